"""The data files of a reduced lot: lot.nc, sites.csv and (optionally) spectra.nc.

`write_lot` builds the labelled lot dataset (`filmmap.io.results.lot_dataset`) with the
per-wafer analysis (`filmmap.pipeline.wafer_analysis`) and writes its files, each
atomically, into the folder it is given - the staging folder of
`filmmap.pipeline.publishing.staged_output` in a reduce.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from filmmap.io.results import lot_dataset, spectra_dataset, write_netcdf_atomic
from filmmap.io.sites_csv import write_sites_csv
from filmmap.lotstats.causes import count_causes
from filmmap.lotstats.roles import roles_from_boat
from filmmap.pipeline.wafer_analysis import add_wafer_statistics


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
    view: object = None      # the lot view (filmmap.lotstats.view.LotView)
    advice: dict | None = None


def wafer_roles(config, wafer_ids, wafer_slots):
    """'dummy', 'monitor' or 'product' for each wafer, from the lot file's [boat]."""
    roles = roles_from_boat(wafer_slots, config.boat)
    return dict(zip(wafer_ids, roles.tolist()))


def write_lot(reduction, outdir, keep_spectra=False, dataset_ready=None):
    """Write lot.nc (and spectra.nc) for a reduced lot; summary files come from the lot view.

    Parameters
    ----------
    reduction : filmmap.pipeline.reducing.LotReduction
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
    written.failures = count_causes(s.note[~s.ok])
    written.dataset = ds
    return written
