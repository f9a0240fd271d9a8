"""Write a reduced lot to its output folder: lot.nc, sites.csv and (optionally) spectra.nc.

A thin layer between `filmmap.reduce` (the fits) and the files, usable from a
notebook as well as from the command line.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from filmmap.io.results import lot_dataset, spectra_dataset, write_netcdf_atomic
from filmmap.io.sites_csv import write_sites_csv
from filmmap.wafermap.stats import within_wafer_stats
from filmmap.wafermap.surface import tps_loo
from filmmap.wafermap.zernike import noll_to_nm, radial_profile, zernike_fit

SHAPE_FIGURES = {
    "tilt_nm": ("tilt_pv_nm", "nm", "tilt peak-to-valley across the measured diameter, "
                "4 sqrt(a2^2 + a3^2) (Noll 1976 normalisation)"),
    "tilt_sigma_nm": ("tilt_pv_u_nm", "nm", "standard uncertainty of tilt_nm"),
    "tilt_direction_deg": ("tilt_direction_deg", "degree",
                           "direction of increasing thickness, 0 = +x, counter-clockwise"),
    "defocus_nm": ("defocus_nm", "nm", "centre-to-edge figure of the defocus term, 2 sqrt(3) a4; "
                   "> 0 thicker at the edge (bowl), < 0 thicker at the centre (dome)"),
    "defocus_sigma_nm": ("defocus_u_nm", "nm", "standard uncertainty of defocus_nm"),
    "astig_nm": ("astig_pv_nm", "nm", "astigmatism peak-to-valley at the measured radius"),
    "astig_angle_deg": ("astig_angle_deg", "degree", "axis of the thick side of the astigmatism"),
}

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
    dataset: object = None   # the xarray.Dataset written to lot.nc
    view: object = None      # the lot view (filmmap.report.lotview.LotView)
    advice: dict | None = None


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
    """Per-wafer statistics, Zernike shape, radial profile and map trust, added to ``ds``.

    Adds on ``wafer``: ``mean_nm``, ``sigma_nm``, ``nu_pct``, ``min_nm``, ``max_nm``,
    ``range_nm``, ``halfrange_pct``, ``sites_used`` (see `filmmap.wafermap.stats`),
    the shape figures of `SHAPE_FIGURES`, ``map_loo_rms_nm`` (leave-one-out error of
    the interpolated map); on (``wafer``, ``zernike``): ``zernike_nm`` and
    ``zernike_sigma_nm`` (Noll 1976 indexing); on (``wafer``, ``ring``):
    ``radial_mean_nm`` and ``ring_radius_mm``.
    """
    names = ("mean_nm", "sigma_nm", "nu_pct", "min_nm", "max_nm", "range_nm",
             "halfrange_pct", "sites_used")
    W = ds.sizes["wafer"]
    out = {n: np.full(W, np.nan) for n in names}
    shape = {n: np.full(W, np.nan) for n in SHAPE_FIGURES}
    loo = np.full(W, np.nan)
    zern, zern_u, rings = {}, {}, {}
    # bool in memory, int8 0/1 when read back from lot.nc (CF flags): a mask either way
    t, ok = ds["thickness"].values, np.asarray(ds["fit_ok"].values).astype(bool)
    for rows, x, y, present in coordinate_groups(ds["x_mm"].values, ds["y_mm"].values):
        t_g, ok_g = t[rows], ok[rows] & present
        st = within_wafer_stats(t_g, ok_g, x, y, diameter_mm, edge_exclusion_mm)
        for n in names:
            out[n][rows] = getattr(st, n)
        if present.sum() >= 3:
            zf = zernike_fit(t_g, ok_g, x, y, diameter_mm, edge_exclusion_mm)
            for n, (attr, _u, _d) in SHAPE_FIGURES.items():
                shape[n][rows] = getattr(zf, attr)
            for k, r in enumerate(rows):
                zern[r], zern_u[r] = zf.coefficients_nm[k], zf.uncertainty_nm[k]
            loo[rows] = tps_loo(t_g, ok_g, x, y, diameter_mm, edge_exclusion_mm).rms_nm
            rp = radial_profile(t_g, ok_g, x, y, diameter_mm, edge_exclusion_mm)
            for k, r in enumerate(rows):
                rings[r] = (rp.radius_mm, rp.mean_nm[k])
    units = {"sites_used": "1", "nu_pct": "percent", "halfrange_pct": "percent"}
    for n in names:
        values = out[n].astype(int) if n == "sites_used" else out[n]
        ds[n] = ("wafer", values, {"units": units.get(n, "nm"), "long_name":
                                   f"within-wafer {n} over usable sites inside the edge exclusion"})
    for n, (_attr, unit, text) in SHAPE_FIGURES.items():
        ds[n] = ("wafer", shape[n], {"units": unit, "long_name": text})
    ds["map_loo_rms_nm"] = ("wafer", loo, {"units": "nm", "long_name":
                            "leave-one-out rms error of the thin-plate-spline map (Rippa 1999): "
                            "how far to trust the interpolated map between sites"})
    J = max((v.size for v in zern.values()), default=0)
    if J:
        Z = np.full((W, J), np.nan)
        Zu = np.full((W, J), np.nan)
        for r, v in zern.items():
            Z[r, :v.size], Zu[r, :v.size] = v, zern_u[r]
        j = np.arange(1, J + 1)
        nm = [noll_to_nm(k) for k in j]
        ds = ds.assign_coords(zernike=("zernike", j, {"long_name": "Noll index j (Noll 1976)",
                                                      "units": "1"}),
                              zernike_n=("zernike", np.array([a for a, _ in nm]),
                                         {"long_name": "radial order n of Noll index j",
                                          "units": "1"}),
                              zernike_m=("zernike", np.array([b for _, b in nm]),
                                         {"long_name": "azimuthal frequency m of Noll index j "
                                          "(signed: < 0 the sine term)", "units": "1"}))
        ds["zernike_nm"] = (("wafer", "zernike"), Z, {"units": "nm", "long_name":
                            "Zernike coefficient a_j over the unit disk of the measured radius, "
                            "Noll (1976) indexing and normalisation"})
        ds["zernike_sigma_nm"] = (("wafer", "zernike"), Zu, {"units": "nm", "long_name":
                                  "standard uncertainty of zernike_nm"})
    K = max((v[0].size for v in rings.values()), default=0)
    if K:
        R = np.full((W, K), np.nan)
        M = np.full((W, K), np.nan)
        for r, (rad, mean) in rings.items():
            R[r, :rad.size], M[r, :rad.size] = rad, mean
        ds["ring_radius_mm"] = (("wafer", "ring"), R, {"units": "mm", "long_name": "mean radius of the ring"})
        ds["radial_mean_nm"] = (("wafer", "ring"), M, {"units": "nm", "long_name":
                                "mean thickness of the usable sites of each ring (radial profile)"})
    return ds


def write_lot(reduction, outdir, keep_spectra=False, dataset_ready=None):
    """Write lot.nc (and spectra.nc) for a reduced lot; summary files come from the lot view.

    Parameters
    ----------
    reduction : filmmap.reduce.LotReduction
    outdir : str or path-like
        Output folder, created if missing. Every file is written atomically.
    keep_spectra : bool
        Also write spectra.nc with measured and model spectra and residuals.
    dataset_ready : callable(xarray.Dataset), optional
        Called with the lot dataset before the files are written (work that needs only
        the dataset, such as the wafer maps, starts then).

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
    ds = add_wafer_statistics(ds, m.wafer_diameter_mm, m.edge_exclusion_mm)
    if dataset_ready is not None:
        dataset_ready(ds)
    written = WrittenLot(outdir=outdir)
    written.files["lot.nc"] = write_netcdf_atomic(ds, outdir / "lot.nc")
    written.files["sites.csv"] = write_sites_csv(ds, outdir / "sites.csv")
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
