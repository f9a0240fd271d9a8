"""sites.csv: one row per measured site, from a lot dataset (in memory or read from lot.nc).

Columns `SITES_CSV_COLUMNS`, in this order:

- ``lot_id``, ``wafer``, ``slot`` (1 = load/door end), ``role`` (product, monitor
  or dummy), ``site`` (site number), ``x_mm``, ``y_mm`` (mm from the wafer centre,
  notch toward -y);
- ``thickness_nm`` and ``sigma_nm``: the fitted thickness of the top fitted layer
  and its total standard uncertainty (lot.nc ``thickness`` and
  ``thickness_sigma``), nm, 4 decimals, empty where the fit was rejected;
- ``fit_ok``, ``suspect``: ``true`` / ``false``;
- ``reason``: why the fit was rejected or is suspect (lot.nc ``fit_note``; empty
  when neither).

Sites a wafer does not have (``not measured`` in lot.nc) are left out. Rows go
wafer by wafer in lot.nc order (boat order), sites in number order.
"""

from __future__ import annotations

import numpy as np

from filmmap.bridge import site_grid, site_values
from filmmap.io.results import write_csv_atomic

SITES_CSV_COLUMNS = ("lot_id", "wafer", "slot", "role", "site", "x_mm", "y_mm", "thickness_nm",
                     "sigma_nm", "fit_ok", "suspect", "reason")


def _num(v, digits=4):
    v = float(v)
    return f"{v:.{digits}f}" if np.isfinite(v) else ""


def site_rows(ds):
    """Header and rows of sites.csv.

    Parameters
    ----------
    ds : xarray.Dataset
        A lot dataset (`filmmap.io.results.lot_dataset` or lot.nc read back), with
        ``thickness``, ``thickness_sigma``, ``fit_ok``, ``fit_note``, ``x_mm``,
        ``y_mm``, ``slot`` (``role``, ``suspect`` optional).

    Returns
    -------
    (list of str, list of list of str)
    """
    lot_id = str(ds.attrs.get("lot_id", ""))
    g = site_grid(ds)   # lot.nc stores fit_ok as int8 0/1 (CF flags): the bridge decodes it
    t, ok, suspect, note, x, y = (g.thickness_nm, g.fit_ok, g.suspect, g.fit_note, g.x_mm,
                                  g.y_mm)
    u = site_values(ds, "thickness_sigma")
    wafers, slots, sites = [str(w) for w in g.wafer], g.slot.tolist(), g.site.tolist()
    roles = g.role.tolist() if g.role is not None else ["product"] * len(wafers)
    rows = []
    for i, w in enumerate(wafers):
        for j, site in enumerate(sites):
            if not g.measured[i, j]:
                continue
            rows.append([lot_id, w, str(slots[i]), roles[i], str(site), _num(x[i, j], 3),
                         _num(y[i, j], 3), _num(t[i, j]) if ok[i, j] else "",
                         _num(u[i, j]) if ok[i, j] else "", "true" if ok[i, j] else "false",
                         "true" if suspect[i, j] else "false", note[i, j]])
    return list(SITES_CSV_COLUMNS), rows


def write_sites_csv(ds, path):
    """Write sites.csv (`site_rows`) atomically to ``path``; return the path."""
    header, rows = site_rows(ds)
    return write_csv_atomic(path, header, rows)
