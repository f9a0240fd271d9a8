"""Zernike decomposition: Noll (1976) definitions, orthonormality, recovery of analytic maps.

Noise-free recoveries are exact in theory: their tolerances (1e-13 for the closed forms,
1e-12 for the exact quadrature, 1e-9 nm and below for least-squares solves) are rounding
levels; the measured worst cases are 1e-13 nm. Noisy ones say their statistics beside them.
"""

import math

import numpy as np
import pytest

from filmmap.wafermap.sites import polar_sites
from filmmap.wafermap.zernike import (COND_MAX, MIN_DOF, choose_order, n_terms, noll_to_nm,
                                      noll_zernike, radial_profile, zernike_basis,
                                      zernike_evaluate, zernike_fit)

D, EE = 300.0, 3.0
RM = D / 2 - EE           # measured radius = normalisation radius by default


def _polar(s):
    return np.hypot(s.x_mm, s.y_mm) / RM, np.arctan2(s.y_mm, s.x_mm)


def test_noll_indices_table_I():
    # R. J. Noll, J. Opt. Soc. Am. 66, 207 (1976), Table I: (n, m) of j = 1..15,
    # m > 0 for the cos member (even j), m < 0 for the sin member (odd j)
    table = {1: (0, 0), 2: (1, 1), 3: (1, -1), 4: (2, 0), 5: (2, -2), 6: (2, 2), 7: (3, -1),
             8: (3, 1), 9: (3, -3), 10: (3, 3), 11: (4, 0), 12: (4, 2), 13: (4, -2),
             14: (4, 4), 15: (4, -4)}
    assert {j: noll_to_nm(j) for j in table} == table
    assert [n_terms(k) for k in range(5)] == [1, 3, 6, 10, 15]


def test_closed_forms_table_I():
    # R. J. Noll (1976), Table I closed forms (even j -> cos, odd j -> sin for m != 0)
    rng = np.random.default_rng(0)
    r = rng.random(200)
    th = rng.uniform(0, 2 * np.pi, 200)
    closed = {
        1: np.ones_like(r),
        2: 2 * r * np.cos(th),
        3: 2 * r * np.sin(th),
        4: math.sqrt(3) * (2 * r**2 - 1),
        5: math.sqrt(6) * r**2 * np.sin(2 * th),
        6: math.sqrt(6) * r**2 * np.cos(2 * th),
        7: math.sqrt(8) * (3 * r**3 - 2 * r) * np.sin(th),
        8: math.sqrt(8) * (3 * r**3 - 2 * r) * np.cos(th),
        9: math.sqrt(8) * r**3 * np.sin(3 * th),
        10: math.sqrt(8) * r**3 * np.cos(3 * th),
        11: math.sqrt(5) * (6 * r**4 - 6 * r**2 + 1),
        12: math.sqrt(10) * (4 * r**4 - 3 * r**2) * np.cos(2 * th),
        13: math.sqrt(10) * (4 * r**4 - 3 * r**2) * np.sin(2 * th),
    }
    for j, expected in closed.items():
        np.testing.assert_allclose(noll_zernike(j, r, th), expected, atol=1e-13, err_msg=f"Z{j}")


def test_orthonormal_on_unit_disk():
    # R. J. Noll (1976), eq. (5): (1/pi) * integral over the unit disk of Z_i Z_j = delta_ij.
    # Quadrature: Gauss-Legendre in r (24 nodes, exact to degree 47 >= 2*6+1) and the
    # uniform rule in theta (64 points, exact for trig degree < 64).
    xg, wg = np.polynomial.legendre.leggauss(24)
    r = 0.5 * (xg + 1)
    wr = 0.5 * wg * r                              # dA = r dr dtheta
    th = np.linspace(0, 2 * np.pi, 64, endpoint=False)
    wt = np.full(th.size, 2 * np.pi / th.size)
    R, T = np.meshgrid(r, th, indexing="ij")
    w = (wr[:, None] * wt[None, :]).ravel()
    B = zernike_basis(28, R.ravel(), T.ravel())    # radial orders 0..6
    gram = (B * w[:, None]).T @ B / np.pi
    np.testing.assert_allclose(gram, np.eye(28), atol=1e-12)


@pytest.mark.parametrize("n_sites", [49, 121])
def test_order_rule(n_sites):
    # filmmap's rule (common practice, no source): largest complete order with
    # terms <= sites - MIN_DOF and condition number <= COND_MAX; the next order fails it
    rho, th = _polar(polar_sites(n_sites, D, EE))
    order = choose_order(rho, th)
    A = zernike_basis(n_terms(order), rho, th)
    assert n_terms(order) <= n_sites - MIN_DOF
    assert np.linalg.cond(A) <= COND_MAX
    nxt = n_terms(order + 1)
    assert nxt > n_sites - MIN_DOF or np.linalg.cond(zernike_basis(nxt, rho, th)) > COND_MAX
    assert order >= 2                       # at least piston, tilt, defocus, astigmatism


@pytest.mark.parametrize("n_sites", [49, 121])
def test_pure_tilt(n_sites):
    # analytic (common practice, no source): t = 100 + g (x cos phi + y sin phi), g in nm/mm.
    # With x = R rho cos(theta): g R rho cos(theta - phi) = (g R / 2)(cos phi Z2 + sin phi Z3),
    # so a2 = gR/2 cos phi, a3 = gR/2 sin phi; PV across the diameter = 2 g R; direction phi.
    s = polar_sites(n_sites, D, EE)
    g, phi = 0.02, np.radians(210.0)
    t = 100.0 + g * (s.x_mm * np.cos(phi) + s.y_mm * np.sin(phi))
    f = zernike_fit(t, None, s.x_mm, s.y_mm, D, EE)
    expected = np.zeros(f.coefficients_nm.size)
    expected[:3] = [100.0, g * RM / 2 * np.cos(phi), g * RM / 2 * np.sin(phi)]
    np.testing.assert_allclose(f.coefficients_nm, expected, atol=1e-9)
    assert f.tilt_pv_nm == pytest.approx(2 * g * RM, abs=1e-9)
    assert f.tilt_direction_deg == pytest.approx(210.0, abs=1e-9)
    assert f.radius_mm == pytest.approx(RM)


@pytest.mark.parametrize("n_sites", [49, 121])
def test_pure_bowl(n_sites):
    # analytic (common practice, no source): t = 100 + c (r/R)^2. Since Z4 = sqrt(3)(2 rho^2 - 1)
    # (Noll 1976, Table I), rho^2 = 1/2 + Z4 / (2 sqrt 3): a1 = 100 + c/2, a4 = c / (2 sqrt 3),
    # and the centre-to-edge defocus figure 2 sqrt(3) a4 = c.
    s = polar_sites(n_sites, D, EE)
    c = -3.0
    t = 100.0 + c * (s.x_mm**2 + s.y_mm**2) / RM**2
    f = zernike_fit(t, None, s.x_mm, s.y_mm, D, EE)
    expected = np.zeros(f.coefficients_nm.size)
    expected[0], expected[3] = 100.0 + c / 2, c / (2 * math.sqrt(3))
    np.testing.assert_allclose(f.coefficients_nm, expected, atol=1e-9)
    assert f.defocus_nm == pytest.approx(c, abs=1e-9)
    assert f.tilt_pv_nm == pytest.approx(0.0, abs=1e-9)
    np.testing.assert_allclose(f.uncertainty_nm, 0.0, atol=1e-9)


def test_pure_astigmatism():
    # analytic (common practice, no source): t = b rho^2 cos(2(theta - psi))
    # = (b / sqrt 6)(sin 2psi Z5 + cos 2psi Z6); PV at rho = 1 is 2b, thick axis psi.
    s = polar_sites(49, D, EE)
    rho, th = _polar(s)
    b, psi = 1.2, np.radians(30.0)
    f = zernike_fit(50 + b * rho**2 * np.cos(2 * (th - psi)), None, s.x_mm, s.y_mm, D, EE)
    assert f.coefficients_nm[4] == pytest.approx(b / math.sqrt(6) * np.sin(2 * psi), abs=1e-9)
    assert f.coefficients_nm[5] == pytest.approx(b / math.sqrt(6) * np.cos(2 * psi), abs=1e-9)
    assert f.astig_pv_nm == pytest.approx(2 * b, abs=1e-9)
    assert f.astig_angle_deg == pytest.approx(30.0, abs=1e-10)   # rounding (measured 2e-13)


@pytest.mark.parametrize("n_sites", [49, 121])
def test_random_expansion_recovered_exactly(n_sites):
    # Noll (1976) basis: any expansion inside the fitted orders is reproduced (noise-free, 1e-9)
    s = polar_sites(n_sites, D, EE)
    rho, th = _polar(s)
    rng = np.random.default_rng(3)
    J = n_terms(choose_order(rho, th))
    a = rng.normal(0, 1, (4, J))
    a[:, 0] += 100
    t = a @ zernike_basis(J, rho, th).T
    f = zernike_fit(t, None, s.x_mm, s.y_mm, D, EE)
    # rounding of the least-squares solve (measured 1.3e-13 nm)
    np.testing.assert_allclose(f.coefficients_nm, a, atol=1e-11)
    np.testing.assert_allclose(zernike_evaluate(f.coefficients_nm, s.x_mm, s.y_mm, f.radius_mm),
                               t, atol=1e-11)


@pytest.mark.parametrize("n_sites", [49, 121])
def test_tilt_bowl_noise_within_uncertainty(n_sites):
    # least squares (common practice, no source): with Gaussian noise the standardised
    # errors (a - a_true)/u follow Student's t with dof = sites - terms, so ~99.7 % lie
    # within 3 u and their spread is ~1. 200 wafers share one pseudo-inverse.
    s = polar_sites(n_sites, D, EE)
    rho, th = _polar(s)
    sigma = 0.2
    truth_tilt = 0.8 * noll_zernike(2, rho, th) - 0.5 * noll_zernike(3, rho, th)
    truth = 100.0 + truth_tilt + 1.5 * noll_zernike(4, rho, th)
    rng = np.random.default_rng(11)
    t = truth + rng.normal(0, sigma, (200, n_sites))
    f = zernike_fit(t, None, s.x_mm, s.y_mm, D, EE)
    a_true = np.zeros(f.coefficients_nm.shape[1])
    a_true[:4] = [100.0, 0.8, -0.5, 1.5]
    z = (f.coefficients_nm - a_true) / f.uncertainty_nm
    # Student's t with 28 (49 sites) or 76 dof: 0.56 % or 0.36 % beyond 3, std
    # sqrt(dof / (dof - 2)) = 1.04 or 1.01; a wafer's z values share its residual sigma,
    # so 200 wafers (not 4200 values) set the scatter of that std, a few %
    # (measured 0.992 / 0.996 within 3, std 1.066 / 1.036)
    assert np.mean(np.abs(z) <= 3) >= 0.99
    assert 0.9 < np.std(z) < 1.15
    # the median of 200 residual sigmas, each from 28+ dof: within 5 % (measured -2 %)
    assert np.median(f.residual_sigma_nm) == pytest.approx(sigma, rel=0.05)
    # derived figures agree with the truth within their stated uncertainty: P(|t| > 3) is
    # about 0.6 % for these dof, i.e. ~1 of 200 wafers; allow up to 6 (binomial tail < 0.1 %)
    assert np.mean(np.abs(f.defocus_nm - 2 * math.sqrt(3) * 1.5) <= 3 * f.defocus_u_nm) >= 0.97
    assert np.mean(np.abs(f.tilt_pv_nm - 4 * math.hypot(0.8, 0.5)) <= 3 * f.tilt_pv_u_nm) >= 0.97


def test_nan_sites_per_wafer_match_single_fits():
    # least squares (common practice, no source): the grouped, vectorised fit equals a
    # separate lstsq on each wafer's own usable sites; a wafer with too few sites drops order
    s = polar_sites(49, D, EE)
    rho, th = _polar(s)
    rng = np.random.default_rng(5)
    t = 100 + 0.5 * noll_zernike(4, rho, th) + rng.normal(0, 0.1, (6, 49))
    t[1, [3, 30]] = np.nan
    t[2, 10] = np.nan
    ok = np.ones(t.shape, bool)
    ok[3, 40] = False
    t[4, 9:] = np.nan                       # only centre + inner ring left (9 sites)
    f = zernike_fit(t, ok, s.x_mm, s.y_mm, D, EE)
    full = f.coefficients_nm.shape[1]
    assert f.n_terms[0] == full and f.n_terms[4] < full
    assert np.all(np.isnan(f.coefficients_nm[4, f.n_terms[4]:]))
    for w in range(t.shape[0]):
        use = ok[w] & np.isfinite(t[w])
        k = f.n_terms[w]
        A = zernike_basis(k, rho[use], th[use])
        a, *_ = np.linalg.lstsq(A, t[w, use], rcond=None)
        np.testing.assert_allclose(f.coefficients_nm[w, :k], a, atol=1e-10)   # rounding
        res = t[w, use] - A @ a
        assert f.residual_sigma_nm[w] == pytest.approx(np.sqrt(res @ res / (use.sum() - k)))


def test_single_wafer_and_explicit_radius():
    # Noll (1976) basis with rho = r / radius_mm: fitting on the wafer radius rescales the
    # tilt coefficient by radius ratio (a2 = g R / 2)
    s = polar_sites(25, D, EE)
    t = 100 + 0.01 * s.x_mm
    f = zernike_fit(t, None, s.x_mm, s.y_mm, D, EE, radius_mm=D / 2, max_order=2)
    assert f.coefficients_nm.shape == (6,)
    assert f.coefficients_nm[1] == pytest.approx(0.01 * D / 4, abs=1e-9)
    assert f.tilt_pv_nm == pytest.approx(0.01 * D, abs=1e-9)


def test_radial_profile_of_bowl():
    # analytic (common practice, no source): ring means of t = 100 + c (r/R)^2 are exact
    s = polar_sites(49, D, EE)
    c = 2.0
    t = 100 + c * (s.x_mm**2 + s.y_mm**2) / RM**2
    t2 = np.vstack([t, t])
    t2[1, 25:] = np.nan                      # wafer 2 lost its outer ring
    p = radial_profile(t2, None, s.x_mm, s.y_mm, D, EE)
    np.testing.assert_allclose(p.radius_mm, [0, RM / 3, 2 * RM / 3, RM])
    np.testing.assert_allclose(p.mean_nm[0], 100 + c * np.array([0, 1 / 9, 4 / 9, 1]))
    assert p.count.tolist() == [[1, 8, 16, 24], [1, 8, 16, 0]]
    assert np.isnan(p.mean_nm[1, 3])


def _choose_order_stepping_down(rho, theta, cond_max, min_dof):
    """The earlier rule, one SVD per order from the dof limit down (the reference)."""
    order = -1
    while n_terms(order + 1) <= rho.size - min_dof:
        order += 1
    while order >= 0:
        sv = np.linalg.svd(zernike_basis(n_terms(order), rho, theta), compute_uv=False)
        if sv[-1] > 0 and sv[0] / sv[-1] <= cond_max:
            return order
        order -= 1
    return -1


@pytest.mark.parametrize("n_sites", [1, 3, 5, 9, 17, 40, 121, 300])
def test_choose_order_stepping_up_matches_stepping_down(n_sites):
    # the condition number never falls as columns are added (singular-value interlacing),
    # so stopping at the first failing order gives the same order as the full search
    rng = np.random.default_rng(n_sites)
    for _ in range(3):
        rho = np.sqrt(rng.uniform(0, 1, n_sites))
        theta = rng.uniform(0, 2 * np.pi, n_sites)
        for cond_max in (3.0, COND_MAX, 100.0):
            assert choose_order(rho, theta, cond_max=cond_max, min_dof=MIN_DOF) == \
                _choose_order_stepping_down(rho, theta, cond_max, MIN_DOF)
