"""filmmap's optics engine against an independent transfer-matrix code, the `tmm` package.

Reference: S. J. Byrnes, "Multilayer optical calculations", arXiv:1603.02720 (2016),
and its Python implementation `tmm` (v0.2), which multiplies 2x2 characteristic
matrices layer by layer, one wavelength and one angle per call. filmmap uses a
batched Airy recursion instead, so agreement to rounding level is a real check of
Fresnel coefficients, Snell branches in absorbing media, phases and the p/s signs.

Convention mapping (verified by hand against both codes' sources):

* filmmap: N = n - ik, time factor exp(+i w t) (Azzam & Bashara 1977).
  tmm: N = n + ik, time factor exp(-i w t) (Byrnes 2016, sect. 2).
  The two descriptions of the same physics are complex conjugates of each other,
  so we pass conj(N) to tmm; its amplitude r is then conj(our r), and
  R = |r|^2 is identical.
* Both codes write r_p = (N_j cos th_i - N_i cos th_j) / (N_j cos th_i + N_i cos th_j)
  (tmm.interface_r; Azzam & Bashara 1977 sect. 4.2), so r_p = -r_s at normal incidence
  in both.
* tmm.ellips returns Delta_tmm = angle(-r_p/r_s) (tmm_core.ellips, read from the
  installed source). With r_tmm = conj(r_ours): -rho_tmm = -conj(rho_ours), whose
  argument is pi - Delta_ours, hence Delta_ours = (180 - Delta_tmm_deg) mod 360.
  Psi = arctan|r_p/r_s| needs no mapping.
"""

import numpy as np
import pytest
import tmm

from filmmap.materials import Cauchy, Tabulated, get_material
from filmmap.optics import transfer

N_CASES = 150  # per substrate; 3 substrates x 150 cases x 3 wavelengths = 1,350 (s, p) pairs

# -- media ------------------------------------------------------------------------------

# A made-up, strongly absorbing, metal-like table (not a real material; test fixture only):
# n 0.4-2.0 and k 2.5-9 across 200-1500 nm, smooth, so PCHIP interpolation is well behaved.
_T_WL = np.arange(200.0, 1501.0, 50.0)
_MADE_UP_TABLE = Tabulated("made-up-absorber", _T_WL,
                           n=0.4 + 1.6 * (_T_WL - 200.0) / 1300.0,
                           k=2.5 + 6.5 * ((_T_WL - 200.0) / 1300.0) ** 1.2,
                           source="made-up test fixture")

# A made-up Cauchy substrate with a strong Urbach tail: k = 2 at 400 nm,
# ~8.8 at 250 nm, ~0.33 at 1450 nm (test fixture only).
_MADE_UP_URBACH = Cauchy("made-up-urbach", A=3.0, B_um2=0.05, k_amplitude=2.0,
                         urbach_exponent=0.8, band_edge_nm=400.0, range_nm=(200.0, 2000.0),
                         source="made-up test fixture")

# A made-up weakly absorbing deposited film (Cauchy + Urbach), for use as a layer.
_LOSSY_FILM = Cauchy("made-up-lossy-film", A=1.9, B_um2=0.02, k_amplitude=0.05,
                     urbach_exponent=1.2, band_edge_nm=400.0, range_nm=(200.0, 2000.0),
                     source="made-up test fixture")

SUBSTRATES = {
    "Si": get_material("Si"),
    "made-up-table": _MADE_UP_TABLE,
    "made-up-urbach": _MADE_UP_URBACH,
}

# layer materials and the largest thickness drawn for each (nm); a thin Si film keeps
# the single-pass attenuation moderate (tmm resets layers with Im(delta) > 35)
LAYERS = [
    (get_material("SiO2"), 1500.0),
    (get_material("Si3N4"), 800.0),
    (_LOSSY_FILM, 600.0),
    (get_material("Si"), 80.0),
]


def _cases(seed):
    """Random stacks: 1-4 layers, angle 0-80 deg, 3 wavelengths in 250-1450 nm."""
    rng = np.random.default_rng(seed)
    out = []
    for i in range(N_CASES):
        n_layers = int(rng.integers(1, 5))
        picks = rng.integers(0, len(LAYERS), size=n_layers)
        mats = [LAYERS[p][0] for p in picks]
        d = [float(rng.uniform(0.0, LAYERS[p][1])) for p in picks]
        # every 10th case at exact normal incidence (a separate code path in reflectance)
        angle = 0.0 if i % 10 == 0 else float(rng.uniform(0.0, 80.0))
        wl = np.sort(rng.uniform(250.0, 1450.0, size=3))
        out.append((mats, d, angle, wl))
    return out


def _tmm(pol, n_list, d_list, angle_deg, wl):
    return tmm.coh_tmm(pol, n_list, d_list, np.deg2rad(angle_deg), wl)


def _delta_gap(a, b):
    """Smallest difference of two angles in degrees, with 0/360 wrap-around."""
    d = np.mod(np.asarray(a) - np.asarray(b), 360.0)
    return np.minimum(d, 360.0 - d)


@pytest.mark.parametrize("substrate_name", list(SUBSTRATES))
def test_random_stacks_match_tmm(substrate_name):
    # Byrnes 2016 (arXiv:1603.02720) / tmm.coh_tmm and tmm.ellips as the reference.
    # Tolerances |dR| <= 1e-12 and |dPsi|, |dDelta| <= 1e-10 deg: both codes are exact
    # formulas in double precision, so only rounding separates them (measured 1.8e-14 in R,
    # 5.6e-12 deg; the factor ~100 is room for another libm or BLAS).
    substrate = SUBSTRATES[substrate_name]
    seed = {"Si": 11, "made-up-table": 12, "made-up-urbach": 13}[substrate_name]
    worst = {"Rs": 0.0, "Rp": 0.0, "Ru": 0.0, "psi": 0.0, "delta": 0.0}
    n_compared = 0
    for mats, d, angle, wl in _cases(seed):
        N_layers = [m(wl) for m in mats]
        N_sub = substrate(wl)
        Rs = transfer.reflectance(wl, 1.0, N_layers, d, N_sub, angle, "s")
        Rp = transfer.reflectance(wl, 1.0, N_layers, d, N_sub, angle, "p")
        Ru = transfer.reflectance(wl, 1.0, N_layers, d, N_sub, angle, "u")
        psi, delta = transfer.psi_delta(wl, 1.0, N_layers, d, N_sub, angle)
        for i, lam in enumerate(wl):
            # conj(N): tmm's n + ik convention (see module docstring)
            n_list = [1.0 + 0j] + [np.conj(N[i]) for N in N_layers] + [np.conj(N_sub[i])]
            d_list = [np.inf] + d + [np.inf]
            s = _tmm("s", n_list, d_list, angle, lam)
            p = _tmm("p", n_list, d_list, angle, lam)
            ru = 0.5 * (s["R"] + p["R"])  # tmm.unpolarized_RT definition
            # tmm.ellips, computed from the same s/p runs (identical formula, half the calls)
            rho_tmm = p["r"] / s["r"]
            psi_tmm = np.degrees(np.arctan(abs(rho_tmm)))
            delta_tmm = np.degrees(np.angle(-rho_tmm))
            delta_mapped = np.mod(180.0 - delta_tmm, 360.0)
            worst["Rs"] = max(worst["Rs"], abs(Rs[i] - s["R"]))
            worst["Rp"] = max(worst["Rp"], abs(Rp[i] - p["R"]))
            worst["Ru"] = max(worst["Ru"], abs(Ru[i] - ru))
            worst["psi"] = max(worst["psi"], abs(psi[i] - psi_tmm))
            worst["delta"] = max(worst["delta"], float(_delta_gap(delta[i], delta_mapped)))
            n_compared += 1
    assert n_compared == 3 * N_CASES
    assert worst["Rs"] <= 1e-12, worst
    assert worst["Rp"] <= 1e-12, worst
    assert worst["Ru"] <= 1e-12, worst
    assert worst["psi"] <= 1e-10, worst
    assert worst["delta"] <= 1e-10, worst


def test_tmm_ellips_mapping_itself():
    # Checks the Delta mapping against tmm.ellips as shipped (not our re-derivation of it),
    # for one oxide-on-Si stack at three angles. Byrnes 2016 / tmm.ellips.
    wl = np.array([632.8])
    N_ox, N_si = get_material("SiO2")(wl), get_material("Si")(wl)
    for angle in (0.0, 45.0, 70.0):
        e = tmm.ellips([1.0, np.conj(N_ox[0]), np.conj(N_si[0])], [np.inf, 123.4, np.inf],
                       np.deg2rad(angle), 632.8)
        psi, delta = transfer.psi_delta(wl, 1.0, [N_ox], [123.4], N_si, angle)
        # rounding only, as in test_random_stacks_match_tmm
        assert abs(psi[0] - np.degrees(e["psi"])) <= 1e-10
        assert _delta_gap(delta[0], np.mod(180.0 - np.degrees(e["Delta"]), 360.0)) <= 1e-10


def test_batched_call_matches_tmm_per_point():
    # One batched call (thickness shape (n, 1) x wavelengths) against tmm point by point:
    # the broadcasting path is the one the fitter and the benchmark use. Byrnes 2016 / tmm.
    rng = np.random.default_rng(5)
    wl = np.linspace(400.0, 1000.0, 7)
    d = rng.uniform(900.0, 1100.0, size=6)
    N_ox, N_si = get_material("SiO2")(wl), get_material("Si")(wl)
    R = transfer.reflectance(wl, 1.0, [N_ox], [d[:, None]], N_si, 0.0)
    assert R.shape == (6, 7)
    for a in range(d.size):
        for b in range(wl.size):
            ref = tmm.coh_tmm("s", [1.0, np.conj(N_ox[b]), np.conj(N_si[b])],
                              [np.inf, d[a], np.inf], 0.0, wl[b])["R"]
            assert abs(R[a, b] - ref) <= 1e-12           # rounding only, as above


def test_stack_object_matches_tmm():
    # The Stack wrapper (registry materials, nominal thicknesses) against tmm, R and Psi/Delta.
    # Byrnes 2016 / tmm.coh_tmm, tmm.ellips; mapping as in the module docstring.
    from filmmap.optics import Layer, Stack
    st = Stack("Si", [Layer("Si3N4", 80.0), Layer("SiO2", 500.0)])
    wl = np.array([300.0, 632.8, 1300.0])
    R = st.reflectance(wl, 55.0)
    psi, delta = st.psi_delta(wl, 65.0)
    N_n, N_o, N_s = (get_material(m)(wl) for m in ("Si3N4", "SiO2", "Si"))
    for i, lam in enumerate(wl):
        n_list = [1.0, np.conj(N_n[i]), np.conj(N_o[i]), np.conj(N_s[i])]
        d_list = [np.inf, 80.0, 500.0, np.inf]
        ru = tmm.unpolarized_RT(n_list, d_list, np.deg2rad(55.0), lam)["R"]
        e = tmm.ellips(n_list, d_list, np.deg2rad(65.0), lam)
        # rounding only, as in test_random_stacks_match_tmm
        assert abs(R[i] - ru) <= 1e-12
        assert abs(psi[i] - np.degrees(e["psi"])) <= 1e-10
        assert _delta_gap(delta[i], np.mod(180.0 - np.degrees(e["Delta"]), 360.0)) <= 1e-10


@pytest.mark.parametrize("layer_names", [
    ["Si3N4", "SiO2"],
    ["SiO2"],
])
def test_batched_substrate_indices_match_tmm(layer_names):
    # The module contract: every input broadcasts. Two substrates stacked on a leading axis
    # (Si and a made-up absorber) must give, row by row, tmm's answers. Byrnes 2016 / tmm.
    wl = np.array([400.0, 632.8, 1000.0])
    N_l = [get_material(m)(wl) for m in layer_names]
    d = [70.0, 400.0][: len(layer_names)]
    N_sub = np.stack([get_material("Si")(wl), _MADE_UP_TABLE(wl)])  # shape (2, 3)
    R = transfer.reflectance(wl, 1.0, N_l, d, N_sub, 50.0, "u")
    assert R.shape == (2, 3)
    for a in range(2):
        for b, lam in enumerate(wl):
            n_list = [1.0] + [np.conj(N[b]) for N in N_l] + [np.conj(N_sub[a, b])]
            ref = tmm.unpolarized_RT(n_list, [np.inf] + d + [np.inf], np.deg2rad(50.0), lam)["R"]
            assert abs(R[a, b] - ref) <= 1e-12           # rounding only, as above
