"""Deal-Grove linear-parabolic oxidation kinetics of silicon.

The oxide thickness x obeys ``dx/dt = B / (A + 2x)``, which integrates at constant
temperature to ``x^2 + A x = B (t + tau)``.  B (parabolic rate constant) and B/A (linear
rate constant) follow Arrhenius laws whose constants are read from
``reference/deal_grove_constants.toml``.

Units at this API: thickness in nm, time in minutes, temperature in degrees Celsius,
oxidant partial pressure in atm.  The rate constants themselves are returned in the units
of the published tables (um^2/h for B, um/h for B/A, um for A) so that they compare
directly with the literature.  Every function broadcasts over its array arguments, so a
whole load of slots (one temperature each) is evaluated in one call.
"""

from __future__ import annotations

from functools import lru_cache
from typing import NamedTuple

import numpy as np

from filmmap.errors import FilmmapInputError
from filmmap.reference_data import reference_toml

#: Boltzmann constant in eV/K: k / e, both exact in the SI since 2019 (CODATA 2018).
BOLTZMANN_EV = 1.380649e-23 / 1.602176634e-19

#: Oxidising ambients this module knows (dry oxygen, steam).
OXIDANTS = ("O2", "H2O")

#: Substrate orientations with tabulated B/A.
ORIENTATIONS = ("100", "111")

_TORR_PER_ATM = 760.0
_NM_PER_UM = 1000.0
_MIN_PER_H = 60.0


@lru_cache(maxsize=None)
def load_constants():
    """The Deal-Grove (and optional Massoud) constants from the reference file.

    Returns
    -------
    dict
        Parsed ``reference/deal_grove_constants.toml``: one table per oxidant
        (``"O2"``, ``"H2O"``) with ``B_prefactor_um2_per_h``, ``B_activation_eV``,
        ``B_over_A_prefactor_um_per_h`` (for (111) silicon), ``B_over_A_activation_eV``,
        ``reference_pressure_torr`` and ``initial_oxide_nm``; a ``"massoud"`` table; and
        ``orientation_ratio_111_to_100``.  Do not mutate (the result is cached).

    References
    ----------
    .. [1] J. D. Plummer, M. D. Deal and P. B. Griffin, "Silicon VLSI Technology",
       Prentice Hall (2000), Ch. 6.
    .. [2] B. E. Deal and A. S. Grove, J. Appl. Phys. 36, 3770-3778 (1965).
    """
    return reference_toml("deal_grove_constants.toml")


def check_ambient(ambient):
    """Normalise an oxidant name to ``"O2"`` or ``"H2O"``.

    Parameters
    ----------
    ambient : str
        ``"O2"`` (dry) or ``"H2O"`` (wet / steam), case-insensitive.

    Returns
    -------
    str
        ``"O2"`` or ``"H2O"``.

    Raises
    ------
    FilmmapInputError
        For any other value (``field='ambient'``).
    """
    key = str(ambient).strip().upper()
    if key not in OXIDANTS:
        raise FilmmapInputError(
            f"oxidising ambient must be one of {', '.join(OXIDANTS)}, got {ambient!r}",
            field="ambient")
    return key


def check_orientation(orientation):
    """Normalise a silicon orientation to ``"100"`` or ``"111"``.

    Parameters
    ----------
    orientation : str or int
        ``"100"`` or ``"111"``; brackets such as ``"(100)"`` or ``"<111>"`` are accepted.

    Returns
    -------
    str
        ``"100"`` or ``"111"``.

    Raises
    ------
    FilmmapInputError
        For any other value (``field='orientation'``).
    """
    key = str(orientation).strip().strip("()<>{}[] ")
    if key not in ORIENTATIONS:
        raise FilmmapInputError(
            f"silicon orientation must be '100' or '111', got {orientation!r}",
            field="orientation")
    return key


def reference_pressure_atm(ambient):
    """Oxidant partial pressure to which the tabulated constants refer.

    Parameters
    ----------
    ambient : str
        ``"O2"`` or ``"H2O"``.

    Returns
    -------
    float
        In atm: 1.0 for dry O2; 640/760 = 0.842 for H2O (Deal & Grove's wet data were taken
        at 640 torr water-vapour partial pressure).

    References
    ----------
    .. [1] B. E. Deal and A. S. Grove, J. Appl. Phys. 36, 3770-3778 (1965).
    """
    table = load_constants()[check_ambient(ambient)]
    return float(table["reference_pressure_torr"]) / _TORR_PER_ATM


def pressure_factor(ambient, pressure_atm=None):
    """Scale factor p / p_ref applied to B and B/A (and the Massoud C).

    Parameters
    ----------
    ambient : str
        ``"O2"`` or ``"H2O"``.
    pressure_atm : array_like or None
        Oxidant partial pressure in atm.  ``None`` means the reference pressure of the
        data (1 atm O2, 640 torr H2O), factor 1.

    Returns
    -------
    numpy.ndarray or float
        Dimensionless factor, linear in pressure.

    Raises
    ------
    FilmmapInputError
        For a pressure that is not finite and positive (``field='pressure_atm'``).

    Notes
    -----
    Linear scaling follows Henry's law in the Deal-Grove model (oxidant solubility in the
    oxide proportional to its partial pressure).  For B this is well obeyed; for dry B/A
    later work found a sub-linear dependence, so results far from the reference pressure
    are approximate.

    References
    ----------
    .. [1] B. E. Deal and A. S. Grove, J. Appl. Phys. 36, 3770-3778 (1965).
    """
    if pressure_atm is None:
        return 1.0
    p = np.asarray(pressure_atm, dtype=float)
    if not np.all(np.isfinite(p) & (p > 0)):
        raise FilmmapInputError(
            f"oxidant partial pressure must be finite and > 0 atm, got {pressure_atm!r}",
            field="pressure_atm")
    return p / reference_pressure_atm(ambient)


def _kT(T_C):
    return BOLTZMANN_EV * (np.asarray(T_C, dtype=float) + 273.15)


def _scalar(a):
    a = np.asarray(a, dtype=float)
    return a[()] if a.ndim == 0 else a


def parabolic_B(T_C, ambient, pressure_atm=None):
    """Parabolic rate constant B(T).

    Parameters
    ----------
    T_C : array_like
        Temperature in degrees Celsius.
    ambient : str
        ``"O2"`` or ``"H2O"``.
    pressure_atm : array_like or None
        Oxidant partial pressure in atm (``None``: reference pressure of the data).

    Returns
    -------
    numpy.ndarray or float
        B in um^2/h (independent of orientation).

    Notes
    -----
    B = C1 exp(-E1 / kT) * p / p_ref.

    References
    ----------
    .. [1] J. D. Plummer, M. D. Deal and P. B. Griffin, "Silicon VLSI Technology",
       Prentice Hall (2000), Ch. 6, after [2].
    .. [2] B. E. Deal and A. S. Grove, J. Appl. Phys. 36, 3770-3778 (1965).
    """
    table = load_constants()[check_ambient(ambient)]
    B = table["B_prefactor_um2_per_h"] * np.exp(-table["B_activation_eV"] / _kT(T_C))
    return _scalar(B * pressure_factor(ambient, pressure_atm))


def linear_B_over_A(T_C, ambient, orientation="100", pressure_atm=None):
    """Linear rate constant B/A(T).

    Parameters
    ----------
    T_C : array_like
        Temperature in degrees Celsius.
    ambient : str
        ``"O2"`` or ``"H2O"``.
    orientation : str
        ``"100"`` or ``"111"``; B/A(100) = B/A(111) / 1.68.
    pressure_atm : array_like or None
        Oxidant partial pressure in atm (``None``: reference pressure of the data).

    Returns
    -------
    numpy.ndarray or float
        B/A in um/h.

    Notes
    -----
    B/A = C2 exp(-E2 / kT) * p / p_ref, with C2 tabulated for (111) silicon.

    References
    ----------
    .. [1] J. D. Plummer, M. D. Deal and P. B. Griffin, "Silicon VLSI Technology",
       Prentice Hall (2000), Ch. 6, after [2].
    .. [2] B. E. Deal and A. S. Grove, J. Appl. Phys. 36, 3770-3778 (1965).
    """
    consts = load_constants()
    table = consts[check_ambient(ambient)]
    ba = table["B_over_A_prefactor_um_per_h"] * np.exp(-table["B_over_A_activation_eV"] / _kT(T_C))
    if check_orientation(orientation) != consts["B_over_A_orientation"]:
        ba = ba / consts["orientation_ratio_111_to_100"]
    return _scalar(ba * pressure_factor(ambient, pressure_atm))


class RateConstants(NamedTuple):
    """Deal-Grove rate constants at one or more temperatures (literature units)."""

    B_um2_per_h: np.ndarray
    """Parabolic rate constant B in um^2/h."""
    B_over_A_um_per_h: np.ndarray
    """Linear rate constant B/A in um/h."""

    @property
    def A_um(self):
        """A = B / (B/A) in um (independent of pressure)."""
        return _scalar(np.asarray(self.B_um2_per_h) / np.asarray(self.B_over_A_um_per_h))


def rate_constants(T_C, ambient, orientation="100", pressure_atm=None):
    """B and B/A together.

    Parameters
    ----------
    T_C : array_like
        Temperature in degrees Celsius.
    ambient : str
        ``"O2"`` or ``"H2O"``.
    orientation : str
        ``"100"`` or ``"111"``.
    pressure_atm : array_like or None
        Oxidant partial pressure in atm (``None``: reference pressure of the data).

    Returns
    -------
    RateConstants
        ``B_um2_per_h``, ``B_over_A_um_per_h`` and the property ``A_um``.

    References
    ----------
    .. [1] B. E. Deal and A. S. Grove, J. Appl. Phys. 36, 3770-3778 (1965).
    """
    return RateConstants(parabolic_B(T_C, ambient, pressure_atm),
                         linear_B_over_A(T_C, ambient, orientation, pressure_atm))


def initial_oxide_nm(ambient):
    """Deal-Grove initial-oxide offset x_i used for a bare wafer.

    Parameters
    ----------
    ambient : str
        ``"O2"`` or ``"H2O"``.

    Returns
    -------
    float
        x_i in nm: 25 for dry O2 (Plummer et al.; Deal & Grove's own table implies 23),
        0 for H2O.

    References
    ----------
    .. [1] B. E. Deal and A. S. Grove, J. Appl. Phys. 36, 3770-3778 (1965).
    .. [2] J. D. Plummer, M. D. Deal and P. B. Griffin, "Silicon VLSI Technology",
       Prentice Hall (2000), Ch. 6.
    """
    return float(load_constants()[check_ambient(ambient)]["initial_oxide_nm"])


def _initial(initial_nm, ambient):
    if initial_nm is None:
        initial_nm = initial_oxide_nm(ambient)
    x0 = np.asarray(initial_nm, dtype=float)
    if not np.all(np.isfinite(x0) & (x0 >= 0)):
        raise FilmmapInputError(f"initial oxide must be finite and >= 0 nm, got {initial_nm!r}",
                                field="initial_nm")
    return x0 / _NM_PER_UM


def tau_minutes(initial_nm, T_C, ambient, orientation="100", pressure_atm=None):
    """Time shift tau that makes the closed form start from an existing oxide.

    Parameters
    ----------
    initial_nm : array_like or None
        Oxide present at t = 0, in nm (``None``: the Deal-Grove x_i of the ambient).
    T_C : array_like
        Temperature in degrees Celsius.
    ambient : str
        ``"O2"`` or ``"H2O"``.
    orientation : str
        ``"100"`` or ``"111"``.
    pressure_atm : array_like or None
        Oxidant partial pressure in atm (``None``: reference pressure of the data).

    Returns
    -------
    numpy.ndarray or float
        tau in minutes, tau = (x_i^2 + A x_i) / B.

    References
    ----------
    .. [1] B. E. Deal and A. S. Grove, J. Appl. Phys. 36, 3770-3778 (1965), Eq. (13).
    """
    xi = _initial(initial_nm, ambient)
    rc = rate_constants(T_C, ambient, orientation, pressure_atm)
    return _scalar((xi * xi + rc.A_um * xi) / rc.B_um2_per_h * _MIN_PER_H)


def _grow_um(x0_um, hours, B, A):
    """Closed form from x0 after ``hours`` at constant B, A (all um / h, broadcast)."""
    u = x0_um * (x0_um + A) + B * hours
    # x = (sqrt(A^2 + 4u) - A) / 2 written without cancellation for small u
    return 2.0 * u / (A + np.sqrt(A * A + 4.0 * u))


def oxide_thickness_nm(minutes, T_C, ambient, orientation="100", initial_nm=None, pressure_atm=None):
    """Oxide thickness after a constant-temperature oxidation (Deal-Grove closed form).

    Parameters
    ----------
    minutes : array_like
        Oxidation time in minutes (>= 0).
    T_C : array_like
        Temperature in degrees Celsius.
    ambient : str
        ``"O2"`` or ``"H2O"``.
    orientation : str
        ``"100"`` or ``"111"``.
    initial_nm : array_like or None
        Oxide at t = 0 in nm.  ``None`` uses the Deal-Grove x_i (25 nm dry, 0 wet), i.e.
        a bare wafer including the fast initial regime of dry oxidation.
    pressure_atm : array_like or None
        Oxidant partial pressure in atm (``None``: reference pressure of the data).

    Returns
    -------
    numpy.ndarray or float
        Thickness in nm, x = (A/2) (sqrt(1 + (t + tau) / (A^2 / 4B)) - 1).

    References
    ----------
    .. [1] B. E. Deal and A. S. Grove, J. Appl. Phys. 36, 3770-3778 (1965), Eq. (14).
    """
    t = np.asarray(minutes, dtype=float)
    if not np.all(np.isfinite(t) & (t >= 0)):
        raise FilmmapInputError(f"oxidation time must be finite and >= 0 min, got {minutes!r}",
                                field="minutes")
    xi = _initial(initial_nm, ambient)
    rc = rate_constants(T_C, ambient, orientation, pressure_atm)
    x = _grow_um(xi, t / _MIN_PER_H, rc.B_um2_per_h, rc.A_um)
    return _scalar(x * _NM_PER_UM)


def oxidation_minutes(target_nm, T_C, ambient, orientation="100", initial_nm=None, pressure_atm=None):
    """Time to reach a thickness at constant temperature (inverse of the closed form).

    Parameters
    ----------
    target_nm : array_like
        Wanted oxide thickness in nm.
    T_C : array_like
        Temperature in degrees Celsius.
    ambient : str
        ``"O2"`` or ``"H2O"``.
    orientation : str
        ``"100"`` or ``"111"``.
    initial_nm : array_like or None
        Oxide at t = 0 in nm (``None``: the Deal-Grove x_i of the ambient).
    pressure_atm : array_like or None
        Oxidant partial pressure in atm (``None``: reference pressure of the data).

    Returns
    -------
    numpy.ndarray or float
        Minutes, t = (x^2 - x_i^2) / B + (x - x_i) / (B/A); negative where the target is
        thinner than the initial oxide.

    References
    ----------
    .. [1] B. E. Deal and A. S. Grove, J. Appl. Phys. 36, 3770-3778 (1965), Eq. (12).
    """
    x = np.asarray(target_nm, dtype=float)
    if not np.all(np.isfinite(x) & (x >= 0)):
        raise FilmmapInputError(f"target thickness must be finite and >= 0 nm, got {target_nm!r}",
                                field="target_nm")
    x = x / _NM_PER_UM
    xi = _initial(initial_nm, ambient)
    rc = rate_constants(T_C, ambient, orientation, pressure_atm)
    hours = (x - xi) * (x + xi + rc.A_um) / rc.B_um2_per_h
    return _scalar(hours * _MIN_PER_H)


def massoud_C(T_C, pressure_atm=None):
    """Thin-regime rate-enhancement amplitude C(T) of Massoud et al. (dry O2 only).

    Parameters
    ----------
    T_C : array_like
        Temperature in degrees Celsius.
    pressure_atm : array_like or None
        O2 partial pressure in atm (``None``: 1 atm).  Linear scaling is this module's
        assumption, not part of the published fit (which was at 1 atm).

    Returns
    -------
    numpy.ndarray or float
        C in um/h; the extra growth rate is C exp(-x / L) with L from
        :func:`massoud_decay_length_nm`.

    Notes
    -----
    dx/dt = B / (A + 2x) + C exp(-x/L), C = C0 exp(-E/kT), with C0 = 3.6e8 um/h,
    E = 2.35 eV, L = 7 nm for both (100) and (111), used with tau = 0.  Constants quoted
    from memory of [2]; see the reference file header.

    References
    ----------
    .. [1] H. Z. Massoud, J. D. Plummer and E. A. Irene, J. Electrochem. Soc. 132,
       2685-2700 (1985).
    .. [2] J. D. Plummer, M. D. Deal and P. B. Griffin, "Silicon VLSI Technology",
       Prentice Hall (2000), Ch. 6.
    """
    m = load_constants()["massoud"]
    C = m["C_prefactor_um_per_h"] * np.exp(-m["C_activation_eV"] / _kT(T_C))
    return _scalar(C * pressure_factor("O2", pressure_atm))


def massoud_decay_length_nm():
    """Decay length L of the Massoud thin-regime term, in nm (7 nm; see `massoud_C`)."""
    return float(load_constants()["massoud"]["decay_length_nm"])


def growth_rate_nm_per_min(thickness_nm, T_C, ambient, orientation="100", pressure_atm=None,
                           thin_oxide=False):
    """Instantaneous growth rate dx/dt at a given thickness.

    Parameters
    ----------
    thickness_nm : array_like
        Current oxide thickness in nm.
    T_C : array_like
        Temperature in degrees Celsius.
    ambient : str
        ``"O2"`` or ``"H2O"``.
    orientation : str
        ``"100"`` or ``"111"``.
    pressure_atm : array_like or None
        Oxidant partial pressure in atm (``None``: reference pressure of the data).
    thin_oxide : bool
        Add the Massoud term C exp(-x/L) (dry O2 only; ignored for H2O).

    Returns
    -------
    numpy.ndarray or float
        dx/dt in nm/min, B / (A + 2x) [+ C exp(-x/L)].

    References
    ----------
    .. [1] B. E. Deal and A. S. Grove, J. Appl. Phys. 36, 3770-3778 (1965), Eq. (10).
    .. [2] H. Z. Massoud, J. D. Plummer and E. A. Irene, J. Electrochem. Soc. 132, 2685 (1985).
    """
    x = np.asarray(thickness_nm, dtype=float) / _NM_PER_UM
    rc = rate_constants(T_C, ambient, orientation, pressure_atm)
    rate = rc.B_um2_per_h / (rc.A_um + 2.0 * x)
    if thin_oxide and check_ambient(ambient) in load_constants()["massoud"]["ambients"]:
        L = massoud_decay_length_nm() / _NM_PER_UM
        rate = rate + massoud_C(T_C, pressure_atm) * np.exp(-x / L)
    return _scalar(rate * _NM_PER_UM / _MIN_PER_H)
