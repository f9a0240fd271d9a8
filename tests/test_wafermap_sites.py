"""Built-in polar site patterns: counts, numbering, placement, symmetry, validation.

Source of every check: common practice, no source (filmmap's own layouts,
documented in filmmap/wafermap/sites.py).
"""

import numpy as np
import pytest

from filmmap.errors import FilmmapInputError
from filmmap.wafermap.sites import (LAYOUTS, SITE_COUNTS, inside_edge_exclusion, lot_arrays,
                                    polar_sites, ring_sites)

D, EE = 300.0, 3.0


@pytest.mark.parametrize("n", SITE_COUNTS)
def test_counts_and_numbering(n):
    # common practice, no source: 1-based numbering, centre first
    s = polar_sites(n, D, EE)
    assert s.site.tolist() == list(range(1, n + 1))
    assert s.x_mm.shape == s.y_mm.shape == (n,)
    assert s.x_mm[0] == 0.0 and s.y_mm[0] == 0.0
    assert 1 + sum(k for _, k, _ in LAYOUTS[n]) == n


@pytest.mark.parametrize("n", SITE_COUNTS)
def test_inside_edge_exclusion_outer_ring_on_it(n):
    # common practice, no source: outer ring on the edge-exclusion radius
    s = polar_sites(n, D, EE)
    assert np.all(inside_edge_exclusion(s.x_mm, s.y_mm, D, EE))
    r = np.hypot(s.x_mm, s.y_mm)
    if n > 1:
        assert r.max() == pytest.approx(D / 2 - EE, abs=1e-9)   # cos/sin rounding at 147 mm
        # a slightly larger exclusion drops exactly the outer ring
        outer = LAYOUTS[n][-1][1]
        assert (~inside_edge_exclusion(s.x_mm, s.y_mm, D, EE + 0.01)).sum() == outer


@pytest.mark.parametrize("n", SITE_COUNTS)
def test_mirror_symmetric(n):
    # common practice, no source: pattern symmetric under x -> -x and y -> -y
    s = polar_sites(n, D, EE)
    pts = np.column_stack([s.x_mm, s.y_mm])
    for flip in ([-1, 1], [1, -1], [-1, -1]):
        mirrored = pts * flip
        dist = np.linalg.norm(mirrored[:, None, :] - pts[None, :, :], axis=-1)
        assert np.all(dist.min(axis=1) < 1e-9)       # mm; cos/sin rounding only


def test_49_site_rings_and_order():
    # common practice, no source: 49 = 1 + 8 + 16 + 24 on radii R_m/3, 2R_m/3, R_m,
    # counter-clockwise from +x within each ring
    s = polar_sites(49, D, EE)
    r = np.hypot(s.x_mm, s.y_mm)
    rm = D / 2 - EE
    np.testing.assert_allclose(r[1:9], rm / 3)
    np.testing.assert_allclose(r[9:25], 2 * rm / 3)
    np.testing.assert_allclose(r[25:], rm)
    ang = np.degrees(np.arctan2(s.y_mm, s.x_mm)) % 360
    # degrees back from rounded coordinates: rounding only
    np.testing.assert_allclose(ang[1:9], 45.0 * np.arange(8), atol=1e-9)
    np.testing.assert_allclose(ang[25:], 15.0 * np.arange(24), atol=1e-9)


def test_ring_sites_custom():
    # common practice, no source
    s = ring_sites([50.0], [3], start_deg=[90.0], centre=False)
    c210, c330 = 50 * np.cos(np.radians(210)), 50 * np.cos(np.radians(330))
    np.testing.assert_allclose(s.x_mm, [0.0, c210, c330], atol=1e-12)   # rounding (mm)
    np.testing.assert_allclose(s.y_mm, [50.0, -25.0, -25.0], atol=1e-12)


@pytest.mark.parametrize("args", [(7, D, EE), (49, -300.0, EE), (49, D, 150.0), (49, D, -1.0),
                                  (49, float("nan"), EE), ("many", D, EE), (49, "big", EE)])
def test_invalid_inputs(args):
    # common practice, no source: unknown count, bad diameter or exclusion is refused
    with pytest.raises(FilmmapInputError):
        polar_sites(*args)


def test_lot_arrays_validation():
    # common practice, no source: shape and dtype checks name the bad field
    x = np.zeros(3)
    with pytest.raises(FilmmapInputError):
        lot_arrays(np.zeros((2, 4)), None, x, x)          # site count mismatch
    with pytest.raises(FilmmapInputError):
        lot_arrays(np.zeros((2, 3)), np.ones((3, 3), bool), x, x)   # ok shape
    with pytest.raises(FilmmapInputError):
        lot_arrays(np.zeros((2, 3)), np.ones(3), x, x)    # ok not boolean
    with pytest.raises(FilmmapInputError):
        lot_arrays(np.zeros((1, 2, 3)), None, x, x)       # 3-D thickness
    t, good, *_ = lot_arrays([1.0, np.nan, 2.0], [True, True, False], x, x)
    assert t.shape == (1, 3) and good.tolist() == [[True, False, False]]
