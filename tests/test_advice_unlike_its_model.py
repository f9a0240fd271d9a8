"""Advice on furnaces that break the advice's own assumptions.

The other advice tests mostly make their lots with filmmap's growth model and the same
gain model the advice reads them with (consistency tests). Here the furnace is
`furnace_reference` (its own Deal-Grove closed form with published constants, not
filmmap.growth) and it differs from what the advice assumes in each way a real tube
does:

- the heater zones blend into each other as an erf over sigma = 2.5 slots (a 10-90 %
  width of 6.4 slots), read with the advice's default, a sharp step;
- the door end is a linear ramp (-6 K at the first product slot, gone after 5 slots),
  not the exponential decay of filmmap's end-effect model;
- every slot has its own 0.15 K of temperature scatter and every wafer mean 0.3 nm of
  measurement noise;
- the growth constants are 3 % slower than the ones the advice uses.

The advised recipe is then run on that same true furnace, and the checks are what a
process engineer needs: the trims flatten the boat where the zones are to blame, the
time puts the mean on target, the limits hold, the advice's own prediction of the next
run is honest, and where the model cannot explain the profile it says so. "The best
three trims can do" is found independently, by minimising the true furnace's spread
over the trims (Nelder-Mead, scipy).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.optimize import minimize

from filmmap.growth.advice import advise

from furnace_reference import DUMMIES, PRODUCT, ZONES, wet_oxide_nm, zone_profile_smooth

RECIPE = [{"name": "push", "ambient": "N2", "minutes": 20, "at_C": 800},
          {"name": "wet", "ambient": "H2O", "minutes": 116.0, "at_C": 1000},
          {"name": "pull", "ambient": "N2", "minutes": 20, "at_C": 800}]
TARGET_NM = 600.0
TOLERANCE_PCT = 1.0             # spec half-width: +/- 6 nm
SIGMA_SLOTS = 2.5               # true zone coupling (erf); the advice assumes a step
RATE = 0.97                     # true growth constants 3 % below the advice's
DOOR_REACH = 5                  # the door ramp covers product slots 4-8
BOUNDARIES = (17.5, 34.5)       # between the zones of furnace_reference.ZONES


def door_ramp(slots, first_K=-6.0):
    """Linear door effect: ``first_K`` at slot 4 (the first after the dummies), 0 from slot 9."""
    u = np.asarray(slots, dtype=float) - max(d for d in DUMMIES if d < 10)
    return first_K * np.clip(1.0 - (u - 1.0) / DOOR_REACH, 0.0, 1.0)


def true_means(T_offset, minutes=116.0):
    """Noise-free wafer means (nm) of the true furnace for per-slot offsets (K)."""
    return wet_oxide_nm(minutes, 1000.0 + np.asarray(T_offset), rate_factor=RATE)


def furnace(seed, zone_errors_K=(-3.0, 0.5, 2.0), ripple_K=0.0):
    """Per-slot true temperature offsets (K) and the measured wafer means (nm)."""
    rng = np.random.default_rng(seed)
    T = (zone_profile_smooth(PRODUCT, ZONES, zone_errors_K, SIGMA_SLOTS) + door_ramp(PRODUCT)
         + 0.15 * rng.standard_normal(PRODUCT.size)
         + ripple_K * np.sin(2 * np.pi * PRODUCT / 4.0))
    return T, true_means(T) + 0.3 * rng.standard_normal(PRODUCT.size)


def run_advice(measured, **limits):
    return advise(RECIPE, "wet", TARGET_NM, ZONES, PRODUCT, measured,
                  ["product"] * PRODUCT.size, tolerance_pct=TOLERANCE_PCT, boat_size=50,
                  dummy_slots=DUMMIES, **limits)


def trims_of(advice):
    return np.array([advice["zone_offsets_C"][z[0]] for z in ZONES])


def next_run(T, advice):
    """True wafer means (nm) when the true furnace runs the advised time and trims."""
    trims = zone_profile_smooth(PRODUCT, ZONES, trims_of(advice), SIGMA_SLOTS)
    return true_means(T + trims, advice["minutes_next"])


def spread_outside_door(x):
    """Std (nm) of the product means the door ramp does not touch (the zones' share)."""
    return float(np.std(x[door_ramp(PRODUCT) == 0.0], ddof=1))


def best_three_trims_spread(T):
    """The smallest spread outside the door that three zone trims reach on the true furnace."""
    def spread(t):
        return spread_outside_door(true_means(
            T + zone_profile_smooth(PRODUCT, ZONES, t, SIGMA_SLOTS)))
    return minimize(spread, np.zeros(3), method="Nelder-Mead",
                    options={"xatol": 1e-3, "fatol": 1e-4}).fun


def predicted_next(advice):
    return np.array([advice["predicted_nm_by_slot_next"][str(s)] for s in PRODUCT])


def near_what_the_model_gets_wrong(slot):
    """A zone boundary (the coupling differs) or the door ramp (its shape differs)."""
    return min(abs(slot - b) for b in BOUNDARIES) <= 3 or slot <= 4 + DOOR_REACH


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_smooth_coupling_door_ramp_and_noise(seed):
    T, measured = furnace(seed)
    a = run_advice(measured)
    x_now, x_next = true_means(T), next_run(T, a)
    # the limits hold (defaults: 5 K per zone, 15 % of the step time)
    assert np.all(np.abs(trims_of(a)) <= 5.0 + 1e-9)                 # float slack only
    assert abs(a["minutes_next"] / a["minutes_now"] - 1) <= 0.15 + 1e-12
    assert not any("clipped" in w for w in a["warnings"])
    # the time puts the true product mean on target: within 0.1 %, a tenth of the spec
    # half-width (measured 0.008-0.013 %: the noise of the mean, 0.3 nm / sqrt(44) =
    # 0.008 %, and the oxide read as a temperature standing in for the 3 % rate error)
    assert abs(np.mean(x_next) / TARGET_NM - 1) < 0.001
    # the trims flatten the boat where the zones are to blame (the slots the door ramp
    # does not reach): at least halved (the closed-loop acceptance figure of
    # test_advice; measured 0.34-0.35), and at least 60 % of what the best three trims
    # could do on this furnace (measured 71-73 %: the step model reads the erf-blended
    # zones diluted)
    now, after = spread_outside_door(x_now), spread_outside_door(x_next)
    best = best_three_trims_spread(T)
    assert after <= 0.5 * now, (now, after)
    assert (now - after) / (now - best) >= 0.6, (now, after, best)
    # the door: extra dummies at the load end, only where the ramp is, none at the source
    edge = a["edge_slots"]["load"]
    assert edge[:2] == [4, 5] and max(edge) <= 4 + DOOR_REACH - 1
    assert a["extra_dummies"]["source"] == 0
    # the advice's own prediction of the next run is honest on the true furnace:
    # WTW within 0.05 %-points (measured <= 0.013), the mean within 0.05 % (measured
    # <= 0.013 %), each slot within the spec half-width and 1.5 nm rms (measured
    # 1.0-1.1 nm rms, 3.3 nm at most: the trims reach across a boundary wider than the
    # step model says)
    wtw_true = 100 * np.std(x_next, ddof=1) / np.mean(x_next)
    assert a["predicted_wtw_pct_next"] == pytest.approx(wtw_true, abs=0.05)
    assert a["predicted_mean_nm_next"] == pytest.approx(np.mean(x_next), rel=5e-4)
    miss = predicted_next(a) - x_next
    assert np.sqrt(np.mean(miss**2)) < 1.5 and np.max(np.abs(miss)) < 0.01 * TARGET_NM
    # slots the model leaves unexplained are only where the furnace differs from the model
    assert all(near_what_the_model_gets_wrong(s) for s in a["unexplained_slots"]), \
        a["unexplained_slots"]


def test_a_profile_no_zone_can_make_is_warned_not_chased():
    # a 1 K ripple with a 4-slot period on top of the same furnace: no heater zone and no
    # boat end makes that, and the advice must say its fit is weak, name the slots, and
    # still not make the boat worse (the trims answer the zone part only)
    T, measured = furnace(1, ripple_K=1.0)
    a = run_advice(measured)
    x_now, x_next = true_means(T), next_run(T, a)
    assert any(w.startswith("weak fit") for w in a["warnings"]), a["warnings"]
    assert a["zone_fit_residual_C"] > 0.5                    # the stated weak-fit limit
    # the ripple's crests and troughs (odd slots, |sin| = 1) are most of the named slots
    named = np.array(a["unexplained_slots"])
    assert named.size >= 10 and np.mean(named % 2 == 1) >= 0.8, named
    # trims still help where the zones are to blame (measured 0.51 of the spread: the
    # ripple stays), and the mean is on target as above
    assert spread_outside_door(x_next) <= 0.75 * spread_outside_door(x_now)
    assert abs(np.mean(x_next) / TARGET_NM - 1) < 0.001
    assert a["predicted_wtw_pct_next"] == pytest.approx(
        100 * np.std(x_next, ddof=1) / np.mean(x_next), abs=0.05)


def test_limits_hold_and_are_said_when_the_furnace_is_far_off():
    # a load zone 10 K cold and constants 10 % slow (not 3 %), with the limits tightened to
    # 3 K and 5 %: every limit holds, each clipped one is named, the target is said to be
    # out of reach and the prediction of the (short) next run is still the true one
    rng = np.random.default_rng(4)
    T = (zone_profile_smooth(PRODUCT, ZONES, (-10.0, 0.0, 1.0), SIGMA_SLOTS)
         + door_ramp(PRODUCT) + 0.15 * rng.standard_normal(PRODUCT.size))
    slow = wet_oxide_nm(116.0, 1000.0 + T, rate_factor=0.90)
    a = run_advice(slow + 0.3 * rng.standard_normal(PRODUCT.size), max_offset_C=3.0,
                   max_time_change_pct=5.0)
    t = trims_of(a)
    assert np.all(np.abs(t) <= 3.0 + 1e-9)                       # float slack only
    assert a["minutes_next"] == pytest.approx(1.05 * 116.0, rel=1e-12)   # clipped: +5 %
    assert any("'load' trim clipped" in w for w in a["warnings"])
    assert any("time change clipped" in w and "not reachable" in w for w in a["warnings"])
    assert any("outside the spec band" in w for w in a["warnings"])
    assert any("off on average" in w for w in a["warnings"])   # the slow constants
    x_next = wet_oxide_nm(a["minutes_next"],
                          1000.0 + T + zone_profile_smooth(PRODUCT, ZONES, t, SIGMA_SLOTS),
                          rate_factor=0.90)
    # honest: the mean it predicts is the true one within 0.1 % (measured 0.014 %), and
    # that mean really is outside the spec band it warns about
    assert a["predicted_mean_nm_next"] == pytest.approx(np.mean(x_next), rel=1e-3)
    assert abs(np.mean(x_next) / TARGET_NM - 1) > TOLERANCE_PCT / 100
    # even clipped, the trims flatten the true boat (measured 0.66 of the spread)
    assert np.std(x_next, ddof=1) < 0.75 * np.std(slow, ddof=1)
    # ... but never at the mean's expense: with the time on its bound and the lot short,
    # trims that cool the boat on average would widen the miss (they did, by -0.9 K, until
    # the advice held the mean). The true mean with the trims is not further from target
    # than without them, at the same time (measured +0.006 nm; 0.05 nm = model mismatch)
    x_untrimmed = wet_oxide_nm(a["minutes_next"], 1000.0 + T, rate_factor=0.90)
    assert np.mean(x_next) >= np.mean(x_untrimmed) - 0.05
