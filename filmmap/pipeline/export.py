"""Tables from an existing lot.nc: sites.csv, summary.csv and (from spectra.nc) spectra.csv.

    from filmmap.pipeline.export import export_lot
    export_lot("results/lot.nc", "tables/")

What the reduce wrote is rebuilt, not recomputed: the lot view comes from lot.nc
(its data and its ``lot_setup`` attribute: target, boat, zones) and, when it lies
beside lot.nc, from advice.json (the boat-model verdicts); no spectrum is fitted
again. The output folder is published whole (`filmmap.pipeline.publishing`), and never
one that holds lot.nc (replacing it would delete the input).
"""

from __future__ import annotations

import json
from pathlib import Path
from types import SimpleNamespace

import numpy as np
import xarray as xr

from filmmap.bridge import site_grid, wafer_values
from filmmap.errors import FilmmapInputError
from filmmap.io.results import write_csv_atomic
from filmmap.io.sites_csv import write_sites_csv
from filmmap.lotstats.view import DEFAULT_MIN_SITES, lot_view, with_boat_model
from filmmap.pipeline.guard import check_outputs_spare_inputs
from filmmap.pipeline.publishing import staged_output
from filmmap.report.summary_json import write_summary_csv

SPECTRA_CSV_COLUMNS = ("lot_id", "wafer", "slot", "site", "quantity", "wavelength_nm", "measured",
                       "model", "residual")
"""Columns of spectra.csv (long format: one row per site, quantity and wavelength)."""


def _config_from_attrs(ds, path):
    """A lot-file stand-in (what `lot_view` reads) from lot.nc's attributes."""
    try:
        setup = json.loads(ds.attrs.get("lot_setup", "null"))
    except ValueError:
        raise FilmmapInputError("the lot_setup attribute is not JSON; expected the one filmmap "
                                "reduce writes", file=path, field="lot_setup") from None
    setup = setup or {}
    target = setup.get("target")
    boat = setup.get("boat")
    return SimpleNamespace(
        lot=SimpleNamespace(id=ds.attrs.get("lot_id", ""), furnace=ds.attrs.get("furnace", ""),
                            run_date=ds.attrs.get("run_date", "")),
        target=None if target is None else SimpleNamespace(**target),
        boat=None if boat is None else SimpleNamespace(
            slots=boat["slots"], dummy_slots=tuple(boat["dummy_slots"]),
            monitor_slots=tuple(boat["monitor_slots"])),
        furnace=SimpleNamespace(zones=tuple(
            SimpleNamespace(name=n, first_slot=a, last_slot=b)
            for n, a, b in setup.get("zones", ()))),
        measurement=SimpleNamespace(wafer_diameter_mm=float(ds.attrs["wafer_diameter_mm"]),
                                    edge_exclusion_mm=float(ds.attrs["edge_exclusion_mm"])))


def open_lot(lot_nc):
    """lot.nc read into memory, with a clear error when it is not one.

    Raises
    ------
    FilmmapInputError
        Not readable as netCDF, or lacking the variables the tables need.
    """
    lot_nc = Path(lot_nc)
    if not lot_nc.is_file():
        raise FilmmapInputError("no such file; expected a lot.nc written by filmmap reduce",
                                file=lot_nc)
    try:
        with xr.open_dataset(lot_nc) as ds:
            ds = ds.load()
    except (OSError, ValueError) as exc:
        raise FilmmapInputError(f"cannot read as netCDF ({exc}); expected a lot.nc written by "
                                "filmmap reduce", file=lot_nc) from None
    missing = [v for v in ("thickness", "thickness_sigma", "fit_ok", "fit_note", "x_mm", "y_mm",
                           "slot", "mean_nm", "sites_used") if v not in ds.variables]
    missing += [a for a in ("lot_id", "wafer_diameter_mm", "edge_exclusion_mm")
                if a not in ds.attrs]
    if missing:
        raise FilmmapInputError(f"lacks {', '.join(missing)}; expected a lot.nc written by "
                                "filmmap reduce", file=lot_nc)
    return ds


def spectra_rows(spectra_ds, lot_ds):
    """Header and rows of the long-format spectra.csv.

    Parameters
    ----------
    spectra_ds : xarray.Dataset
        spectra.nc (``measured``, ``model``, ``residual`` on wafer, site, point).
    lot_ds : xarray.Dataset
        lot.nc (for the lot id, slots and which sites were measured).

    Returns
    -------
    (list of str, list of list of str)
        Rows per wafer, site, point; sites without a spectrum left out; values with
        ``repr`` precision (the file is for analysis, not display).
    """
    lot_id = str(lot_ds.attrs.get("lot_id", ""))
    grid = site_grid(lot_ds)
    slot = dict(zip(grid.wafer, grid.slot.tolist()))
    meas, model, resid = (wafer_values(spectra_ds, v) for v in ("measured", "model", "residual"))
    wl = wafer_values(spectra_ds, "wavelength_nm")
    quantity = wafer_values(spectra_ds, "quantity", str).tolist()
    rows = []
    for i, w in enumerate(wafer_values(spectra_ds, "wafer", str).tolist()):
        for j, site in enumerate(wafer_values(spectra_ds, "site", int).tolist()):
            if not np.any(np.isfinite(meas[i, j])):
                continue
            for k in range(wl.size):
                rows.append([lot_id, w, str(slot.get(w, "")), str(site), quantity[k],
                             repr(float(wl[k])), repr(float(meas[i, j, k])),
                             repr(float(model[i, j, k])), repr(float(resid[i, j, k]))])
    return list(SPECTRA_CSV_COLUMNS), rows


def export_lot(lot_nc, outdir):
    """Write sites.csv and summary.csv (and spectra.csv) of an existing lot.nc into ``outdir``.

    Parameters
    ----------
    lot_nc : path-like
        lot.nc written by ``filmmap reduce``; advice.json and spectra.nc beside it are
        used when present.
    outdir : path-like
        Output folder, published whole; new, empty or an earlier filmmap output folder.

    Returns
    -------
    dict {name: path}
        The files written (paths inside ``outdir``).

    Raises
    ------
    FilmmapInputError
        A missing or foreign lot.nc, an unreadable advice.json, or an output folder that
        holds the inputs.
    """
    lot_nc = Path(lot_nc).absolute()
    folder = lot_nc.parent
    advice_path, spectra_path = folder / "advice.json", folder / "spectra.nc"
    inputs = [("lot.nc", lot_nc)] + [(p.name, p) for p in (advice_path, spectra_path)
                                     if p.is_file()]
    check_outputs_spare_inputs([Path(outdir).absolute()], inputs)
    ds = open_lot(lot_nc)
    advice = None
    if advice_path.is_file():
        try:
            advice = json.loads(advice_path.read_text(encoding="utf-8"))
        except (OSError, ValueError) as exc:
            raise FilmmapInputError(f"cannot read advice.json ({exc}); expected the one filmmap "
                                    "reduce wrote, or none", file=advice_path) from None
    # the same view the reduce built: its minimum sites, its boat-model verdicts
    view = with_boat_model(lot_view(ds, _config_from_attrs(ds, lot_nc),
                                    min_sites=DEFAULT_MIN_SITES), advice)
    spectra = None
    if spectra_path.is_file():
        try:
            with xr.open_dataset(spectra_path) as sp:
                spectra = sp.load()
        except (OSError, ValueError) as exc:
            raise FilmmapInputError(f"cannot read as netCDF ({exc})", file=spectra_path) from None
    written = {}
    with staged_output(outdir) as stage:
        write_sites_csv(ds, stage / "sites.csv")
        write_summary_csv(view, stage / "summary.csv")
        written = {"sites.csv": None, "summary.csv": None}
        if spectra is not None:
            header, rows = spectra_rows(spectra, ds)
            write_csv_atomic(stage / "spectra.csv", header, rows)
            written["spectra.csv"] = None
    out = Path(outdir).absolute()
    return {name: out / name for name in written}
