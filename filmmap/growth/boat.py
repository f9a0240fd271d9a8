"""One model of the boat: zone errors, end effects and what neither explains, fitted together.

The per-slot effective temperature offset dT_s (the oxide read as a thermometer,
`filmmap.growth.calibrate.calibrate_slots`) is explained as

    dT_s = sum_z G[s, z] e_z  +  a_load phi_load(s)  +  a_source phi_source(s)  +  r_s

- ``G`` is the zone-to-slot gain matrix with its coupling between neighbouring zones
  (`filmmap.growth.calibrate.gain_matrix`), ``e_z`` one temperature error per heater zone;
- ``phi_end(s) = exp(-(u - 1) / decay_slots)`` is an end effect at each end of the boat,
  u = 1 for the first wafer after the last dummy at that end, decaying over a few slots
  (an open end radiates to the cold door or the cold source flange and its gas is not yet
  at temperature: common practice, no source); ``a_end`` is its amplitude at that first
  wafer, K;
- ``r_s`` is the residual: what neither zones nor ends explain.

All amplitudes are fitted together by weighted linear least squares, the decay length by
a scan over a few values (the fit with the smallest residual wins), with standard errors
from the covariance scaled by the residual variance (floored at the scatter a wafer-mean
uncertainty gives, `floor_C`). An end effect counts as found only when its amplitude is at
least `DETECTION_SIGMAS` standard errors and `min_end_effect_C`: otherwise it is reported
as not detected and answers nothing.

Why together: a zone error shifts every slot of its zone, an end effect only the first
few; fitted separately, the zone fit chases the end (trimming a whole zone to fix three
slots) and the edge-slot rule blames the end for a cold zone. Fitted together each cause
gets its own share, and each recommendation answers one cause: trims the zone part,
extra dummies the end-effect part that trims cannot remove.

Units: temperature offsets K, slots dimensionless (1 = load end).

References
----------
.. [1] Zone-to-slot coupling and end-effect shape: common practice, no source.
.. [2] P. R. Bevington and D. K. Robinson, Data Reduction and Error Analysis for the
   Physical Sciences, 3rd ed. (2003), ch. 7 (linear least squares and its covariance).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from filmmap.errors import FilmmapInputError
from filmmap.growth.calibrate import gain_matrix, normalise_zones, slot_arrays

__all__ = ["BoatFit", "EndEffect", "fit_boat", "end_shape", "coupling_width_from_profiling",
           "DECAY_SCAN_SLOTS"]

DECAY_SCAN_SLOTS = (1.0, 1.5, 2.0, 3.0, 4.0)
"""Decay lengths of the end effect tried, slots (the one with the smallest residual wins)."""

DETECTION_SIGMAS = 3.0
"""An end effect is found when its amplitude is at least this many standard errors."""


@dataclass(frozen=True)
class EndEffect:
    """The end effect at one end of the boat.

    Attributes
    ----------
    end : str
        ``"load"`` or ``"source"``.
    amplitude_C : float
        Offset at the first wafer after the last dummy, K (NaN when not fitted).
    sigma_C : float
        Its standard error, K.
    decay_slots : float
        e-folding length, slots.
    last_dummy_slot : int
        Slot of the last dummy at this end (0 or boat size + 1 when there is none).
    detected : bool
        Amplitude at least `DETECTION_SIGMAS` standard errors and the minimum size.
    """

    end: str
    amplitude_C: float
    sigma_C: float
    decay_slots: float
    last_dummy_slot: int
    detected: bool

    def at(self, slots):
        """The end effect at the given slots, K (0 where not detected)."""
        if not self.detected:
            return np.zeros(np.shape(slots))
        return self.amplitude_C * end_shape(slots, self.end, self.last_dummy_slot,
                                            self.decay_slots)


@dataclass(frozen=True)
class BoatFit:
    """The boat's slot profile split into zone errors, end effects and a residual.

    Attributes
    ----------
    names : tuple of str
        Zone names, load end first.
    zone_absolute_C : numpy.ndarray
        Zone offsets including the common offset, K (NaN where undetermined).
    zone_sigma_C : numpy.ndarray
        Their standard errors, K.
    common_C : float
        Weighted mean of the zone part over the slots used, K (temperature, rate and time
        errors of the whole run together).
    zone_error_C : numpy.ndarray
        ``zone_absolute_C - common_C``, K: what zone trims can flatten.
    observed : numpy.ndarray of bool
        Zones with enough data.
    ends : tuple of EndEffect
        Load end, then source end.
    slot : numpy.ndarray of int
        Slots used.
    offset_C : numpy.ndarray
        Their effective offsets, K.
    zone_part_C, end_part_C, residual_C : numpy.ndarray
        The three parts at those slots, K.
    weight : numpy.ndarray
        Fit weights.
    residual_rms_C : float
        Weighted rms residual, K.
    explained_zone, explained_end : float
        Shares of the slot-to-slot variance explained by the zones and by the ends
        (NaN for a flat profile).
    width_slots : float
        Zone coupling width used, slots.
    shape : str
        Zone transition shape.
    """

    names: tuple
    zone_absolute_C: np.ndarray
    zone_sigma_C: np.ndarray
    common_C: float
    zone_error_C: np.ndarray
    observed: np.ndarray
    ends: tuple
    slot: np.ndarray
    offset_C: np.ndarray
    zone_part_C: np.ndarray
    end_part_C: np.ndarray
    residual_C: np.ndarray
    weight: np.ndarray
    residual_rms_C: float
    explained_zone: float
    explained_end: float
    width_slots: float
    shape: str
    notes: list = field(default_factory=list)

    zone_slots: tuple = ()

    def zone_part_at(self, slots):
        """The zone model (with the common offset) at any slots, K."""
        G = gain_matrix(self.zone_slots, slots, self.width_slots, self.shape)
        absolute = np.where(self.observed, self.zone_absolute_C, self.common_C)
        return G @ absolute

    def end_part_at(self, slots):
        """Both end effects at any slots, K (0 where none was found)."""
        return sum((e.at(slots) for e in self.ends), np.zeros(np.shape(slots)))

    def end(self, which):
        """The EndEffect of ``"load"`` or ``"source"``."""
        return next(e for e in self.ends if e.end == which)

    def as_dict(self):
        """JSON-ready summary (None for NaN)."""
        def f(v):
            return float(v) if v is not None and np.isfinite(v) else None
        return {
            "zone_errors_C": {n: f(e) for n, e in zip(self.names, self.zone_error_C)},
            "zone_errors_sigma_C": {n: f(s) for n, s in zip(self.names, self.zone_sigma_C)},
            "common_offset_C": f(self.common_C),
            "end_effects": {e.end: {"amplitude_C": f(e.amplitude_C), "sigma_C": f(e.sigma_C),
                                    "decay_slots": f(e.decay_slots),
                                    "last_dummy_slot": int(e.last_dummy_slot),
                                    "detected": bool(e.detected)} for e in self.ends},
            "residual_rms_C": f(self.residual_rms_C),
            "explained_by_zones": f(self.explained_zone),
            "explained_by_ends": f(self.explained_end),
            "coupling_width_slots": float(self.width_slots),
            "notes": list(self.notes),
        }


def end_shape(slots, end, last_dummy_slot, decay_slots):
    """exp(-(u - 1) / decay) with u the distance in slots from the last dummy at that end.

    Slots on the dummy side of ``last_dummy_slot`` get 0 (dummies are not fitted).
    """
    s = np.asarray(slots, dtype=float)
    u = s - last_dummy_slot if end == "load" else last_dummy_slot - s
    return np.where(u >= 1, np.exp(-(u - 1.0) / float(decay_slots)), 0.0)


def _last_dummies(boat_size, dummy_slots, product_slots):
    """Last dummy slot at each end: the dummies before the first and after the last product slot."""
    dummies = sorted(int(s) for s in dummy_slots)
    lo, hi = min(product_slots), max(product_slots)
    load = max([s for s in dummies if s < lo], default=0)
    source = min([s for s in dummies if s > hi], default=int(boat_size) + 1)
    return load, source


def fit_boat(slot, offset_C, zones, weight=None, *, boat_size=None, dummy_slots=(),
             width_slots=0.0, shape="logistic", decay_slots=None, floor_C=0.05,
             min_end_effect_C=0.2, min_zone_weight=1.0, min_slots_beyond_end=4):
    """Fit zone errors and end effects together to per-slot effective offsets.

    Parameters
    ----------
    slot : array_like of int
        Boat slots (1 = load end), dimensionless.
    offset_C : array_like of float
        Effective temperature offset per slot, K (NaN entries are left out).
    zones : sequence
        Heater zones, load end first (see `normalise_zones`).
    weight : array_like of float, optional
        Fit weight per slot (1 product, monitors as chosen, 0 dummies).
    boat_size : int, optional
        Slots in the boat (default: the highest slot given).
    dummy_slots : sequence of int
        Dummy slots; the end effect starts after the last dummy at each end.
    width_slots : float
        Zone coupling width, slots.
    shape : {"logistic", "linear"}
        Zone transition shape.
    decay_slots : float, optional
        End-effect decay length, slots; None = scan `DECAY_SCAN_SLOTS`.
    floor_C : float
        Smallest per-slot scatter assumed for the standard errors, K (a wafer mean known
        to 0.1 nm on 500 nm reads to about 0.05 K).
    min_end_effect_C : float
        Smallest end-effect amplitude reported as found, K.
    min_zone_weight : float
        A zone is fitted only with at least this much summed gain weight.
    min_slots_beyond_end : int
        An end effect is fitted only when the end's zone holds at least this many used
        slots beyond the first two decay lengths (else it cannot be told from the zone).

    Returns
    -------
    BoatFit

    Raises
    ------
    FilmmapInputError
        For arrays of different lengths, negative weights or bad zones.
    """
    zs = normalise_zones(zones)
    if not zs:
        raise FilmmapInputError("at least one heater zone is needed", field="zones")
    names = tuple(z[0] for z in zs)
    s_u, d_u, w_u = slot_arrays(slot, offset_C, weight)
    s_u = s_u.astype(int)
    nan = float("nan")
    size = (int(boat_size) if boat_size is not None
            else int(np.max(np.asarray(slot).astype(int), initial=0)))
    G = gain_matrix(zs, s_u, width_slots, shape)
    observed = (w_u @ G) >= min_zone_weight if s_u.size else np.zeros(len(zs), bool)
    notes = []
    if s_u.size == 0 or not observed.any():
        empty = np.full(len(zs), nan)
        ends = (EndEffect("load", nan, nan, nan, 0, False),
                EndEffect("source", nan, nan, nan, size + 1, False))
        return BoatFit(names, empty, empty.copy(), nan, empty.copy(), observed, ends, s_u, d_u,
                       d_u * nan, d_u * nan, d_u * nan, w_u, nan, nan, nan, float(width_slots),
                       shape, ["no usable slots"], zone_slots=zs)
    load_dummy, source_dummy = _last_dummies(size, dummy_slots, s_u)
    Go = G[:, observed]

    def design(decay):
        cols, which = [Go], []
        for end, last in (("load", load_dummy), ("source", source_dummy)):
            phi = end_shape(s_u, end, last, decay)
            u = s_u - last if end == "load" else last - s_u
            beyond = np.count_nonzero(u > 1 + 2 * decay)
            if beyond >= min_slots_beyond_end and np.any(phi > 0.5):
                cols.append(phi[:, None])
                which.append(end)
        return np.hstack(cols), which

    sw = np.sqrt(w_u)
    best = None
    for decay in ([float(decay_slots)] if decay_slots is not None else DECAY_SCAN_SLOTS):
        X, which = design(decay)
        if X.shape[1] > s_u.size:
            continue
        sol, *_ = np.linalg.lstsq(X * sw[:, None], d_u * sw, rcond=None)
        resid = d_u - X @ sol
        ss = float(np.sum(w_u * resid**2))
        if best is None or ss < best[0] - 1e-12:
            best = (ss, decay, X, which, sol, resid)
    if best is None:   # fewer slots than unknowns: zones alone
        X, which, decay = Go, [], float(decay_slots or DECAY_SCAN_SLOTS[0])
        sol, *_ = np.linalg.lstsq(X * sw[:, None], d_u * sw, rcond=None)
        resid = d_u - X @ sol
        best = (float(np.sum(w_u * resid**2)), decay, X, which, sol, resid)
    ss, decay, X, which, sol, resid = best
    n, p = X.shape
    dof = n - p
    var = max(ss / max(float(np.sum(w_u)), 1e-300) * n / dof if dof > 0 else 0.0, floor_C**2)
    try:
        cov = np.linalg.inv((X * w_u[:, None]).T @ X) * var
        se = np.sqrt(np.maximum(np.diag(cov), 0.0))
    except np.linalg.LinAlgError:
        se = np.full(p, nan)
        notes.append("the zone and end-effect columns are degenerate: standard errors undefined")
    k = int(observed.sum())
    absolute = np.full(len(zs), nan)
    absolute[observed] = sol[:k]
    zone_se = np.full(len(zs), nan)
    zone_se[observed] = se[:k]
    zone_part = Go @ sol[:k]
    ends = []
    end_part = np.zeros(s_u.size)
    for end, last in (("load", load_dummy), ("source", source_dummy)):
        if end in which:
            j = k + which.index(end)
            a, a_se = float(sol[j]), float(se[j])
            found = abs(a) >= max(DETECTION_SIGMAS * a_se, min_end_effect_C)
            ends.append(EndEffect(end, a, a_se, decay, last, bool(found)))
            if found:
                end_part += a * X[:, j]
            else:
                # not found: its share goes back to the residual, where it belongs
                resid = resid + a * X[:, j]
        else:
            ends.append(EndEffect(end, nan, nan, decay, last, False))
            notes.append(f"the {end} end holds too few product slots beyond the end effect's "
                         "reach to tell an end effect from its zone: none fitted")
    # the zone part absorbs what an undetected end effect would have taken: refit zones
    if not all(e.detected for e in ends if np.isfinite(e.amplitude_C)):
        sol_z, *_ = np.linalg.lstsq(Go * sw[:, None], (d_u - end_part) * sw, rcond=None)
        absolute[observed] = sol_z
        zone_part = Go @ sol_z
        resid = d_u - zone_part - end_part
    common = float(np.sum(w_u * zone_part) / np.sum(w_u))
    total = float(np.sum(w_u * (d_u - np.sum(w_u * d_u) / np.sum(w_u)) ** 2))
    ss_res = float(np.sum(w_u * resid**2))
    rms = math.sqrt(ss_res / float(np.sum(w_u)))
    if total <= 1e-12 * float(np.sum(w_u)):
        ex_zone = ex_end = nan
    else:
        ex_end = float(np.sum(w_u * end_part**2)) / total
        ex_zone = max(0.0, 1.0 - ss_res / total - ex_end)
    return BoatFit(names, absolute, zone_se, common, absolute - common, observed, tuple(ends),
                   s_u, d_u, zone_part, end_part, resid, w_u, rms, ex_zone, ex_end,
                   float(width_slots), shape, notes, zone_slots=zs)


def coupling_width_from_profiling(slot, offset_before_C, offset_after_C, zones, trimmed_zone,
                                  trim_K, *, shape="logistic", widths=None):
    """Zone coupling width measured by a profiling run: one zone trimmed, the rest unchanged.

    Procedure (docs/furnace.md): run the same recipe twice, the second time with one zone's
    offset changed by ``trim_K`` and nothing else; reduce both lots; the per-slot effective
    offsets of the two advice files differ by that zone's column of the gain matrix times
    the trim. The width whose column fits that difference best (least squares over a scan)
    is the furnace's coupling width.

    Parameters
    ----------
    slot : array_like of int
        Slots measured in both runs (1 = load end).
    offset_before_C, offset_after_C : array_like of float
        Effective offsets of those slots in the two runs, K (an advice's
        ``effective_offset_C_by_slot``).
    zones : sequence
        Heater zones, load end first.
    trimmed_zone : str
        The zone whose offset was changed.
    trim_K : float
        The change, K (a few K, well above the run-to-run scatter).
    shape : {"logistic", "linear"}
        Transition shape.
    widths : sequence of float, optional
        Widths tried, slots (default 0 to 12 in steps of 0.25).

    Returns
    -------
    (float, float)
        The width (slots) and the rms misfit of its column (K).

    References
    ----------
    .. [1] Zone-to-slot coupling model and profiling procedure: common practice, no source.
    """
    zs = normalise_zones(zones)
    names = [z[0] for z in zs]
    if trimmed_zone not in names:
        raise FilmmapInputError(f"zone {trimmed_zone!r} is not a zone ({', '.join(names)})",
                                field="trimmed_zone")
    if not (math.isfinite(float(trim_K)) and abs(float(trim_K)) > 0):
        raise FilmmapInputError("the profiling trim must be a non-zero number of K",
                                field="trim_K")
    s = np.asarray(slot).ravel()
    diff = np.asarray(offset_after_C, dtype=float).ravel() - np.asarray(offset_before_C,
                                                                         dtype=float).ravel()
    use = np.isfinite(diff)
    s, diff = s[use], diff[use]
    # the common part (a run-to-run rate or time difference) is not the zone's doing
    k = names.index(trimmed_zone)
    best = None
    for w in (np.arange(0.0, 12.01, 0.25) if widths is None else widths):
        col = gain_matrix(zs, s, float(w), shape)[:, k] * float(trim_K)
        # the trim's own amplitude is known: fit only the common offset beside it
        resid = diff - col - (diff - col).mean()
        rms = float(np.sqrt(np.mean(resid**2)))
        if best is None or rms < best[1] - 1e-12:
            best = (float(w), rms)
    return best
