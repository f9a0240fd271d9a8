"""Read the furnace's temperature profile from the oxide it grew: per-slot and per-zone offsets.

Two levels of calibration, both pure functions of the recipe as run and the measured
wafer means:

Per slot (`calibrate_slots`)
    The *effective temperature offset* dT of a slot is the temperature offset (K, added to
    every step of the recipe) with which the Deal-Grove model reproduces that slot's
    measured wafer-mean thickness.  It is the oxide read as a thermometer.  It lumps
    together everything that changes the growth of that slot: a real temperature error,
    and also any error of rate (steam flow, oxidant partial pressure) or of time (a step
    that ran short), which the oxide cannot tell apart from temperature.

Per zone (`fit_zones`)
    The per-slot offsets are explained by one temperature error per heater zone through
    a zone-to-slot gain matrix G (`gain_matrix`): dT_s = sum_z G[s, z] e_z.

Gain model (common practice, no source).  Each slot follows the zone it sits in; near
the boundary between two neighbouring zones the slot sees a blend of both.  With zone
boundaries at b_k (half-way between the last slot of zone k and the first slot of zone
k + 1) and a transition function H (0 well before the boundary, 1 well after it), the
weight of zone k at slot position s is ``H_{k-1}(s) - H_k(s)`` (with ``H_0 = 1`` and
``H_K = 0``): every row of G is non-negative and sums to 1, and a slot more than a few
widths from any boundary follows its own zone only.  ``width_slots = 0`` is a pure step
(each slot follows its own zone exactly); ``shape="logistic"`` uses
``H = 1 / (1 + exp(-(s - b) / sigma))`` with ``sigma = width / (2 ln 9)`` so that the 10-90 %
transition spans ``width_slots`` slots; ``shape="linear"`` uses a straight ramp from 0 to 1
over ``width_slots`` slots centred on the boundary.  Slots before the first zone follow
the first zone, slots after the last zone the last zone.

Separating a rate or time error from zone temperature errors.  Because every row of G
sums to 1, a common offset c added to all zone errors is exactly the same as a uniform
temperature offset of the whole boat, and a uniform temperature offset is (to first
order) the same as a global rate or time error: the measured lot cannot separate them.
`fit_zones` therefore reports the zone errors *relative to the common offset*:
``common_C`` is the weighted mean of the per-slot effective offsets (temperature, rate and
time errors together, not separable) and ``error_C = absolute_C - common_C`` holds the
zone-to-zone differences only, which are what a zone trim can flatten.  The next run's
time advice (`filmmap.growth.advice`) does not use ``common_C`` at all: it puts the mean
on target with the per-slot effective offsets themselves, so whatever the common part is
made of, the time correction is the one the model needs to reproduce the lot and hit
the target.

Units: thickness nm, time minutes, temperature degrees Celsius, temperature offsets K
(equal to differences in degrees Celsius), slot numbers 1 = load (door) end.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, replace

import numpy as np

from filmmap.errors import FilmmapInputError
from filmmap.growth.recipe import (
    DEFAULT_TEMPERATURE_RANGE_C,
    integrate_recipe,
    step_index,
    thickness_sensitivity_to_temperature,
    validate_steps,
)

__all__ = ["COUPLING_SHAPES", "DEFAULT_INITIAL_NM", "SlotCalibration", "ZoneFit",
           "calibrate_slots", "fit_zones", "gain_matrix", "normalise_zones",
           "steps_from_config", "zones_from_config", "with_minutes"]

#: Shapes of the transition between neighbouring zones in the gain model.
COUPLING_SHAPES = ("logistic", "linear")

#: Native oxide on an HF-last wafer before the furnace, nm (common practice, no source).
DEFAULT_INITIAL_NM = 1.5

_LN9 = math.log(9.0)


# --------------------------------------------------------------------------- inputs

def normalise_zones(zones):
    """Check heater zones and return them as ``(name, first_slot, last_slot)`` tuples.

    Parameters
    ----------
    zones : sequence
        Load end first.  Each item is an object with ``name``, ``first_slot`` and
        ``last_slot`` attributes (e.g. `filmmap.io.lotfile.Zone`), a mapping with those
        keys, or a tuple ``(name, first_slot, last_slot)``; slots are 1-based inclusive
        boat slot numbers (dimensionless).

    Returns
    -------
    tuple of (str, int, int)

    Raises
    ------
    FilmmapInputError
        For a malformed zone, a repeated name, ``first_slot > last_slot``, or zones that
        overlap or are not in load-to-source order (``field='zones'``).

    References
    ----------
    .. [1] Zone-to-slot model: common practice, no source.
    """
    out = []
    for i, z in enumerate(zones):
        try:
            if isinstance(z, Mapping):
                name, first, last = z["name"], z["first_slot"], z["last_slot"]
            elif hasattr(z, "first_slot"):
                name, first, last = z.name, z.first_slot, z.last_slot
            else:
                name, first, last = z
            first_i, last_i = int(first), int(last)
        except (KeyError, TypeError, ValueError, AttributeError):
            raise FilmmapInputError(f"zone {i + 1}: expected (name, first_slot, last_slot), "
                                    f"got {z!r}", field="zones") from None
        if first_i != first or last_i != last or not 1 <= first_i <= last_i:
            raise FilmmapInputError(f"zone {name!r}: slots {first}-{last}; expected whole numbers "
                                    "with 1 <= first_slot <= last_slot", field="zones")
        if any(str(name) == o[0] for o in out):
            raise FilmmapInputError(f"zone name {name!r} is used twice", field="zones")
        if out and first_i <= out[-1][2]:
            raise FilmmapInputError(f"zone {name!r} starts at slot {first_i}, not after zone "
                                    f"{out[-1][0]!r} (ends at slot {out[-1][2]}); expected "
                                    "non-overlapping zones, load end first", field="zones")
        out.append((str(name), first_i, last_i))
    return tuple(out)


def steps_from_config(config):
    """The recipe of a lot file as checked `Step` objects.

    Parameters
    ----------
    config : filmmap.io.lotfile.LotConfig
        A lot read by `filmmap.io.read_lot_file`.

    Returns
    -------
    tuple of Step
        Empty when the lot file has no recipe.

    Notes
    -----
    The lot-file reader builds the steps as `Step` objects and checks them with the rules
    of `validate_steps` (the same furnace temperature range), so they are returned as read
    and nothing here can refuse a step the reader accepted.

    References
    ----------
    .. [1] B. E. Deal and A. S. Grove, J. Appl. Phys. 36, 3770-3778 (1965) (the kinetics
       the steps feed).
    """
    return tuple(config.recipe)


def zones_from_config(config):
    """The heater zones of a lot file as ``(name, first_slot, last_slot)`` tuples.

    Parameters
    ----------
    config : filmmap.io.lotfile.LotConfig
        A lot read by `filmmap.io.read_lot_file`.

    Returns
    -------
    tuple of (str, int, int)
        Empty when the lot file has no ``[furnace]`` table.

    References
    ----------
    .. [1] Zone-to-slot model: common practice, no source.
    """
    if config.furnace is None:
        return ()
    return normalise_zones(config.furnace.zones)


def with_minutes(steps, step, minutes):
    """A copy of a recipe with one step's duration replaced.

    Parameters
    ----------
    steps : sequence of Step
        Checked recipe (see `validate_steps`).
    step : int or str
        Index or unique name of the step.
    minutes : float
        New duration, minutes (> 0).

    Returns
    -------
    tuple of Step

    References
    ----------
    .. [1] B. E. Deal and A. S. Grove, J. Appl. Phys. 36, 3770-3778 (1965).
    """
    k = step_index(steps, step)
    out = list(steps)
    out[k] = replace(out[k], minutes=float(minutes))
    return tuple(out)


# --------------------------------------------------------------------------- gain matrix

def gain_matrix(zones, slots, width_slots=0.0, shape="logistic"):
    """Zone-to-slot gain matrix G: the share of each zone's temperature seen by each slot.

    Parameters
    ----------
    zones : sequence
        Heater zones, load end first (see `normalise_zones`).
    slots : array_like of int
        Boat slot numbers (1 = load end) of the rows, dimensionless.
    width_slots : float
        Width of the transition between neighbouring zones, in slots (>= 0); 0 is a pure
        step.
    shape : {"logistic", "linear"}
        Transition function (see the module notes).

    Returns
    -------
    numpy.ndarray
        Shape ``(len(slots), len(zones))``, dimensionless, rows non-negative and summing
        to 1.

    Raises
    ------
    FilmmapInputError
        For a negative or non-finite width or an unknown shape.

    Notes
    -----
    Zone k weighs ``H_{k-1}(s) - H_k(s)`` at slot s, with H the transition across the
    boundary half-way between zone k and zone k + 1 (``H_0 = 1``, ``H_K = 0``).

    References
    ----------
    .. [1] Zone-to-slot coupling model: common practice, no source.
    """
    zs = normalise_zones(zones)
    if not zs:
        raise FilmmapInputError("at least one heater zone is needed", field="zones")
    w = float(width_slots)
    if not (math.isfinite(w) and w >= 0):
        raise FilmmapInputError(f"width_slots must be finite and >= 0 slots, got {width_slots!r}",
                                field="width_slots")
    if shape not in COUPLING_SHAPES:
        raise FilmmapInputError(f"shape must be one of {', '.join(COUPLING_SHAPES)}, got {shape!r}",
                                field="shape")
    s = np.asarray(slots, dtype=float).ravel()
    bounds = [0.5 * (zs[k][2] + zs[k + 1][1]) for k in range(len(zs) - 1)]
    H = [np.ones_like(s)]
    for b in bounds:
        if w == 0:
            H.append((s > b).astype(float))
        elif shape == "logistic":
            sigma = w / (2.0 * _LN9)
            H.append(0.5 * (1.0 + np.tanh(0.5 * (s - b) / sigma)))
        else:
            H.append(np.clip((s - b) / w + 0.5, 0.0, 1.0))
    H.append(np.zeros_like(s))
    return np.stack([H[k] - H[k + 1] for k in range(len(zs))], axis=1)


# --------------------------------------------------------------------------- per slot

@dataclass(frozen=True)
class SlotCalibration:
    """Per-slot effective temperature offsets read from the measured oxide.

    Attributes
    ----------
    slot : numpy.ndarray of int
        Boat slot numbers, as given.
    mean_nm : numpy.ndarray of float
        Measured wafer-mean thickness, nm.
    offset_C : numpy.ndarray of float
        Effective temperature offset, K; NaN where the mean is NaN or out of reach.
    model_nm : numpy.ndarray of float
        Model thickness at ``offset_C``, nm (NaN where ``offset_C`` is NaN).
    status : numpy.ndarray of str
        ``"ok"``, ``"missing"`` (mean is NaN), ``"out-of-range"`` (the mean needs an
        offset beyond the search range: thinner or thicker than the recipe can grow) or
        ``"no-convergence"`` (the root finder ran out of iterations; not expected).
    search_C : (float, float)
        Offset range searched, K.

    References
    ----------
    .. [1] B. E. Deal and A. S. Grove, J. Appl. Phys. 36, 3770-3778 (1965).
    """

    slot: np.ndarray
    mean_nm: np.ndarray
    offset_C: np.ndarray
    model_nm: np.ndarray
    status: np.ndarray
    search_C: tuple

    @property
    def ok(self):
        """Boolean mask of calibrated slots."""
        return self.status == "ok"

    @property
    def n_failed(self):
        """Number of slots with a finite mean that could not be calibrated."""
        return int(np.sum((self.status != "ok") & (self.status != "missing")))


def _offset_range(steps, search_K, temperature_range_C):
    """Offsets (K) that keep every oxidising step inside the accepted temperature range."""
    lo_t, hi_t = temperature_range_C
    temps = [t for s in steps if s.oxidising for t in (s.start_C, s.end_C)]
    if not temps:
        raise FilmmapInputError("the recipe has no oxidising step: it grows no oxide, so the "
                                "oxide cannot tell the temperature", field="steps")
    # 1 K margin: the differenced sensitivity looks up to 0.5 K beyond the offset
    return (max(-search_K, lo_t - min(temps) + 1.0), min(search_K, hi_t - max(temps) - 1.0))


def calibrate_slots(steps, slot, mean_nm, *, orientation="100", initial_nm=DEFAULT_INITIAL_NM,
                    pressure_atm=None, thin_regime="deal-grove", search_K=60.0, tol_nm=1e-7,
                    temperature_range_C=DEFAULT_TEMPERATURE_RANGE_C, constants=None):
    """Effective temperature offset of each slot that makes the model grow its measured mean.

    Parameters
    ----------
    steps : sequence of Step or mapping
        The recipe as it was run (see `integrate_recipe`).
    slot : array_like of int
        Boat slot of each wafer (1 = load end), dimensionless.
    mean_nm : array_like of float
        Measured wafer-mean thickness per wafer, nm (NaN = no usable mean).
    orientation : str
        Silicon orientation, ``"100"`` or ``"111"``.
    initial_nm : float or array_like
        Oxide before the first step, nm (default 1.5, native oxide); scalar or per wafer.
    pressure_atm : float, mapping or None
        Oxidant partial pressure in atm, as for `integrate_recipe` (None: the reference
        pressure of the rate data).
    thin_regime : str
        Initial-regime treatment of dry steps, as for `integrate_recipe`.
    search_K : float
        Largest offset searched either way, K (> 0); also limited so that every
        oxidising step stays inside ``temperature_range_C``.
    tol_nm : float
        Accepted thickness mismatch, nm (> 0).
    temperature_range_C : (float, float)
        Accepted temperatures of oxidising steps, degrees Celsius.
    constants : dict, optional
        Rate constants, as for `integrate_recipe` (None: the reference file's).

    Returns
    -------
    SlotCalibration

    Raises
    ------
    FilmmapInputError
        For an invalid recipe or arrays of different lengths, a negative or infinite
        mean, or a recipe without an oxidising step.

    Notes
    -----
    The final thickness increases monotonically with a temperature offset applied to all
    steps, so each slot has at most one root in the search range.  All slots are solved
    at once by Newton's method on ``model(dT) - mean`` with the five-point differenced
    sensitivity (`thickness_sensitivity_to_temperature`), safeguarded by a bracket that
    is narrowed at every step (a Newton step leaving the bracket is replaced by
    bisection).

    References
    ----------
    .. [1] B. E. Deal and A. S. Grove, J. Appl. Phys. 36, 3770-3778 (1965).
    """
    st = validate_steps(steps, temperature_range_C)
    slots = np.asarray(slot).ravel()
    mean = np.asarray(mean_nm, dtype=float).ravel()
    if slots.size != mean.size:
        raise FilmmapInputError(f"{mean.size} means for {slots.size} slots; expected one mean per "
                                "slot", field="mean_nm")
    if np.any(np.isinf(mean)) or np.any(mean[np.isfinite(mean)] < 0):
        raise FilmmapInputError("wafer means must be >= 0 nm or NaN (no usable mean)",
                                field="mean_nm")
    search_K = float(search_K)
    if not (math.isfinite(search_K) and search_K > 0):
        raise FilmmapInputError(f"search_K must be finite and > 0 K, got {search_K!r}",
                                field="search_K")
    lo_lim, hi_lim = _offset_range(st, search_K, temperature_range_C)
    x0 = np.broadcast_to(np.asarray(initial_nm, dtype=float), mean.shape)
    kw = dict(pressure_atm=pressure_atm, thin_regime=thin_regime,
              temperature_range_C=temperature_range_C, constants=constants)
    status = np.where(np.isfinite(mean), "ok", "missing").astype(object)
    offset = np.full(mean.shape, np.nan)
    model = np.full(mean.shape, np.nan)
    use = np.isfinite(mean)
    if use.any():
        m = mean[use]
        x0u = x0[use]

        def f(d):
            return integrate_recipe(st, orientation, x0u, d, **kw) - m

        lo = np.full(m.shape, lo_lim)
        hi = np.full(m.shape, hi_lim)
        f_lo, f_hi = f(lo), f(hi)
        bad = (f_lo > tol_nm) | (f_hi < -tol_nm)
        x = np.clip(np.zeros(m.shape), lo, hi)
        done = bad.copy()
        fx = f(x)
        for _ in range(100):
            conv = ~done & (np.abs(fx) <= tol_nm)
            done |= conv
            if done.all():
                break
            lo = np.where(fx < 0, x, lo)
            hi = np.where(fx > 0, x, hi)
            slope = thickness_sensitivity_to_temperature(st, orientation, x0u, x, **kw)
            with np.errstate(divide="ignore", invalid="ignore"):
                newton = x - fx / slope
            ok = np.isfinite(newton) & (newton > lo) & (newton < hi)
            step = np.where(ok, newton, 0.5 * (lo + hi))
            x = np.where(done, x, step)
            fx = f(x)
        failed = bad | ~done
        offset[use] = np.where(failed, np.nan, x)
        model[use] = np.where(failed, np.nan, fx + m)
        status[use] = np.where(bad, "out-of-range", np.where(done, "ok", "no-convergence"))
    return SlotCalibration(slot=slots, mean_nm=mean, offset_C=offset, model_nm=model,
                           status=status.astype(str), search_C=(lo_lim, hi_lim))


# --------------------------------------------------------------------------- per zone

@dataclass(frozen=True)
class ZoneFit:
    """Heater-zone temperature errors fitted to per-slot effective offsets.

    Attributes
    ----------
    names : tuple of str
        Zone names, load end first.
    absolute_C : numpy.ndarray
        Fitted zone offsets e'_z, K, including the common offset (NaN for a zone with too
        little data to be determined).
    common_C : float
        Weighted mean of the per-slot effective offsets used, K: temperature, rate and time
        errors of the whole boat together (not separable from the oxide alone).
    error_C : numpy.ndarray
        ``absolute_C - common_C``: zone-to-zone temperature differences, K.
    observed : numpy.ndarray of bool
        Zones with enough data to be fitted.
    slot : numpy.ndarray of int
        Slots used in the fit.
    fitted_C : numpy.ndarray
        Zone-model offset at those slots, K.
    residual_C : numpy.ndarray
        Effective offset minus the zone model, K.
    weight : numpy.ndarray
        Fit weights of those slots, dimensionless.
    residual_rms_C : float
        Weighted root-mean-square residual, K (NaN with no slots).
    explained : float
        ``1 - sum(w r^2) / sum(w (dT - common)^2)``, the share of the slot-to-slot variance
        of the effective offsets that the zones explain; NaN when the offsets are flat
        (weighted rms spread below 1e-6 K), where the figure means nothing.
    width_slots : float
        Transition width of the gain model, slots.
    shape : str
        Transition shape of the gain model.

    References
    ----------
    .. [1] Zone-to-slot coupling model: common practice, no source.
    """

    names: tuple
    absolute_C: np.ndarray
    common_C: float
    error_C: np.ndarray
    observed: np.ndarray
    slot: np.ndarray
    fitted_C: np.ndarray
    residual_C: np.ndarray
    weight: np.ndarray
    residual_rms_C: float
    explained: float
    width_slots: float
    shape: str

    def as_dict(self):
        """Zone name -> relative error in K (None where undetermined)."""
        return {n: (float(e) if np.isfinite(e) else None)
                for n, e in zip(self.names, self.error_C)}


def slot_arrays(slot, offset_C, weight=None):
    """Checked slot, offset and weight arrays of the slots a fit can use.

    Parameters
    ----------
    slot : array_like of int
        Boat slots (1 = load end).
    offset_C : array_like of float
        Effective offset per slot, K (NaN = not usable).
    weight : array_like of float, optional
        Fit weight per slot (default 1; 0 leaves the slot out).

    Returns
    -------
    (numpy.ndarray, numpy.ndarray, numpy.ndarray)
        Slots, offsets and weights of the usable slots (finite offset, weight > 0).

    Raises
    ------
    FilmmapInputError
        For arrays of different lengths or negative or non-finite weights.
    """
    s = np.asarray(slot).ravel()
    d = np.asarray(offset_C, dtype=float).ravel()
    w = np.ones(d.shape) if weight is None else np.asarray(weight, dtype=float).ravel()
    if not (s.size == d.size == w.size):
        raise FilmmapInputError(f"slot, offset_C and weight have {s.size}, {d.size} and {w.size} "
                                "entries; expected one per slot", field="offset_C")
    if np.any(~np.isfinite(w)) or np.any(w < 0):
        raise FilmmapInputError("fit weights must be finite and >= 0", field="weight")
    use = np.isfinite(d) & (w > 0)
    return s[use], d[use], w[use]


def fit_zones(slot, offset_C, zones, weight=None, *, width_slots=0.0, shape="logistic",
              min_zone_weight=1.0):
    """Fit one temperature error per heater zone to the per-slot effective offsets.

    Parameters
    ----------
    slot : array_like of int
        Boat slots (1 = load end), dimensionless.
    offset_C : array_like of float
        Effective temperature offset per slot, K (NaN entries are left out).
    zones : sequence
        Heater zones, load end first (see `normalise_zones`).
    weight : array_like of float, optional
        Non-negative fit weight per slot, dimensionless (default 1); e.g. 1 for product
        and monitor wafers, 0 for dummies.
    width_slots : float
        Zone transition width of the gain model, slots (0 = pure step).
    shape : {"logistic", "linear"}
        Transition shape of the gain model.
    min_zone_weight : float
        A zone is fitted only when the summed weight of its gain over the slots used is
        at least this (default 1: about one wafer's worth of evidence), dimensionless;
        otherwise its error is NaN.

    Returns
    -------
    ZoneFit

    Raises
    ------
    FilmmapInputError
        For arrays of different lengths, negative weights or bad zones.

    Notes
    -----
    Weighted linear least squares ``min sum_s w_s (dT_s - sum_z G[s, z] e'_z)^2`` over the
    determined zones.  Because the rows of G sum to 1 the common offset is in the span of
    the model; it is reported separately (``common_C``) and removed from ``error_C``
    (see the module notes).  When fewer slots than zones are used the fit is exact and
    its residual says nothing; the caller judges the evidence from the slot count.

    References
    ----------
    .. [1] Zone-to-slot coupling model: common practice, no source.
    """
    zs = normalise_zones(zones)
    names = tuple(z[0] for z in zs)
    s_u, d_u, w_u = slot_arrays(slot, offset_C, weight)
    G = gain_matrix(zs, s_u, width_slots, shape)
    observed = (w_u @ G) >= min_zone_weight if s_u.size else np.zeros(len(zs), bool)
    absolute = np.full(len(zs), np.nan)
    nan = float("nan")
    if s_u.size == 0 or not observed.any():
        return ZoneFit(names, absolute, nan, absolute.copy(), observed, s_u, d_u * nan, d_u * nan,
                       w_u, nan, nan, float(width_slots), shape)
    sw = np.sqrt(w_u)
    Go = G[:, observed]
    sol, *_ = np.linalg.lstsq(Go * sw[:, None], d_u * sw, rcond=None)
    absolute[observed] = sol
    fitted = Go @ sol
    resid = d_u - fitted
    common = float(np.sum(w_u * d_u) / np.sum(w_u))
    ss_res = float(np.sum(w_u * resid**2))
    ss_tot = float(np.sum(w_u * (d_u - common) ** 2))
    rms = math.sqrt(ss_res / float(np.sum(w_u)))
    explained = nan if ss_tot <= 1e-12 * float(np.sum(w_u)) else 1.0 - ss_res / ss_tot
    return ZoneFit(names, absolute, common, absolute - common, observed, s_u, fitted, resid, w_u,
                   rms, explained, float(width_slots), shape)
