"""Slot profile along the boat: reference level, flagged slots, edge slots, flat zone.

The two ends of a furnace boat see a different temperature and gas flow from
its centre, which is why dummy wafers fill both ends and product wafers sit in
the centre (common practice, no source). When the dummies are too few, the
product wafers nearest the ends come out thinner or thicker than the rest:
these are the *edge slots*. This module finds them from the wafer means of one
lot and says how many extra dummies each end would need.

Slot 1 is the load (door) end; the highest slot is the gas source end.

Definitions used throughout
---------------------------
product region
    Slots from the lowest to the highest product slot (whatever lies between).
judged slot
    A product slot whose wafer mean is finite. Monitor, dummy and empty slots
    and product wafers with a NaN mean are shown in the profile but not judged;
    they neither flag nor break a run of judged slots.
central slots
    The middle half of the product region: with the region ``[a, b]`` of
    ``L = b - a + 1`` slots and ``q = L // 4``, the slots ``[a + q, b - q]``.
    For ``L <= 3`` that is the whole region.
reference level
    Median of the judged central slot means (of all judged slots when no
    central slot is judged).
robust sigma
    ``max(1.4826 * MAD, floor)``, MAD = median absolute deviation of the judged
    slot means from their median; ``floor = sigma_floor_pct % of the
    reference``, so that a lot flatter than the measurement can resolve does
    not flag noise.
flag
    A judged slot is flagged when its mean is outside the spec band around the
    target (if a target is given) or when ``|mean - reference| > k * robust
    sigma`` (if at least ``min_robust_slots`` slots are judged).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace

import numpy as np
from scipy.special import ndtri

from filmmap.errors import FilmmapInputError
from filmmap.lotstats.wtw import check_lot, check_spec, in_spec

#: Consistency factor: 1.4826 * MAD estimates sigma of a normal sample, 1 / Phi^-1(3/4).
MAD_TO_SIGMA = 1.4826

#: Small-sample inflation of the limit, ``k = z * (1 + c / n)`` (see `default_k`).
SMALL_SAMPLE_C = 15.0


def robust_sigma(values_nm):
    """Sigma of a sample from its median absolute deviation, ``1.4826 * MAD``.

    Parameters
    ----------
    values_nm : array_like of float
        Values in nm; NaNs are ignored.

    Returns
    -------
    float
        Robust sigma in nm; NaN when no value is finite.

    References
    ----------
    .. [1] F. R. Hampel, "The influence curve and its role in robust
       estimation", J. Am. Stat. Assoc. 69, 383-393 (1974).
    .. [2] P. J. Rousseeuw and C. Croux, "Alternatives to the median absolute
       deviation", J. Am. Stat. Assoc. 88, 1273-1283 (1993): the factor
       1.4826 = 1 / Phi^-1(3/4) makes the MAD consistent for a normal sigma.
    """
    x = np.asarray(values_nm, dtype=float)
    x = x[np.isfinite(x)]
    if x.size == 0:
        return math.nan
    return float(MAD_TO_SIGMA * np.median(np.abs(x - np.median(x))))


def default_k(n_slots, false_alarm=0.01):
    """Limit in robust sigmas that keeps the lot-wise false-alarm rate near ``false_alarm``.

    Parameters
    ----------
    n_slots : int
        Number of judged slots in the lot (>= 1).
    false_alarm : float
        Wanted probability (0 < p < 1) that a flat lot with normal noise has
        any slot flagged by the robust rule.

    Returns
    -------
    float
        ``k = z * (1 + SMALL_SAMPLE_C / n)`` with ``z = Phi^-1(1 - a_n / 2)``
        and the per-slot rate ``a_n = 1 - (1 - false_alarm)^(1/n)``.

    Notes
    -----
    ``z`` alone would hold the rate if the reference and sigma were known.
    They are estimated from the same n slots, and the MAD is a noisy scale
    estimate (about 37 % efficient at the normal), so small lots need a wider
    limit. The factor ``1 + 15 / n`` was fitted to a Monte Carlo of flat
    normal lots (reference = median of the middle half, sigma = 1.4826 MAD of
    all n): with it the lot-wise rate stayed between 0.4 % and 0.9 % for
    n = 8 ... 300 at ``false_alarm = 0.01`` (k = 9.3 at n = 8, 4.9 at n = 44,
    4.5 at n = 100). The fit was made at ``false_alarm = 0.01``; at other
    rates it is an approximation. Below 8 slots the MAD is too erratic for any such
    formula; `slot_profile` then switches the robust rule off by default.

    References
    ----------
    .. [1] L. Davies and U. Gather, "The identification of multiple outliers",
       J. Am. Stat. Assoc. 88, 782-792 (1993): calibrating an outlier
       identifier so that a clean sample of n is flagged with probability
       alpha, with per-point rate 1 - (1 - alpha)^(1/n).
    .. [2] F. R. Hampel, J. Am. Stat. Assoc. 69, 383-393 (1974): median and
       MAD based identifier.
    """
    n = int(n_slots)
    if n < 1:
        raise ValueError("default_k needs at least one slot")
    if not 0.0 < false_alarm < 1.0:
        raise FilmmapInputError(f"false_alarm must be between 0 and 1, got {false_alarm!r}",
                                field="false_alarm")
    per_slot = -math.expm1(math.log1p(-false_alarm) / n)
    return float(-ndtri(per_slot / 2.0) * (1.0 + SMALL_SAMPLE_C / n))


def central_slots(first, last):
    """The middle half of a product region ``[first, last]`` (slot numbers).

    Parameters
    ----------
    first, last : int
        Lowest and highest product slot.

    Returns
    -------
    (int, int)
        ``(first + q, last - q)`` with ``q = (last - first + 1) // 4``.

    References
    ----------
    .. [1] Taking the reference from the centre of the load, away from both
       ends of the boat: common practice, no source.
    """
    q = (int(last) - int(first) + 1) // 4
    return int(first) + q, int(last) - q


@dataclass(frozen=True)
class SlotProfile:
    """The slot profile of one lot and what it says about the boat ends.

    Per-slot arrays run over slots ``1 .. boat_size``.

    Parameters
    ----------
    slots : numpy.ndarray of int
        Slot numbers 1 .. boat_size.
    wafer_id : numpy.ndarray of object
        Wafer in each slot (None = empty slot).
    role : numpy.ndarray of object
        Role per slot: ``"product"``, ``"monitor"``, ``"dummy"`` or ``"empty"``.
    mean_nm, sigma_nm : numpy.ndarray of float
        Wafer mean and wafer sigma in nm per slot (NaN = empty or unusable).
    judged : numpy.ndarray of bool
        Product slots with a finite mean (the only slots that can flag).
    flags : numpy.ndarray of bool
        Flagged slots.
    deviation_sigmas : numpy.ndarray of float
        ``(mean - reference) / robust_sigma`` for judged slots, NaN elsewhere.
    reasons : dict of int to str
        Why each flagged slot is flagged.
    product_region : (int, int) or None
        Lowest and highest product slot.
    central_region : (int, int) or None
        Slots whose means set the reference (see `central_slots`).
    reference_nm : float
        Reference level in nm (NaN when nothing is judged).
    mad_sigma_nm : float
        1.4826 * MAD of the judged slot means in nm, before the floor.
    robust_sigma_nm : float
        Robust sigma used, ``max(mad_sigma_nm, floor)``, in nm.
    k : float or None
        Limit in robust sigmas; None when the robust rule is off.
    limit_nm : float or None
        ``k * robust_sigma_nm`` in nm; None when the robust rule is off.
    target_nm, tolerance_pct : float or None
        The spec used for the band rule.
    edge_slots : list of int
        Flagged slots contiguous with either end of the product region, sorted.
    edge_slots_load, edge_slots_source : list of int
        The same, split by end (load = low slots, source = high slots).
    flat_zone : list of int or None
        ``[first, last]`` of the longest run of unflagged judged slots.
    extra_dummies : dict
        ``{"load": n, "source": n}`` extra dummy wafers recommended per end.
    notes : list of str
        Plain-text remarks (missing wafers, rules switched off, floors used).
    """

    slots: np.ndarray
    wafer_id: np.ndarray
    role: np.ndarray
    mean_nm: np.ndarray
    sigma_nm: np.ndarray
    judged: np.ndarray
    flags: np.ndarray
    deviation_sigmas: np.ndarray
    reasons: dict
    product_region: tuple | None
    central_region: tuple | None
    reference_nm: float
    mad_sigma_nm: float
    robust_sigma_nm: float
    k: float | None
    limit_nm: float | None
    target_nm: float | None
    tolerance_pct: float | None
    edge_slots: list
    edge_slots_load: list
    edge_slots_source: list
    flat_zone: list | None
    extra_dummies: dict
    notes: list

    @property
    def flagged_slots(self):
        """Sorted list of flagged slot numbers."""
        return [int(s) for s in self.slots[self.flags]]


def slot_profile(wafer_id, slot, role, mean_nm, sigma_nm, boat_size, *, target_nm=None,
                 tolerance_pct=None, k=None, false_alarm=0.01, sigma_floor_pct=0.1,
                 min_robust_slots=8, dummy_margin=0):
    """Slot profile of a lot: flag slots, find edge slots and the flat zone.

    Parameters
    ----------
    wafer_id : array_like of str
        Wafer identifiers, unique.
    slot : array_like of int
        Slot of each wafer, 1 = load/door end .. ``boat_size`` = gas source
        end; one wafer per slot, empty slots allowed.
    role : array_like of str
        ``"product"``, ``"monitor"`` or ``"dummy"``.
    mean_nm : array_like of float
        Wafer mean thickness in nm; NaN when the wafer has too few usable sites.
    sigma_nm : array_like of float
        Wafer sigma in nm (shown in the profile, not used for flags).
    boat_size : int
        Number of slots in the boat.
    target_nm : float, optional
        Target thickness in nm; enables the spec-band rule.
    tolerance_pct : float, optional
        Spec half-width in percent of the target; required with a target.
    k : float, optional
        Limit of the robust rule in robust sigmas; default `default_k` of the
        number of judged slots and ``false_alarm``.
    false_alarm : float
        Wanted lot-wise false-alarm rate of the robust rule on flat lots
        (dimensionless, default 0.01) when ``k`` is not given.
    sigma_floor_pct : float
        Floor on the robust sigma in percent of the reference (default 0.1 %,
        1 nm on a 1000 nm film). Set it near the noise of a wafer mean (site
        repeatability / sqrt(number of sites)); 0 disables the floor.
    min_robust_slots : int
        Fewest judged slots for the robust rule (default 8; >= 3). With fewer,
        only the spec band can flag.
    dummy_margin : int
        Safety dummies added at each end to the recommendation (default 0).

    Returns
    -------
    SlotProfile

    Notes
    -----
    Edge slots: walking inward from each end of the product region over
    judged slots, the flagged slots met before the first unflagged one. When
    every judged slot is flagged there is no flat part to protect and no edge
    (the whole lot is off: a recipe matter, not a dummy matter); no edge slot
    and no flat zone are reported. Extra dummies at an end: the number of
    slots from that end of the product region to its innermost edge slot
    (equal to the number of edge slots when there are no gaps), plus
    ``dummy_margin`` (added at both ends).

    Flat zone: the longest run of unflagged judged slots in slot order
    (unjudged slots do not break a run); on a tie the lower run.

    References
    ----------
    .. [1] F. R. Hampel, J. Am. Stat. Assoc. 69, 383-393 (1974): median / MAD
       outlier rule.
    .. [2] P. J. Rousseeuw and C. Croux, J. Am. Stat. Assoc. 88, 1273-1283
       (1993): the 1.4826 consistency factor.
    .. [3] L. Davies and U. Gather, J. Am. Stat. Assoc. 88, 782-792 (1993):
       lot-wise calibration of the limit.
    .. [4] Dummy wafers at both ends of the boat, product in the centre, and
       thickness differences at the boat ends: common practice, no source.
    """
    if boat_size is None:
        raise FilmmapInputError("boat_size is required", field="boat_size")
    lot = check_lot(wafer_id, slot, role, mean_nm, sigma_nm, boat_size=boat_size)
    target, tol = check_spec(target_nm, tolerance_pct)
    if k is not None and not (math.isfinite(k) and k > 0):
        raise FilmmapInputError(f"k must be a positive number of robust sigmas, got {k!r}", field="k")
    if not (math.isfinite(sigma_floor_pct) and sigma_floor_pct >= 0):
        raise FilmmapInputError(f"sigma_floor_pct must be >= 0, got {sigma_floor_pct!r}",
                                field="sigma_floor_pct")
    if int(min_robust_slots) != min_robust_slots or min_robust_slots < 3:
        raise FilmmapInputError(f"min_robust_slots must be an integer >= 3, got {min_robust_slots!r}",
                                field="min_robust_slots")
    if int(dummy_margin) != dummy_margin or dummy_margin < 0:
        raise FilmmapInputError(f"dummy_margin must be an integer >= 0, got {dummy_margin!r}",
                                field="dummy_margin")
    boat_size, margin = int(boat_size), int(dummy_margin)

    # --- profile over every slot of the boat
    slots = np.arange(1, boat_size + 1)
    idx = lot.slot - 1
    ids = np.full(boat_size, None, dtype=object)
    roles = np.full(boat_size, "empty", dtype=object)
    mean = np.full(boat_size, math.nan)
    sigma = np.full(boat_size, math.nan)
    ids[idx], roles[idx], mean[idx], sigma[idx] = lot.wafer_id, lot.role, lot.mean_nm, lot.sigma_nm
    is_product = roles == "product"
    judged = is_product & np.isfinite(mean)
    flags = np.zeros(boat_size, dtype=bool)
    dev = np.full(boat_size, math.nan)
    reasons: dict[int, list[str]] = {}
    notes: list[str] = []

    n_missing = int(np.count_nonzero(is_product & ~judged))
    if n_missing:
        notes.append(f"{n_missing} product wafer(s) without a usable mean are not judged")

    empty = SlotProfile(slots, ids, roles, mean, sigma, judged, flags, dev, {}, None, None,
                        math.nan, math.nan, math.nan, None, None, target, tol, [], [], [], None,
                        {"load": margin, "source": margin}, notes)
    if not np.any(is_product):
        notes.append("no product wafers in the lot: nothing to judge")
        return empty
    first, last = (int(s) for s in slots[is_product][[0, -1]])
    centre = central_slots(first, last)
    if not np.any(judged):
        notes.append("no product wafer has a usable mean: nothing to judge")
        return replace(empty, product_region=(first, last), central_region=centre)

    # --- reference level and robust sigma
    values = mean[judged]
    in_centre = judged & (slots >= centre[0]) & (slots <= centre[1])
    if np.any(in_centre):
        reference = float(np.median(mean[in_centre]))
    else:
        reference = float(np.median(values))
        notes.append("no central slot has a usable mean: reference taken over all product slots")
    mad_sigma = robust_sigma(values)
    floor = sigma_floor_pct / 100.0 * reference
    sig = max(mad_sigma, floor)
    if floor > mad_sigma:
        notes.append(f"robust sigma raised from {mad_sigma:.3g} nm to the floor "
                     f"{floor:.3g} nm ({sigma_floor_pct:g} % of reference)")
    n_judged = int(values.size)
    if sig > 0:
        dev[judged] = (values - reference) / sig

    # --- flags
    if target is not None:
        band = judged & ~in_spec(mean, target, tol)
        for s in slots[band]:
            m = mean[s - 1]
            reasons.setdefault(int(s), []).append(
                f"mean {m:.2f} nm is {100.0 * (m - target) / target:+.2f} % from target "
                f"{target:g} nm, outside +/-{tol:g} %")
        flags |= band
    if n_judged >= min_robust_slots and sig > 0:
        k_used = float(k) if k is not None else default_k(n_judged, false_alarm)
        limit = k_used * sig
        far = judged & (np.abs(mean - reference) > limit)
        for s in slots[far]:
            m = mean[s - 1]
            reasons.setdefault(int(s), []).append(
                f"mean {m:.2f} nm is {m - reference:+.2f} nm from reference {reference:.2f} nm "
                f"= {dev[s - 1]:+.1f} robust sigmas, beyond +/-{k_used:.2f}")
        flags |= far
    else:
        k_used = limit = None
        why = (f"only {n_judged} judged slot(s), fewer than {min_robust_slots}" if sig > 0
               else "robust sigma is 0 (identical means and no floor)")
        notes.append(f"robust rule off: {why}; only the spec band can flag")

    # --- edge slots, flat zone, extra dummies
    jslots = [int(s) for s in slots[judged]]
    jflag = [bool(flags[s - 1]) for s in jslots]
    load = _flagged_run(jslots, jflag)
    source = sorted(_flagged_run(jslots[::-1], jflag[::-1]))
    if all(jflag):
        notes.append("every judged slot is flagged: the whole lot is off, not its ends; "
                     "no edge slot or flat zone reported")
        load, source = [], []
    elif len(load) + len(source) > n_judged / 2:
        notes.append("edge runs cover more than half of the product slots: this looks like a "
                     "lot-wide offset or tilt rather than an end effect")
    flat = _longest_unflagged_run(jslots, jflag)
    extra = {"load": (load[-1] - first + 1 if load else 0) + margin,
             "source": (last - source[0] + 1 if source else 0) + margin}

    return SlotProfile(
        slots=slots, wafer_id=ids, role=roles, mean_nm=mean, sigma_nm=sigma, judged=judged,
        flags=flags, deviation_sigmas=dev,
        reasons={s: "; ".join(r) for s, r in sorted(reasons.items())},
        product_region=(first, last), central_region=centre, reference_nm=reference,
        mad_sigma_nm=mad_sigma, robust_sigma_nm=sig, k=k_used, limit_nm=limit,
        target_nm=target, tolerance_pct=tol, edge_slots=sorted(load + source),
        edge_slots_load=load, edge_slots_source=source, flat_zone=flat,
        extra_dummies=extra, notes=notes)


def _flagged_run(slots, flags):
    """Slots met while flagged, walking the given order, up to the first unflagged one."""
    run = []
    for s, f in zip(slots, flags):
        if not f:
            break
        run.append(s)
    return run


def _longest_unflagged_run(slots, flags):
    """[first, last] of the longest run of unflagged slots (lower run on ties), or None."""
    best, best_len, start, length = None, 0, None, 0
    for s, f in zip(slots, flags):
        if f:
            start, length = None, 0
            continue
        if start is None:
            start = s
        length += 1
        if length > best_len:
            best, best_len = [start, s], length
    return best
