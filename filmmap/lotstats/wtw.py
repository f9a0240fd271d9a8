"""Wafer-to-wafer (WTW) statistics of one furnace lot, over its product wafers.

A lot is given as per-wafer arrays (one entry per wafer in the boat): wafer id,
slot, role, wafer mean thickness and wafer sigma. Roles:

``product``
    Wafers that are shipped; the only ones in the lot figures.
``monitor``
    Test wafers run with the lot. They are listed (so their thickness can be
    read) and marked ``counted=False``, but they are left out of the grand
    mean, WTW NU %, range, min/max and in-spec count: they may be a different
    substrate or pre-treatment and are often placed on purpose in unusual
    positions, so they do not stand for what is shipped.
``dummy``
    Filler wafers at the ends of the boat (common practice, no source). They
    are neither listed nor counted.

A wafer whose mean is NaN (too few usable sites on the wafer) is left out of
every figure and counted in ``n_missing``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from filmmap.errors import FilmmapInputError
from filmmap.lotstats.roles import ROLES
from filmmap.lotstats.uniformity import percent_of_mean


# Relative slack on spec limits so that a mean exactly on the limit (up to float
# rounding) counts as in spec.
_SPEC_SLACK = 1e-9


@dataclass(frozen=True)
class LotArrays:
    """Checked per-wafer arrays of one lot (see `check_lot`).

    Parameters
    ----------
    wafer_id : numpy.ndarray of str
        Wafer identifiers (unique).
    slot : numpy.ndarray of int
        Boat slot of each wafer (unique, >= 1; 1 = load/door end).
    role : numpy.ndarray of str
        ``"product"``, ``"monitor"`` or ``"dummy"`` (lower case).
    mean_nm : numpy.ndarray of float
        Wafer mean thickness in nm (NaN = too few usable sites).
    sigma_nm : numpy.ndarray of float
        Wafer sigma (within-wafer standard deviation) in nm, NaN allowed.
    """

    wafer_id: np.ndarray
    slot: np.ndarray
    role: np.ndarray
    mean_nm: np.ndarray
    sigma_nm: np.ndarray


def check_lot(wafer_id, slot, role, mean_nm, sigma_nm, boat_size=None):
    """Check and normalise the per-wafer arrays of a lot.

    Parameters
    ----------
    wafer_id : array_like of str
        Wafer identifiers, unique within the lot.
    slot : array_like of int
        Boat slot of each wafer, 1 = load/door end, higher = toward the gas
        source end; unique (one wafer per slot).
    role : array_like of str
        ``"product"``, ``"monitor"`` or ``"dummy"`` (case and surrounding
        blanks ignored).
    mean_nm : array_like of float
        Wafer mean thickness in nm; NaN when the wafer has too few usable sites.
    sigma_nm : array_like of float
        Wafer sigma in nm; NaN allowed.
    boat_size : int, optional
        Number of slots in the boat; when given, every slot must be
        ``1 <= slot <= boat_size``.

    Returns
    -------
    LotArrays

    Raises
    ------
    FilmmapInputError
        Arrays of different lengths, an empty lot, unknown roles, repeated
        ids or slots, slots out of the boat, infinite or negative thickness.

    References
    ----------
    .. [1] Dummy wafers at both ends of the boat, product in the centre:
       common practice, no source.
    """
    ids = np.asarray(wafer_id, dtype=object).ravel()
    n = ids.size
    raw_slot = np.asarray(slot).ravel()
    raw_role = np.asarray(role, dtype=object).ravel()
    mean = np.asarray(mean_nm, dtype=float).ravel()
    sigma = np.asarray(sigma_nm, dtype=float).ravel()
    for name, arr in (("slot", raw_slot), ("role", raw_role), ("mean_nm", mean), ("sigma_nm", sigma)):
        if arr.size != n:
            raise FilmmapInputError(f"{arr.size} values for {n} wafers; every per-wafer array "
                                    "must have one entry per wafer", field=name)
    if n == 0:
        raise FilmmapInputError("the lot has no wafers", field="wafer_id")
    ids = np.array([str(v) for v in ids], dtype=object)
    _no_repeats(ids, "wafer_id")

    try:
        slot_f = raw_slot.astype(float)
    except (TypeError, ValueError):
        raise FilmmapInputError("slots must be integers", field="slot") from None
    if np.any(~np.isfinite(slot_f)) or np.any(slot_f != np.round(slot_f)):
        raise FilmmapInputError("slots must be whole numbers", field="slot")
    slots = slot_f.astype(int)
    if np.any(slots < 1):
        raise FilmmapInputError(f"slot {int(slots.min())} is below 1 (slot 1 = load end)", field="slot")
    if boat_size is not None:
        if int(boat_size) != boat_size or boat_size < 1:
            raise FilmmapInputError(f"boat_size must be a positive integer, got {boat_size!r}",
                                    field="boat_size")
        if np.any(slots > boat_size):
            raise FilmmapInputError(f"slot {int(slots.max())} is beyond the boat "
                                    f"({int(boat_size)} slots)", field="slot")
    _no_repeats(slots, "slot", what="one wafer per slot")

    roles = np.array([str(r).strip().lower() for r in raw_role], dtype=object)
    unknown = sorted(set(roles) - set(ROLES))
    if unknown:
        raise FilmmapInputError(f"unknown role(s) {unknown}; expected one of {list(ROLES)}", field="role")

    for name, arr in (("mean_nm", mean), ("sigma_nm", sigma)):
        if np.any(np.isinf(arr)):
            raise FilmmapInputError("infinite value; use NaN for a wafer without a usable value",
                                    field=name)
        if np.any(arr[np.isfinite(arr)] < 0):
            raise FilmmapInputError("negative thickness or sigma", field=name)
    return LotArrays(ids, slots, roles, mean, sigma)


def check_spec(target_nm, tolerance_pct):
    """Check the thickness spec; return ``(target_nm, tolerance_pct)`` as floats or None.

    Parameters
    ----------
    target_nm : float or None
        Target thickness in nm (> 0), or None when the lot has no target.
    tolerance_pct : float or None
        Half-width of the spec band in percent of the target (>= 0); required
        when a target is given, ignored otherwise.

    Returns
    -------
    (float or None, float or None)
    """
    if target_nm is None:
        return None, None if tolerance_pct is None else float(tolerance_pct)
    target = float(target_nm)
    if not math.isfinite(target) or target <= 0:
        raise FilmmapInputError(f"target must be a positive thickness in nm, got {target_nm!r}",
                                field="target_nm")
    if tolerance_pct is None:
        raise FilmmapInputError("a target needs a tolerance (percent of target)", field="tolerance_pct")
    tol = float(tolerance_pct)
    if not math.isfinite(tol) or tol < 0:
        raise FilmmapInputError(f"tolerance must be >= 0 %, got {tolerance_pct!r}", field="tolerance_pct")
    return target, tol


def in_spec(mean_nm, target_nm, tolerance_pct):
    """Whether wafer means lie in the spec band ``|mean - target| <= tol % of target``.

    Parameters
    ----------
    mean_nm : array_like of float
        Wafer mean thickness in nm.
    target_nm : float
        Target thickness in nm.
    tolerance_pct : float
        Half-width of the band in percent of the target.

    Returns
    -------
    numpy.ndarray of bool
        False for NaN means (use the NaN mask to tell "unknown" from "out").

    References
    ----------
    .. [1] A symmetric band around the target in percent of the target:
       common practice, no source.
    """
    mean = np.asarray(mean_nm, dtype=float)
    half_width = tolerance_pct / 100.0 * target_nm
    with np.errstate(invalid="ignore"):
        return np.abs(mean - target_nm) <= half_width * (1 + _SPEC_SLACK) + 1e-12


@dataclass(frozen=True)
class WaferRow:
    """One product or monitor wafer as it enters the WTW figures.

    Parameters
    ----------
    wafer_id : str
        Wafer identifier.
    slot : int
        Boat slot.
    role : str
        ``"product"`` or ``"monitor"``.
    mean_nm : float
        Wafer mean thickness in nm (NaN = too few usable sites).
    sigma_nm : float
        Wafer sigma in nm.
    in_spec : bool or None
        Mean within the spec band; None without a target or with a NaN mean.
    counted : bool
        True when the wafer is in the product figures (product with a finite mean).
    """

    wafer_id: str
    slot: int
    role: str
    mean_nm: float
    sigma_nm: float
    in_spec: bool | None
    counted: bool


@dataclass(frozen=True)
class WaferToWafer:
    """Wafer-to-wafer figures of a lot, over its product wafers with a usable mean.

    Parameters
    ----------
    n_product : int
        Product wafers in the lot (with or without a usable mean).
    n_used : int
        Product wafers with a finite mean: the sample of every figure below.
    n_missing : int
        Product wafers left out because their mean is NaN.
    missing_ids : list of str
        Their ids, in slot order.
    n_monitor, n_dummy : int
        Monitor and dummy wafers in the lot (not in the figures).
    grand_mean_nm : float
        Mean of the product wafer means in nm (NaN when ``n_used == 0``).
    wtw_sigma_nm : float
        Sample standard deviation (n - 1) of the product wafer means in nm
        (NaN when ``n_used < 2``).
    wtw_nu_pct : float
        100 * wtw_sigma_nm / grand_mean_nm in percent (NaN when ``n_used < 2``).
    range_nm : float
        max - min of the product wafer means in nm (0 for one wafer).
    min_nm, max_nm : float
        Lowest and highest product wafer mean in nm.
    min_wafer, max_wafer : str or None
        Ids of those wafers (the lower slot on ties).
    target_nm : float or None
        Target thickness in nm.
    tolerance_pct : float or None
        Spec half-width in percent of target.
    in_spec_count : int or None
        Counted product wafers in spec; None without a target.
    out_of_spec_ids : list of str
        Counted product wafers out of spec, in slot order (empty without a target).
    wafers : tuple of WaferRow
        Product and monitor wafers in slot order; monitors have ``counted=False``.
    """

    n_product: int
    n_used: int
    n_missing: int
    missing_ids: list
    n_monitor: int
    n_dummy: int
    grand_mean_nm: float
    wtw_sigma_nm: float
    wtw_nu_pct: float
    range_nm: float
    min_nm: float
    max_nm: float
    min_wafer: str | None
    max_wafer: str | None
    target_nm: float | None
    tolerance_pct: float | None
    in_spec_count: int | None
    out_of_spec_ids: list
    wafers: tuple


def wafer_to_wafer(wafer_id, slot, role, mean_nm, sigma_nm, *, target_nm=None, tolerance_pct=None):
    """Wafer-to-wafer uniformity of a lot over its product wafers.

    Parameters
    ----------
    wafer_id : array_like of str
        Wafer identifiers, unique.
    slot : array_like of int
        Boat slot of each wafer (1 = load/door end), unique.
    role : array_like of str
        ``"product"``, ``"monitor"`` or ``"dummy"``.
    mean_nm : array_like of float
        Wafer mean thickness in nm; NaN when the wafer has too few usable sites.
    sigma_nm : array_like of float
        Wafer sigma in nm.
    target_nm : float, optional
        Target thickness in nm; without it no in-spec flags are given.
    tolerance_pct : float, optional
        Spec half-width in percent of the target; required with a target.

    Returns
    -------
    WaferToWafer

    Notes
    -----
    Over the n product wafers with a finite mean ``m_i``:
    grand mean ``M = sum(m_i) / n``; WTW sigma ``s = sqrt(sum((m_i - M)^2) / (n - 1))``;
    WTW NU % ``= 100 s / M``; range ``= max(m_i) - min(m_i)``. A wafer is in spec
    when ``|m_i - target| <= tolerance_pct / 100 * target``. Dummies are ignored;
    monitors are listed with their in-spec flag but not counted; wafers with a
    NaN mean are counted in ``n_missing`` only.

    References
    ----------
    .. [1] Non-uniformity as 100 * sigma / mean with the n - 1 sample standard
       deviation: common practice, no source.
    .. [2] Product, monitor and dummy wafer roles in a furnace boat: common
       practice, no source.
    """
    lot = check_lot(wafer_id, slot, role, mean_nm, sigma_nm)
    target, tol = check_spec(target_nm, tolerance_pct)

    order = np.argsort(lot.slot, kind="stable")
    ids, slots, roles = lot.wafer_id[order], lot.slot[order], lot.role[order]
    mean, sigma = lot.mean_nm[order], lot.sigma_nm[order]

    finite = np.isfinite(mean)
    product = roles == "product"
    used = product & finite
    flag = in_spec(mean, target, tol) if target is not None else None

    rows = []
    for i in np.flatnonzero(roles != "dummy"):
        ok = None if flag is None or not finite[i] else bool(flag[i])
        rows.append(WaferRow(str(ids[i]), int(slots[i]), str(roles[i]), float(mean[i]),
                             float(sigma[i]), ok, bool(used[i])))

    m = mean[used]
    n = int(m.size)
    if n:
        grand = float(np.mean(m))
        lo, hi = int(np.argmin(m)), int(np.argmax(m))
        min_nm, max_nm = float(m[lo]), float(m[hi])
        min_wafer, max_wafer = str(ids[used][lo]), str(ids[used][hi])
    else:
        grand = min_nm = max_nm = math.nan
        min_wafer = max_wafer = None
    sd = float(np.std(m, ddof=1)) if n >= 2 else math.nan
    nu = float(percent_of_mean(sd, grand)) if n >= 2 else math.nan

    if flag is not None:
        in_count = int(np.count_nonzero(flag & used))
        out_ids = [str(v) for v in ids[used & ~flag]]
    else:
        in_count, out_ids = None, []

    return WaferToWafer(
        n_product=int(np.count_nonzero(product)),
        n_used=n,
        n_missing=int(np.count_nonzero(product & ~finite)),
        missing_ids=[str(v) for v in ids[product & ~finite]],
        n_monitor=int(np.count_nonzero(roles == "monitor")),
        n_dummy=int(np.count_nonzero(roles == "dummy")),
        grand_mean_nm=grand,
        wtw_sigma_nm=sd,
        wtw_nu_pct=nu,
        range_nm=max_nm - min_nm if n else math.nan,
        min_nm=min_nm,
        max_nm=max_nm,
        min_wafer=min_wafer,
        max_wafer=max_wafer,
        target_nm=target,
        tolerance_pct=tol,
        in_spec_count=in_count,
        out_of_spec_ids=out_ids,
        wafers=tuple(rows),
    )


def _no_repeats(values, field, what="unique values"):
    uniq, counts = np.unique(values, return_counts=True)
    if np.any(counts > 1):
        rep = [str(v) for v in uniq[counts > 1]][:5]
        raise FilmmapInputError(f"repeated value(s) {rep}; expected {what}", field=field)
