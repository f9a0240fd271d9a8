"""What-if prediction of a recipe along the boat, per heater zone and per slot.

`predict_by_zone` runs the Deal-Grove model through the lot file's recipe, optionally
with changed step times or temperatures, with zone trims applied through the zone-to-slot
gain matrix (`filmmap.growth.calibrate.gain_matrix`) and, optionally, with a furnace
profile calibrated from an earlier lot (per-slot effective offsets).  Without a
calibrated profile the furnace is taken as perfect (every slot at the set point plus its
trims), so the table then shows what the recipe as written grows, not what a particular
tube grows.

Units: thickness nm, time minutes, temperature degrees Celsius, offsets K.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import replace

import numpy as np

from filmmap.errors import FilmmapInputError
from filmmap.lotstats.roles import roles_from_boat
from filmmap.lotstats.uniformity import nonuniformity_pct
from filmmap.growth.calibrate import (
    DEFAULT_INITIAL_NM,
    gain_matrix,
    steps_from_config,
    zones_from_config,
)
from filmmap.growth.settings import growth_settings
from filmmap.growth.recipe import integrate_recipe, step_index, validate_steps

__all__ = ["apply_overrides", "predict_by_zone"]

_HOLD_KEYS = ("minutes", "at_C")
_RAMP_KEYS = ("minutes", "from_C", "to_C")


def apply_overrides(steps, overrides):
    """A recipe with what-if changes to step durations and temperatures.

    Parameters
    ----------
    steps : sequence of Step
        Checked recipe (see `validate_steps`).
    overrides : mapping or None
        Step name (or index) -> mapping of new values: ``minutes`` (min) and ``at_C``
        (deg C) for a hold; ``minutes``, ``from_C`` and ``to_C`` (deg C) for a ramp.
        E.g. ``{"wet": {"minutes": 170}}``.

    Returns
    -------
    (tuple of Step, list of str)
        The changed, re-validated recipe and the names of the changed steps.

    Raises
    ------
    FilmmapInputError
        For an unknown step, a key that does not fit the step (``at_C`` on a ramp, say),
        or a value that fails validation (``field='overrides.<step>.<key>'``).

    References
    ----------
    .. [1] B. E. Deal and A. S. Grove, J. Appl. Phys. 36, 3770-3778 (1965) (the kinetics
       the steps feed).
    """
    out = list(steps)
    changed = []
    if not overrides:
        return tuple(out), changed
    if not isinstance(overrides, Mapping):
        raise FilmmapInputError("overrides must map step names to {key: value} tables",
                                field="overrides")
    for name, values in overrides.items():
        k = step_index(out, name)
        s = out[k]
        allowed = _RAMP_KEYS if s.is_ramp else _HOLD_KEYS
        if not isinstance(values, Mapping) or not values:
            raise FilmmapInputError(f"override of step {s.name!r}: expected a table of "
                                    f"{', '.join(allowed)}", field=f"overrides.{s.name}")
        for key, v in values.items():
            field = f"overrides.{s.name}.{key}"
            if key not in allowed:
                kind = "ramp" if s.is_ramp else "hold"
                raise FilmmapInputError(f"step {s.name!r} is a {kind}; it takes "
                                        f"{', '.join(allowed)}, not {key!r}", field=field)
            if isinstance(v, bool) or not isinstance(v, (int, float, np.integer, np.floating)) \
                    or not math.isfinite(float(v)):
                raise FilmmapInputError(f"override {key} of step {s.name!r} must be a finite "
                                        f"number, got {v!r}", field=field)
        out[k] = replace(s, **{key: float(v) for key, v in values.items()})
        changed.append(s.name)
    return validate_steps(out), changed


def _slot_profile(slot_offsets_C, slots):
    """Per-slot offsets (K) from a mapping or array; gaps filled by linear interpolation."""
    if slot_offsets_C is None:
        return np.zeros(slots.size), []
    if isinstance(slot_offsets_C, Mapping):
        known = {}
        for key, v in slot_offsets_C.items():
            try:
                s = int(key)
            except (TypeError, ValueError):
                raise FilmmapInputError(f"slot_offsets_C key {key!r} is not a slot number",
                                        field="slot_offsets_C") from None
            if v is not None and math.isfinite(float(v)):
                known[s] = float(v)
        if not known:
            raise FilmmapInputError("slot_offsets_C holds no finite offset", field="slot_offsets_C")
        ks = np.array(sorted(known))
        vs = np.array([known[s] for s in ks])
    else:
        arr = np.asarray(slot_offsets_C, dtype=float).ravel()
        if arr.size != slots.size:
            raise FilmmapInputError(f"slot_offsets_C has {arr.size} values for {slots.size} "
                                    "slots", field="slot_offsets_C")
        ok = np.isfinite(arr)
        if not ok.any():
            raise FilmmapInputError("slot_offsets_C holds no finite offset", field="slot_offsets_C")
        ks, vs = slots[ok], arr[ok]
    filled = [int(s) for s in slots if s not in set(ks.tolist())]
    return np.interp(slots, ks, vs), filled


def predict_by_zone(config, overrides=None, zone_offsets_C=None, *, slot_offsets_C=None,
                    initial_nm=DEFAULT_INITIAL_NM, width_slots=None, shape="logistic",
                    pressure_atm=None, thin_regime=None, growth=None):
    """Predicted oxide thickness per heater zone and per slot for a lot file's recipe.

    Parameters
    ----------
    config : filmmap.io.lotfile.LotConfig
        Lot file with a ``[[recipe.step]]`` list; ``[boat]`` and ``[furnace]`` give the
        slots and zones when present (without them: one slot, one zone ``"boat"``).
    overrides : mapping, optional
        What-if changes, step name -> {``minutes`` (min), ``at_C``/``from_C``/``to_C``
        (deg C)}; see `apply_overrides`.
    zone_offsets_C : mapping, optional
        Zone name -> trim added to that zone, K (e.g. an advice's ``zone_offsets_C``),
        spread over the slots through the gain matrix.
    slot_offsets_C : mapping or array_like, optional
        A calibrated furnace profile: slot number (int or str) -> effective offset, K
        (e.g. an advice's ``effective_offset_C_by_slot``; None values are skipped), or one
        value per slot 1..n.  Slots without a value are linearly interpolated (held
        constant beyond the ends) and listed in the notes.
    initial_nm : float
        Oxide before the first step, nm (default 1.5, native oxide).
    width_slots : float, optional
        Zone transition width of the gain model, slots (default: the lot file's
        ``coupling_width_slots``, else 0 = pure step).
    shape : {"logistic", "linear"}
        Transition shape of the gain model.
    pressure_atm : float, mapping or None
        Oxidant partial pressure, atm, as for `integrate_recipe` (default: the growth
        settings').
    thin_regime : str, optional
        Initial-regime treatment of dry steps (default: the growth settings').
    growth : GrowthSettings, optional
        Pressures, thin regime and constants (default: `growth_settings` of the lot file,
        i.e. its ``[growth]``).

    Returns
    -------
    dict
        ``recipe``: list of step rows (``name``, ``ambient``, ``minutes``, ``at_C``,
        ``from_C``, ``to_C``, ``changed``); ``zones``: list of rows (``zone``,
        ``first_slot``, ``last_slot``, ``trim_C``, ``mean_nm``, ``min_nm``, ``max_nm``,
        ``deviation_pct`` from the target or None); ``slots``: list of rows (``slot``,
        ``zone``, ``role``, ``offset_C`` total applied, ``thickness_nm``);
        ``product_mean_nm``, ``product_wtw_pct`` (100 std / mean, None with fewer than two
        product slots), ``target_nm`` and ``tolerance_pct`` (None without a target),
        ``notes`` (list of str).  Zone figures are over the zone's product and monitor
        slots, or over all its slots when it holds none.

    Raises
    ------
    FilmmapInputError
        For a lot file without a recipe (``field='recipe'``), an unknown zone name in
        ``zone_offsets_C``, or bad overrides.

    References
    ----------
    .. [1] B. E. Deal and A. S. Grove, J. Appl. Phys. 36, 3770-3778 (1965).
    .. [2] Zone-to-slot coupling model: common practice, no source.
    """
    if not config.recipe:
        raise FilmmapInputError("nothing to predict: the lot file has no [[recipe.step]]",
                                field="recipe")
    base_steps = steps_from_config(config)
    steps, changed = apply_overrides(base_steps, overrides)
    zones = zones_from_config(config)
    if config.boat is not None:
        n_slots = config.boat.slots
    elif zones:
        n_slots = zones[-1][2]
    else:
        n_slots = 1
    if not zones:
        zones = (("boat", 1, n_slots),)
    names = [z[0] for z in zones]
    slots = np.arange(1, n_slots + 1)
    trims = np.zeros(len(zones))
    for name, v in (zone_offsets_C or {}).items():
        if name not in names:
            raise FilmmapInputError(f"zone_offsets_C names zone {name!r}; zones are "
                                    f"{', '.join(map(repr, names))}", field="zone_offsets_C")
        if v is None or not math.isfinite(float(v)):
            raise FilmmapInputError(f"trim of zone {name!r} must be a finite number of K",
                                    field="zone_offsets_C")
        trims[names.index(name)] = float(v)
    settings = growth_settings(config) if growth is None else growth
    if width_slots is None:
        width_slots = (getattr(config.furnace, "coupling_width_slots", None) or 0.0
                       if config.furnace is not None else 0.0)
    G = gain_matrix(zones, slots, width_slots, shape)
    profile, filled = _slot_profile(slot_offsets_C, slots)
    offset = profile + G @ trims
    x = np.asarray(integrate_recipe(
        steps, config.stack.orientation, initial_nm, offset,
        pressure_atm=settings.pressure_atm if pressure_atm is None else pressure_atm,
        thin_regime=settings.thin_regime if thin_regime is None else thin_regime,
        constants=settings.constants), dtype=float).reshape(slots.shape)
    roles = roles_from_boat(slots, config.boat)
    target = config.target.thickness_nm if config.target is not None else None
    # a slot belongs to the zone whose range holds it (the gain only blends temperatures)
    zone_of = np.argmax(gain_matrix(zones, slots, 0.0), axis=1)
    zone_rows = []
    for i, (name, a, b) in enumerate(zones):
        inside = zone_of == i
        wafers = inside & (roles != "dummy")
        sel = x[wafers] if wafers.any() else x[inside]
        mean = float(np.mean(sel)) if sel.size else None
        zone_rows.append({
            "zone": name, "first_slot": a, "last_slot": b, "trim_C": float(trims[i]),
            "mean_nm": mean,
            "min_nm": float(np.min(sel)) if sel.size else None,
            "max_nm": float(np.max(sel)) if sel.size else None,
            "deviation_pct": (100.0 * (mean / target - 1.0)
                              if target is not None and mean is not None else None),
        })
    slot_rows = [{"slot": int(s), "zone": names[zone_of[j]], "role": str(roles[j]),
                  "offset_C": float(offset[j]), "thickness_nm": float(x[j])}
                 for j, s in enumerate(slots)]
    prod = x[roles == "product"]
    notes = []
    if slot_offsets_C is None:
        notes.append("no calibrated furnace profile given: every slot at the set point plus "
                     "its zone trim")
    if filled:
        notes.append(f"slot offsets interpolated for slot(s) {', '.join(map(str, filled))}")
    notes.extend(f"growth model: {n}" for n in settings.notes)
    return {
        "recipe": [{"name": s.name, "ambient": s.ambient, "minutes": s.minutes, "at_C": s.at_C,
                    "from_C": s.from_C, "to_C": s.to_C, "changed": s.name in changed}
                   for s in steps],
        "zones": zone_rows,
        "slots": slot_rows,
        "product_mean_nm": float(np.mean(prod)) if prod.size else None,
        "product_wtw_pct": (float(nonuniformity_pct(prod)) if prod.size >= 2 else None),
        "target_nm": target,
        "tolerance_pct": config.target.tolerance_pct if config.target is not None else None,
        "notes": notes,
    }


def plan_run(config, *, growth=None, slot_offsets_C=None, zone_offsets_C=None,
             initial_nm=DEFAULT_INITIAL_NM, max_minutes=10000.0, width_slots=None):
    """Plan a run before it happens: the adjust-step time that puts the product mean on target.

    Parameters
    ----------
    config : filmmap.io.lotfile.LotConfig
        Lot file with a recipe and a ``[target]`` (no spectra needed).
    growth : GrowthSettings, optional
        Pressures, thin regime and constants, e.g. with a rate factor learned from the
        furnace's history (default: the lot file's ``[growth]``).
    slot_offsets_C, zone_offsets_C : optional
        A calibrated furnace profile and trims, as for `predict_by_zone`.
    initial_nm : float
        Oxide before the first step, nm.
    max_minutes : float
        Longest duration searched, minutes.
    width_slots : float, optional
        Zone coupling width, slots (default: the lot file's, else a sharp step).

    Returns
    -------
    dict
        ``adjust_step`` (str), ``minutes_written`` and ``minutes_planned`` (min), and the
        `predict_by_zone` table at the planned time under ``prediction``.

    Raises
    ------
    FilmmapInputError
        Without a recipe or a target, or when no duration within ``max_minutes`` reaches
        the target.

    References
    ----------
    .. [1] B. E. Deal and A. S. Grove, J. Appl. Phys. 36, 3770-3778 (1965).
    """
    from scipy.optimize import brentq

    if not config.recipe:
        raise FilmmapInputError("nothing to plan: the lot file has no [[recipe.step]]",
                                field="recipe")
    if config.target is None:
        raise FilmmapInputError("nothing to plan: the lot file has no [target] (the thickness "
                                "to aim for)", field="target")
    steps = steps_from_config(config)
    if config.target.adjust_step is not None:
        name = config.target.adjust_step
    else:
        ox = [(s.minutes, s.name) for s in steps if s.oxidising]
        if not ox:
            raise FilmmapInputError("the recipe has no oxidising step to plan", field="recipe")
        name = max(ox)[1]
    written = next(s.minutes for s in steps if s.name == name)
    target = float(config.target.thickness_nm)

    def mean_at(minutes):
        table = predict_by_zone(config, {name: {"minutes": minutes}}, zone_offsets_C,
                                slot_offsets_C=slot_offsets_C, initial_nm=initial_nm,
                                growth=growth, width_slots=width_slots)
        return table["product_mean_nm"] - target, table

    lo, hi = 1e-3, float(max_minutes)
    f_lo, _ = mean_at(lo)
    f_hi, _ = mean_at(hi)
    if f_lo > 0 or f_hi < 0:
        raise FilmmapInputError(f"no duration of step {name!r} between {lo:g} and {hi:g} min "
                                f"reaches the target {target:g} nm", field="target.thickness_nm")
    minutes = brentq(lambda m: mean_at(m)[0], lo, hi, xtol=1e-6)
    _, table = mean_at(minutes)
    return {"adjust_step": name, "minutes_written": float(written),
            "minutes_planned": float(minutes), "prediction": table}
