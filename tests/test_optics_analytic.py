"""The optics engine against closed-form thin-film and Fresnel results, and its analytic
thickness derivatives against central finite differences.

Tolerances: the closed forms are exact, so what separates them from the engine is float
rounding (eps = 2.2e-16 times the few operations of an R below 1: 1e-14), more where a
phase of several radians is formed (1e-13 to 1e-12) or an expression divides by a small
number (named beside it).
"""

import numpy as np
import pytest

from filmmap.materials import Cauchy, get_material
from filmmap.optics import transfer

WL = np.linspace(250.0, 1450.0, 25)


def _si(wl):
    return get_material("Si")(wl)


def _delta_gap(a, b):
    """Smallest difference of two angles in degrees, with 0/360 wrap-around."""
    d = np.mod(np.asarray(a) - np.asarray(b), 360.0)
    return np.minimum(d, 360.0 - d)


# -- normal incidence, bare and coated substrates ------------------------------------

@pytest.mark.parametrize("substrate", ["Si", "SiO2", "Si3N4"])
def test_bare_substrate_normal_reflectance(substrate):
    # R = |(N - 1)/(N + 1)|^2 at normal incidence from air (Fresnel; Hecht, Optics,
    # 4th ed. 2002, sect. 4.6, and Born & Wolf 1999 sect. 1.5 for complex N; from memory)
    N = get_material(substrate)(WL)
    expected = np.abs((N - 1.0) / (N + 1.0)) ** 2
    for pol in ("s", "p", "u"):
        R = transfer.reflectance(WL, 1.0, [], [], N, 0.0, pol)
        assert np.max(np.abs(R - expected)) <= 1e-14          # rounding


@pytest.mark.parametrize("n1", [1.38, 1.4585, 2.0])
@pytest.mark.parametrize("substrate", ["Si", "made-up-absorber"])
def test_half_wave_layer_is_absent(n1, substrate):
    # A lossless layer with n1 d = lambda/2 (at that lambda) leaves R at normal incidence
    # equal to the bare substrate's (Hecht, Optics, 4th ed. 2002, sect. 9.7 "absentee"
    # half-wave layer; from memory). Holds for absorbing substrates too: phi = exp(-2 i pi) = 1.
    wl = np.array([350.0, 632.8, 1200.0])
    if substrate == "Si":
        N_s = _si(wl)
    else:
        N_s = np.array([1.2 - 4.0j, 2.5 - 3.0j, 0.3 - 7.0j])  # made-up absorbing indices
    d = wl / (2.0 * n1)
    R = transfer.reflectance(wl, 1.0, [np.full(3, n1)], [d], N_s, 0.0)
    bare = np.abs((N_s - 1.0) / (N_s + 1.0)) ** 2
    # the phase 2 pi is formed from d and lambda in floating point: 1e-13
    assert np.max(np.abs(R - bare)) <= 1e-13
    # and a whole number m of half waves likewise
    R3 = transfer.reflectance(wl, 1.0, [np.full(3, n1)], [3 * d], N_s, 0.0)
    assert np.max(np.abs(R3 - bare)) <= 1e-12        # a phase three times larger


@pytest.mark.parametrize("n1, n_s", [(1.38, 1.52), (1.4585, 3.5), (2.0, 4.0), (1.8, 1.5)])
def test_quarter_wave_layer(n1, n_s):
    # Quarter-wave film on a transparent substrate, normal incidence from air (n0 = 1):
    # R = ((n_s - n1^2) / (n_s + n1^2))^2 (Hecht, Optics, 4th ed. 2002, sect. 9.7,
    # single-layer antireflection coating; from memory)
    wl = np.array([400.0, 632.8, 1000.0])
    d = wl / (4.0 * n1)
    R = transfer.reflectance(wl, 1.0, [np.full(3, n1)], [d], np.full(3, n_s), 0.0)
    expected = ((n_s - n1**2) / (n_s + n1**2)) ** 2
    assert np.max(np.abs(R - expected)) <= 1e-14           # rounding


def test_single_film_airy_formula_oblique():
    # Single transparent film on a transparent substrate at any angle (Born & Wolf,
    # Principles of Optics, 7th ed. 1999, sect. 1.6.4, Airy summation; from memory):
    # r = (r01 + r12 e^{-2i b}) / (1 + r01 r12 e^{-2i b}), b = 2 pi n1 d cos(th1) / lambda,
    # written here from scratch with Snell angles and textbook Fresnel coefficients.
    n0, n1, n2 = 1.0, 1.46, 1.52
    wl = np.linspace(300.0, 1200.0, 19)
    d = 812.0
    for angle in (0.0, 20.0, 45.0, 70.0, 85.0):
        t0 = np.deg2rad(angle)
        t1 = np.arcsin(n0 * np.sin(t0) / n1)
        t2 = np.arcsin(n0 * np.sin(t0) / n2)
        c0, c1, c2 = np.cos(t0), np.cos(t1), np.cos(t2)
        rs01 = (n0 * c0 - n1 * c1) / (n0 * c0 + n1 * c1)
        rs12 = (n1 * c1 - n2 * c2) / (n1 * c1 + n2 * c2)
        rp01 = (n1 * c0 - n0 * c1) / (n1 * c0 + n0 * c1)
        rp12 = (n2 * c1 - n1 * c2) / (n2 * c1 + n1 * c2)
        ph = np.exp(-2j * 2.0 * np.pi * n1 * d * c1 / wl)
        rs = (rs01 + rs12 * ph) / (1 + rs01 * rs12 * ph)
        rp = (rp01 + rp12 * ph) / (1 + rp01 * rp12 * ph)
        args = (wl, n0, [np.full(wl.shape, n1)], [d], np.full(wl.shape, n2), angle)
        # rounding: 1e-14 in R, 1e-13 in r (a phase of ~30 rad for 812 nm at 300 nm)
        assert np.max(np.abs(transfer.reflectance(*args, "s") - abs(rs) ** 2)) <= 1e-14
        assert np.max(np.abs(transfer.reflectance(*args, "p") - abs(rp) ** 2)) <= 1e-14
        assert np.max(np.abs(transfer.stack_r(*args, "s") - rs)) <= 1e-13
        assert np.max(np.abs(transfer.stack_r(*args, "p") - rp)) <= 1e-13


def test_thick_absorbing_layer_hides_substrate():
    # A layer much thicker than its absorption depth acts as the substrate (Beer-Lambert
    # attenuation; common practice, no source): 5 um of Si on glass vs bare Si at 250-400 nm,
    # where the round trip damps the amplitude by exp(-4 pi k d / lambda) < 1e-13.
    wl = np.linspace(250.0, 400.0, 16)
    N = _si(wl)
    R = transfer.reflectance(wl, 1.0, [N], [5000.0], np.full(wl.shape, 1.5), 30.0, "u")
    bare = transfer.reflectance(wl, 1.0, [], [], N, 30.0, "u")
    # independent bare-substrate Fresnel at 30 deg (Azzam & Bashara 1977 sect. 4.2)
    s0 = np.sin(np.deg2rad(30.0))
    c0 = np.cos(np.deg2rad(30.0))
    q = np.sqrt(N**2 - s0**2)
    rs = (c0 - q) / (c0 + q)
    rp = (N**2 * c0 - q) / (N**2 * c0 + q)
    assert np.max(np.abs(bare - 0.5 * (abs(rs) ** 2 + abs(rp) ** 2))) <= 1e-14   # rounding
    assert np.max(np.exp(-4 * np.pi * -N.imag * 5000.0 / wl)) < 1e-13
    # what the damped round trip still adds (< 1e-13) plus rounding
    assert np.max(np.abs(R - bare)) <= 1e-12


# -- normal incidence: s and p coincide ------------------------------------------------

def test_rs_equals_rp_at_normal_incidence():
    # At normal incidence the plane of incidence is undefined: R_s = R_p, and in the
    # Azzam & Bashara (1977) sign convention r_p = -r_s (rho = -1, Delta = 180 deg).
    N_ox, N_si = get_material("SiO2")(WL), _si(WL)
    args = (WL, 1.0, [N_ox], [1000.0], N_si, 0.0)
    rs = transfer.stack_r(*args, "s")
    rp = transfer.stack_r(*args, "p")
    assert np.max(np.abs(rp + rs)) <= 1e-14                 # rounding
    # the oblique code path at a vanishing angle must agree with the normal-incidence path:
    # at 1e-7 deg (1.7e-9 rad) s and p differ by O(theta^2) = 3e-18, so rounding again
    Rs = transfer.reflectance(WL, 1.0, [N_ox], [1000.0], N_si, 1e-7, "s")
    Rp = transfer.reflectance(WL, 1.0, [N_ox], [1000.0], N_si, 1e-7, "p")
    R0 = transfer.reflectance(WL, 1.0, [N_ox], [1000.0], N_si, 0.0, "u")
    assert np.max(np.abs(Rs - Rp)) <= 1e-12
    assert np.max(np.abs(Rs - R0)) <= 1e-12
    psi, delta = transfer.psi_delta(WL, 1.0, [N_ox], [1000.0], N_si, 0.0)
    assert np.max(np.abs(psi - 45.0)) <= 1e-12
    assert np.max(np.abs(delta - 180.0)) <= 1e-12


# -- ellipsometry of a bare surface ----------------------------------------------------

@pytest.mark.parametrize("n", [1.4585, 2.0, 3.5])
def test_brewster_angle_bare_dielectric(n):
    # Psi = 0 at tan(theta_B) = n (Brewster; Hecht, Optics 2002 sect. 8.6, from memory);
    # Delta = 180 deg below and 0 deg above Brewster's angle (Azzam & Bashara 1977 sect. 4.2;
    # Tompkins, A User's Guide to Ellipsometry, 1993, ch. 2)
    wl = np.array([632.8])
    N = np.array([n + 0j])
    theta_b = np.degrees(np.arctan(n))
    psi, _ = transfer.psi_delta(wl, 1.0, [], [], N, theta_b)
    # theta_B itself is rounded (~1e-16 rad): |r_p| ~ 1e-16, Psi and R_p rounding-small
    # (measured Psi 1.5e-14 deg, R_p 1.5e-32)
    assert psi[0] <= 1e-12
    R_p = transfer.reflectance(wl, 1.0, [], [], N, theta_b, "p")
    assert R_p[0] <= 1e-28
    for below in (1.0, 20.0, theta_b - 1.0):
        psi, delta = transfer.psi_delta(wl, 1.0, [], [], N, below)
        # a lossless medium: rho is real, its angle exactly 0 or 180 up to rounding
        # (measured exactly 0 and 180)
        assert _delta_gap(delta[0], 180.0) <= 1e-12 and psi[0] > 0
    for above in (theta_b + 1.0, 80.0, 89.0):
        psi, delta = transfer.psi_delta(wl, 1.0, [], [], N, above)
        assert _delta_gap(delta[0], 0.0) <= 1e-12 and psi[0] > 0


@pytest.mark.parametrize("angle", [45.0, 65.0, 70.0, 75.0])
def test_bare_substrate_two_phase_inversion(angle):
    # Two-phase model inversion (Azzam & Bashara 1977, sect. 4.3; Tompkins 1993 ch. 2):
    # N^2 = N0^2 sin^2(th) [1 + tan^2(th) ((1 - rho)/(1 + rho))^2], rho = tan(Psi) e^{i Delta}.
    # Recovering N = n - ik of Si from our Psi, Delta checks Psi, Delta and their sign.
    N = _si(WL)
    psi, delta = transfer.psi_delta(WL, 1.0, [], [], N, angle)
    rho = np.tan(np.radians(psi)) * np.exp(1j * np.radians(delta))
    th = np.radians(angle)
    N2 = np.sin(th) ** 2 * (1 + np.tan(th) ** 2 * ((1 - rho) / (1 + rho)) ** 2)
    N_back = np.sqrt(N2)
    N_back = np.where(N_back.real < 0, -N_back, N_back)
    # degrees, tan and a complex square root on the way back, |1 + rho| >= 0.2 here:
    # rounding only (measured 1.1e-14)
    assert np.max(np.abs(N_back - N)) <= 1e-12
    # absorbing substrate with N = n - ik: Delta in (0, 180) (Tompkins 1993 ch. 2)
    assert np.all((delta > 0) & (delta < 180))


# -- analytic derivatives against central finite differences -----------------------------

_LOSSY = Cauchy("lossy-test-film", 1.9, 0.02, k_amplitude=0.05, urbach_exponent=1.2,
                band_edge_nm=400.0, range_nm=(200.0, 2000.0))
STACKS = [
    ["SiO2"],
    ["Si3N4", "SiO2"],
    ["SiO2", _LOSSY, "SiO2"],
]
THICK = [[950.0], [60.0, 110.0], [25.0, 140.0, 300.0]]
H = 1e-3  # nm; central difference truncation ~ H^2 f'''/6, negligible here
# rtol 1e-6 in the comparisons below: truncation is (2 pi n H / lambda)^2 / 6 ~ 1e-9
# relative for the shortest fringes; round-off eps R / H ~ 2e-13 is what atol covers


def _indices(names, wl):
    return [get_material(m)(wl) for m in names]


@pytest.mark.parametrize("pol", ["s", "p", "u"])
@pytest.mark.parametrize("angle", [0.0, 40.0, 70.0])
@pytest.mark.parametrize("which", range(len(STACKS)))
def test_reflectance_derivatives_vs_finite_differences(which, angle, pol):
    # central differences (common practice, no source)
    wl = np.linspace(300.0, 1100.0, 9)
    Nl, Ns = _indices(STACKS[which], wl), _si(wl)
    # a batch of two thickness sets, shape (2, 1), to exercise broadcasting of derivatives
    d = [np.array([[t], [t * 1.07 + 3.0]]) for t in THICK[which]]
    R, dR = transfer.reflectance(wl, 1.0, Nl, d, Ns, angle, pol, derivatives=True)
    R_plain = transfer.reflectance(wl, 1.0, Nl, d, Ns, angle, pol)
    assert np.array_equal(R, R_plain)
    assert len(dR) == len(d)
    for j in range(len(d)):
        up = [t + H if i == j else t for i, t in enumerate(d)]
        dn = [t - H if i == j else t for i, t in enumerate(d)]
        fd = (transfer.reflectance(wl, 1.0, Nl, up, Ns, angle, pol)
              - transfer.reflectance(wl, 1.0, Nl, dn, Ns, angle, pol)) / (2 * H)
        assert dR[j].shape == R.shape == (2, wl.size)
        np.testing.assert_allclose(dR[j], fd, rtol=1e-6, atol=1e-10)


@pytest.mark.parametrize("angle", [50.0, 65.0, 75.0])
@pytest.mark.parametrize("which", range(len(STACKS)))
def test_psi_delta_derivatives_vs_finite_differences(which, angle):
    # central differences (common practice, no source); Delta differenced with wrap-around
    wl = np.linspace(300.0, 1100.0, 9)
    Nl, Ns = _indices(STACKS[which], wl), _si(wl)
    d = [np.array([[t], [t * 0.93 + 5.0]]) for t in THICK[which]]
    psi, delta, dpsi, ddelta = transfer.psi_delta(wl, 1.0, Nl, d, Ns, angle, derivatives=True)
    psi0, delta0 = transfer.psi_delta(wl, 1.0, Nl, d, Ns, angle)
    assert np.array_equal(psi, psi0) and np.array_equal(delta, delta0)
    for j in range(len(d)):
        up = [t + H if i == j else t for i, t in enumerate(d)]
        dn = [t - H if i == j else t for i, t in enumerate(d)]
        p_up, d_up = transfer.psi_delta(wl, 1.0, Nl, up, Ns, angle)
        p_dn, d_dn = transfer.psi_delta(wl, 1.0, Nl, dn, Ns, angle)
        fd_psi = (p_up - p_dn) / (2 * H)
        fd_delta = (np.mod(d_up - d_dn + 180.0, 360.0) - 180.0) / (2 * H)
        np.testing.assert_allclose(dpsi[j], fd_psi, rtol=1e-6, atol=1e-7)
        np.testing.assert_allclose(ddelta[j], fd_delta, rtol=1e-6, atol=1e-7)


# -- input contract --------------------------------------------------------------------

@pytest.mark.parametrize("angle", [0.0, 45.0])
def test_reflectance_rejects_unknown_polarization(angle):
    # the documented choices are {"s", "p", "u"} (transfer.reflectance docstring)
    wl = np.array([500.0])
    with pytest.raises(ValueError):
        transfer.reflectance(wl, 1.0, [], [], np.array([3.5 + 0j]), angle, "x")
