"""Run-to-run control: EWMA estimates of a furnace's state across lots, and the next recipe.

One lot tells the advice (`filmmap.growth.advice`) the furnace's *effective temperature
offsets*: a common offset (temperature, rate and time errors of the whole boat together,
which the oxide cannot tell apart) and one error per heater zone.  Acting on a single lot
chases its noise; ignoring the history lets a drift run away.  The run-to-run practice
in semiconductor manufacturing is to filter the per-run estimate of the process state
with an exponentially weighted moving average,

    x_hat_k = w x_k + (1 - w) x_hat_(k-1),

and to choose the next run's inputs from ``x_hat`` (Sachs, Hu & Ingolfsson 1995).  The
weight w (0 < w <= 1) trades noise rejection (small w) against speed of following a
drift (large w; w = 1 is "use the last lot only", what the one-lot advice does).  Under a
steady drift of d per run the EWMA lags by d (1 - w) / w, so one-step-ahead errors grow as
d / w: with a drifting furnace a small weight leaves the lot off target.

What is filtered.  The *furnace's own* state must be filtered, not what the lot read,
because the lot's offsets include the zone trims that were in force during its run.  For
each lot and heater zone z,

    e_z = common_offset_C + zone_errors_C[z] - applied_trim_z      (K)

is the zone's absolute effective offset with the applied trim taken out (the advice
reports ``zone_errors_C`` relative to ``common_offset_C``, so their sum is the zone's
fitted absolute offset).  The common part, ``c = common_offset_C - mean trim`` (the
trims averaged with the zone's share of product slots), is filtered too; it alone is
used for a furnace without zones and for a zone that was never determined.  A zone
undetermined in one lot holds its previous estimate.

Next run (`next_run`).  Trims that flatten the boat: ``t_z = -(e_hat_z - e_bar)``, with
``e_bar`` the product-slot weighted mean of the ``e_hat``, so the trims are centred and
the time takes the mean (as in the advice), clipped to ``+/- max_offset_C``; then the
duration of the adjust step that puts the predicted mean of the product slots on target
(`filmmap.growth.minutes_for_target` when the trimmed offsets are uniform, refined by
Brent's method on `filmmap.growth.integrate_recipe` otherwise), within
``+/- max_time_change_pct`` of the current duration.  The trims returned are those to
have *in force* during the next run, relative to the zones' untrimmed set points.

An invented drifting furnace that closes the loop (each run: grow -> measure -> advice ->
EWMA -> next recipe) lives with the tests, ``tests/furnace_sim.py``: it is a test fixture,
not part of the package; ``benchmarks/r2r_closed_loop.py`` compares weights with it.

Caution: every recipe or zone change is advisory and must be approved by the process
owner, within the furnace's qualified limits (see `filmmap.cautions.ADVICE_CAUTION`).

Units: temperature offsets and trims K, time minutes, thickness nm, errors percent.

References
----------
.. [1] E. Sachs, A. Hu and A. Ingolfsson, "Run by run process control: combining SPC and
   feedback control", IEEE Trans. Semicond. Manuf. 8, 26 (1995) (from memory).
.. [2] B. E. Deal and A. S. Grove, J. Appl. Phys. 36, 3770-3778 (1965) (growth model).
.. [3] R. P. Brent, Algorithms for Minimization without Derivatives, Prentice-Hall (1973)
   (`scipy.optimize.brentq`).
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field

import numpy as np
from scipy.optimize import brentq

from filmmap.errors import FilmmapInputError
from filmmap.lotstats.roles import roles_from_boat
from filmmap.lotstats.uniformity import nonuniformity_pct
from filmmap.growth import (
    CAUTION,
    DEFAULT_INITIAL_NM,
    gain_matrix,
    integrate_recipe,
    minutes_for_target,
    normalise_zones,
    step_index,
    validate_steps,
    with_minutes,
)

__all__ = ["FurnaceEstimate", "LotOffsets", "NextRun", "estimate_furnace",
           "estimate_from_records", "ewma_filter", "lot_offsets", "next_run",
           "next_run_from_history"]


def _f(v):
    if v is None:
        return None
    v = float(v)
    return v if math.isfinite(v) else None


def _check_weight(weight):
    w = float(weight)
    if not 0 < w <= 1:
        raise FilmmapInputError(f"the EWMA weight must be in (0, 1], got {weight!r}",
                                field="weight")
    return w


def ewma_filter(values, weight, initial=None):
    """Exponentially weighted moving average of a run-to-run series.

    Parameters
    ----------
    values : array_like of float
        One estimate per run, in run order (NaN or None = no estimate from that run), in
        any unit.
    weight : float
        w in (0, 1]: the weight of the newest run.
    initial : float, optional
        ``x_hat_0``; default the first finite value (the filter then starts from it,
        ``x_hat_1 = x_1``).

    Returns
    -------
    numpy.ndarray
        ``x_hat_k = w x_k + (1 - w) x_hat_(k-1)`` after each run (same unit); a run
        without a value holds the previous estimate (NaN before the first value when no
        ``initial`` is given).

    Raises
    ------
    FilmmapInputError
        For a weight outside (0, 1].

    References
    ----------
    .. [1] E. Sachs, A. Hu and A. Ingolfsson, IEEE Trans. Semicond. Manuf. 8, 26
       (1995) (from memory).
    """
    w = _check_weight(weight)
    x = np.asarray([np.nan if v is None else v for v in np.ravel(values)], dtype=float)
    out = np.full(x.size, np.nan)
    prev = np.nan if initial is None else float(initial)
    for k, v in enumerate(x):
        if math.isfinite(v):
            prev = v if not math.isfinite(prev) else w * v + (1.0 - w) * prev
        out[k] = prev
    return out


# --------------------------------------------------------------------------- per lot

@dataclass(frozen=True)
class LotOffsets:
    """The furnace's own effective offsets read from one lot, applied trims taken out.

    Attributes
    ----------
    common_C : float or None
        Common effective offset minus the mean applied trim, K.
    zone_C : dict
        Zone name -> absolute effective offset of the zone minus its applied trim, K
        (None where the lot could not determine the zone).

    References
    ----------
    .. [1] B. E. Deal and A. S. Grove, J. Appl. Phys. 36, 3770-3778 (1965).
    """

    common_C: float | None
    zone_C: dict = field(default_factory=dict)


def _zone_shares(zone_names, zones=None, slots=None, width_slots=0.0, shape="logistic"):
    """Weight of each zone in the product-slot mean (equal when unknown)."""
    if zones and slots is not None and len(slots):
        zs = normalise_zones(zones)
        G = gain_matrix(zs, np.asarray(slots), width_slots, shape)
        col = dict(zip([z[0] for z in zs], G.sum(axis=0)))
        share = np.array([col.get(n, 0.0) for n in zone_names])
        if share.sum() > 0:
            return share / share.sum()
    return np.full(len(zone_names), 1.0 / max(len(zone_names), 1))


def lot_offsets(advice, applied_trims_C=None, *, zones=None, product_slots=None):
    """The furnace's effective offsets from one lot's advice.

    Parameters
    ----------
    advice : mapping
        An advice dict (``advice.json``): uses ``common_offset_C`` and
        ``zone_errors_C`` (K) and, for the slot weights, ``model.width_slots`` and
        ``model.shape``.
    applied_trims_C : mapping, optional
        Zone name -> trim in force during that lot's run, K (missing zones: 0 K).
    zones : sequence, optional
        Heater zones with their slots (see `filmmap.growth.normalise_zones`); with
        ``product_slots`` they weight the mean applied trim by each zone's share of
        product slots (else all zones weigh the same).
    product_slots : array_like of int, optional
        Product slots of the lot (1 = load end).

    Returns
    -------
    LotOffsets

    Raises
    ------
    FilmmapInputError
        When the advice has no ``common_offset_C`` key.

    References
    ----------
    .. [1] Zone-to-slot coupling model: common practice, no source.
    """
    if not isinstance(advice, Mapping) or "common_offset_C" not in advice:
        raise FilmmapInputError("the advice has no common_offset_C: it was not made by this "
                                "filmmap's advice", field="advice")
    common = _f(advice.get("common_offset_C"))
    errors = dict(advice.get("zone_errors_C") or {})
    trims = {str(k): float(v or 0.0) for k, v in (applied_trims_C or {}).items()}
    names = list(errors)
    unknown = sorted(set(trims) - set(names)) if names else []
    if unknown:
        raise FilmmapInputError(f"applied trims name zone(s) {unknown} that the advice does not "
                                f"have ({names})", field="applied_trims_C")
    model = advice.get("model") or {}
    share = _zone_shares(names, zones, product_slots, float(model.get("width_slots", 0.0)),
                         model.get("shape", "logistic"))
    t = np.array([trims.get(n, 0.0) for n in names])
    t_mean = float(share @ t) if names else 0.0
    zone = {}
    for n in names:
        e = _f(errors[n])
        zone[n] = None if (e is None or common is None) else common + e - trims.get(n, 0.0)
    return LotOffsets(common_C=None if common is None else common - t_mean, zone_C=zone)


# --------------------------------------------------------------------------- estimate

@dataclass(frozen=True)
class FurnaceEstimate:
    """EWMA-filtered furnace state after the lots seen so far.

    Attributes
    ----------
    weight : float
        EWMA weight w used.
    n_lots : int
        Lots filtered.
    common_C : float or None
        Filtered common offset, K.
    zone_C : dict
        Zone -> filtered absolute zone offset, K (None: never determined).
    common_series : numpy.ndarray
        The per-lot common offsets, K (NaN where missing).
    common_filtered : numpy.ndarray
        The filter after each lot, K.

    References
    ----------
    .. [1] E. Sachs, A. Hu and A. Ingolfsson, IEEE Trans. Semicond. Manuf. 8, 26
       (1995) (from memory).
    """

    weight: float
    n_lots: int
    common_C: float | None
    zone_C: dict
    common_series: np.ndarray
    common_filtered: np.ndarray

    @property
    def zone_error_C(self):
        """Zone -> filtered zone offset relative to the filtered common offset, K."""
        return {n: (None if v is None or self.common_C is None else v - self.common_C)
                for n, v in self.zone_C.items()}


def estimate_furnace(history, weight=0.3, *, initial=None):
    """EWMA estimate of the furnace's offsets from a run-ordered list of lots.

    Parameters
    ----------
    history : sequence of LotOffsets
        Oldest lot first.
    weight : float
        EWMA weight w in (0, 1] (default 0.3).
    initial : LotOffsets or float, optional
        Starting estimate (K): a float for the common offset and every zone, or a
        `LotOffsets`; default the first lot's values.

    Returns
    -------
    FurnaceEstimate

    Raises
    ------
    FilmmapInputError
        For a weight outside (0, 1] or an empty history.

    References
    ----------
    .. [1] E. Sachs, A. Hu and A. Ingolfsson, IEEE Trans. Semicond. Manuf. 8, 26
       (1995) (from memory).
    """
    w = _check_weight(weight)
    hist = list(history)
    if not hist:
        raise FilmmapInputError("no lot in the history: nothing to estimate from",
                                field="history")
    if isinstance(initial, LotOffsets):
        init_c, init_z = initial.common_C, dict(initial.zone_C)
    else:
        init_c, init_z = initial, {}
    c_series = np.array([np.nan if h.common_C is None else h.common_C for h in hist])
    c_filt = ewma_filter(c_series, w, init_c)
    names = []
    for h in hist:
        names += [n for n in h.zone_C if n not in names]
    zone = {}
    for n in names:
        series = [h.zone_C.get(n) for h in hist]
        start = init_z.get(n, initial if isinstance(initial, (int, float)) else None)
        v = ewma_filter(series, w, start)[-1]
        zone[n] = _f(v)
    return FurnaceEstimate(weight=w, n_lots=len(hist), common_C=_f(c_filt[-1]), zone_C=zone,
                           common_series=c_series, common_filtered=c_filt)


def _product_slots_of(row):
    return [w.slot for w in row.wafers if w.role == "product"]


def estimate_from_records(rows, weight=0.3, *, zones=None, last=None):
    """`estimate_furnace` from history records (`filmmap.history.store.LotRecord`).

    Parameters
    ----------
    rows : sequence of LotRecord
        Lots of one furnace in run order; those without an advice are skipped.
    weight : float
        EWMA weight w in (0, 1].
    zones : sequence, optional
        Heater zones with slots, to weight the mean applied trim by product slots.
    last : int, optional
        Use only the latest ``last`` lots with an advice.

    Returns
    -------
    FurnaceEstimate
        Over the lots that have an advice, with their ``applied_trims_C`` (None = 0 K)
        taken out.

    Raises
    ------
    FilmmapInputError
        When no lot has an advice.

    References
    ----------
    .. [1] E. Sachs, A. Hu and A. Ingolfsson, IEEE Trans. Semicond. Manuf. 8, 26
       (1995) (from memory).
    """
    use = [r for r in rows if r.advice]
    if last is not None:
        use = use[-int(last):]
    if not use:
        raise FilmmapInputError("no recorded lot has an advice (a recipe and a target are "
                                "needed to read the furnace's offsets)", field="history")
    hist = [lot_offsets(r.advice, r.applied_trims_C, zones=zones,
                        product_slots=_product_slots_of(r)) for r in use]
    return estimate_furnace(hist, weight)


# --------------------------------------------------------------------------- next run

@dataclass(frozen=True)
class NextRun:
    """Recipe time and zone trims for the next run from a furnace estimate.

    Attributes
    ----------
    adjust_step : str
        Step whose duration is set.
    minutes_now, minutes_next : float
        Its current and advised durations, min.
    zone_trims_C : dict
        Zone -> trim to have in force during the next run, K (relative to the
        untrimmed zone set point).
    predicted_mean_nm : float
        Predicted mean of the product slots, nm.
    predicted_wtw_pct : float or None
        Predicted 100 s / mean of the product slots (zone model only), %.
    time_clipped : int
        -1 / +1 when the time sits on its lower / upper bound, else 0.
    clipped_zones : list of str
        Zones whose trim sits on ``+/- max_offset_C``.
    warnings : list of str
    caution : str

    References
    ----------
    .. [1] E. Sachs, A. Hu and A. Ingolfsson, IEEE Trans. Semicond. Manuf. 8, 26
       (1995) (from memory).
    """

    adjust_step: str
    minutes_now: float
    minutes_next: float
    zone_trims_C: dict
    predicted_mean_nm: float
    predicted_wtw_pct: float | None
    time_clipped: int
    clipped_zones: list
    warnings: list
    caution: str = CAUTION

    def as_dict(self):
        """JSON-ready dict (numbers as float, None for missing)."""
        return {"adjust_step": self.adjust_step, "minutes_now": self.minutes_now,
                "minutes_next": self.minutes_next, "zone_trims_C": dict(self.zone_trims_C),
                "predicted_mean_nm": _f(self.predicted_mean_nm),
                "predicted_wtw_pct": _f(self.predicted_wtw_pct),
                "time_clipped": self.time_clipped, "clipped_zones": list(self.clipped_zones),
                "warnings": list(self.warnings), "caution": self.caution}


def next_run(steps, adjust_step, target_nm, estimate, *, zones=(), product_slots=None,
             orientation="100", initial_nm=DEFAULT_INITIAL_NM, pressure_atm=None,
             thin_regime="deal-grove", max_offset_C=5.0, max_time_change_pct=15.0,
             width_slots=0.0, shape="logistic"):
    """The next run's adjust-step time and zone trims from a filtered furnace estimate.

    Parameters
    ----------
    steps : sequence of Step or mapping
        The recipe to run next (its adjust-step duration is the current one).
    adjust_step : str or int
        The oxidising step whose duration is set.
    target_nm : float
        Target thickness, nm.
    estimate : FurnaceEstimate
        From `estimate_furnace` / `estimate_from_records`.
    zones : sequence
        Heater zones with slots, load end first (empty: time only).
    product_slots : array_like of int, optional
        Product slots of the next run (required with zones).
    orientation : str
        ``"100"`` or ``"111"``.
    initial_nm : float
        Oxide before the first step, nm.
    pressure_atm : float, mapping or None
        Oxidant partial pressure, atm, as for `integrate_recipe`.
    thin_regime : str
        As for `integrate_recipe`.
    max_offset_C : float
        Largest trim either way, K (> 0).
    max_time_change_pct : float
        Largest change of the duration, percent of the current one (0-100).
    width_slots : float
        Zone transition width of the gain model, slots.
    shape : str
        Gain-model transition shape.

    Returns
    -------
    NextRun

    Raises
    ------
    FilmmapInputError
        For an estimate without a common offset, zones without product slots, bad
        bounds or an invalid recipe.

    References
    ----------
    .. [1] E. Sachs, A. Hu and A. Ingolfsson, IEEE Trans. Semicond. Manuf. 8, 26
       (1995) (from memory).
    .. [2] B. E. Deal and A. S. Grove, J. Appl. Phys. 36, 3770-3778 (1965).
    """
    st = validate_steps(steps)
    k = step_index(st, adjust_step)
    if not st[k].oxidising:
        raise FilmmapInputError(f"adjust step {st[k].name!r} grows no oxide", field="adjust_step")
    target = float(target_nm)
    if not (math.isfinite(target) and target > 0):
        raise FilmmapInputError(f"target must be > 0 nm, got {target_nm!r}", field="target_nm")
    max_off = float(max_offset_C)
    p_time = float(max_time_change_pct)
    if not (math.isfinite(max_off) and max_off > 0):
        raise FilmmapInputError(f"max_offset_C must be > 0 K, got {max_offset_C!r}",
                                field="max_offset_C")
    if not 0 < p_time < 100:
        raise FilmmapInputError(f"max_time_change_pct must be in (0, 100), got "
                                f"{max_time_change_pct!r}", field="max_time_change_pct")
    if estimate.common_C is None:
        raise FilmmapInputError("the estimate has no common offset", field="estimate")
    warnings = []
    zs = normalise_zones(zones) if zones else ()
    names = [z[0] for z in zs]
    if zs:
        if product_slots is None or len(product_slots) == 0:
            raise FilmmapInputError("zone trims need the product slots of the next run",
                                    field="product_slots")
        slots = np.asarray(product_slots, dtype=int)
        G = gain_matrix(zs, slots, width_slots, shape)
        e = np.array([estimate.zone_C.get(n) if estimate.zone_C.get(n) is not None
                      else estimate.common_C for n in names], dtype=float)
        missing = [n for n in names if estimate.zone_C.get(n) is None]
        if missing:
            warnings.append(f"zone(s) {', '.join(missing)} have no estimate; taken at the "
                            "common offset and not trimmed")
        share = G.sum(axis=0) / G.sum()
        t = -(e - float(share @ e))
        for i, n in enumerate(names):
            if n in missing:
                t[i] = 0.0
        t = np.clip(t, -max_off, max_off)
        clipped = [n for n, v in zip(names, t) if abs(v) >= max_off * (1 - 1e-9)]
        for n in clipped:
            warnings.append(f"zone {n!r} trim clipped at the limit of +/-{max_off:g} K")
        base = G @ (e + t)
    else:
        slots = np.array([1])
        t, clipped = np.zeros(0), []
        base = np.array([estimate.common_C])
    kw = dict(pressure_atm=pressure_atm, thin_regime=thin_regime)
    m_now = float(st[k].minutes)
    m_lo, m_hi = m_now * (1 - p_time / 100.0), m_now * (1 + p_time / 100.0)

    def _mean_at(m):
        return float(np.mean(integrate_recipe(with_minutes(st, k, m), orientation, initial_nm,
                                              base, **kw)))

    uniform = float(np.ptp(base)) < 1e-9
    guess = minutes_for_target(st, k, target, orientation, initial_nm, float(np.mean(base)),
                               on_unreachable="nan", **kw)
    guess = float(guess)
    clip = 0
    if uniform and math.isfinite(guess) and m_lo <= guess <= m_hi:
        minutes = guess
    else:
        g_lo, g_hi = _mean_at(m_lo) - target, _mean_at(m_hi) - target
        if g_lo >= 0:
            minutes, clip = m_lo, (-1 if g_lo > 0 else 0)
        elif g_hi <= 0:
            minutes, clip = m_hi, (1 if g_hi < 0 else 0)
        else:
            minutes = brentq(lambda m: _mean_at(m) - target, m_lo, m_hi, xtol=1e-9, rtol=1e-12)
    if clip:
        warnings.append(f"time change clipped at {clip * p_time:+g} % of {m_now:g} min: the "
                        "target is not reachable within the bound")
    x = integrate_recipe(with_minutes(st, k, minutes), orientation, initial_nm,
                         base if zs else base[0], **kw)
    x = np.atleast_1d(np.asarray(x, dtype=float))
    wtw = float(nonuniformity_pct(x)) if x.size >= 2 else None
    return NextRun(adjust_step=st[k].name or str(k), minutes_now=m_now,
                   minutes_next=float(minutes),
                   zone_trims_C={n: float(v) for n, v in zip(names, t)},
                   predicted_mean_nm=float(np.mean(x)), predicted_wtw_pct=wtw,
                   time_clipped=int(clip), clipped_zones=clipped, warnings=warnings)


def next_run_from_history(rows, config, weight=0.3, *, last=None):
    """Run-to-run advice for the next run of a lot file, from a furnace's recorded lots.

    Parameters
    ----------
    rows : sequence of LotRecord
        Recorded lots of the furnace, in run order (`filmmap.history.store.lots`).
    config : filmmap.io.lotfile.LotConfig
        The lot file of the next run: recipe (its adjust-step duration is the current
        one), ``[target]``, ``[furnace]`` zones and limits, ``[boat]`` roles.
    weight : float
        EWMA weight w in (0, 1].
    last : int, optional
        Filter only the latest ``last`` lots with an advice.

    Returns
    -------
    NextRun
        Product slots of the next run: the boat's slots less dummies and monitors
        when the lot file has a ``[boat]``, else the latest lot's product slots.
        A warning notes lots whose applied trims were not recorded (taken as 0 K).

    Raises
    ------
    FilmmapInputError
        Without a recipe or target in the lot file, or without a lot with an advice.

    References
    ----------
    .. [1] E. Sachs, A. Hu and A. Ingolfsson, IEEE Trans. Semicond. Manuf. 8, 26
       (1995) (from memory).
    """
    from filmmap.growth import steps_from_config, zones_from_config

    if not config.recipe or config.target is None:
        raise FilmmapInputError("run-to-run advice needs [[recipe.step]] and [target] in the "
                                "lot file", field="recipe" if not config.recipe else "target")
    steps = steps_from_config(config)
    zones = zones_from_config(config)
    use = [r for r in rows if r.advice]
    if last is not None:
        use = use[-int(last):]
    est = estimate_from_records(use, weight, zones=zones)
    latest = use[-1]
    if config.boat is not None:
        every = np.arange(1, config.boat.slots + 1)
        product = every[roles_from_boat(every, config.boat) == "product"].tolist()
    else:
        product = _product_slots_of(latest)
    adjust = config.target.adjust_step or latest.advice.get("adjust_step")
    model = latest.advice.get("model") or {}
    furnace = config.furnace
    out = next_run(steps, adjust, config.target.thickness_nm, est, zones=zones,
                   product_slots=product, orientation=config.stack.orientation,
                   initial_nm=float(model.get("initial_nm") or DEFAULT_INITIAL_NM),
                   max_offset_C=furnace.max_offset_C if furnace is not None else 5.0,
                   max_time_change_pct=furnace.max_time_change_pct if furnace is not None
                   else 15.0, width_slots=float(model.get("width_slots", 0.0)),
                   shape=model.get("shape", "logistic"))
    unknown = sum(1 for r in use if r.applied_trims_C is None)
    if zones and unknown:
        out.warnings.append(f"{unknown} of {len(use)} lot(s) have no recorded applied trims; "
                            "taken as 0 K")
    out.warnings.append(f"EWMA weight {est.weight:g} over {est.n_lots} lot(s)")
    return out
