"""Calibration from the oxide, next-run advice and what-if prediction.

Most tests here are consistency tests: their synthetic furnaces are filmmap's own growth
model (`integrate_recipe`) and gain model (`gain_matrix`), with known zone errors and a
known time or rate error; the advice reads them back with the same assumptions, and the
advised run goes back through the same model.  They check the advice's algebra (round
trips, bounds, warnings, the result's shape), not that its model is right.  That outside
check is elsewhere: test_boat_model.py and test_advice_unlike_its_model.py make their
furnaces with the independent Deal-Grove of tests/furnace_reference.py, the latter with
a coupling, a door effect, noise and growth constants the advice does not assume.  The
model checks in this file compare with furnace_reference's Deal-Grove closed form (Deal &
Grove, J. Appl. Phys. 36, 3770 (1965), constants of Plummer et al. 2000); the
zone-coupling model and the warning thresholds are common practice, no source.  The
source of each check is named beside it.
"""

import json
import math

import numpy as np
import pytest
from scipy.optimize import brentq

from filmmap.pipeline.demo import lot_toml
from filmmap.errors import FilmmapInputError
from filmmap.growth import (
    ADVICE_KEYS,
    CAUTION,
    advise,
    advise_from_config,
    calibrate_slots,
    fit_zones,
    gain_matrix,
    integrate_recipe,
    predict_by_zone,
    reference_pressure_atm,
    validate_steps,
    with_minutes,
)
from filmmap.io import read_lot_file

from furnace_reference import minutes_to_grow, wet_oxide_nm

ZONES = (("load", 1, 17), ("center", 18, 34), ("source", 35, 50))
SLOTS = np.arange(1, 51)
DUMMY = (1, 2, 3, 48, 49, 50)
MONITOR = (15, 36)
ROLES = np.array(["dummy" if s in DUMMY else "monitor" if s in MONITOR else "product"
                  for s in SLOTS], dtype=object)
PRODUCT = ROLES == "product"

# Wet oxidation at 1050 C with a dry cap (a made-up but typical thick-oxide recipe).
WET = validate_steps([
    {"name": "push", "ambient": "N2", "minutes": 30.0, "from_C": 800.0, "to_C": 1050.0},
    {"name": "dry", "ambient": "O2", "minutes": 10.0, "at_C": 1050.0},
    {"name": "wet", "ambient": "H2O", "minutes": 100.0, "at_C": 1050.0},
    {"name": "pull", "ambient": "N2", "minutes": 40.0, "from_C": 1050.0, "to_C": 800.0},
])
# Dry oxidation with an oxidising ramp (exercises the ramp integrator).
DRY = validate_steps([
    {"name": "ramp", "ambient": "O2", "minutes": 30.0, "from_C": 900.0, "to_C": 1100.0},
    {"name": "ox", "ambient": "O2", "minutes": 120.0, "at_C": 1100.0},
    {"name": "pull", "ambient": "N2", "minutes": 40.0, "from_C": 1100.0, "to_C": 800.0},
])


def furnace_run(steps, step, minutes, zone_error_C, trims_C=0.0, time_factor=1.0,
                rate_factor=1.0, width_slots=0.0):
    """A synthetic furnace: zone errors and trims through the gain model, a run that lasts
    ``time_factor`` times the set duration of ``step``, and growth rates ``rate_factor``
    times nominal (an oxidant partial pressure off by that factor scales B and B/A, Deal &
    Grove 1965).  Returns the wafer means (nm) of all 50 slots."""
    G = gain_matrix(ZONES, SLOTS, width_slots)
    offset = G @ (np.asarray(zone_error_C, float) + trims_C)
    p = {"O2": rate_factor, "H2O": rate_factor * reference_pressure_atm("H2O")}
    return integrate_recipe(with_minutes(steps, step, minutes * time_factor), "100", 1.5,
                            offset, pressure_atm=p)


def measured_lot(steps, step, **furnace):
    m0 = next(s.minutes for s in steps if s.name == step)
    x = furnace_run(steps, step, m0, **furnace)
    x[ROLES == "dummy"] = np.nan          # dummies are not measured
    return m0, x


def trims_of(advice):
    return np.array([advice["zone_offsets_C"][z[0]] for z in ZONES])


def nominal_target(steps):
    """The thickness the recipe as written grows in a perfect furnace (nm)."""
    return float(integrate_recipe(steps, "100", 1.5, 0.0))


# --------------------------------------------------------------------------- gain model

def test_gain_matrix_definition():
    # Zone-to-slot coupling: common practice, no source (the definition in calibrate.py).
    step = gain_matrix(ZONES, SLOTS, 0.0)
    own = np.array([[a <= s <= b for (_, a, b) in ZONES] for s in SLOTS], float)
    assert np.array_equal(step, own)                       # width 0 = each slot its own zone
    for shape in ("logistic", "linear"):
        G = gain_matrix(ZONES, SLOTS, 4.0, shape)
        assert np.allclose(G.sum(axis=1), 1.0) and np.all(G >= 0)   # a blend of zones
        # far from a boundary: slot 10 is 7.5 slots (~2 widths) from 17.5; the logistic
        # leaves 9^-3.75 = 3e-4 there, the linear ramp nothing
        assert np.allclose(G[SLOTS <= 10], own[SLOTS <= 10], atol=1e-3)
    # logistic: the 10-90 % transition spans width_slots around the boundary at 17.5
    # (the next boundary, 17 slots away, adds 9^-7.5 = 7e-8 to these: abs 1e-6)
    G = gain_matrix(ZONES, [15.5, 19.5], 4.0, "logistic")
    assert G[0, 1] == pytest.approx(0.1, abs=1e-6) and G[1, 1] == pytest.approx(0.9, abs=1e-6)
    with pytest.raises(FilmmapInputError):
        gain_matrix(ZONES, SLOTS, -1.0)
    with pytest.raises(FilmmapInputError):
        gain_matrix((("a", 1, 10), ("b", 5, 20)), SLOTS)   # overlapping zones


# --------------------------------------------------------------------------- calibration

def test_calibration_recovers_slot_offsets():
    # Noise-free round trip through the model: recovery within 0.01 K (brief's figure).
    rng = np.random.default_rng(7)
    true = rng.uniform(-6.0, 4.0, SLOTS.size)
    x = integrate_recipe(WET, "100", 1.5, true)
    x[9] = np.nan                       # a wafer without a usable mean
    x[20] = 5.0                         # thinner than the recipe grows at -60 K
    cal = calibrate_slots(WET, SLOTS, x)
    ok = cal.status == "ok"
    assert np.max(np.abs(cal.offset_C[ok] - true[ok])) < 0.01
    assert cal.status[9] == "missing" and np.isnan(cal.offset_C[9])
    assert cal.status[20] == "out-of-range" and np.isnan(cal.offset_C[20])
    assert cal.n_failed == 1 and ok.sum() == SLOTS.size - 2


def test_calibration_matches_deal_grove_closed_form():
    # Deal & Grove 1965, Eq. (14): one wet hold from 1.5 nm; the offset that grows x is the
    # root of the closed form x(t, T0 + dT) = x, found here independently with brentq on
    # furnace_reference's closed form (constants of Plummer et al. 2000, not filmmap's).
    steps = [{"name": "wet", "ambient": "H2O", "minutes": 90.0, "at_C": 1000.0}]
    measured = np.array([480.0, 510.0, 530.0])
    cal = calibrate_slots(steps, [1, 2, 3], measured)
    assert cal.offset_C.size == measured.size
    for x, dT in zip(measured, cal.offset_C):
        ref = brentq(lambda d: wet_oxide_nm(90.0, 1000.0 + d, initial_nm=1.5) - x,
                     -50, 50, xtol=1e-10)
        # 1e-4 K: filmmap's 7-digit k_B moves B/A by <= 6e-7, i.e. x by ~3e-7 of 500 nm,
        # which the oxide reads as ~3e-5 K (at ~5 nm/K)
        assert dT == pytest.approx(ref, abs=1e-4)


@pytest.mark.parametrize("width, shape", [(0.0, "logistic"), (4.0, "logistic"), (3.0, "linear")])
def test_zone_fit_recovers_zone_errors(width, shape):
    # Noise-free synthetic furnace built through the same gain model: within 0.05 K (brief).
    true = np.array([-4.0, 0.0, 1.0])
    G = gain_matrix(ZONES, SLOTS, width, shape)
    x = integrate_recipe(WET, "100", 1.5, G @ true)
    x[ROLES == "dummy"] = np.nan
    cal = calibrate_slots(WET, SLOTS, x)
    w = np.where(ROLES == "dummy", 0.0, 1.0)
    fit = fit_zones(SLOTS, cal.offset_C, ZONES, w, width_slots=width, shape=shape)
    assert np.max(np.abs(fit.absolute_C - true)) < 0.05
    common = np.sum(w * (G @ true)) / np.sum(w)
    assert fit.common_C == pytest.approx(common, abs=0.05)
    assert np.max(np.abs(fit.error_C - (true - common))) < 0.05
    # the same gain model both ways, noise-free: nothing left but the calibration's solver
    # tolerance (measured residual <= 3e-9 K, errors <= 1e-9 K)
    assert fit.residual_rms_C < 1e-6 and fit.explained > 1 - 1e-9


def test_zone_differences_survive_a_rate_error():
    # A global rate error looks like a uniform offset (degenerate, see calibrate.py); the
    # zone-to-zone differences are still read to within 0.1 K with rates 3 % low.
    true = np.array([-4.0, 0.0, 1.0])
    _, x = measured_lot(WET, "wet", zone_error_C=true, rate_factor=0.97)
    cal = calibrate_slots(WET, SLOTS, x)
    fit = fit_zones(SLOTS, cal.offset_C, ZONES, np.where(ROLES == "dummy", 0.0, 1.0))
    # 0.1 K: a rate error equals a uniform offset only to first order; thin and thick
    # slots read it slightly differently (measured 0.07 K)
    assert np.max(np.abs(np.diff(fit.error_C) - np.diff(true))) < 0.1
    # the rate error shows up in the common offset: 3 % of B and B/A at 1050 C reads as
    # about -5 K (measured -5.0 K)
    assert -6.0 < fit.common_C < -4.0


# --------------------------------------------------------------------------- closed loop

CASES = [
    # steps, adjust step, zone errors (K), time factor, rate factor, coupling width (slots)
    pytest.param(WET, "wet", [-4.0, 0.0, 1.0], 0.95, 1.0, 3.0, id="wet-5pct-short-smooth"),
    pytest.param(WET, "wet", [-4.0, 0.0, 1.0], 1.0, 0.97, 0.0, id="wet-rate-3pct-low-step"),
    pytest.param(DRY, "ox", [-3.0, 0.5, 1.5], 1.0, 0.97, 2.0, id="dry-ramp-rate-3pct-low"),
]


@pytest.mark.parametrize("steps, step, zone_error, time_factor, rate_factor, width", CASES)
def test_closed_loop_hits_target_and_flattens(steps, step, zone_error, time_factor,
                                              rate_factor, width):
    # Brief's acceptance figures: next-run product mean within 0.5 % of target and the slot
    # spread (std of product wafer means) cut by at least half.  The error persists in the
    # next run (the furnace behaves as calibrated).
    target = nominal_target(steps)
    furnace = dict(zone_error_C=zone_error, time_factor=time_factor, rate_factor=rate_factor,
                   width_slots=width)
    m0, x = measured_lot(steps, step, **furnace)
    assert abs(np.nanmean(x[PRODUCT]) / target - 1) > 0.01      # the run really was off
    a = advise(steps, step, target, ZONES, SLOTS, x, ROLES, width_slots=width)
    nxt = furnace_run(steps, step, a["minutes_next"], trims_C=trims_of(a), **furnace)
    assert abs(np.mean(nxt[PRODUCT]) / target - 1) < 0.005
    assert np.std(nxt[PRODUCT], ddof=1) <= 0.5 * np.std(x[PRODUCT], ddof=1)
    # the advice's own next-run prediction agrees with the re-simulated furnace; the
    # time or rate error stands in as a temperature offset, exact only to first order
    # over the advised time change (measured <= 2.2e-4)
    assert a["predicted_mean_nm_next"] == pytest.approx(np.mean(nxt[PRODUCT]), rel=1e-3)
    assert not any("clipped" in w for w in a["warnings"])


# --------------------------------------------------------------------------- bounds

def test_zone_bound_respected_and_warned():
    # Brief: a 12 C cold zone with max 5 C; bounds from the lot file's [furnace] limits.
    target = nominal_target(WET)
    _, x = measured_lot(WET, "wet", zone_error_C=[-12.0, 0.0, 0.0])
    a = advise(WET, "wet", target, ZONES, SLOTS, x, ROLES, max_offset_C=5.0)
    t = trims_of(a)
    # hard limits; 1e-9 (and 1e-12 on a ratio) is float slack only, here and below
    assert np.all(np.abs(t) <= 5.0 + 1e-9)
    assert t[0] == pytest.approx(5.0, abs=1e-9)               # the cold zone as warm as allowed
    assert any("'load'" in w and "clipped" in w for w in a["warnings"])
    assert abs(a["minutes_next"] / a["minutes_now"] - 1) <= 0.15 + 1e-12
    # even clipped, the trims do not make the boat worse (the model's own prediction)
    assert a["predicted_wtw_pct_next"] < a["predicted_wtw_pct_now"]


def test_time_bound_respected_and_warned():
    # A run 5 % short needs about +5 % time; with a 2 % limit the change stops at +2 %.
    target = nominal_target(WET)
    m0, x = measured_lot(WET, "wet", zone_error_C=[0.0, 0.0, 0.0], time_factor=0.95)
    a = advise(WET, "wet", target, ZONES, SLOTS, x, ROLES, max_time_change_pct=2.0,
               tolerance_pct=1.0)
    assert a["minutes_next"] == pytest.approx(1.02 * m0, rel=1e-12)   # clipped: exactly +2 %
    assert any("time change clipped" in w and "not reachable" in w for w in a["warnings"])
    assert any("outside the spec band" in w for w in a["warnings"])
    assert a["predicted_mean_nm_next"] < target


def test_bounds_hold_for_random_furnaces():
    # Bounds are hard limits whatever the furnace (common practice, no source).
    rng = np.random.default_rng(11)
    target = nominal_target(WET)
    for _ in range(5):
        zone_error = rng.uniform(-10, 10, 3)
        _, x = measured_lot(WET, "wet", zone_error_C=zone_error,
                            time_factor=rng.uniform(0.8, 1.2))
        a = advise(WET, "wet", target, ZONES, SLOTS, x, ROLES, max_offset_C=3.0,
                   max_time_change_pct=10.0)
        assert np.all(np.abs(trims_of(a)) <= 3.0 + 1e-9)
        assert abs(a["minutes_next"] / a["minutes_now"] - 1) <= 0.10 + 1e-12


def test_reference_zone_is_held():
    target = nominal_target(WET)
    _, x = measured_lot(WET, "wet", zone_error_C=[-3.0, 0.0, 1.0])
    a = advise(WET, "wet", target, ZONES, SLOTS, x, ROLES, reference_zone="center")
    t = trims_of(a)
    assert t[1] == 0.0
    # relative to the centre, the load zone needs +3 K and the source -1 K; the
    # smallest-trim term shrinks trims by about 1 % (0.03 K here; measured 2.970, -1.003)
    assert t[0] == pytest.approx(3.0, abs=0.05) and t[2] == pytest.approx(-1.0, abs=0.05)


# --------------------------------------------------------------------------- warnings

def test_weak_evidence_with_three_wafers():
    # Fewer than 5 usable product wafers is weak evidence (common practice, no source).
    target = nominal_target(WET)
    _, x = measured_lot(WET, "wet", zone_error_C=[-2.0, 0.0, 1.0])
    keep = np.isin(SLOTS, [10, 25, 40])
    a = advise(WET, "wet", target, ZONES, SLOTS[keep], x[keep], ROLES[keep])
    assert a["n_usable_product"] == 3
    assert any("weak evidence" in w for w in a["warnings"])
    full = advise(WET, "wet", target, ZONES, SLOTS, x, ROLES)
    assert not any("weak evidence" in w for w in full["warnings"])


def test_failed_site_fits_warning():
    # More than 5 % failed site fits is weak evidence (common practice, no source).
    target = nominal_target(WET)
    _, x = measured_lot(WET, "wet", zone_error_C=[-2.0, 0.0, 1.0])
    many = advise(WET, "wet", target, ZONES, SLOTS, x, ROLES, n_failed_sites=300, n_sites=2156)
    few = advise(WET, "wet", target, ZONES, SLOTS, x, ROLES, n_failed_sites=20, n_sites=2156)
    assert any("300 of 2156 site fits failed" in w for w in many["warnings"])
    assert not any("site fits failed" in w for w in few["warnings"])


def test_unexplained_profile_warning():
    # A random zig-zag along the boat cannot come from three heater zones (no source).
    rng = np.random.default_rng(3)
    zigzag = np.where(SLOTS % 2 == 0, 2.0, -2.0) + rng.normal(0.0, 0.5, SLOTS.size)
    x = integrate_recipe(WET, "100", 1.5, zigzag)
    x[ROLES == "dummy"] = np.nan
    a = advise(WET, "wet", nominal_target(WET), ZONES, SLOTS, x, ROLES)
    assert any("do not explain the slot profile" in w for w in a["warnings"])
    # a +/-2 K zig-zag: the zones explain next to nothing (measured 1 %) and about 2 K
    # rms stays (measured 2.1 K); the bounds are far from both
    assert a["zone_fit_explained"] < 0.5 and a["zone_fit_residual_C"] > 1.0
    # control: a pure zone profile raises no such warning
    _, clean = measured_lot(WET, "wet", zone_error_C=[-2.0, 0.0, 1.0])
    b = advise(WET, "wet", nominal_target(WET), ZONES, SLOTS, clean, ROLES)
    assert not any("do not explain" in w for w in b["warnings"])


def test_no_usable_product_gives_no_change():
    x = np.full(SLOTS.size, np.nan)
    a = advise(WET, "wet", 1000.0, ZONES, SLOTS, x, ROLES)
    assert a["minutes_next"] == a["minutes_now"] and not any(trims_of(a))
    assert a["predicted_wtw_pct_now"] is None
    assert any("no usable product" in w for w in a["warnings"])


# --------------------------------------------------------------------------- result shape

def test_pinned_keys_and_types():
    # The pinned advice keys (the brief's JSON example), in order, with their types;
    # written out here, not taken from the module's ADVICE_KEYS (which must say the same).
    pinned = ("adjust_step", "minutes_now", "minutes_next", "zone_offsets_C",
              "effective_offset_C_by_slot", "predicted_wtw_pct_now", "predicted_wtw_pct_next",
              "warnings")
    target = nominal_target(WET)
    _, x = measured_lot(WET, "wet", zone_error_C=[-2.0, 0.0, 1.0])
    x[30] = np.nan                                   # a product wafer without a mean
    a = advise(WET, "wet", target, ZONES, SLOTS, x, ROLES)
    assert tuple(a)[:len(pinned)] == pinned == ADVICE_KEYS
    assert isinstance(a["adjust_step"], str) and a["adjust_step"] == "wet"
    assert isinstance(a["minutes_now"], float) and isinstance(a["minutes_next"], float)
    assert list(a["zone_offsets_C"]) == [z[0] for z in ZONES]
    assert all(isinstance(v, float) for v in a["zone_offsets_C"].values())
    by_slot = a["effective_offset_C_by_slot"]
    assert list(by_slot) == [str(s) for s in SLOTS]
    assert by_slot["31"] is None and by_slot["1"] is None
    assert all(isinstance(v, float) for k, v in by_slot.items() if ROLES[int(k) - 1] != "dummy"
               and k != "31")
    assert isinstance(a["predicted_wtw_pct_now"], float)
    assert isinstance(a["predicted_wtw_pct_next"], float)
    assert isinstance(a["warnings"], list) and all(isinstance(w, str) for w in a["warnings"])
    assert a["caution"] == CAUTION and CAUTION not in a["warnings"]
    assert "process owner" in a["caution"] and "qualified limits" in a["caution"]
    json.dumps(a, allow_nan=False)                   # strict JSON: no NaN anywhere
    # the measured WTW equals the "now" prediction (the calibration reproduces the means)
    p = PRODUCT & np.isfinite(x)
    wtw = 100 * np.std(x[p], ddof=1) / np.mean(x[p])
    # rel 1e-6: the calibration inverts the model to its solver tolerance (measured 2e-9)
    assert a["predicted_wtw_pct_now"] == pytest.approx(wtw, rel=1e-6)


def test_time_only_advice_matches_closed_form():
    # Deal & Grove 1965, Eq. (12): with no zones and one wet hold, the advised time is the
    # closed-form time to grow the target at the temperature the oxide reads; the oxide
    # and that time both from furnace_reference (Plummer et al. 2000 constants).
    steps = [{"name": "wet", "ambient": "H2O", "minutes": 100.0, "at_C": 1000.0}]
    x = float(wet_oxide_nm(100.0, 998.0, initial_nm=1.5))   # furnace 2 K cold
    target = 1.04 * x
    a = advise(steps, "wet", target, (), np.arange(1, 9), np.full(8, x), ["product"] * 8)
    assert a["zone_offsets_C"] == {}
    # 1e-4 K and 1e-6: filmmap's 7-digit k_B (<= 6e-7 of B/A, ~3e-5 K as read by the oxide)
    assert a["effective_offset_C_by_slot"]["4"] == pytest.approx(-2.0, abs=1e-4)
    ref = minutes_to_grow(target, 998.0, "H2O", initial_nm=1.5)
    assert a["minutes_next"] == pytest.approx(ref, rel=1e-6)


# --------------------------------------------------------------------------- lot files

def _demo_lot(tmp_path, text):
    (tmp_path / "wafers").mkdir()
    (tmp_path / "wafers" / "w.csv").write_text("placeholder\n")
    (tmp_path / "lot.toml").write_text(text)
    return read_lot_file(tmp_path / "lot.toml")


def _without_table(text, name):
    """Lot text with the [name] table (up to the next blank line) removed."""
    head = text.index(f"[{name}]")
    return text[:head] + text[text.index("\n\n", head) + 2:]


def test_advise_from_config_reads_the_lot(tmp_path):
    cfg = _demo_lot(tmp_path, lot_toml())
    slots = np.array([s for s in range(1, 51) if s not in cfg.boat.dummy_slots])
    true = gain_matrix(cfg.furnace.zones, slots) @ np.array([-3.0, 0.0, 1.0])
    steps = [dict(name=s.name, ambient=s.ambient, minutes=s.minutes, at_C=s.at_C,
                  from_C=s.from_C, to_C=s.to_C) for s in cfg.recipe]
    x = integrate_recipe(steps, "100", 1.5, true)
    a = advise_from_config(cfg, slots, x)              # roles from [boat]
    assert a["adjust_step"] == cfg.target.adjust_step
    assert a["model"]["max_offset_C"] == cfg.furnace.max_offset_C
    assert a["n_usable_product"] == slots.size - len(cfg.boat.monitor_slots)
    # the time solver (Brent, xtol 1e-9 min) puts the model's mean on target: measured 3e-15
    assert a["predicted_mean_nm_next"] == pytest.approx(cfg.target.thickness_nm, rel=1e-9)
    # the lot is made with the gain model the advice reads it with (a consistency test):
    # trims can flatten it almost entirely (measured 0.7 % of the spread left)
    assert a["predicted_wtw_pct_next"] < 0.05 * a["predicted_wtw_pct_now"]


@pytest.mark.parametrize("table", ["target", "recipe"])
def test_advise_from_config_needs_recipe_and_target(tmp_path, table):
    text = lot_toml()
    if table == "target":
        text = _without_table(text, "target")
    else:
        text = text[:text.index("[[recipe.step]]")].replace('adjust_step = "wet"\n', "")
    cfg = _demo_lot(tmp_path, text)
    with pytest.raises(FilmmapInputError) as err:
        advise_from_config(cfg, [10, 20], [600.0, 600.0])
    assert err.value.field == table and "no advice" in err.value.reason


WET_LOT = """\
[lot]
id = "T1"
[measurement]
technique = "reflectance"
files = ["wafers/*.csv"]
[stack]
substrate = "Si"
orientation = "100"
[[stack.layer]]
material = "SiO2"
thickness_nm = 600.0
[target]
thickness_nm = 600.0
tolerance_pct = 2.0
adjust_step = "wet"
[boat]
slots = 30
dummy_slots = [1, 30]
[furnace]
zones = [ { name = "load", slots = [1, 15] }, { name = "source", slots = [16, 30] } ]
[[recipe.step]]
name = "push"
ambient = "N2"
minutes = 20
from_C = 800
to_C = 1000
[[recipe.step]]
name = "wet"
ambient = "H2O"
minutes = 120
at_C = 1000
"""


def test_predict_by_zone_matches_closed_form(tmp_path):
    # Deal & Grove 1965, Eq. (14): an N2 push grows nothing, so each zone holds the closed
    # form at its set point plus trim (furnace_reference's closed form; rel 1e-6 for
    # filmmap's 7-digit k_B, <= 6e-7 of B/A, throughout this test).
    cfg = _demo_lot(tmp_path, WET_LOT)
    p = predict_by_zone(cfg, {"wet": {"minutes": 170}}, {"load": 2.0})
    load, source = p["zones"]
    assert load["mean_nm"] == pytest.approx(wet_oxide_nm(170.0, 1002.0, initial_nm=1.5), rel=1e-6)
    assert source["mean_nm"] == pytest.approx(wet_oxide_nm(170.0, 1000.0, initial_nm=1.5),
                                              rel=1e-6)
    assert [r["changed"] for r in p["recipe"]] == [False, True]
    assert len(p["slots"]) == 30 and p["slots"][0]["role"] == "dummy"
    assert p["target_nm"] == 600.0 and p["product_wtw_pct"] > 0
    # as written (no overrides, no trims): one thickness everywhere
    flat = predict_by_zone(cfg)
    assert flat["product_wtw_pct"] == pytest.approx(0.0, abs=1e-9)   # identical slots
    assert flat["zones"][0]["mean_nm"] == pytest.approx(
        wet_oxide_nm(120.0, 1000.0, initial_nm=1.5), rel=1e-6)


def test_predict_by_zone_rejects_bad_what_ifs(tmp_path):
    cfg = _demo_lot(tmp_path, WET_LOT)
    with pytest.raises(FilmmapInputError):
        predict_by_zone(cfg, {"dry": {"minutes": 10}})       # no such step
    with pytest.raises(FilmmapInputError) as err:
        predict_by_zone(cfg, {"push": {"at_C": 900}})        # a ramp has no at_C
    assert err.value.field == "overrides.push.at_C"
    with pytest.raises(FilmmapInputError):
        predict_by_zone(cfg, zone_offsets_C={"middle": 1.0})  # no such zone
    # a calibrated profile from an advice is accepted, gaps interpolated
    prof = {str(s): (None if s in (1, 30) else -1.0) for s in range(1, 31)}
    p = predict_by_zone(cfg, slot_offsets_C=prof)
    assert p["slots"][0]["offset_C"] == pytest.approx(-1.0) and "interpolated" in p["notes"][0]
    assert math.isclose(p["product_mean_nm"], wet_oxide_nm(120.0, 999.0, initial_nm=1.5),
                        rel_tol=1e-6)
