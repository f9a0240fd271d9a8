"""Results on disk: the labelled lot dataset (lot.nc) and the per-wafer summary.csv."""

from __future__ import annotations

import csv
import datetime as _dt
import io
import json
import os
from pathlib import Path

import numpy as np
import xarray as xr

from filmmap import __version__
from filmmap.atomic import write_bytes_atomic, write_text_atomic
from filmmap.io.cf import cf_encode

FIT_QUALITY_DEFINITION = ("reduced chi-square: sum(w r^2) / (points - parameters), w = 1/sigma^2 "
                          "from the noise model; about 1 when the model explains the data to the noise")


SIGMA_DEFINITION = ("sqrt(diag(C)), C = (J^T W J + priors)^-1 the covariance of the fit with the "
                    "instrument systematics marginalised; times the reduced chi-square when that "
                    "exceeds 1 with at least 20 degrees of freedom")

_PARAMETER_UNITS = {"thickness": "nm", "offset": "1", "scale": "1", "wavelength_shift": "nm",
                    "angle_offset": "degree", "cauchy_A": "1", "cauchy_B": "um2",
                    "index_scale": "1"}
"""Units of the fitted parameters (reflectance is a fraction, unit "1")."""


def _layer_var(name, top):
    """Variable name of a fitted parameter: 'thickness' for the top fitted layer."""
    if name == top:
        return "thickness"
    if name.startswith("thickness[") and name.endswith("]"):
        return "thickness_" + name[len("thickness["):-1]
    if name in ("offset", "scale"):
        return f"reflectance_{name}"
    return name.replace("[", "_").replace("]", "")


def lot_dataset(reduction, roles=None):
    """Labelled dataset of a reduced lot, dims (wafer, site).

    Parameters
    ----------
    reduction : filmmap.pipeline.reducing.LotReduction
    roles : dict {wafer: role}, optional
        'product', 'monitor' or 'dummy' per wafer.

    Returns
    -------
    xarray.Dataset
        ``thickness`` / ``thickness_sigma`` (nm, the top fitted layer), one
        ``thickness_<layer>`` pair per further fitted layer, ``fit_quality``,
        ``fit_ok``, ``fit_note``, ``rms_residual``, ``iterations``; coordinates
        ``wafer``, ``slot`` (on wafer), ``site``, ``x_mm``, ``y_mm`` (on wafer, site).
        Sites a wafer lacks are NaN with ``fit_ok`` false and note "not measured".
    """
    s = reduction.sites
    config = reduction.config
    # wafers in boat order, then by id
    wafer_ids, first_idx, wafer_of_row = np.unique(s.wafer, return_index=True, return_inverse=True)
    wafer_slot = s.slot[first_idx]
    order = np.lexsort((wafer_ids, wafer_slot))
    wafer_ids, wafer_slot = wafer_ids[order], wafer_slot[order]
    rank = np.empty_like(order)
    rank[order] = np.arange(order.size)
    rows = rank[wafer_of_row.ravel()]
    site_ids, cols = np.unique(s.site, return_inverse=True)
    cols = cols.ravel()
    shape = (wafer_ids.size, site_ids.size)

    def grid(values, fill, dtype=float):
        out = np.full(shape, fill, dtype=dtype)
        out[rows, cols] = values
        return out

    top = next((n for n in s.names if n.startswith("thickness[")), s.names[0])
    data_vars = {}
    for k, name in enumerate(s.names):
        var = _layer_var(name, top)
        unit = _PARAMETER_UNITS.get(name.split("[")[0], "1")
        data_vars[var] = (("wafer", "site"), grid(s.values[:, k], np.nan),
                          {"units": unit, "long_name": f"fitted {name}",
                           "note": "NaN where the fit is not ok (see fit_note)"})
        data_vars[var + "_sigma"] = (("wafer", "site"), grid(s.sigma[:, k], np.nan),
                                     {"units": unit, "long_name": f"total standard uncertainty of {name}",
                                      "definition": SIGMA_DEFINITION})
        if s.sigma_stat is not None and name.startswith("thickness"):
            data_vars[var + "_sigma_stat"] = (
                ("wafer", "site"), grid(s.sigma_stat[:, k], np.nan),
                {"units": unit, "long_name": f"statistical part of the uncertainty of {name}",
                 "definition": "from the noise alone, instrument systematics held at their "
                               "fitted values"})
        if s.unchecked is not None:
            data_vars[var + "_unchecked"] = (
                ("wafer", "site"), grid(s.unchecked[:, k], np.nan),
                {"units": unit, "long_name": f"best value of {name} found by the fit, whatever "
                 "its verdict", "note": "for inspection of rejected sites only; not a result"})
    if s.correlation is not None and len(s.names) > 1:
        P = len(s.names)
        corr = np.full(shape + (P, P), np.nan)
        corr[rows, cols] = s.correlation
        data_vars["parameter_correlation"] = (
            ("wafer", "site", "parameter", "parameter_b"), corr,
            {"units": "1", "long_name": "correlation of the fitted parameters at each site",
             "definition": "C_ij / sqrt(C_ii C_jj), C the covariance of the regularised fit"})
    if s.suspect is not None:
        data_vars["suspect"] = (("wafer", "site"), grid(s.suspect.astype(np.int8), 0, np.int8),
                                {"units": "1", "long_name": "accepted fit far worse than the "
                                 "lot's typical one (see fit_note)", "flag_values": np.array(
                                     [0, 1], dtype=np.int8), "flag_meanings": "normal suspect"})
    data_vars["fit_quality"] = (("wafer", "site"), grid(s.reduced_chi2, np.nan),
                                {"units": "1", "long_name": "reduced chi-square",
                                 "definition": FIT_QUALITY_DEFINITION})
    data_vars["rms_residual"] = (("wafer", "site"), grid(s.rms_residual, np.nan),
                                 {"units": "1" if config.measurement.technique == "reflectance"
                                  else "degree", "long_name": "root-mean-square residual"})
    data_vars["iterations"] = (("wafer", "site"), grid(s.iterations, -1, int),
                               {"units": "1", "long_name": "Levenberg-Marquardt iterations"})
    data_vars["fit_ok"] = (("wafer", "site"), grid(s.ok, False, bool),
                           {"units": "1", "long_name": "fit accepted"})
    note = np.full(shape, "not measured", dtype=object)
    note[rows, cols] = s.note
    data_vars["fit_note"] = (("wafer", "site"), note.astype(str),
                             {"units": "1", "long_name": "why the fit is not ok ('' when ok)"})
    coords = {
        "wafer": ("wafer", wafer_ids.astype(str), {"long_name": "wafer id"}),
        "site": ("site", site_ids.astype(int), {"long_name": "site number", "units": "1"}),
        "slot": ("wafer", wafer_slot.astype(int), {"long_name": "boat slot, 1 = load/door end",
                                                    "units": "1"}),
        "x_mm": (("wafer", "site"), grid(s.x_mm, np.nan), {"units": "mm",
                                                           "long_name": "site x from wafer centre"}),
        "y_mm": (("wafer", "site"), grid(s.y_mm, np.nan),
                 {"units": "mm", "long_name": "site y from wafer centre, notch toward -y"}),
    }
    if s.correlation is not None and len(s.names) > 1:
        coords["parameter"] = ("parameter", np.array(s.names).astype(str),
                               {"long_name": "fitted parameter"})
        coords["parameter_b"] = ("parameter_b", np.array(s.names).astype(str),
                                 {"long_name": "fitted parameter (second index)"})
    if roles is not None:
        coords["role"] = ("wafer", np.array([roles.get(w, "product") for w in wafer_ids]).astype(str),
                          {"long_name": "product, monitor or dummy"})
    m = config.measurement
    attrs = {
        "title": f"filmmap thickness results for lot {config.lot.id}",
        "lot_id": config.lot.id,
        "furnace": config.lot.furnace or "",
        "run_date": str(config.lot.run_date or ""),
        "technique": m.technique,
        "angle_deg": float(m.angle_deg),
        "wafer_diameter_mm": float(m.wafer_diameter_mm),
        "edge_exclusion_mm": float(m.edge_exclusion_mm),
        "stack": "\n".join(reduction.stack.describe()),
        "fitted_parameters": json.dumps(s.names),
        "software": f"filmmap {__version__}",
        # relative to the lot folder: the record means the same on another machine
        "input_files_sha256": json.dumps([{"file": lot_relative(f, config.path), "sha256": h}
                                          for f, h in reduction.inputs]),
        "created": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
        "wavelength_range_nm": json.dumps([float(reduction.wavelength_nm[0]),
                                           float(reduction.wavelength_nm[-1])]),
        # what the lot view needs besides the data, so `filmmap export` can rebuild
        # summary.csv from lot.nc alone (JSON text: netCDF attributes hold no nesting)
        "lot_setup": json.dumps(lot_setup(config)),
    }
    return xr.Dataset(data_vars, coords=coords, attrs=attrs)


def lot_setup(config):
    """Target, boat and zones of a lot file as plain data (the ``lot_setup`` attribute).

    Returns
    -------
    dict
        ``target`` ({thickness_nm, tolerance_pct} or None), ``boat`` ({slots,
        dummy_slots, monitor_slots} or None), ``zones`` ([[name, first_slot,
        last_slot], ...]).
    """
    t, b = config.target, config.boat
    zones = getattr(config.furnace, "zones", ()) if config.furnace is not None else ()
    return {
        "target": None if t is None else {"thickness_nm": float(t.thickness_nm),
                                          "tolerance_pct": float(t.tolerance_pct)},
        "boat": None if b is None else {"slots": int(b.slots),
                                        "dummy_slots": [int(v) for v in b.dummy_slots],
                                        "monitor_slots": [int(v) for v in
                                                          (getattr(b, "monitor_slots", ()) or ())]},
        "zones": [[str(z.name), int(z.first_slot), int(z.last_slot)] for z in zones or ()],
    }


def lot_relative(path, lot_file):
    """``path`` relative to the folder of ``lot_file`` (POSIX separators, ``..`` where outside).

    Parameters
    ----------
    path, lot_file : str or path-like

    Returns
    -------
    str
    """
    folder = Path(lot_file).absolute().parent
    return Path(os.path.relpath(Path(path).absolute(), folder)).as_posix()


def spectra_dataset(reduction, lot_ds):
    """Measured and model spectra with residuals, dims (wafer, site, point), for inspection.

    Reflectance is a fraction (units "1"); psi and delta are in degrees (both
    quantities of an ellipsometer share the unit, so one ``units`` fits the
    ``point`` axis); ``quantity`` names what each point holds.
    """
    s = reduction.sites
    wi = {w: i for i, w in enumerate(lot_ds.wafer.values)}
    sj = {v: j for j, v in enumerate(lot_ds.site.values)}
    rows = np.array([wi[w] for w in s.wafer])
    cols = np.array([sj[v] for v in s.site])
    M = s.measured_spectra.shape[1]
    meas = np.full((lot_ds.sizes["wafer"], lot_ds.sizes["site"], M), np.nan)
    model = meas.copy()
    meas[rows, cols] = s.measured_spectra
    model[rows, cols] = s.model_spectra
    wl = reduction.wavelength_nm
    quantity = (["R"] * wl.size if M == wl.size else ["psi"] * wl.size + ["delta"] * wl.size)
    point_wl = np.tile(wl, M // wl.size)
    resid = meas - model
    if M != wl.size:
        resid[..., wl.size:] = np.mod(resid[..., wl.size:] + 180.0, 360.0) - 180.0
    unit = "1" if M == wl.size else "degree"
    dims = ("wafer", "site", "point")
    attrs = {k: lot_ds.attrs[k] for k in ("lot_id", "software", "created") if k in lot_ds.attrs}
    return xr.Dataset(
        {"measured": (dims, meas, {"units": unit, "long_name": "measured spectrum (reflectance "
                                   "fraction, or psi then delta)"}),
         "model": (dims, model, {"units": unit, "long_name": "model spectrum at the unchecked "
                                 "best fit"}),
         "residual": (dims, resid, {"units": unit, "long_name": "measured minus model (delta "
                                    "wrapped to [-180, 180) degree)"})},
        coords={"wafer": ("wafer", lot_ds.wafer.values, dict(lot_ds.wafer.attrs)),
                "site": ("site", lot_ds.site.values, dict(lot_ds.site.attrs)),
                "wavelength_nm": ("point", point_wl, {"units": "nm", "long_name": "wavelength"}),
                "quantity": ("point", np.array(quantity), {"long_name": "what the point holds: "
                                                            "R, psi or delta"})},
        attrs={"title": f"filmmap spectra for lot {attrs.get('lot_id', '')}", **attrs,
               "note": "R as a fraction; psi and delta in degrees; model at the unchecked best fit"})


def write_netcdf_atomic(ds, path):
    """Write a dataset as NetCDF4 (through h5netcdf), atomically.

    The file is built in memory and written by Python: when a write fails (a full disk, a
    file-size limit), the HDF5 library left holding a half-written file was seen to crash
    the whole process at exit, after filmmap had reported the error; Python's own write
    raises a plain OSError that names the file and leaves nothing behind.
    """
    ds, encoding = cf_encode(ds)
    with _local_scheduler():
        data = bytes(ds.to_netcdf(engine="h5netcdf", encoding=encoding))
    write_bytes_atomic(path, data)
    return path


def _local_scheduler():
    """A context in which xarray takes a local write lock, even inside a Dask worker.

    The arrays are in memory already; on a Dask distributed worker xarray would ask the
    cluster for a lock named after the in-memory target, which the cluster cannot make.
    """
    import contextlib

    try:
        import dask
    except ImportError:
        return contextlib.nullcontext()
    return dask.config.set(scheduler="synchronous")


def write_csv_atomic(path, header, rows):
    """Write rows (sequences) under a header as UTF-8 CSV, atomically."""
    buf = io.StringIO()
    writer = csv.writer(buf, lineterminator="\n")
    writer.writerow(header)
    writer.writerows(rows)
    return write_text_atomic(path, buf.getvalue())
