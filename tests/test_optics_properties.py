"""Property tests (hypothesis) of the optics engine: physical bounds and invariances.

Each property is a physical fact, not a number produced by filmmap:
R in [0, 1] for passive media (energy conservation); a layer of zero thickness, or
a layer of the ambient's own index, is optically absent; splitting a layer into two
of the same material changes nothing; Psi in [0, 90] and Delta in [0, 360) by
definition of tan(Psi) e^{i Delta} = r_p / r_s (Azzam & Bashara 1977, sect. 4.2).
Batch shape must not change the numbers (common practice, no source).

Tolerances are rounding levels for random stacks of up to 4 layers and 3 um (phases of
~100 rad): 1e-12 to 1e-11 in R and r, Delta compared through rho where |rho| is tiny.
"""

import numpy as np
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from filmmap.materials import Cauchy, get_material
from filmmap.optics import transfer

SETTINGS = settings(max_examples=40, deadline=None,
                    suppress_health_check=[HealthCheck.too_slow])

_LOSSY = Cauchy("lossy-prop-film", 1.9, 0.02, k_amplitude=0.08, urbach_exponent=1.0,
                band_edge_nm=400.0, range_nm=(200.0, 2000.0))
LAYER_MATERIALS = [get_material("SiO2"), get_material("Si3N4"), _LOSSY, get_material("Si")]
SUBSTRATES = [get_material("Si"), get_material("SiO2"),
              Cauchy("dark-prop-sub", 2.5, 0.05, k_amplitude=3.0, urbach_exponent=0.5,
                     band_edge_nm=400.0, range_nm=(200.0, 2000.0))]

wavelengths = st.lists(st.floats(250.0, 1450.0), min_size=1, max_size=6).map(
    lambda v: np.array(sorted(v)))
angles = st.floats(0.0, 85.0)
thickness = st.floats(0.0, 3000.0)
layer = st.tuples(st.integers(0, len(LAYER_MATERIALS) - 1), thickness)
stacks = st.lists(layer, min_size=0, max_size=4)
substrate = st.integers(0, len(SUBSTRATES) - 1)


def _eval(wl, layers, sub):
    return ([LAYER_MATERIALS[i](wl) for i, _ in layers], [d for _, d in layers],
            SUBSTRATES[sub](wl))


def _delta_gap(a, b):
    d = np.mod(np.asarray(a) - np.asarray(b), 360.0)
    return np.minimum(d, 360.0 - d)


@SETTINGS
@given(wl=wavelengths, layers=stacks, sub=substrate, angle=angles)
def test_reflectance_between_zero_and_one(wl, layers, sub, angle):
    # energy conservation in passive media (Born & Wolf 1999, sect. 1.5; common practice)
    Nl, d, Ns = _eval(wl, layers, sub)
    for pol in ("s", "p", "u"):
        R = transfer.reflectance(wl, 1.0, Nl, d, Ns, angle, pol)
        assert R.shape == wl.shape
        assert np.all(np.isfinite(R))
        assert np.all((R >= 0.0) & (R <= 1.0 + 1e-14))   # a mirror-like stack may round up


@SETTINGS
@given(wl=wavelengths, layers=stacks, sub=substrate, angle=angles)
def test_psi_delta_ranges(wl, layers, sub, angle):
    # Psi = arctan|rho| in [0, 90], Delta = arg(rho) taken in [0, 360)
    # (Azzam & Bashara 1977 sect. 4.2; Tompkins 1993 ch. 2)
    Nl, d, Ns = _eval(wl, layers, sub)
    psi, delta = transfer.psi_delta(wl, 1.0, Nl, d, Ns, angle)
    assert np.all((psi >= 0.0) & (psi <= 90.0))
    assert np.all((delta >= 0.0) & (delta < 360.0))


@SETTINGS
@given(wl=wavelengths, layers=stacks, sub=substrate, angle=angles,
       extra=st.integers(0, len(LAYER_MATERIALS) - 1), where=st.integers(0, 4))
def test_zero_thickness_layer_changes_nothing(wl, layers, sub, angle, extra, where):
    # a layer of zero thickness is physically absent (common practice, no source)
    where = min(where, len(layers))
    with_zero = layers[:where] + [(extra, 0.0)] + layers[where:]
    Nl, d, Ns = _eval(wl, layers, sub)
    Nz, dz, _ = _eval(wl, with_zero, sub)
    R = transfer.reflectance(wl, 1.0, Nl, d, Ns, angle, "u")
    Rz = transfer.reflectance(wl, 1.0, Nz, dz, Ns, angle, "u")
    assert np.max(np.abs(R - Rz)) <= 1e-12
    psi, delta = transfer.psi_delta(wl, 1.0, Nl, d, Ns, angle)
    psiz, deltaz = transfer.psi_delta(wl, 1.0, Nz, dz, Ns, angle)
    # Delta is ill-conditioned where |rho| is tiny; compare rho itself instead
    rho = np.tan(np.radians(psi)) * np.exp(1j * np.radians(delta))
    rhoz = np.tan(np.radians(psiz)) * np.exp(1j * np.radians(deltaz))
    # relative to |rho| (>= 1): an extra interface pair and its phase add rounding
    assert np.max(np.abs(rho - rhoz)) <= 1e-9 * np.max(np.maximum(1.0, np.abs(rho)))


@SETTINGS
@given(wl=wavelengths, layers=stacks, sub=substrate, angle=angles, d_air=thickness)
def test_ambient_index_layer_on_top_changes_nothing(wl, layers, sub, angle, d_air):
    # a top layer with the ambient's own index (n = 1), of any thickness, only moves the
    # phase reference plane: |r| and so R are unchanged (common practice, no source)
    Nl, d, Ns = _eval(wl, layers, sub)
    R = transfer.reflectance(wl, 1.0, Nl, d, Ns, angle, "u")
    Ra = transfer.reflectance(wl, 1.0, [np.ones(wl.shape, complex)] + Nl, [d_air] + d, Ns,
                              angle, "u")
    assert np.max(np.abs(R - Ra)) <= 1e-12


@SETTINGS
@given(wl=wavelengths, sub=substrate, angle=angles, mat=st.integers(0, 2),
       d1=thickness, d2=thickness)
def test_split_layer_changes_nothing(wl, sub, angle, mat, d1, d2):
    # two adjacent layers of the same material = one layer of the summed thickness
    # (no interface between identical media; common practice, no source). Materials 0-2
    # only: splitting a strongly absorbing layer is still exact but rounding grows.
    N = LAYER_MATERIALS[mat](wl)
    Ns = SUBSTRATES[sub](wl)
    one = transfer.stack_r(wl, 1.0, [N], [d1 + d2], Ns, angle, "p")
    two = transfer.stack_r(wl, 1.0, [N, N], [d1, d2], Ns, angle, "p")
    assert np.max(np.abs(one - two)) <= 1e-11


@SETTINGS
@given(wl=wavelengths, layers=st.lists(layer, min_size=1, max_size=3), sub=substrate,
       angle=angles, spread=st.lists(thickness, min_size=6, max_size=6))
def test_batch_shape_independence(wl, layers, sub, angle, spread):
    # the same numbers whether thicknesses are looped one at a time, given as (6, 1),
    # or as (2, 3, 1) and reshaped (common practice, no source)
    Nl, d, Ns = _eval(wl, layers, sub)
    first = np.array(spread)
    # layer 0 varies over the batch; the others keep their drawn thickness
    looped = np.array([transfer.reflectance(wl, 1.0, Nl, [t] + d[1:], Ns, angle, "u")
                       for t in first])
    col = transfer.reflectance(wl, 1.0, Nl, [first[:, None]] + d[1:], Ns, angle, "u")
    cube = transfer.reflectance(wl, 1.0, Nl, [first.reshape(2, 3, 1)] + d[1:], Ns, angle, "u")
    assert col.shape == (6, wl.size) and cube.shape == (2, 3, wl.size)
    # the same operations in another order of broadcasting: last-bit differences at most
    assert np.max(np.abs(looped - col)) <= 1e-14
    assert np.max(np.abs(cube.reshape(6, -1) - col)) <= 1e-14
    # likewise for Psi/Delta (compared with wrap-around)
    psi_l, delta_l = zip(*[transfer.psi_delta(wl, 1.0, Nl, [t] + d[1:], Ns, angle)
                           for t in first])
    psi_c, delta_c = transfer.psi_delta(wl, 1.0, Nl, [first.reshape(2, 3, 1)] + d[1:], Ns, angle)
    # in degrees; Delta is an angle of a possibly tiny rho, so looser
    assert np.max(np.abs(np.array(psi_l) - psi_c.reshape(6, -1))) <= 1e-12
    assert np.max(_delta_gap(np.array(delta_l), delta_c.reshape(6, -1))) <= 1e-9
