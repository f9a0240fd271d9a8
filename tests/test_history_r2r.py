"""Run-to-run control: EWMA filter, furnace state from advice, next run, closed loop.

The EWMA recursion x_hat_k = w x_k + (1 - w) x_hat_(k-1) is the run-to-run practice of
Sachs, Hu & Ingolfsson (IEEE Trans. Semicond. Manuf. 8, 26 (1995), from memory); the
expected values of the filter are computed by hand in the comments.  The furnace-state
and next-run checks build synthetic lots with the Deal-Grove model (`integrate_recipe`)
from known zone offsets and trims, so the expected answers are the inputs.  The closed
loop runs an invented drifting furnace (a coarse 12-slot boat, two short steps, so the
test is fast).
"""

import numpy as np
import pytest

from filmmap.pipeline.demo import lot_toml
from filmmap.errors import FilmmapInputError
from filmmap.growth import advise, gain_matrix, integrate_recipe, with_minutes, validate_steps
from filmmap.history.r2r import (
    FurnaceEstimate,
    LotOffsets,
    estimate_from_records,
    estimate_furnace,
    ewma_filter,
    lot_offsets,
    next_run,
    next_run_from_history,
)
from filmmap.history.records import LotRecord, WaferSummary
from filmmap.io import read_lot_file
from furnace_sim import SyntheticFurnace, simulate

RECIPE = [{"name": "dry-cap", "ambient": "O2", "minutes": 5.0, "at_C": 1000.0},
          {"name": "wet", "ambient": "H2O", "minutes": 115.0, "at_C": 1000.0}]
ZONES = (("load", 1, 4), ("center", 5, 8), ("source", 9, 12))
SLOTS = np.arange(1, 13)
ROLES = np.array(["product"] * 12, dtype=object)


# --------------------------------------------------------------------------- filter

def test_ewma_filter_by_hand():
    # w = 0.5 on 1, 2, 4: x_hat = 1 (the first value), 0.5*2 + 0.5*1 = 1.5,
    # 0.5*4 + 0.5*1.5 = 2.75
    np.testing.assert_allclose(ewma_filter([1, 2, 4], 0.5), [1.0, 1.5, 2.75])
    # from x_hat_0 = 0: 0.5, 0.5*2 + 0.25 = 1.25, 0.5*4 + 0.625 = 2.625
    np.testing.assert_allclose(ewma_filter([1, 2, 4], 0.5, initial=0.0), [0.5, 1.25, 2.625])
    # a run without a value holds the estimate; w = 1 is the last value
    np.testing.assert_allclose(ewma_filter([1, None, 4], 0.5), [1.0, 1.0, 2.5])
    np.testing.assert_allclose(ewma_filter([3, 1, 4], 1.0), [3, 1, 4])
    # the steady lag behind a ramp of slope d is d (1 - w) / w
    x_hat = ewma_filter(np.arange(200.0) * 0.3, 0.25)
    assert 0.3 * 199 - x_hat[-1] == pytest.approx(0.3 * 0.75 / 0.25, rel=1e-9)
    for bad in (0.0, 1.5, -0.1):
        with pytest.raises(FilmmapInputError, match="weight"):
            ewma_filter([1.0], bad)


# --------------------------------------------------------------------------- state

def _lot(e_zone, trims, minutes=115.0):
    """Wafer means of a noiseless lot grown with zone offsets e + trims (pure steps)."""
    G = gain_matrix(ZONES, SLOTS, 0.0)
    off = G @ (np.asarray(e_zone) + np.asarray(trims))
    return integrate_recipe(with_minutes(validate_steps(RECIPE), 1, minutes), "100", 1.5, off)


def test_lot_offsets_take_the_applied_trims_out():
    advice = {"common_offset_C": -1.0, "zone_errors_C": {"a": 0.5, "b": -0.5}}
    got = lot_offsets(advice, {"a": 1.0})
    # zone a: -1 + 0.5 - 1 = -1.5; zone b: -1 - 0.5 - 0 = -1.5; common: -1 - (1 + 0)/2
    assert got.zone_C == {"a": -1.5, "b": -1.5}
    assert got.common_C == -1.5
    with pytest.raises(FilmmapInputError, match="do not|does not"):
        lot_offsets(advice, {"c": 1.0})
    with pytest.raises(FilmmapInputError, match="common_offset_C"):
        lot_offsets({}, None)


def test_furnace_state_is_recovered_through_the_advice():
    e = np.array([-2.0, 0.5, 1.0])          # the furnace's own zone offsets, K
    trims = np.array([1.5, 0.0, -0.8])      # trims in force during the run, K
    adv = advise(RECIPE, "wet", 600.0, ZONES, SLOTS, _lot(e, trims), ROLES)
    got = lot_offsets(adv, dict(zip(["load", "center", "source"], trims)), zones=ZONES,
                      product_slots=SLOTS)
    np.testing.assert_allclose([got.zone_C[n] for n in ("load", "center", "source")], e,
                               atol=1e-6)
    assert got.common_C == pytest.approx(np.mean(e), abs=1e-6)   # 4 slots per zone


def test_estimate_filters_each_zone_and_holds_missing_ones():
    hist = [LotOffsets(-1.0, {"load": -2.0, "source": None}),
            LotOffsets(-0.5, {"load": -1.0, "source": 0.4}),
            LotOffsets(0.0, {"load": 0.0, "source": 0.8})]
    est = estimate_furnace(hist, 0.5)
    # common: -1, -0.75, -0.375; load: -2, -1.5, -0.75; source: -, 0.4, 0.6
    assert est.common_C == pytest.approx(-0.375)
    assert est.zone_C == {"load": pytest.approx(-0.75), "source": pytest.approx(0.6)}
    assert est.zone_error_C["source"] == pytest.approx(0.975)
    np.testing.assert_allclose(est.common_filtered, [-1.0, -0.75, -0.375])
    with pytest.raises(FilmmapInputError, match="no lot"):
        estimate_furnace([], 0.5)


# --------------------------------------------------------------------------- next run

def _estimate(common, zones):
    return FurnaceEstimate(weight=1.0, n_lots=1, common_C=common, zone_C=zones,
                           common_series=np.array([common]), common_filtered=np.array([common]))


def test_next_run_flattens_the_boat_and_hits_the_target():
    e = {"load": -2.0, "center": 0.5, "source": 1.0}
    nxt = next_run(RECIPE, "wet", 600.0, _estimate(-0.1667, e), zones=ZONES, product_slots=SLOTS)
    t = np.array([nxt.zone_trims_C[n] for n in ("load", "center", "source")])
    ev = np.array(list(e.values()))
    np.testing.assert_allclose(ev + t, np.mean(ev), atol=1e-12)     # flat, centred trims
    assert np.sum(t) == pytest.approx(0.0, abs=1e-12)
    # the time is checked against the model directly
    G = gain_matrix(ZONES, SLOTS, 0.0)
    x = integrate_recipe(with_minutes(validate_steps(RECIPE), 1, nxt.minutes_next), "100", 1.5,
                         G @ (ev + t))
    assert np.mean(x) == pytest.approx(600.0, abs=1e-5)
    assert nxt.predicted_mean_nm == pytest.approx(600.0, abs=1e-5)
    assert nxt.predicted_wtw_pct == pytest.approx(0.0, abs=1e-9)
    assert nxt.time_clipped == 0 and nxt.clipped_zones == []


def test_next_run_clips_trims_and_time_and_says_so():
    e = {"load": -9.0, "center": 0.0, "source": 0.0}      # more than the 5 K limit
    nxt = next_run(RECIPE, "wet", 600.0, _estimate(-3.0, e), zones=ZONES, product_slots=SLOTS)
    assert nxt.zone_trims_C["load"] == pytest.approx(5.0)
    assert nxt.clipped_zones == ["load"]
    G = gain_matrix(ZONES, SLOTS, 0.0)
    t = np.array(list(nxt.zone_trims_C.values()))
    x = integrate_recipe(with_minutes(validate_steps(RECIPE), 1, nxt.minutes_next), "100", 1.5,
                         G @ (np.array(list(e.values())) + t))
    assert np.mean(x) == pytest.approx(600.0, abs=1e-4)    # non-uniform: Brent on the mean
    far = next_run(RECIPE, "wet", 900.0, _estimate(0.0, {}), max_time_change_pct=10.0)
    assert far.time_clipped == 1 and far.minutes_next == pytest.approx(126.5)
    assert any("clipped" in w for w in far.warnings)
    with pytest.raises(FilmmapInputError, match="product slots"):
        next_run(RECIPE, "wet", 600.0, _estimate(0.0, e), zones=ZONES)


def test_next_run_from_history_with_a_lot_file(tmp_path):
    (tmp_path / "wafers").mkdir()
    (tmp_path / "wafers" / "w.csv").write_text("placeholder\n")
    (tmp_path / "lot.toml").write_text(lot_toml())
    cfg = read_lot_file(tmp_path / "lot.toml")           # the invented demo tube's lot file
    product = [s for s in range(1, 51) if s not in (1, 2, 3, 15, 36, 48, 49, 50)]
    steps = validate_steps([dict(name=s.name, ambient=s.ambient, minutes=s.minutes,
                                 **({"at_C": s.at_C} if s.at_C is not None else
                                    {"from_C": s.from_C, "to_C": s.to_C})) for s in cfg.recipe])
    G = gain_matrix(cfg.furnace.zones, np.array(product), 0.0)
    e = np.array([-1.0, 0.0, 0.6])
    rows = []
    for i, trims in enumerate(([0.0, 0.0, 0.0], [1.0, 0.0, -0.6])):
        x = integrate_recipe(steps, "100", 1.5, G @ (e + np.array(trims)))
        adv = advise(steps, "wet", 600.0, cfg.furnace.zones, product, x, ["product"] * len(x))
        rows.append(LotRecord(lot_id=f"L{i}", advice=adv,
                              applied_trims_C=dict(zip(("load", "center", "source"), trims)),
                              wafers=tuple(WaferSummary(f"W{s}", s) for s in product)))
    est = estimate_from_records(rows, 0.3, zones=cfg.furnace.zones)
    np.testing.assert_allclose([est.zone_C[n] for n in ("load", "center", "source")], e,
                               atol=1e-5)
    nxt = next_run_from_history(rows, cfg, 0.3)
    assert nxt.predicted_mean_nm == pytest.approx(600.0, abs=1e-3)
    t = np.array([nxt.zone_trims_C[n] for n in ("load", "center", "source")])
    assert np.ptp(e + t) == pytest.approx(0.0, abs=1e-5)
    assert any("EWMA weight 0.3 over 2" in w for w in nxt.warnings)


# --------------------------------------------------------------------------- closed loop

def _furnace():
    """Invented: rate factor -0.3 %/run, source zone -0.2 K/run, smooth cold load end."""
    profile = tuple(-1.5 * np.exp(-(SLOTS - 1) / 3.0) + 0.3)
    return SyntheticFurnace(zones=ZONES, product_slots=tuple(SLOTS), profile_C=profile,
                            rate_drift_pct_per_run=-0.3, zone_drift_C_per_run={"source": -0.2},
                            rate_noise_pct=0.3, wafer_noise_pct=0.1, width_slots=2.0)


def test_closed_loop_keeps_a_drifting_furnace_in_tolerance():
    fur = _furnace()
    tol = 2.0
    open_loop = simulate(fur, RECIPE, "wet", 600.0, weight=None, n_runs=30, tolerance_pct=tol)
    loop = simulate(fur, RECIPE, "wet", 600.0, weight=0.5, n_runs=30, tolerance_pct=tol)
    slow = simulate(fur, RECIPE, "wet", 600.0, weight=0.1, n_runs=30, tolerance_pct=tol)
    # open loop: the recipe never changes and the lot mean walks out of the spec
    assert np.all(open_loop.minutes == 115.0)
    assert open_loop.runs_out_of_tolerance >= 10
    assert open_loop.error_pct[-1] < -tol
    # controlled: every run within tolerance, the boat kept flat, the time lengthened
    assert loop.runs_out_of_tolerance == 0
    assert loop.max_abs_error_pct < tol
    assert np.mean(loop.wtw_pct[-10:]) < 0.6 * np.mean(open_loop.wtw_pct[-10:])
    assert loop.minutes[-1] > 115.0
    assert loop.trims_C[-1]["source"] > 2.0       # compensates the source zone's drift
    # a small weight lags the drift: the steady error grows as drift / w
    assert slow.mean_abs_error_pct > loop.mean_abs_error_pct
    # the same noise for every strategy: the first run is the same lot
    assert open_loop.lot_mean_nm[0] == loop.lot_mean_nm[0] == slow.lot_mean_nm[0]
