"""The one bridge from the labelled lot dataset to the numpy arrays the kernels take.

The fitting, map and lot-statistics kernels work on plain numpy arrays; the lot is
published and passed between layers as a labelled `xarray.Dataset` (dims ``wafer`` and
``site``, written by `filmmap.io.results.lot_dataset`, stored as ``lot.nc``). Every
layer that needs arrays from that dataset - the lot view (`filmmap.lotstats.view`), the
figures, the reports, the history - reads them here, so the dataset's conventions (the
"not measured" note of a site a wafer lacks, optional variables, dtypes) are decoded in
one place.

This module sits in the foundation layer: it imports numpy only (the dataset is used
through its mapping interface, so xarray is not even imported).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

#: ``fit_note`` of a site a wafer lacks (not a failed fit), as written in lot.nc.
NOT_MEASURED = "not measured"

__all__ = ["NOT_MEASURED", "SiteGrid", "site_grid", "wafer_values", "site_values",
           "config_value"]


def _has(ds, name):
    return name in ds.variables


def wafer_values(ds, name, dtype=float):
    """One per-wafer (or per-site) variable as a numpy array, or None when absent.

    Parameters
    ----------
    ds : xarray.Dataset
        The lot dataset.
    name : str
        Variable or coordinate name.
    dtype : numpy dtype
        Type of the returned array.

    Returns
    -------
    numpy.ndarray or None
    """
    if not _has(ds, name):
        return None
    return np.asarray(ds[name].values, dtype=dtype)


#: Same reading for per-site variables (dims wafer, site).
site_values = wafer_values


def config_value(obj, *names, default=None):
    """``obj.names[0].names[1]...``, or `default` where any link is missing or None.

    The lot view takes the lot configuration or any object with the same attributes (a
    namespace in tests, a record rebuilt from an old output folder), so a missing section
    is not an error.
    """
    for name in names:
        if obj is None:
            return default
        obj = getattr(obj, name, None)
    return default if obj is None else obj


@dataclass(frozen=True)
class SiteGrid:
    """The per-site arrays of a lot, dims (wafer, site), in the dataset's wafer order.

    Attributes
    ----------
    wafer : numpy.ndarray of str, shape (W,)
        Wafer ids.
    slot : numpy.ndarray of int, shape (W,)
        Boat slot of each wafer (1 = load/door end).
    role : numpy.ndarray of str, shape (W,), or None
        ``product``, ``monitor`` or ``dummy`` (lower case) when the dataset records roles.
    site : numpy.ndarray of int, shape (S,)
        Site numbers.
    x_mm, y_mm : numpy.ndarray of float, shape (W, S)
        Site position from the wafer centre, mm (NaN where the wafer lacks the site).
    thickness_nm : numpy.ndarray of float, shape (W, S)
        Fitted thickness of the top fitted layer, nm (NaN where not accepted).
    fit_ok : numpy.ndarray of bool, shape (W, S)
        Fit accepted.
    fit_note : numpy.ndarray of str, shape (W, S)
        Why a fit is not accepted, or a note on an accepted one; `NOT_MEASURED` where the
        wafer lacks the site.
    measured : numpy.ndarray of bool, shape (W, S)
        The wafer has the site (``fit_note != NOT_MEASURED``).
    fit_quality : numpy.ndarray of float, shape (W, S)
        Reduced chi-square (NaN when the dataset has none).
    suspect : numpy.ndarray of bool, shape (W, S)
        Accepted fit flagged as suspect (all False when the dataset has no flags).
    thickness_unchecked_nm : numpy.ndarray of float, shape (W, S), or None
        The fit's best thickness whatever its verdict (only with the fit's inspection data).
    """

    wafer: np.ndarray
    slot: np.ndarray
    role: np.ndarray | None
    site: np.ndarray
    x_mm: np.ndarray
    y_mm: np.ndarray
    thickness_nm: np.ndarray
    fit_ok: np.ndarray
    fit_note: np.ndarray
    measured: np.ndarray
    fit_quality: np.ndarray
    suspect: np.ndarray
    thickness_unchecked_nm: np.ndarray | None

    @property
    def shape(self):
        """(wafers, sites)."""
        return self.fit_ok.shape

    def wafer_index(self):
        """``{wafer id: row}``."""
        return {str(w): i for i, w in enumerate(self.wafer)}

    def site_index(self):
        """``{site number: column}``."""
        return {int(s): j for j, s in enumerate(self.site)}


def site_grid(ds):
    """Decode the per-site arrays of a lot dataset.

    Parameters
    ----------
    ds : xarray.Dataset
        The lot dataset with at least ``wafer``, ``slot``, ``fit_ok`` and ``fit_note``;
        ``thickness``, ``x_mm``, ``y_mm``, ``site``, ``role``, ``fit_quality``, ``suspect``
        and ``thickness_unchecked`` are read when present.

    Returns
    -------
    SiteGrid
    """
    fit_ok = np.asarray(ds["fit_ok"].values, dtype=bool)
    shape = fit_ok.shape
    note = np.asarray(ds["fit_note"].values).astype(str)
    nan = np.full(shape, math.nan)

    def grid(name):
        v = site_values(ds, name)
        return nan.copy() if v is None else v

    role = None
    if _has(ds, "role"):
        role = np.array([str(r).strip().lower() for r in ds["role"].values], dtype=object)
    site = wafer_values(ds, "site", int)
    suspect = site_values(ds, "suspect")
    return SiteGrid(
        wafer=np.array([str(w) for w in ds["wafer"].values], dtype=object),
        slot=np.asarray(ds["slot"].values).astype(int),
        role=role,
        site=np.arange(1, shape[1] + 1) if site is None else site,
        x_mm=grid("x_mm"), y_mm=grid("y_mm"), thickness_nm=grid("thickness"),
        fit_ok=fit_ok, fit_note=note, measured=note != NOT_MEASURED,
        fit_quality=grid("fit_quality"),
        suspect=np.zeros(shape, bool) if suspect is None else suspect != 0,
        thickness_unchecked_nm=site_values(ds, "thickness_unchecked"))
