"""The lot-statistics rules every layer shares: non-uniformity, roles, exclusion, causes.

Non-uniformity is checked against Python's `statistics` module (an implementation the
project did not write) on the definition 100 s / mean, s the n - 1 sample standard
deviation (common practice, no source).
"""

import math
import statistics

import numpy as np
import pytest

from filmmap.errors import FilmmapInputError
from filmmap.lotstats import (count_causes, failure_cause, lot_means, nonuniformity_pct,
                              roles_from_boat, usable_wafers)
from types import SimpleNamespace


def test_nonuniformity_matches_statistics_module():
    rng = np.random.default_rng(3)
    x = rng.normal(600.0, 4.0, 37)
    expected = 100.0 * statistics.stdev(x.tolist()) / statistics.fmean(x.tolist())
    # two-pass float64 sums against the stdlib's exact-rational-free path: 1e-12 relative
    assert nonuniformity_pct(x) == pytest.approx(expected, rel=1e-12)


def test_nonuniformity_ignores_nan_and_reduces_along_an_axis():
    x = np.array([[100.0, 102.0, np.nan, 98.0], [50.0, np.nan, np.nan, np.nan]])
    nu = nonuniformity_pct(x, axis=1)
    assert nu[0] == pytest.approx(100.0 * statistics.stdev([100, 102, 98]) / 100.0, rel=1e-12)
    assert math.isnan(nu[1])          # one value: no spread to speak of
    assert math.isnan(nonuniformity_pct([-1.0, 1.0]))   # mean 0: undefined, not infinite


def test_roles_from_boat():
    boat = SimpleNamespace(dummy_slots=(1, 50), monitor_slots=(25,))
    assert roles_from_boat([1, 2, 25, 50], boat).tolist() == ["dummy", "product", "monitor",
                                                              "dummy"]
    assert roles_from_boat([3], None).tolist() == ["product"]


def test_minimum_sites_rule():
    used = np.array([49, 4, 5, np.nan])
    assert usable_wafers(used, 5).tolist() == [True, False, True, False]
    assert np.isnan(lot_means([1.0, 2.0, 3.0, 4.0], used, 5)).tolist() == [False, True, False,
                                                                            True]
    with pytest.raises(FilmmapInputError, match="min_sites"):
        usable_wafers(used, 0)


def test_failure_causes_count_the_text_before_the_colon():
    notes = ["ambiguous: 2 candidates", "no film signal: flat", "ambiguous: 3 candidates", ""]
    assert failure_cause(notes[0]) == "ambiguous"
    assert count_causes(notes) == {"ambiguous": 2, "no film signal": 1,
                                   "no reason recorded": 1}
