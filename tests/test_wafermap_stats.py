"""Within-wafer statistics: hand-worked example, numpy/scipy cross-checks, edge cases.

Definitions are common practice, no source (see filmmap/wafermap/stats.py).
"""

import numpy as np
import pytest
from scipy import stats as sps

from filmmap.errors import FilmmapInputError
from filmmap.wafermap.sites import polar_sites
from filmmap.wafermap.stats import usable_sites, within_wafer_stats

D, EE = 200.0, 3.0


def test_hand_worked_five_sites():
    # Hand-worked (common practice, no source): values 100, 102, 98, 101, 99 nm
    #   mean  = (100 + 102 + 98 + 101 + 99) / 5 = 500 / 5 = 100 nm
    #   dev   = 0, +2, -2, +1, -1 ; squares 0, 4, 4, 1, 1 ; sum 10
    #   var   = 10 / (5 - 1) = 2.5 nm^2 ; sigma = sqrt(2.5) = 1.58113883... nm
    #   NU%   = 100 * sqrt(2.5) / 100 = 1.58113883... %
    #   min 98, max 102, range 4 nm ; half-range % = 100 * 4 / (2 * 100) = 2 %
    s = polar_sites(5, D, EE)
    st = within_wafer_stats([100.0, 102.0, 98.0, 101.0, 99.0], None, s.x_mm, s.y_mm, D, EE)
    # abs 1e-12: sums of five numbers near 100, rounding only
    assert st.sites_used == 5
    assert st.mean_nm == pytest.approx(100.0, abs=1e-12)
    assert st.sigma_nm == pytest.approx(np.sqrt(2.5), abs=1e-12)
    assert st.nu_pct == pytest.approx(np.sqrt(2.5), abs=1e-12)
    assert (st.min_nm, st.max_nm, st.range_nm) == (98.0, 102.0, 4.0)
    assert st.halfrange_pct == pytest.approx(2.0, abs=1e-12)


def test_excluded_sites_do_not_count():
    # common practice, no source: sites outside the edge exclusion, not ok, or NaN are ignored;
    # the remaining five are the hand-worked example above (mean 100, sigma sqrt(2.5))
    s = polar_sites(5, D, EE)
    x = np.append(s.x_mm, [D / 2 - 1.0, 0.0, 10.0])        # extra site at r = 99 mm > 97 mm
    y = np.append(s.y_mm, [0.0, 20.0, 10.0])
    t = np.array([[100.0, 102.0, 98.0, 101.0, 99.0, 500.0, 700.0, np.nan]])
    ok = np.array([[True] * 6 + [False, True]])
    st = within_wafer_stats(t, ok, x, y, D, EE)
    assert st.sites_used.tolist() == [5]
    assert st.mean_nm[0] == pytest.approx(100.0)
    assert st.sigma_nm[0] == pytest.approx(np.sqrt(2.5))
    assert usable_sites(t, ok, x, y, D, EE).sum() == 5


def test_against_numpy_and_scipy():
    # reference: numpy mean/std(ddof=1)/min/max and scipy.stats.variation(ddof=1) per wafer
    rng = np.random.default_rng(7)
    s = polar_sites(49, D, EE)
    t = rng.normal(50.0, 1.5, (30, 49))
    t[rng.random(t.shape) < 0.1] = np.nan
    ok = rng.random(t.shape) > 0.05
    st = within_wafer_stats(t, ok, s.x_mm, s.y_mm, D, EE)
    for w in range(t.shape[0]):
        v = t[w][ok[w] & np.isfinite(t[w])]
        # rounding: sums in another order (1e-13), the variance's cancellation (1e-11)
        assert st.sites_used[w] == v.size
        assert st.mean_nm[w] == pytest.approx(np.mean(v), rel=1e-13)
        assert st.sigma_nm[w] == pytest.approx(np.std(v, ddof=1), rel=1e-11)
        assert st.nu_pct[w] == pytest.approx(100 * sps.variation(v, ddof=1), rel=1e-11)
        assert st.range_nm[w] == pytest.approx(np.ptp(v), rel=1e-13)
        assert st.halfrange_pct[w] == pytest.approx(100 * np.ptp(v) / (2 * np.mean(v)), rel=1e-12)


def test_large_offset_two_pass_accuracy():
    # common practice, no source: a two-pass variance keeps sigma exact on a big mean
    s = polar_sites(5, D, EE)
    st = within_wafer_stats(1e9 + np.array([100.0, 102.0, 98.0, 101.0, 99.0]), None,
                            s.x_mm, s.y_mm, D, EE)
    # each value carries eps x 1e9 = 2e-7 nm of rounding; sigma 1.58 nm keeps ~1e-7 of it
    assert st.sigma_nm == pytest.approx(np.sqrt(2.5), rel=1e-6)


def test_zero_and_one_site():
    # documented convention (common practice, no source): 0 sites -> all NaN;
    # 1 site -> mean = min = max, range 0, sigma and NU% NaN
    s = polar_sites(5, D, EE)
    t = np.full((2, 5), np.nan)
    t[1, 2] = 90.0
    with np.errstate(all="raise"):
        st = within_wafer_stats(t, None, s.x_mm, s.y_mm, D, EE)
    assert st.sites_used.tolist() == [0, 1]
    for name in ("mean_nm", "sigma_nm", "nu_pct", "min_nm", "max_nm", "range_nm", "halfrange_pct"):
        assert np.isnan(getattr(st, name)[0])
    assert st.mean_nm[1] == st.min_nm[1] == st.max_nm[1] == 90.0
    assert st.range_nm[1] == 0.0 and st.halfrange_pct[1] == 0.0
    assert np.isnan(st.sigma_nm[1]) and np.isnan(st.nu_pct[1])
    assert set(st.as_dict()) == {"sites_used", "mean_nm", "sigma_nm", "nu_pct", "min_nm",
                                 "max_nm", "range_nm", "halfrange_pct"}


def test_bad_wafer_geometry():
    # common practice, no source: an edge exclusion as wide as the radius leaves no wafer
    s = polar_sites(5, D, EE)
    with pytest.raises(FilmmapInputError):
        within_wafer_stats(np.ones(5), None, s.x_mm, s.y_mm, D, D)
