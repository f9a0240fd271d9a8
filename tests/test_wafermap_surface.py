"""Thin-plate-spline maps: interpolation at the sites, masking, and leave-one-out error.

Where two exact computations meet (the spline at its own sites, Rippa's formula against a
refit, filmmap's spline against scipy's RBFInterpolator), the tolerance 1e-10 nm is the
rounding of solving the spline's linear system (measured 1e-13 to 5e-13 nm).
"""

import numpy as np
import pytest
from scipy.interpolate import RBFInterpolator

from filmmap.wafermap.sites import polar_sites
from filmmap.wafermap.surface import grid_axes, tps_loo, tps_polar_surface, tps_surface

D, EE = 300.0, 3.0
RM = D / 2 - EE


def _bowl_tilt(x, y):
    return 100 + 0.01 * x - 0.005 * y + 2.0 * (x**2 + y**2) / RM**2


def test_polar_map_passes_through_sites():
    # interpolating spline (Duchon 1977; smoothing 0): the map equals the data at every site.
    # n_r = 37 puts rings at rho = k/36 (1/3, 2/3, 1 included); n_theta = 145 gives 2.5 deg
    # steps, a divisor of the 45, 22.5 and 15 deg site spacings of the 49-site pattern.
    s = polar_sites(49, D, EE)
    rng = np.random.default_rng(1)
    t = _bowl_tilt(s.x_mm, s.y_mm) + rng.normal(0, 0.3, (3, 49))
    p = tps_polar_surface(t, None, s.x_mm, s.y_mm, D, EE, n_r=37, n_theta=145)
    assert p.thickness_nm.shape == (3, 145, 37)
    r = np.hypot(s.x_mm, s.y_mm)
    ang = np.degrees(np.arctan2(s.y_mm, s.x_mm)) % 360
    ir = np.rint(r / RM * 36).astype(int)
    it = np.rint(ang / 2.5).astype(int)
    np.testing.assert_allclose(p.thickness_nm[:, it, ir], t, atol=1e-10)
    X, Y, Z = p.mesh(0)
    np.testing.assert_allclose(np.hypot(X, Y).max(), RM)   # the mesh ends on the measured circle


def test_cartesian_map_passes_through_sites_on_nodes():
    # interpolating spline (Duchon 1977): sites placed on grid nodes get their own value back
    gx, gy = grid_axes(D, 101)
    rng = np.random.default_rng(2)
    GX, GY = np.meshgrid(gx, gy)
    inside = np.nonzero(np.hypot(GX, GY).ravel() < 140)[0]
    pick = rng.choice(inside, 40, replace=False)
    x, y = GX.ravel()[pick], GY.ravel()[pick]
    t = _bowl_tilt(x, y) + rng.normal(0, 0.2, x.size)
    s = tps_surface(t, None, x, y, D, EE, n_grid=101)
    np.testing.assert_allclose(s.thickness_nm.ravel()[pick], t, atol=1e-10)


def test_nan_beyond_measured_radius():
    # filmmap rule (common practice, no source): no value beyond the outermost usable site
    s = polar_sites(49, D, EE)
    t = np.vstack([_bowl_tilt(s.x_mm, s.y_mm)] * 2)
    t[1, 25:] = np.nan                               # wafer 2: outer ring missing
    surf = tps_surface(t, None, s.x_mm, s.y_mm, D, EE, n_grid=81)
    np.testing.assert_allclose(surf.measured_radius_mm, [RM, 2 * RM / 3])
    GX, GY = np.meshgrid(surf.x_mm, surf.y_mm)
    gr = np.hypot(GX, GY)
    for w, rm in enumerate(surf.measured_radius_mm):
        z = surf.thickness_nm[w]
        assert np.all(np.isnan(z[gr > rm + 1e-6]))
        assert np.all(np.isfinite(z[gr <= rm - 1e-6]))
    assert np.all(np.isnan(surf.thickness_nm[:, gr > D / 2]))


def test_too_few_sites_gives_no_map():
    # thin-plate spline with a linear term needs 3 non-collinear sites (Duchon 1977)
    s = polar_sites(5, D, EE)
    t = np.array([[100.0, 101.0, np.nan, np.nan, np.nan], [100.0, 101, 102, 103, 104]])
    surf = tps_surface(t, None, s.x_mm, s.y_mm, D, EE, n_grid=21)
    assert np.all(np.isnan(surf.thickness_nm[0])) and np.isnan(surf.measured_radius_mm[0])
    assert np.isfinite(surf.thickness_nm[1]).any()


def test_rippa_loo_equals_brute_force():
    # S. Rippa, Adv. Comput. Math. 11, 193 (1999): e_i = c_i / (A^-1)_ii equals refitting
    # without site i; reference = scipy RBFInterpolator refit for every left-out site
    s = polar_sites(25, D, EE)
    rng = np.random.default_rng(4)
    t = _bowl_tilt(s.x_mm, s.y_mm) + rng.normal(0, 0.5, (2, 25))
    t[1, 7] = np.nan
    loo = tps_loo(t, None, s.x_mm, s.y_mm, D, EE)
    for w in range(2):
        use = np.isfinite(t[w])
        for i in np.nonzero(use)[0]:
            keep = use.copy()
            keep[i] = False
            spline = RBFInterpolator(np.column_stack([s.x_mm[keep], s.y_mm[keep]]), t[w, keep],
                                     kernel="thin_plate_spline")
            pred = spline(np.array([[s.x_mm[i], s.y_mm[i]]]))[0]
            assert loo.error_nm[w, i] == pytest.approx(t[w, i] - pred, abs=1e-10)
    assert np.isnan(loo.error_nm[1, 7])
    used = np.isfinite(t)
    np.testing.assert_allclose(loo.rms_nm, [np.sqrt(np.mean(loo.error_nm[w, used[w]] ** 2))
                                            for w in range(2)])


@pytest.mark.parametrize("n_sites", [49, 121])
def test_loo_small_for_smooth_large_for_rough(n_sites):
    # Duchon (1977): the spline reproduces planes exactly (LOO error 0); for a smooth
    # 4 nm bowl + tilt the LOO RMS is under 2 % of the map range; for white noise of
    # 1 nm it is at least the noise level (the neighbours carry no information)
    s = polar_sites(n_sites, D, EE)
    x, y = s.x_mm, s.y_mm
    plane = 100 + 0.01 * x - 0.005 * y
    smooth = _bowl_tilt(x, y)
    rough = 100 + np.random.default_rng(0).normal(0, 1.0, n_sites)
    loo = tps_loo(np.vstack([plane, smooth, rough]), None, x, y, D, EE)
    assert loo.rms_nm[0] < 1e-9                       # rounding (measured 1e-12)
    assert loo.rms_nm[1] < 0.02 * np.ptp(smooth)      # measured 0.2-0.6 %
    # white noise: a prediction from the neighbours adds its own error, so the expected
    # LOO rms exceeds 1 nm; an rms from 49 values scatters by ~10 %, hence 0.9 (measured
    # 1.00 and 1.21)
    assert loo.rms_nm[2] > 0.9


def test_single_wafer_shapes():
    # common practice, no source: a 1-D input is one wafer and drops the wafer axis
    s = polar_sites(13, D, EE)
    t = _bowl_tilt(s.x_mm, s.y_mm)
    surf = tps_surface(t, None, s.x_mm, s.y_mm, D, EE, n_grid=31)
    loo = tps_loo(t, None, s.x_mm, s.y_mm, D, EE)
    assert surf.thickness_nm.shape == (31, 31) and np.ndim(surf.measured_radius_mm) == 0
    assert loo.error_nm.shape == (13,) and np.ndim(loo.rms_nm) == 0


def test_lot_spline_equals_each_wafers_own_spline():
    # Duchon (1977): the interpolant is unique, so completing a wafer's missing sites with
    # its own spline and interpolating the lot at once must equal the wafer's direct spline
    # (reference: scipy RBFInterpolator on that wafer's usable sites only)
    s = polar_sites(49, D, EE)
    rng = np.random.default_rng(9)
    t = _bowl_tilt(s.x_mm, s.y_mm) + rng.normal(0, 0.3, (4, 49))
    t[1, [2, 17, 40]] = np.nan
    ok = np.ones(t.shape, bool)
    ok[2, 30] = False
    t[3, 25:] = np.nan
    surf = tps_surface(t, ok, s.x_mm, s.y_mm, D, EE, n_grid=41)
    GX, GY = np.meshgrid(surf.x_mm, surf.y_mm)
    for w in range(4):
        use = ok[w] & np.isfinite(t[w])
        spline = RBFInterpolator(np.column_stack([s.x_mm[use], s.y_mm[use]]), t[w, use],
                                 kernel="thin_plate_spline")
        z = surf.thickness_nm[w]
        have = np.isfinite(z)
        np.testing.assert_allclose(z[have], spline(np.column_stack([GX[have], GY[have]])),
                                   atol=1e-10)
    assert np.isfinite(surf.thickness_nm[3]).sum() < np.isfinite(surf.thickness_nm[0]).sum()


def test_dense_map_leave_one_out_estimate_matches_the_exact_one(monkeypatch):
    # a 1,500-site map of a smooth wafer with 0.3 nm noise: the local estimate used above
    # DENSE_MAP_SITES against the exact closed form (forced by raising the limit)
    import filmmap.wafermap.surface as surface

    rng = np.random.default_rng(5)
    n = 1500
    r = 70 * np.sqrt(rng.uniform(0, 1, n))
    a = rng.uniform(0, 2 * np.pi, n)
    x, y = r * np.cos(a), r * np.sin(a)
    t = 1000 + 4e-3 * x**2 - 2e-3 * y**2 + 0.05 * y + 0.3 * rng.standard_normal(n)
    estimate = tps_loo(t, None, x, y, 150.0, 3.0)
    sampled = np.isfinite(estimate.error_nm)
    assert 300 <= sampled.sum() <= surface.LOO_SAMPLE_SITES
    monkeypatch.setattr(surface, "DENSE_MAP_SITES", 10**6)
    exact = tps_loo(t, None, x, y, 150.0, 3.0)
    assert np.isfinite(exact.error_nm).all()
    # the same errors at the sampled sites (the far sites barely move a dense spline):
    # within a sixth of the 0.3 nm noise or 10 % (measured 0.02 nm at most) ...
    np.testing.assert_allclose(estimate.error_nm[sampled], exact.error_nm[sampled],
                               rtol=0.1, atol=0.05)
    # ... so the same trust figure for the map, to 5 % (measured 1.8 %)
    assert abs(estimate.rms_nm / exact.rms_nm - 1) < 0.05
