"""Write a reduced lot to its output folder: lot.nc, summary.csv and (optionally) spectra.nc.

A thin layer between `filmmap.reduce` (the fits) and the files, usable from a
notebook as well as from the command line.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from filmmap.io.results import lot_dataset, spectra_dataset, write_csv_atomic, write_netcdf_atomic
from filmmap.wafermap.stats import within_wafer_stats

SUMMARY_COLUMNS = ["wafer", "slot", "role", "sites_measured", "sites_fit_ok", "sites_used",
                   "mean_nm", "sigma_nm", "nu_pct", "min_nm", "max_nm", "range_nm",
                   "halfrange_pct"]


@dataclass
class WrittenLot:
    """Paths and headline figures of a written lot."""

    outdir: Path
    files: dict = field(default_factory=dict)
    n_wafers: int = 0
    n_sites: int = 0
    n_failed: int = 0
    mean_nm: float = float("nan")
    failures: dict = field(default_factory=dict)


def wafer_roles(config, wafer_ids, wafer_slots):
    """'dummy', 'monitor' or 'product' for each wafer, from the lot file's [boat]."""
    boat = config.boat
    dummies = set(boat.dummy_slots) if boat is not None else set()
    monitors = set(getattr(boat, "monitor_slots", ()) or ()) if boat is not None else set()
    return {w: ("dummy" if s in dummies else "monitor" if s in monitors else "product")
            for w, s in zip(wafer_ids, wafer_slots)}


def coordinate_groups(x_mm, y_mm):
    """Group wafers that share one site layout.

    Parameters
    ----------
    x_mm, y_mm : numpy.ndarray (n_wafers, n_sites)
        Site coordinates per wafer, NaN where a wafer lacks the site.

    Yields
    ------
    rows : numpy.ndarray of int
        Wafers of the group.
    x, y : numpy.ndarray (n_sites,)
        Their shared coordinates (missing sites at 0, to be masked by the caller).
    present : numpy.ndarray (n_sites,) of bool
        Sites the group has.
    """
    key = np.nan_to_num(np.stack([x_mm, y_mm], axis=1), nan=np.inf)
    _, inverse = np.unique(key.reshape(key.shape[0], -1), axis=0, return_inverse=True)
    for g in np.unique(inverse):
        rows = np.nonzero(inverse.ravel() == g)[0]
        x, y = x_mm[rows[0]], y_mm[rows[0]]
        present = np.isfinite(x) & np.isfinite(y)
        yield rows, np.where(present, x, 0.0), np.where(present, y, 0.0), present


def add_wafer_statistics(ds, diameter_mm, edge_exclusion_mm):
    """Per-wafer within-wafer statistics as variables on the ``wafer`` dim (in place)."""
    names = ("mean_nm", "sigma_nm", "nu_pct", "min_nm", "max_nm", "range_nm",
             "halfrange_pct", "sites_used")
    out = {n: np.full(ds.sizes["wafer"], np.nan) for n in names}
    t, ok = ds["thickness"].values, ds["fit_ok"].values
    for rows, x, y, present in coordinate_groups(ds["x_mm"].values, ds["y_mm"].values):
        st = within_wafer_stats(t[rows], ok[rows] & present, x, y, diameter_mm, edge_exclusion_mm)
        for n in names:
            out[n][rows] = getattr(st, n)
    units = {"sites_used": "1", "nu_pct": "percent", "halfrange_pct": "percent"}
    for n in names:
        values = out[n].astype(int) if n == "sites_used" else out[n]
        ds[n] = ("wafer", values, {"units": units.get(n, "nm"), "long_name":
                                   f"within-wafer {n} over usable sites inside the edge exclusion"})
    return ds


def write_lot(reduction, outdir, keep_spectra=False):
    """Write lot.nc and summary.csv (and spectra.nc) for a reduced lot.

    Parameters
    ----------
    reduction : filmmap.reduce.LotReduction
    outdir : str or path-like
        Output folder, created if missing. Every file is written atomically.
    keep_spectra : bool
        Also write spectra.nc with measured and model spectra and residuals.

    Returns
    -------
    WrittenLot
    """
    outdir = Path(outdir)
    outdir.mkdir(parents=True, exist_ok=True)
    s = reduction.sites
    ids, first = np.unique(s.wafer, return_index=True)
    roles = wafer_roles(reduction.config, ids, s.slot[first])
    ds = lot_dataset(reduction, roles)
    m = reduction.config.measurement
    add_wafer_statistics(ds, m.wafer_diameter_mm, m.edge_exclusion_mm)
    written = WrittenLot(outdir=outdir)
    written.files["lot.nc"] = write_netcdf_atomic(ds, outdir / "lot.nc")
    rows = []
    measured = (ds["fit_note"] != "not measured").sum("site").values
    fit_ok = ds["fit_ok"].sum("site").values
    for i, w in enumerate(ds.wafer.values):
        rows.append([w, int(ds.slot.values[i]), str(ds.role.values[i]), int(measured[i]),
                     int(fit_ok[i])] + [_fmt(ds[c].values[i]) for c in SUMMARY_COLUMNS[5:]])
    written.files["summary.csv"] = write_csv_atomic(outdir / "summary.csv", SUMMARY_COLUMNS, rows)
    if keep_spectra and s.measured_spectra is not None:
        written.files["spectra.nc"] = write_netcdf_atomic(spectra_dataset(reduction, ds),
                                                          outdir / "spectra.nc")
    written.n_wafers = int(ds.sizes["wafer"])
    written.n_sites = int(s.ok.size)
    written.n_failed = int((~s.ok).sum())
    written.mean_nm = float(np.nanmean(s.values[:, 0])) if s.ok.any() else float("nan")
    reasons, counts = np.unique([r.split(":")[0] for r in s.note[~s.ok]], return_counts=True)
    written.failures = dict(zip(reasons.tolist(), counts.tolist()))
    written.dataset = ds
    return written


def _fmt(v):
    if isinstance(v, (int, np.integer)):
        return int(v)
    v = float(v)
    return "" if not np.isfinite(v) else f"{v:.4f}"
