"""The furnace run: ``[boat]``, ``[furnace]`` (heater zones, adjustment limits) and the recipe.

Recipe steps are `filmmap.growth.Step` objects, checked here once, with the growth model's
own rules: a step this reader accepts, `filmmap.growth.validate_steps` accepts too, so no
later fit or advice fails on it. An oxidising (O2, H2O) step must run inside the furnace
temperature range the growth model accepts (`FURNACE_TEMPERATURE_RANGE_C`); an N2 step
only inside the sanity bound of every step temperature (`filmmap.bounds.TEMPERATURE_RANGE_C`).
Errors name the lot file, the line and the lot file's own field path, with steps counted
from 1 as the file lists them (``recipe.step[3].at_C``).
"""

from __future__ import annotations

from filmmap.bounds import MAX_BOAT_SLOTS, MAX_STEP_MINUTES, MAX_TEMPERATURE_OFFSET_K, \
    TEMPERATURE_RANGE_C
from filmmap.growth.recipe import DEFAULT_TEMPERATURE_RANGE_C, Step, temperatures_outside_range
from filmmap.io.lotfile.reader import found
from filmmap.io.lotfile.schema import (AMBIENTS, OXIDISING_AMBIENTS, BoatConfig,
                                           FurnaceConfig, Zone)

#: Temperatures of oxidising steps the furnace model accepts, deg C: the growth model's
#: range (`filmmap.growth.DEFAULT_TEMPERATURE_RANGE_C`), which every later use of the recipe
#: (fit advice, ``predict``, ``plan``, the history's rate) applies.
FURNACE_TEMPERATURE_RANGE_C = DEFAULT_TEMPERATURE_RANGE_C


def read_boat(rd, doc):
    """The ``[boat]`` table as `BoatConfig`, or None."""
    t = rd.table(doc, "boat", "")
    if t is None:
        return None
    w = "boat"
    rd.keys(t, w, "boat")
    slots = rd.value(t, "slots", w, "integer", required=True)
    if not 1 <= slots <= MAX_BOAT_SLOTS:
        rd.fail(f"slots = {slots}; expected a positive number of boat slots, at most "
                f"{MAX_BOAT_SLOTS}", f"{w}.slots")
    dummy = rd.int_list(t, "dummy_slots", w, 1, slots)
    monitor = rd.int_list(t, "monitor_slots", w, 1, slots)
    both = sorted(set(dummy) & set(monitor))
    if both:
        rd.fail(f"slot {both[0]} is both a dummy and a monitor slot", f"{w}.monitor_slots")
    return BoatConfig(slots=slots, dummy_slots=dummy, monitor_slots=monitor)


def read_furnace(rd, doc, boat):
    """The ``[furnace]`` table as `FurnaceConfig`, or None; zones checked against the boat."""
    t = rd.table(doc, "furnace", "")
    if t is None:
        return None
    w = "furnace"
    rd.keys(t, w, "furnace")
    if "zones" not in t:
        rd.fail("missing required key 'zones' in [furnace] (heater zones, load end first)",
                f"{w}.zones")
    raw = rd.value(t, "zones", w, "array")
    if not raw:
        rd.fail("zones is empty; expected at least one heater zone", f"{w}.zones")
    zones = []
    for i, z in enumerate(raw, start=1):
        zw = f"{w}.zones[{i}]"
        if not isinstance(z, dict):
            rd.fail(f"expected a zone table {{ name = \"...\", slots = [first, last] }}, found "
                    f"{found(z)}", zw)
        rd.keys(z, zw, "furnace.zones")
        name = rd.name(z, "name", zw, required=True)
        if any(name == other.name for other in zones):
            rd.fail(f"zone name {name!r} is used twice", f"{zw}.name")
        if "slots" not in z:
            rd.fail(f"missing required key 'slots' in zone {name!r} ([first, last], inclusive)",
                    f"{zw}.slots")
        s = rd.value(z, "slots", zw, "array")
        if len(s) != 2 or not all(isinstance(x, int) and not isinstance(x, bool) for x in s):
            rd.fail(f"zone {name!r}: expected slots = [first, last], two integers, found "
                    f"{found(s)}", f"{zw}.slots")
        first, last = s
        if not 1 <= first <= last:
            rd.fail(f"zone {name!r}: slots = [{first}, {last}]; expected 1 <= first <= last",
                    f"{zw}.slots")
        if boat is not None and last > boat.slots:
            rd.fail(f"zone {name!r} reaches slot {last}, outside the boat (slots 1..{boat.slots})",
                    f"{zw}.slots")
        if not zones and first != 1:
            rd.fail(f"zone {name!r} starts at slot {first}; expected the first zone (load end) to "
                    "start at slot 1", f"{zw}.slots")
        if zones:
            prev = zones[-1]
            if first <= prev.last_slot:
                rd.fail(f"zone {name!r} starts at slot {first} but zone {prev.name!r} ends at slot "
                        f"{prev.last_slot}: zones overlap (expected load end first, each zone "
                        "starting after the previous one ends)", f"{zw}.slots")
            if first > prev.last_slot + 1:
                gap = (f"slot {prev.last_slot + 1}" if first == prev.last_slot + 2
                       else f"slots {prev.last_slot + 1}-{first - 1}")
                rd.fail(f"{gap} between zones {prev.name!r} and {name!r} belong to no zone; "
                        "expected contiguous zones", f"{zw}.slots")
        zones.append(Zone(name=name, first_slot=first, last_slot=last))
    if boat is not None and zones[-1].last_slot != boat.slots:
        rd.fail(f"the last zone {zones[-1].name!r} ends at slot {zones[-1].last_slot} but the boat "
                f"has {boat.slots} slots; expected the zones to cover the whole boat",
                f"{w}.zones[{len(zones)}].slots")
    offset = rd.number(t, "max_offset_C", w, default=5.0, lo=0.0, hi=MAX_TEMPERATURE_OFFSET_K,
                       lo_open=True, unit=" C")
    change = rd.number(t, "max_time_change_pct", w, default=15.0, lo=0.0, hi=100.0,
                       lo_open=True, hi_open=True, unit=" %")
    width = rd.number(t, "coupling_width_slots", w, default=None, lo=0.0, hi=50.0, unit=" slots")
    return FurnaceConfig(zones=tuple(zones), max_offset_C=offset, max_time_change_pct=change,
                         coupling_width_slots=width)


def read_recipe(rd, doc):
    """The ``[[recipe.step]]`` tables as a tuple of `filmmap.growth.Step` (empty without
    ``[recipe]``), each checked as the growth model checks a step (see the module notes)."""
    t = rd.table(doc, "recipe", "")
    if t is None:
        return ()
    rd.keys(t, "recipe", "recipe")
    raw = rd.tables(t, "step", "recipe", what="recipe steps")
    if raw is None:
        rd.fail("[recipe] has no [[recipe.step]]; expected one or more steps", "recipe.step")
    steps = []
    for i, s in enumerate(raw, start=1):
        steps.append(_read_step(rd, s, f"recipe.step[{i}]", steps))
    return tuple(steps)


def _read_step(rd, s, w, earlier):
    rd.keys(s, w, "recipe.step")
    name = rd.name(s, "name", w, required=True)
    if any(name == other.name for other in earlier):
        rd.fail(f"step name {name!r} is used twice; expected unique step names", f"{w}.name")
    ambient = rd.string(s, "ambient", w, required=True, choices=AMBIENTS)
    minutes = rd.number(s, "minutes", w, required=True, lo=0.0, hi=MAX_STEP_MINUTES,
                        lo_open=True, unit=" min")
    lo_t, hi_t = TEMPERATURE_RANGE_C
    temps = {k: rd.number(s, k, w, lo=lo_t, hi=hi_t, lo_open=True, unit=" C")
             for k in ("at_C", "from_C", "to_C")}
    at, frm, to = temps["at_C"], temps["from_C"], temps["to_C"]
    if at is not None and (frm is not None or to is not None):
        rd.fail(f"step {name!r} gives at_C and from_C/to_C; expected either at_C (hold) or "
                "from_C and to_C (ramp)", f"{w}.at_C")
    if at is None:
        if frm is None and to is None:
            rd.fail(f"step {name!r} has no temperature; expected at_C (hold) or from_C and "
                    "to_C (ramp), deg C", f"{w}.at_C")
        if to is None:
            rd.fail(f"step {name!r} is a ramp with from_C but no to_C; expected the end "
                    "temperature to_C (deg C)", f"{w}.to_C")
        if frm is None:
            rd.fail(f"step {name!r} is a ramp with to_C but no from_C; expected the start "
                    "temperature from_C (deg C)", f"{w}.from_C")
    outside = temperatures_outside_range(ambient, temps, FURNACE_TEMPERATURE_RANGE_C)
    if outside:
        key, value = outside[0]
        lo, hi = FURNACE_TEMPERATURE_RANGE_C
        rd.fail(f"step {name!r} ({ambient}): {key} = {value:g} C is outside the furnace range "
                f"of oxidising steps; expected {lo:g} <= {key} <= {hi:g} C (the range the "
                f"growth model accepts for {' and '.join(OXIDISING_AMBIENTS)} steps)",
                f"{w}.{key}")
    return Step(name=name, ambient=ambient, minutes=minutes, at_C=at, from_C=frm, to_C=to)
