"""Next-run advice from a measured lot: adjust-step time and heater-zone trims.

`advise` turns the measured wafer means of one furnace lot into advice for the next run
of the same recipe:

1. Calibrate (`filmmap.growth.calibrate`): the per-slot effective temperature offset that
   makes the Deal-Grove model reproduce each wafer's measured mean, and the zone errors
   that explain them through the zone-to-slot gain matrix G.
2. Zone trims t (one per heater zone, K) within ``+/- max_offset_C`` that minimise the
   predicted slot-to-slot spread of the product wafers: bounded linear least squares
   (`scipy.optimize.lsq_linear`) on the model linearised about the current point,
   ``x_s(t + d) ~ x_s(t) + S_s (G d)_s`` with ``S_s`` the per-slot thickness sensitivity
   to temperature (nm/K), repeated on the nonlinear model (``n_iterations`` times).  The
   objective is the centred, mean-normalised thickness of the product slots (so the
   spread, not the mean, is minimised).  A uniform shift of all zones changes the mean,
   not the spread; to make the answer unique and keep trims small a Tikhonov term of
   ``trim_regularisation`` (default 1e-2) times the mean squared column norm of the data
   term is added.  It selects the smallest trims that flatten the boat and leaves the
   mean to the time; it makes each trim about 1 % smaller than the unregularised
   optimum, far below the model's accuracy.  (Without it the uniform part of the trims
   would be set by a second-order effect, the slightly different relative temperature
   sensitivity of thin and thick slots, which buys almost nothing: on the demo furnace a
   0.9 K uniform shift for a 0.5 % smaller spread.)
   With ``reference_zone`` set, that zone's trim is held at 0 instead and the others
   are trimmed relative to it.
3. Time: with those trims, the duration of ``adjust_step`` that puts the mean of the
   product wafers on target (Brent's method on the nonlinear model), bounded by
   ``+/- max_time_change_pct`` of the current duration.  Steps 2 and 3 are alternated
   twice, since the trims are optimised at the new duration.
4. Predictions: the model per slot now (per-slot effective offsets, i.e. the measured
   means again) and next (effective offsets plus the trims through G, new duration).
   A slot's deviation that the zones do not explain stays in the next-run prediction:
   the trims cannot remove it, and the advice does not pretend they do.

Time/rate versus temperature.  The oxide cannot tell a global rate or time error from a
uniform temperature offset (see `filmmap.growth.calibrate`).  The time advice uses the
per-slot effective offsets directly, so it corrects whatever made the whole lot thin or
thick; the trims see only the slot-to-slot differences.  A next run is predicted as if
the cause persists (the furnace behaves as calibrated).

Caution.  The result carries a separate ``"caution"`` key (not in ``"warnings"``) saying
that the advice is advisory and must be approved by the process owner within the
furnace's qualified limits.  ``"warnings"`` holds only findings about this lot.

Units: thickness nm, time minutes, temperature degrees Celsius, offsets and trims K (=
degrees Celsius difference), slots 1 = load end.
"""

from __future__ import annotations

import math

import numpy as np
from scipy.optimize import brentq, lsq_linear

from filmmap.cautions import ADVICE_CAUTION
from filmmap.errors import FilmmapInputError
from filmmap.growth.boat import fit_boat
from filmmap.growth.settings import growth_settings
from filmmap.growth.calibrate import (
    DEFAULT_INITIAL_NM,
    calibrate_slots,
    gain_matrix,
    normalise_zones,
    steps_from_config,
    with_minutes,
    zones_from_config,
)
from filmmap.growth.recipe import (
    integrate_recipe,
    step_index,
    thickness_sensitivity_to_temperature,
    validate_steps,
)
from filmmap.lotstats.roles import ROLES, roles_from_boat
from filmmap.lotstats.uniformity import nonuniformity_pct

__all__ = ["ADVICE_KEYS", "CAUTION", "advise", "advise_from_config", "roles_from_boat"]

#: The pinned keys of an advice dict, in order (more keys may follow, never fewer).
ADVICE_KEYS = ("adjust_step", "minutes_now", "minutes_next", "zone_offsets_C",
               "effective_offset_C_by_slot", "predicted_wtw_pct_now", "predicted_wtw_pct_next",
               "warnings")

#: Always attached to an advice under the key ``"caution"`` (text owned by `filmmap.cautions`).
CAUTION = ADVICE_CAUTION

# Relative slack when deciding that a bound is active.
_AT_BOUND = 1e-6


def _f(v):
    """Python float, None for NaN / None."""
    if v is None:
        return None
    v = float(v)
    return v if math.isfinite(v) else None


def _wtw_pct(x):
    """WTW NU % of predicted product-slot thicknesses (`nonuniformity_pct`), None if < 2."""
    nu = nonuniformity_pct(x)
    return None if not math.isfinite(nu) else nu


def _check_wafers(slot, mean_nm, role):
    slots = np.asarray(slot).ravel()
    mean = np.asarray(mean_nm, dtype=float).ravel()
    roles = np.array([str(r).strip().lower() for r in np.asarray(role, dtype=object).ravel()],
                     dtype=object)
    if not (slots.size == mean.size == roles.size):
        raise FilmmapInputError(f"slot, mean_nm and role have {slots.size}, {mean.size} and "
                                f"{roles.size} entries; expected one per wafer", field="slot")
    try:
        sf = slots.astype(float)
    except (TypeError, ValueError):
        raise FilmmapInputError("slots must be whole numbers", field="slot") from None
    if np.any(~np.isfinite(sf)) or np.any(sf != np.round(sf)) or np.any(sf < 1):
        raise FilmmapInputError("slots must be whole numbers >= 1 (1 = load end)", field="slot")
    slots = sf.astype(int)
    if np.unique(slots).size != slots.size:
        raise FilmmapInputError("a slot appears twice; expected one wafer per slot", field="slot")
    unknown = sorted(set(roles) - set(ROLES))
    if unknown:
        raise FilmmapInputError(f"unknown role(s) {unknown}; expected one of {list(ROLES)}",
                                field="role")
    return slots, mean, roles


class _Model:
    """The recipe with a variable adjust-step duration, evaluated on slot offset arrays."""

    def __init__(self, steps, k, orientation, initial_nm, pressure_atm, thin_regime,
                 constants=None):
        self.steps, self.k = steps, k
        self.kw = dict(pressure_atm=pressure_atm, thin_regime=thin_regime, constants=constants)
        self.orientation, self.initial_nm = orientation, initial_nm

    def steps_at(self, minutes):
        return with_minutes(self.steps, self.k, minutes)

    def x(self, offset, minutes):
        return np.asarray(integrate_recipe(self.steps_at(minutes), self.orientation,
                                           self.initial_nm, offset, **self.kw), dtype=float)

    def dx_dT(self, offset, minutes):
        return np.asarray(thickness_sensitivity_to_temperature(
            self.steps_at(minutes), self.orientation, self.initial_nm, offset, **self.kw),
            dtype=float)


def _optimise_trims(model, base, G, free, t, minutes, max_offset_C, reg, n_iterations,
                    hold_mean=None):
    """Bounded least-squares trims (K) minimising the relative spread of ``model.x``.

    With ``hold_mean = (mean_nm, full_base)`` the trims must also leave the product mean
    (computed with the slots' full offsets ``full_base``) at ``mean_nm``: a heavily
    weighted residual, so their common part cannot trade the mean for flatness. Used when
    the time sits on its bound and the mean already misses the target.
    """
    t = t.copy()
    if not free.any():
        return t
    Gf = G[:, free]
    for _ in range(n_iterations):
        off = base + G @ t
        x = model.x(off, minutes)
        S = model.dx_dT(off, minutes)
        mu = float(np.mean(x))
        J = S[:, None] * Gf / mu
        J = J - J.mean(axis=0)                # centred: the spread, not the mean
        r = (x - mu) / mu
        if hold_mean is not None:
            mean_nm, full_base = hold_mean
            off_full = full_base + G @ t
            # 1e3 x sqrt(n): the mean holds to about 1e-3 of the spread's weight
            w = 1e3 * math.sqrt(x.size)
            J_mean = (model.dx_dT(off_full, minutes)[:, None] * Gf).mean(axis=0) / mean_nm
            J = np.vstack([J, w * J_mean])
            r = np.append(r, w * (float(np.mean(model.x(off_full, minutes))) / mean_nm - 1.0))
        c2 = float(np.sum(J[:x.size] * J[:x.size])) / Gf.shape[1]
        lam = math.sqrt(reg * c2) if c2 > 0 else 1.0
        tf = t[free]
        A = np.vstack([J, lam * np.eye(tf.size)])
        b = np.concatenate([-r, -lam * tf])
        lo = -max_offset_C - tf
        hi = max_offset_C - tf
        # lsq_linear needs lo < hi strictly; a trim sitting on a bound gets a hair of room
        lo = np.minimum(lo, hi - 1e-12)
        d = lsq_linear(A, b, bounds=(lo, hi), method="bvls").x
        t[free] = np.clip(tf + d, -max_offset_C, max_offset_C)
        if np.max(np.abs(d)) < 1e-5:
            break
    return t


def _solve_time(model, offset, target_nm, m_lo, m_hi):
    """Adjust-step minutes putting mean(model.x) on target within [m_lo, m_hi]; (minutes, clip)."""
    def g(m):
        return float(np.mean(model.x(offset, m))) - target_nm
    g_lo, g_hi = g(m_lo), g(m_hi)
    if g_lo >= 0:
        return m_lo, (-1 if g_lo > 0 else 0)
    if g_hi <= 0:
        return m_hi, (1 if g_hi < 0 else 0)
    return brentq(g, m_lo, m_hi, xtol=1e-9, rtol=1e-12), 0


def _unbounded_minutes(model, offset, target_nm, m0):
    """Minutes the target would need without the time bound, or None (beyond 0.01x-20x)."""
    def g(m):
        return float(np.mean(model.x(offset, m))) - target_nm
    lo, hi = 0.01 * m0, 20.0 * m0
    try:
        if g(lo) > 0 or g(hi) < 0:
            return None
        return brentq(g, lo, hi, xtol=1e-6)
    except FilmmapInputError:
        return None


def advise(steps, adjust_step, target_nm, zones, slot, mean_nm, role, *, orientation="100",
           initial_nm=DEFAULT_INITIAL_NM, pressure_atm=None, thin_regime="deal-grove",
           max_offset_C=5.0, max_time_change_pct=15.0, tolerance_pct=None, width_slots=0.0,
           shape="logistic", monitor_weight=1.0, reference_zone=None, n_failed_sites=0,
           n_sites=None, min_product_wafers=5, max_failed_fraction=0.05, max_residual_C=0.5,
           trim_regularisation=1e-2, n_iterations=3, boat_size=None, decay_slots=None,
           dummy_slots=None, constants=None, growth_notes=(), width_source=None):
    """Advice for the next run: adjust-step time and zone trims, with predictions and warnings.

    Parameters
    ----------
    steps : sequence of Step or mapping
        The recipe as it was run (see `filmmap.growth.integrate_recipe`).
    adjust_step : str or int
        Name (or index) of the oxidising step whose duration is advised.
    target_nm : float
        Target thickness, nm (> 0).
    zones : sequence
        Heater zones, load end first (see `filmmap.growth.calibrate.normalise_zones`);
        may be empty (time advice only).
    slot : array_like of int
        Boat slot of each wafer, 1 = load end (dimensionless).
    mean_nm : array_like of float
        Measured wafer-mean thickness, nm (NaN = wafer without a usable mean).
    role : array_like of str
        ``"product"``, ``"monitor"`` or ``"dummy"`` per wafer.
    orientation : str
        Silicon orientation, ``"100"`` or ``"111"``.
    initial_nm : float
        Oxide before the first step, nm (default 1.5, native oxide), the same for every
        wafer.
    pressure_atm : float, mapping or None
        Oxidant partial pressure, atm, one value for all wafers, as for
        `integrate_recipe` (None: reference pressure).
    thin_regime : str
        Initial-regime treatment of dry steps, as for `integrate_recipe`.
    max_offset_C : float
        Largest zone trim proposed either way, K (> 0).
    max_time_change_pct : float
        Largest change of the adjust-step duration, percent of the current one (0-100).
    tolerance_pct : float, optional
        Spec half-width, percent of the target; when given, a predicted mean outside it is
        warned about.
    width_slots : float
        Zone transition width of the gain model, slots (0 = pure step).
    shape : {"logistic", "linear"}
        Transition shape of the gain model.
    monitor_weight : float
        Weight of monitor wafers in the zone fit relative to product wafers (>= 0);
        dummies always weigh 0.  Monitors never enter the spread or the mean.
    reference_zone : str, optional
        Hold this zone's trim at 0 K and trim the others relative to it (default: the
        smallest trims, see the module notes).
    n_failed_sites : int
        Number of measurement sites whose thickness fit failed in this lot (count).
    n_sites : int, optional
        Number of sites measured (count); with it the failed share is compared with
        ``max_failed_fraction``, without it any failed site is reported.
    min_product_wafers : int
        Fewer usable product wafers than this is weak evidence (count, default 5).
    max_failed_fraction : float
        Failed-site share above which the evidence is called weak (fraction, 0.05).
    max_residual_C : float
        Weighted rms residual of the zone fit above which the zones are said not to
        explain the slot profile, K (default 0.5).
    trim_regularisation : float
        Relative weight of the smallest-trim term (dimensionless, default 1e-2).
    n_iterations : int
        Linearise-and-solve passes of the trim optimisation (count, default 3).
    boat_size : int, optional
        Slots in the boat (default: the highest slot given); the source-end effect starts
        after the last dummy before it.
    decay_slots : float, optional
        End-effect decay length, slots (default: the best of a scan, see
        `filmmap.growth.boat`).
    dummy_slots : sequence of int, optional
        Dummy slots of the boat, measured or not (default: the wafers with role
        ``"dummy"``); each end effect starts after the last dummy at its end.
    constants : dict, optional
        Rate constants, as for `integrate_recipe` (None: the reference file's).
    growth_notes : sequence of str
        Where the growth model's pressures and constants came from, recorded under
        ``model``.
    width_source : str, optional
        Where ``width_slots`` came from (the lot file, a profiling run), recorded under
        ``model``; default: "given" when non-zero, else "default: a sharp step".

    Returns
    -------
    dict
        The pinned keys first, in this order: ``adjust_step`` (str), ``minutes_now``,
        ``minutes_next`` (float, min), ``zone_offsets_C`` (zone name -> trim to add to the
        zone's offset for the next run, K), ``effective_offset_C_by_slot`` (slot number as
        str -> effective offset, K, None where not calibrated), ``predicted_wtw_pct_now``,
        ``predicted_wtw_pct_next`` (100 std / mean of the product slots, %, None with
        fewer than two), ``warnings`` (list of str).  Then: ``caution`` (str),
        ``target_nm``, ``time_change_pct``, ``predicted_mean_nm_now``,
        ``predicted_mean_nm_next``, ``predicted_nm_by_slot_now``,
        ``predicted_nm_by_slot_next`` (slot str -> nm), ``zone_errors_C`` (zone ->
        error relative to the common offset, K, None where undetermined),
        ``common_offset_C`` (K), ``zone_fit_residual_C`` (K rms), ``zone_fit_explained``
        (fraction or None), ``n_usable_product`` (count), ``uncalibrated_slots`` (list of
        int), ``model`` (settings used); with zones also ``boat_model`` (the joint fit of
        zone errors, end effects and residual, `filmmap.growth.boat`),
        ``extra_dummies`` (end -> count), ``edge_slots`` (end -> slots the end effect
        still puts out of tolerance after the trims), ``flat_zone_slots`` ([first, last]
        product slots predicted within tolerance after the advice, or None),
        ``unexplained_slots`` (slots whose residual alone exceeds half the tolerance) and
        ``recommendations`` (list of {"action", "answers"}: each change with the cause it
        answers).

    Raises
    ------
    FilmmapInputError
        For an invalid recipe, an adjust step that grows no oxide, bad arrays, bounds or
        zones.

    Notes
    -----
    Numbers that cannot be computed are None, never NaN, so the dict serialises as
    strict JSON.  Values are not rounded.

    References
    ----------
    .. [1] B. E. Deal and A. S. Grove, J. Appl. Phys. 36, 3770-3778 (1965).
    .. [2] P. B. Stark and R. L. Parker, "Bounded-variable least-squares: an algorithm and
       applications", Comput. Stat. 10, 129-141 (1995) (`scipy.optimize.lsq_linear`,
       method ``"bvls"``).
    .. [3] Zone-to-slot coupling model: common practice, no source.
    """
    st = validate_steps(steps)
    k = step_index(st, adjust_step)
    if not st[k].oxidising:
        raise FilmmapInputError(f"adjust step {st[k].name!r} runs in N2 and grows no oxide; "
                                "expected an O2 or H2O step", field="adjust_step")
    target = float(target_nm)
    if not (math.isfinite(target) and target > 0):
        raise FilmmapInputError(f"target must be finite and > 0 nm, got {target_nm!r}",
                                field="target_nm")
    max_off = float(max_offset_C)
    if not (math.isfinite(max_off) and max_off > 0):
        raise FilmmapInputError(f"max_offset_C must be > 0 K, got {max_offset_C!r}",
                                field="max_offset_C")
    p_time = float(max_time_change_pct)
    if not 0 < p_time < 100:
        raise FilmmapInputError(f"max_time_change_pct must be in (0, 100) %, got "
                                f"{max_time_change_pct!r}", field="max_time_change_pct")
    if not (math.isfinite(float(monitor_weight)) and monitor_weight >= 0):
        raise FilmmapInputError("monitor_weight must be >= 0", field="monitor_weight")
    zs = normalise_zones(zones)
    names = [z[0] for z in zs]
    if reference_zone is not None and reference_zone not in names:
        raise FilmmapInputError(f"reference zone {reference_zone!r} is not a zone "
                                f"({', '.join(map(repr, names))})", field="reference_zone")
    slots, mean, roles = _check_wafers(slot, mean_nm, role)
    initial_nm = float(initial_nm)
    m0 = float(st[k].minutes)
    step_name = st[k].name or str(k)
    model = _Model(st, k, orientation, initial_nm, pressure_atm, thin_regime, constants)
    warnings = []

    cal = calibrate_slots(st, slots, mean, orientation=orientation, initial_nm=initial_nm,
                          pressure_atm=pressure_atm, thin_regime=thin_regime, constants=constants)
    by_slot = {str(int(s)): _f(o) for s, o in zip(slots, cal.offset_C)}
    weight = np.where(roles == "product", 1.0,
                      np.where(roles == "monitor", float(monitor_weight), 0.0))
    product = (roles == "product") & cal.ok
    n_p = int(product.sum())
    bad_cal = [int(s) for s, status in zip(slots, cal.status) if status not in ("ok", "missing")]

    # one model of the boat (zones + end effects + residual) and the offsets for prediction
    boat = None
    G = np.zeros((slots.size, 0))
    if zs:
        boat = fit_boat(slots, cal.offset_C, zs, weight, boat_size=boat_size,
                        dummy_slots=(slots[roles == "dummy"] if dummy_slots is None
                                     else dummy_slots), width_slots=width_slots,
                        shape=shape, decay_slots=decay_slots)
        G = gain_matrix(zs, slots, width_slots, shape)
    base = cal.offset_C.copy()
    fill = np.isnan(base)
    if fill.any():
        if boat is not None and boat.observed.any():
            base[fill] = G[fill][:, boat.observed] @ boat.zone_absolute_C[boat.observed]
        else:
            finite = base[np.isfinite(base)]
            base[fill] = float(np.mean(finite)) if finite.size else 0.0

    settings = {"orientation": str(orientation), "initial_nm": _f(initial_nm),
                "width_slots": float(width_slots), "shape": shape,
                "width_source": width_source or ("given by the caller" if width_slots
                                                 else "default: a sharp step between zones"),
                "reference_zone": reference_zone, "max_offset_C": max_off,
                "max_time_change_pct": p_time, "thin_regime": thin_regime,
                "pressure_atm": (dict(pressure_atm) if isinstance(pressure_atm, dict)
                                 else _f(pressure_atm)),
                "growth": list(growth_notes)}
    trims = np.zeros(len(zs))

    def result(minutes_next, t, x_now, x_next):
        xp_now, xp_next = x_now[product], x_next[product]
        return {
            "adjust_step": step_name,
            "minutes_now": m0,
            "minutes_next": float(minutes_next),
            "zone_offsets_C": {n: float(v) for n, v in zip(names, t)},
            "effective_offset_C_by_slot": by_slot,
            "predicted_wtw_pct_now": _wtw_pct(xp_now),
            "predicted_wtw_pct_next": _wtw_pct(xp_next),
            "warnings": warnings,
            "caution": CAUTION,
            "target_nm": target,
            "time_change_pct": 100.0 * (float(minutes_next) / m0 - 1.0),
            "predicted_mean_nm_now": _f(np.mean(xp_now)) if xp_now.size else None,
            "predicted_mean_nm_next": _f(np.mean(xp_next)) if xp_next.size else None,
            "predicted_nm_by_slot_now": {str(int(s)): _f(v) for s, v in zip(slots, x_now)},
            "predicted_nm_by_slot_next": {str(int(s)): _f(v) for s, v in zip(slots, x_next)},
            "zone_errors_C": boat.as_dict()["zone_errors_C"] if boat is not None else {},
            "common_offset_C": _f(boat.common_C) if boat is not None else _f(
                np.mean(cal.offset_C[product]) if n_p else None),
            "zone_fit_residual_C": _f(boat.residual_rms_C) if boat is not None else None,
            "zone_fit_explained": _f(boat.explained_zone) if boat is not None else None,
            "n_usable_product": n_p,
            "uncalibrated_slots": bad_cal,
            "model": settings,
        }

    # evidence
    if bad_cal:
        warnings.append(f"{len(bad_cal)} wafer(s) could not be calibrated (mean beyond what the "
                        f"recipe grows within {cal.search_C[0]:+.0f}..{cal.search_C[1]:+.0f} K): "
                        f"slot(s) {', '.join(map(str, bad_cal))}; left out")
    if n_p == 0:
        warnings.append("no usable product wafer: no advice; the recipe and zones are left "
                        "unchanged")
        x_now = model.x(base, m0)
        return result(m0, trims, x_now, x_now)
    if n_p < min_product_wafers:
        warnings.append(f"weak evidence: only {n_p} usable product wafer(s) (fewer than "
                        f"{min_product_wafers}); treat the advice as a first estimate")
    n_failed = int(n_failed_sites)
    if n_sites is not None and n_sites > 0:
        if n_failed > max_failed_fraction * n_sites:
            warnings.append(f"weak evidence: {n_failed} of {int(n_sites)} site fits failed "
                            f"({100.0 * n_failed / n_sites:.1f} %, more than "
                            f"{100.0 * max_failed_fraction:g} %); wafer means rest on fewer sites")
    elif n_failed > 0:
        warnings.append(f"{n_failed} site fit(s) failed; the wafer means rest on fewer sites")

    # zones
    free = np.zeros(len(zs), bool)
    if boat is not None:
        free = boat.observed.copy()
        if reference_zone is not None:
            free[names.index(reference_zone)] = False
        unseen = [n for n, o in zip(names, boat.observed) if not o]
        if unseen:
            warnings.append(f"zone(s) {', '.join(map(repr, unseen))} hold too few usable wafers "
                            "to be calibrated; their trim is held at 0 K")
        if np.isfinite(boat.residual_rms_C) and boat.residual_rms_C > max_residual_C:
            expl = ("" if not np.isfinite(boat.explained_zone)
                    else f"; the zones explain {100.0 * max(boat.explained_zone, 0.0):.0f} % and "
                         f"the boat ends {100.0 * max(boat.explained_end, 0.0):.0f} % of the "
                         "slot-to-slot variance")
            warnings.append(f"weak fit: zones and boat ends do not explain the slot profile: "
                            f"the boat model leaves {boat.residual_rms_C:.2f} K rms (more than "
                            f"{max_residual_C:g} K){expl}; trims and dummies answer only their "
                            "parts, the rest needs another cause to be found")
        if np.isfinite(boat.common_C) and abs(boat.common_C) > max_off:
            warnings.append(f"the whole lot reads as {boat.common_C:+.1f} K off on average: a "
                            "temperature, rate or time error of the whole run (the oxide cannot "
                            "tell which); check the run record before acting on the advice. If "
                            "every lot of this furnace reads alike, its own growth rate differs "
                            "from the constants: learn it with --furnace-history, or state it in "
                            "the lot file's [growth] (docs/furnace.md)")

    # trims and time, alternated. The trims flatten the zone part only: the end effects
    # and the residual are not the zones' doing, and chasing them with a zone trim would
    # move every other slot of that zone. The time puts the whole product mean on target.
    Gp = G[product]
    bp = base[product]
    bz = boat.zone_part_at(slots[product]) if boat is not None else bp
    m_lo, m_hi = m0 * (1.0 - p_time / 100.0), m0 * (1.0 + p_time / 100.0)
    minutes, clip = m0, 0
    for _ in range(2):
        if zs:
            trims = _optimise_trims(model, bz, Gp, free, trims, minutes, max_off,
                                    float(trim_regularisation), int(n_iterations))
        minutes, clip = _solve_time(model, bp + Gp @ trims, target, m_lo, m_hi)
    if clip and zs:
        mean_untrimmed = float(np.mean(model.x(bp, minutes)))
        mean_trimmed = float(np.mean(model.x(bp + Gp @ trims, minutes)))
        if abs(mean_trimmed - target) > abs(mean_untrimmed - target):
            # the time sits on its bound and the flattening trims moved the mean further
            # from target (a bound made them cool or heat the whole boat): flatten again
            # with the mean held where the time alone puts it - trims answer the zone
            # part, never at the mean's expense
            trims = _optimise_trims(model, bz, Gp, free, np.zeros(len(zs)), minutes, max_off,
                                    float(trim_regularisation), 2 * int(n_iterations),
                                    hold_mean=(mean_untrimmed, bp))
            minutes, clip = _solve_time(model, bp + Gp @ trims, target, m_lo, m_hi)

    for n, v, e in zip(names, trims, (boat.zone_error_C if boat is not None else [])):
        if abs(v) >= max_off * (1.0 - _AT_BOUND):
            err = f" (zone error {e:+.2f} K relative to the boat mean)" if np.isfinite(e) else ""
            warnings.append(f"zone {n!r} trim clipped at {v:+.2f} K, the limit of "
                            f"+/-{max_off:g} K{err}; the boat cannot be fully flattened within "
                            "the limit")

    x_now = model.x(base, m0)
    x_next = model.x(base + G @ trims, minutes)
    mean_next = float(np.mean(x_next[product]))
    miss_pct = 100.0 * (mean_next / target - 1.0)
    if clip:
        need = _unbounded_minutes(model, bp + Gp @ trims, target, m0)
        need_txt = (f"the model needs {need:.1f} min ({100.0 * (need / m0 - 1.0):+.1f} %)"
                    if need is not None else "the model cannot reach it with this step alone")
        warnings.append(f"time change clipped at {clip * p_time:+g} % "
                        f"({minutes:.1f} min), the limit of +/-{p_time:g} %: {need_txt}; "
                        f"the target is not reachable within the bounds, predicted product "
                        f"mean {mean_next:.1f} nm ({miss_pct:+.2f} % from target)")
    if tolerance_pct is not None and abs(miss_pct) > float(tolerance_pct):
        warnings.append(f"predicted product mean {mean_next:.1f} nm is outside the spec band "
                        f"(+/-{float(tolerance_pct):g} % of {target:g} nm)")
    out = result(minutes, trims, x_now, x_next)
    out.update(_boat_verdicts(boat, model, slots, roles, product, base + G @ trims, minutes,
                              x_next, target, tolerance_pct, step_name, m0, names, trims,
                              warnings))
    return out


def _runs(slots):
    """Maximal runs of consecutive integers in a sorted slot list, as (first, last)."""
    out = []
    for s in slots:
        if out and s == out[-1][1] + 1:
            out[-1][1] = s
        else:
            out.append([s, s])
    return [tuple(r) for r in out]


def _boat_verdicts(boat, model, slots, roles, product, offset_next, minutes, x_next, target,
                   tolerance_pct, step_name, m0, names, trims, warnings):
    """Dummies, flat zone, unexplained slots and the recommendations, from the one boat fit.

    Every recommendation names the cause it answers: the time the product mean, each trim
    its zone's error, extra dummies the end effect that trims cannot remove (the slots
    where the end effect alone still exceeds the tolerance after the advice).
    """
    recs = [{"action": f"set {step_name} to {minutes:.1f} min (now {m0:.1f} min)",
             "answers": "the product mean against the target"}]
    out = {"recommendations": recs}
    if boat is None:
        return out
    tol_nm = None if tolerance_pct is None else float(tolerance_pct) / 100.0 * target
    S = model.dx_dT(offset_next, minutes)          # nm per K at each slot, next run
    prod_slots = np.sort(slots[product])
    for n, v, e, se in zip(names, trims, boat.zone_error_C, boat.zone_sigma_C):
        if abs(v) >= 0.05:
            err = (f"zone error {e:+.2f} +/- {se:.2f} K relative to the boat mean"
                   if np.isfinite(e) else "zone error undetermined")
            recs.append({"action": f"trim zone {n!r} by {v:+.2f} K", "answers": err})
    extra, edges = {}, {}
    for e in boat.ends:
        extra[e.end], edges[e.end] = 0, []
        if not e.detected or tol_nm is None:
            continue
        side = prod_slots if e.end == "load" else prod_slots[::-1]
        idx = {int(s): i for i, s in enumerate(slots)}
        # out of tolerance after the advice, and in tolerance but for this end effect
        this_end = S * e.at(slots)
        out_of_tol = [int(s) for s in side
                      if abs(x_next[idx[int(s)]] - target) > tol_nm
                      and abs(x_next[idx[int(s)]] - this_end[idx[int(s)]] - target) <= tol_nm]
        edges[e.end] = sorted(out_of_tol)
        extra[e.end] = len(out_of_tol)
        if out_of_tol:
            recs.append({"action": f"add {len(out_of_tol)} dumm{'y' if len(out_of_tol) == 1 else 'ies'} "
                                   f"at the {e.end} end",
                         "answers": f"the {e.end}-end effect ({e.amplitude_C:+.2f} +/- "
                                    f"{e.sigma_C:.2f} K at the first wafer after the dummies, "
                                    f"decaying over {e.decay_slots:g} slots), which zone trims "
                                    f"cannot remove: slots {', '.join(map(str, out_of_tol))} stay "
                                    "out of tolerance"})
    out["extra_dummies"] = extra
    out["edge_slots"] = edges
    flat = None
    unexplained = []
    if tol_nm is not None:
        idx = {int(s): i for i, s in enumerate(slots)}
        good = [int(s) for s in prod_slots if abs(x_next[idx[int(s)]] - target) <= tol_nm]
        runs = _runs(good)
        # a run may step over monitor/dummy slots between product slots
        merged = []
        for r in runs:
            if merged and not np.any(np.isin(prod_slots, np.arange(merged[-1][1] + 1, r[0]))):
                merged[-1] = (merged[-1][0], r[1])
            else:
                merged.append(r)
        if merged:
            flat = list(max(merged, key=lambda r: (r[1] - r[0], -r[0])))
        resid = dict(zip(boat.slot.tolist(), boat.residual_C.tolist()))
        for s in prod_slots:
            r = resid.get(int(s))
            if r is not None and abs(S[idx[int(s)]] * r) > 0.5 * tol_nm:
                unexplained.append(int(s))
    out["flat_zone_slots"] = flat
    out["unexplained_slots"] = unexplained
    if unexplained:
        recs.append({"action": f"look into slot(s) {', '.join(map(str, unexplained))}",
                     "answers": "a residual that neither the zones nor the boat ends explain "
                                f"(boat model residual {boat.residual_rms_C:.2f} K rms)"})
    out["boat_model"] = boat.as_dict()
    return out


def _choose_adjust_step(steps):
    ox = [(s.minutes, i) for i, s in enumerate(steps) if s.oxidising]
    if not ox:
        raise FilmmapInputError("the recipe has no oxidising step to adjust", field="recipe")
    return max(ox)[1]


def advise_from_config(config, slot, mean_nm, role=None, n_failed_sites=0, rate_factors=None,
                       **options):
    """`advise` with the recipe, target, zones, limits and orientation of a lot file.

    Parameters
    ----------
    config : filmmap.io.lotfile.LotConfig
        The lot file; needs a ``[[recipe.step]]`` list and a ``[target]``.  ``[furnace]``
        gives the zones and the limits (without it: time advice only, default limits of
        5 K and 15 %); ``target.adjust_step`` names the step (without it the longest
        oxidising step is used and a warning says so).
    slot : array_like of int
        Boat slot of each wafer (1 = load end), dimensionless.
    mean_nm : array_like of float
        Measured wafer-mean thickness, nm (NaN allowed).
    role : array_like of str, optional
        Role per wafer; None takes them from ``config.boat`` (`roles_from_boat`).
    n_failed_sites : int
        Number of failed site fits in the lot (count).
    rate_factors : dict, optional
        ``{ambient: factor}`` on B and B/A, e.g. a furnace's rate learned from its history.
    **options
        Any further keyword of `advise` (e.g. ``n_sites``, ``width_slots``,
        ``initial_nm`` in nm, ``min_product_wafers``).

    Returns
    -------
    dict
        As `advise`.

    Raises
    ------
    FilmmapInputError
        When the lot file has no recipe or no target (``field='recipe'`` or
        ``field='target'``; the reason says which), or as `advise`.

    References
    ----------
    .. [1] B. E. Deal and A. S. Grove, J. Appl. Phys. 36, 3770-3778 (1965).
    .. [2] P. B. Stark and R. L. Parker, Comput. Stat. 10, 129-141 (1995).
    """
    if not config.recipe:
        raise FilmmapInputError("no advice: the lot file has no [[recipe.step]] (the recipe as "
                                "run is needed to model the growth)", field="recipe")
    if config.target is None:
        raise FilmmapInputError("no advice: the lot file has no [target] (the thickness to aim "
                                "for)", field="target")
    steps = steps_from_config(config)
    note = None
    if config.target.adjust_step is not None:
        adjust = config.target.adjust_step
    else:
        adjust = _choose_adjust_step(steps)
        note = (f"target.adjust_step is not set: the longest oxidising step "
                f"{steps[adjust].name!r} is adjusted")
    kw = dict(orientation=config.stack.orientation, tolerance_pct=config.target.tolerance_pct)
    if config.furnace is not None:
        kw.update(max_offset_C=config.furnace.max_offset_C,
                  max_time_change_pct=config.furnace.max_time_change_pct)
    if config.boat is not None:
        kw.update(boat_size=config.boat.slots, dummy_slots=tuple(config.boat.dummy_slots))
    growth = growth_settings(config, rate_factors=rate_factors)
    kw.update(pressure_atm=growth.pressure_atm, thin_regime=growth.thin_regime,
              constants=growth.constants, growth_notes=growth.notes)
    # the coupling width: the lot file's when it states one, else the caller's (e.g. learned
    # from the furnace's history), else a sharp step
    width = getattr(config.furnace, "coupling_width_slots", None) if config.furnace else None
    if width is not None:
        options = {k: v for k, v in options.items() if k not in ("width_slots", "width_source")}
        kw.update(width_slots=width, width_source="lot file ([furnace] coupling_width_slots)")
    kw.update(options)
    if role is None:
        role = roles_from_boat(slot, config.boat)
    out = advise(steps, adjust, config.target.thickness_nm, zones_from_config(config), slot,
                 mean_nm, role, n_failed_sites=n_failed_sites, **kw)
    if config.furnace is None:
        out["warnings"].insert(0, "the lot file has no [furnace] zones: time advice only")
    if note:
        out["warnings"].insert(0, note)
    return out
