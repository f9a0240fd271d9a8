"""Lot view: wafer-to-wafer figures and the slot profile along the boat.

Every check names its source beside it: a paper (author, year) or "common
practice, no source" for facts of the trade.
"""

import math

import numpy as np
import pytest

from filmmap.errors import FilmmapInputError
from filmmap.lotstats import (central_slots, default_k, robust_sigma, slot_profile,
                              wafer_to_wafer)

# Synthetic boat used throughout. Layout: dummies at both ends, product in the
# centre, because the boat ends see a different temperature and gas flow
# (common practice, no source).
BOAT = 50
SLOTS = np.arange(1, BOAT + 1)
ROLES = np.where((SLOTS <= 3) | (SLOTS >= 48), "dummy", "product")
IDS = np.array([f"W{s:02d}" for s in SLOTS])
TARGET, TOL = 1000.0, 2.0
N_SITES, SITE_NOISE = 49, 0.005  # wafer-mean noise = 0.5 % / sqrt(49) = 0.071 %


def make_lots(rng, n_lots=1, shift=None):
    """Wafer means and sigmas of ``n_lots`` lots, each mean the average of 49 noisy sites.

    ``shift`` maps slot -> relative change of that slot's true thickness.
    """
    true = np.full(BOAT, TARGET)
    for s, rel in (shift or {}).items():
        true[s - 1] *= 1 + rel
    sites = true[None, :, None] * (1 + SITE_NOISE * rng.standard_normal((n_lots, BOAT, N_SITES)))
    return sites.mean(axis=2), sites.std(axis=2, ddof=1)


def profile(mean, sigma, **kw):
    return slot_profile(IDS, SLOTS, ROLES, mean, sigma, BOAT, **kw)


WITH_TARGET = dict(target_nm=TARGET, tolerance_pct=TOL)


# --------------------------------------------------------------------------- edge detection

@pytest.mark.parametrize("spec", [WITH_TARGET, {}], ids=["target", "no-target"])
def test_load_end_drop_gives_two_edge_slots(spec):
    # A 3 % thinner pair of slots next to the load-end dummies is an edge effect
    # (common practice, no source); it must be found by the band rule and, without
    # a target, by the median/MAD rule alone (Hampel 1974).
    rng = np.random.default_rng(101)
    means, sigmas = make_lots(rng, 50, shift={4: -0.03, 5: -0.03})
    for mean, sigma in zip(means, sigmas):
        p = profile(mean, sigma, **spec)
        assert p.edge_slots == [4, 5]
        assert p.edge_slots_load == [4, 5] and p.edge_slots_source == []
        assert p.extra_dummies == {"load": 2, "source": 0}
        assert p.flat_zone == [6, 47]
        assert p.flagged_slots == [4, 5]
        assert set(p.reasons) == {4, 5}
        assert ("target" in p.reasons[4]) == bool(spec)


@pytest.mark.parametrize("spec", [WITH_TARGET, {}], ids=["target", "no-target"])
def test_source_end_drop_gives_two_edge_slots(spec):
    # The same edge effect at the gas source end (high slots) (common practice, no source).
    rng = np.random.default_rng(202)
    means, sigmas = make_lots(rng, 50, shift={46: -0.03, 47: -0.03})
    for mean, sigma in zip(means, sigmas):
        p = profile(mean, sigma, **spec)
        assert p.edge_slots == [46, 47]
        assert p.edge_slots_source == [46, 47] and p.edge_slots_load == []
        assert p.extra_dummies == {"load": 0, "source": 2}
        assert p.flat_zone == [4, 45]


@pytest.mark.parametrize("spec", [WITH_TARGET, {}], ids=["target", "no-target"])
def test_interior_outlier_is_flagged_but_not_an_edge(spec):
    # One odd wafer in the middle is flagged (Hampel 1974) but is not contiguous
    # with an end, so it asks for no dummies (definition of an edge slot:
    # common practice, no source). Flat zone = longer side: slots 26-47 (22) > 4-24 (21).
    rng = np.random.default_rng(303)
    means, sigmas = make_lots(rng, 20, shift={25: +0.03})
    for mean, sigma in zip(means, sigmas):
        p = profile(mean, sigma, **spec)
        assert p.flagged_slots == [25]
        assert p.edge_slots == []
        assert p.extra_dummies == {"load": 0, "source": 0}
        assert p.flat_zone == [26, 47]


def test_dummy_margin_is_added_at_both_ends():
    # The margin is a safety allowance the engineer sets (common practice, no source).
    rng = np.random.default_rng(404)
    (mean,), (sigma,) = make_lots(rng, 1, shift={4: -0.03})
    p = profile(mean, sigma, dummy_margin=1, **WITH_TARGET)
    assert p.edge_slots == [4]
    assert p.extra_dummies == {"load": 2, "source": 1}


# --------------------------------------------------------------------------- false alarms

@pytest.mark.parametrize("spec", [WITH_TARGET, {}], ids=["target", "no-target"])
@pytest.mark.parametrize("floor_pct", [0.1, 0.0], ids=["floor", "no-floor"])
def test_flat_lots_rarely_report_edge_slots(spec, floor_pct):
    # Lot-wise false-alarm rate <= 1 % on flat lots, the calibration target of the
    # default limit (Davies & Gather 1993). Without the floor the limit alone holds it.
    rng = np.random.default_rng(505)
    means, sigmas = make_lots(rng, 300)
    with_edge = sum(bool(profile(m, s, sigma_floor_pct=floor_pct, **spec).edge_slots)
                    for m, s in zip(means, sigmas))
    assert len(means) == 300
    assert with_edge / len(means) <= 0.01          # the calibration target (measured 0 of 300)


def test_flat_lots_rarely_flag_any_slot_without_floor():
    # The default k is calibrated for any flag in the lot, not only edge slots
    # (Davies & Gather 1993): over 1000 flat lots at most 1 % have a flag.
    rng = np.random.default_rng(606)
    means, sigmas = make_lots(rng, 1000)
    flagged = sum(profile(m, s, sigma_floor_pct=0.0).flags.any() for m, s in zip(means, sigmas))
    assert len(means) == 1000
    assert flagged / len(means) <= 0.01            # the calibration target (measured 3 of 1000)


def test_perfectly_flat_lot_flags_nothing_thanks_to_floor():
    # Identical means give MAD = 0; the floor keeps the rule from flagging a
    # 0.01 % wobble (Hampel 1974 rule needs a positive scale).
    mean = np.full(BOAT, 1000.0)
    mean[10] = 1000.1
    p = profile(mean, np.full(BOAT, 5.0))
    assert p.mad_sigma_nm == 0.0
    assert p.robust_sigma_nm == pytest.approx(1.0)  # 0.1 % of 1000 nm
    assert not p.flags.any()
    assert p.flat_zone == [4, 47]
    p0 = profile(mean, np.full(BOAT, 5.0), sigma_floor_pct=0.0)
    assert p0.k is None and any("robust rule off" in n for n in p0.notes)


# --------------------------------------------------------------------------- robust statistics

def test_mad_consistency_factor():
    # 1.4826 * MAD estimates sigma of a normal sample (Rousseeuw & Croux 1993).
    rng = np.random.default_rng(707)
    x = 3.0 * rng.standard_normal(200_000) + 50.0
    # the MAD's relative standard error is 1.166 / sqrt(n) = 0.26 % here: 1 % is ~4 of them
    assert robust_sigma(x) == pytest.approx(3.0, rel=0.01)


def test_default_k_widens_for_small_lots():
    # A scale estimated from few values is noisy, so the limit must widen as n
    # shrinks (Davies & Gather 1993); it never drops below the known-sigma limit.
    from scipy.special import ndtri
    ks = [default_k(n) for n in (8, 12, 20, 44, 100)]
    assert all(a > b for a, b in zip(ks, ks[1:]))
    for n, k in zip((8, 12, 20, 44, 100), ks):
        assert k > -ndtri((1 - 0.99 ** (1 / n)) / 2)


def test_central_slots_are_middle_half():
    # Reference from the centre of the load (common practice, no source):
    # region 4..47 has 44 slots, q = 11, central 15..36 (22 slots).
    assert central_slots(4, 47) == (15, 36)
    assert central_slots(5, 7) == (5, 7)


def test_slot_profile_against_hand_computation():
    # 8 product slots, no dummies, k = 3 given.
    # means (slots 1..8): 990 999 1001 1000 1002 998 1000 1003
    # central slots: L = 8, q = 2 -> slots 3..6 = 1001 1000 1002 998
    #   sorted 998 1000 1001 1002 -> reference = (1000 + 1001) / 2 = 1000.5
    # all 8 sorted: 990 998 999 1000 1000 1001 1002 1003 -> median 1000
    #   |x - 1000| = 10 1 1 0 2 2 0 3 -> sorted 0 0 1 1 2 2 3 10 -> MAD = (1 + 2) / 2 = 1.5
    #   robust sigma = 1.4826 * 1.5 = 2.2239 nm (floor 0.1 % * 1000.5 = 1.0005 nm is lower)
    # limit = 3 * 2.2239 = 6.6717 nm; slot 1: |990 - 1000.5| = 10.5 > 6.67 -> flagged,
    #   slot 8: 2.5 -> not. Slot 1 touches the load end -> edge, 1 extra dummy; flat 2..8.
    # (Hampel 1974 rule, Rousseeuw & Croux 1993 factor)
    mean = [990, 999, 1001, 1000, 1002, 998, 1000, 1003]
    args = ([f"P{i}" for i in range(1, 9)], list(range(1, 9)), ["product"] * 8, mean, [4.0] * 8, 8)
    p = slot_profile(*args, k=3.0)
    assert p.central_region == (3, 6)
    assert p.reference_nm == pytest.approx(1000.5)
    assert p.robust_sigma_nm == pytest.approx(1.4826 * 1.5)
    assert p.limit_nm == pytest.approx(3 * 1.4826 * 1.5)
    assert p.flagged_slots == [1]
    assert p.edge_slots_load == [1] and p.edge_slots_source == []
    assert p.extra_dummies == {"load": 1, "source": 0}
    assert p.flat_zone == [2, 8]
    assert p.deviation_sigmas[0] == pytest.approx(-10.5 / (1.4826 * 1.5))
    # With the default limit for 8 slots (k = 9.3) the 4.7-sigma slot is not flagged:
    # the small-sample widening at work (Davies & Gather 1993).
    assert slot_profile(*args).flagged_slots == []


# --------------------------------------------------------------------------- WTW

def test_wtw_against_hand_computation():
    # Product means 998, 1002, 1004, 996 nm (+ a NaN product, a monitor, a dummy).
    # grand mean = (998 + 1002 + 1004 + 996) / 4 = 4000 / 4 = 1000 nm
    # deviations -2, +2, +4, -4 -> squares 4 + 4 + 16 + 16 = 40
    # sigma (n - 1) = sqrt(40 / 3) = 3.6515 nm -> WTW NU = 100 * 3.6515 / 1000 = 0.36515 %
    # range = 1004 - 996 = 8 nm; min 996 (W5), max 1004 (W4)
    # target 1000, tolerance 0.3 % -> band +/-3 nm: 998 in, 1002 in, 1004 out, 996 out
    #   -> in-spec count 2; the monitor (1030 nm) is out but not counted.
    # (NU = 100 sigma / mean with n - 1: common practice, no source)
    ids = ["W1", "W2", "W3", "W4", "W5", "W6", "M1", "D1"]
    slots = [3, 4, 5, 6, 7, 8, 2, 1]
    roles = ["product"] * 6 + ["monitor", "dummy"]
    mean = [998, 1002, math.nan, 1004, 996, 9999.0, 1030, 1010]
    roles[5] = "dummy"  # W6 is a dummy too: its odd mean must not matter
    w = wafer_to_wafer(ids, slots, roles, mean, [3.0] * 8, target_nm=1000, tolerance_pct=0.3)
    assert w.grand_mean_nm == pytest.approx(1000.0)
    assert w.wtw_sigma_nm == pytest.approx(math.sqrt(40 / 3))
    assert w.wtw_nu_pct == pytest.approx(100 * math.sqrt(40 / 3) / 1000)
    assert w.range_nm == pytest.approx(8.0)
    assert (w.min_nm, w.max_nm, w.min_wafer, w.max_wafer) == (996, 1004, "W5", "W4")
    assert (w.n_product, w.n_used, w.n_missing, w.missing_ids) == (5, 4, 1, ["W3"])
    assert (w.n_monitor, w.n_dummy) == (1, 2)
    assert w.in_spec_count == 2
    assert w.out_of_spec_ids == ["W4", "W5"]
    rows = {r.wafer_id: r for r in w.wafers}
    assert set(rows) == {"W1", "W2", "W3", "W4", "W5", "M1"}  # dummies not listed
    assert [r.slot for r in w.wafers] == sorted(r.slot for r in w.wafers)
    assert rows["M1"].counted is False and rows["M1"].in_spec is False
    assert rows["W3"].counted is False and rows["W3"].in_spec is None
    assert rows["W1"].in_spec is True and rows["W4"].in_spec is False


def test_wtw_on_synthetic_lot_matches_numpy():
    # Cross-check of the definitions on the 44-wafer synthetic lot (common practice, no source).
    rng = np.random.default_rng(808)
    (mean,), (sigma,) = make_lots(rng, 1)
    w = wafer_to_wafer(IDS, SLOTS, ROLES, mean, sigma, **WITH_TARGET)
    prod = mean[ROLES == "product"]
    assert w.n_used == 44
    assert w.wtw_nu_pct == pytest.approx(100 * prod.std(ddof=1) / prod.mean())
    # wafer-mean noise is 0.5 % / sqrt(49) = 0.071 %: the NU % should be close to it; an
    # NU % from 44 wafers scatters by 1 / sqrt(2 x 43) = 11 % of itself, so 0.05-0.1 is
    # about 3 standard errors either way
    assert 0.05 < w.wtw_nu_pct < 0.1
    assert w.in_spec_count == 44


# --------------------------------------------------------------------------- edge cases

def test_all_nan_lot():
    # No usable wafer: nothing to compute, nothing flagged, the loss is counted.
    mean = np.full(BOAT, math.nan)
    w = wafer_to_wafer(IDS, SLOTS, ROLES, mean, mean, **WITH_TARGET)
    assert (w.n_used, w.n_missing) == (0, 44)
    assert math.isnan(w.grand_mean_nm) and math.isnan(w.wtw_nu_pct) and math.isnan(w.range_nm)
    assert w.in_spec_count == 0 and w.min_wafer is None
    p = profile(mean, mean, **WITH_TARGET)
    assert not p.flags.any() and p.edge_slots == [] and p.flat_zone is None
    assert math.isnan(p.reference_nm)
    assert p.product_region == (4, 47)
    assert p.extra_dummies == {"load": 0, "source": 0}
    assert any("no product wafer has a usable mean" in n for n in p.notes)


def test_single_product_wafer():
    # One wafer: mean defined, sigma (n - 1) not; the robust rule needs >= 8 slots.
    ids, slots, roles = ["D1", "P1", "D2"], [1, 2, 3], ["dummy", "product", "dummy"]
    w = wafer_to_wafer(ids, slots, roles, [1000, 1012, 1000], [2, 2, 2], **WITH_TARGET)
    assert w.grand_mean_nm == 1012 and w.range_nm == 0
    assert math.isnan(w.wtw_sigma_nm) and math.isnan(w.wtw_nu_pct)
    assert w.in_spec_count == 1
    p = slot_profile(ids, slots, roles, [1000, 1012, 1000], [2, 2, 2], 3, **WITH_TARGET)
    assert p.reference_nm == 1012 and p.k is None
    assert p.flat_zone == [2, 2] and p.edge_slots == []
    # out of the band: flagged, but a lone flagged wafer is "whole lot off", not an edge
    p = slot_profile(ids, slots, roles, [1000, 1030, 1000], [2, 2, 2], 3, **WITH_TARGET)
    assert p.flagged_slots == [2] and p.edge_slots == [] and p.flat_zone is None
    assert any("whole lot" in n for n in p.notes)


def test_gaps_monitors_and_nan_wafers_in_the_edge_run():
    # Empty slots, a monitor and a NaN product inside the edge run neither flag nor
    # break it; extra dummies cover the span up to the innermost edge slot
    # (definition, common practice, no source).
    rng = np.random.default_rng(909)
    (mean,), (sigma,) = make_lots(rng, 1, shift={4: -0.03, 6: -0.03, 7: -0.03})
    keep = ~np.isin(SLOTS, [20, 21, 22])  # empty slots 20-22
    roles = ROLES.copy()
    roles[4] = "monitor"  # slot 5
    mean = mean.copy()
    mean[5] = math.nan  # slot 6: too few usable sites
    p = slot_profile(IDS[keep], SLOTS[keep], roles[keep], mean[keep], sigma[keep], BOAT,
                     **WITH_TARGET)
    assert list(p.role[19:22]) == ["empty"] * 3 and np.isnan(p.mean_nm[19:22]).all()
    assert not p.judged[4] and not p.judged[5]
    assert p.edge_slots_load == [4, 7]
    assert p.extra_dummies == {"load": 4, "source": 0}  # slots 4, 5, 6, 7
    assert p.flat_zone == [8, 47]
    w = wafer_to_wafer(IDS[keep], SLOTS[keep], roles[keep], mean[keep], sigma[keep], **WITH_TARGET)
    assert (w.n_product, w.n_used, w.n_missing, w.n_monitor) == (40, 39, 1, 1)  # 44 - 3 empty - 1 monitor


def test_no_target():
    # Without a target there is no spec band: no in-spec flags, only the robust rule.
    rng = np.random.default_rng(1010)
    (mean,), (sigma,) = make_lots(rng, 1)
    w = wafer_to_wafer(IDS, SLOTS, ROLES, mean, sigma)
    assert w.in_spec_count is None and w.out_of_spec_ids == []
    assert all(r.in_spec is None for r in w.wafers)
    p = profile(mean, sigma)
    assert p.target_nm is None and p.k is not None
    assert p.flat_zone == [4, 47]


def test_whole_lot_off_target_is_not_an_edge():
    # A lot 3 % thick everywhere is a recipe matter; adding dummies will not fix it
    # (common practice, no source).
    rng = np.random.default_rng(1111)
    (mean,), (sigma,) = make_lots(rng, 1, shift={s: 0.03 for s in range(4, 48)})
    p = profile(mean, sigma, **WITH_TARGET)
    assert p.flags[3:47].all()
    assert p.edge_slots == [] and p.flat_zone is None
    assert p.extra_dummies == {"load": 0, "source": 0}


def test_small_lot_uses_band_only():
    # Fewer than 8 judged slots: the MAD is too erratic (Davies & Gather 1993),
    # so only the spec band flags.
    ids, slots = ["A", "B", "C", "D", "E"], [1, 2, 3, 4, 5]
    mean = [975, 1000, 1001, 999, 1000]
    p = slot_profile(ids, slots, ["product"] * 5, mean, [1] * 5, 5, **WITH_TARGET)
    assert p.k is None and p.flagged_slots == [1] and p.edge_slots == [1]
    p = slot_profile(ids, slots, ["product"] * 5, mean, [1] * 5, 5)
    assert p.flagged_slots == []


@pytest.mark.parametrize("change, field", [
    (dict(slot=[1, 1, 2]), "slot"),
    (dict(role=["product", "wafer", "dummy"]), "role"),
    (dict(slot=[1, 2, 9]), "slot"),
    (dict(mean_nm=[1000, math.inf, 1000]), "mean_nm"),
    (dict(wafer_id=["A", "A", "C"]), "wafer_id"),
    (dict(mean_nm=[1000, 1000]), "mean_nm"),
    (dict(target_nm=1000), "tolerance_pct"),
])
def test_bad_input_names_the_field(change, field):
    args = dict(wafer_id=["A", "B", "C"], slot=[1, 2, 3], role=["dummy", "product", "dummy"],
                mean_nm=[1000, 1000, 1000], sigma_nm=[1, 1, 1], boat_size=5)
    args.update(change)
    with pytest.raises(FilmmapInputError) as err:
        slot_profile(**args)
    assert err.value.field == field
