"""Cauchy dispersion with optional Urbach absorption tail, for deposited films."""

from __future__ import annotations

import numpy as np

from filmmap.materials.base import Material


def cauchy_index(wavelength_nm, A, B_um2=0.0, C_um4=0.0, k_amplitude=0.0,
                 urbach_exponent=0.0, band_edge_nm=400.0):
    """Complex index N = n - ik of a Cauchy film with an Urbach tail.

    Parameters
    ----------
    wavelength_nm : array_like
        Vacuum wavelength in nm.
    A : float
        Constant term (dimensionless).
    B_um2 : float
        Coefficient of lambda^-2, lambda in micrometres (um^2).
    C_um4 : float
        Coefficient of lambda^-4 (um^4).
    k_amplitude : float
        Extinction coefficient at ``band_edge_nm`` (dimensionless); 0 = lossless.
    urbach_exponent : float
        Dimensionless steepness of the tail; k = k_amplitude *
        exp(urbach_exponent * (1240/lambda - 1240/band_edge_nm)) with photon energies in eV.
    band_edge_nm : float
        Wavelength in nm at which k equals ``k_amplitude``.

    Returns
    -------
    numpy.ndarray of complex

    References
    ----------
    .. [1] A.-L. Cauchy, Mémoire sur la dispersion de la lumière (1836).
    .. [2] F. Urbach, Phys. Rev. 92, 1324 (1953).
    .. [3] H. G. Tompkins, A User's Guide to Ellipsometry (1993), Cauchy and
       Urbach forms as used in ellipsometry practice.
    """
    lam_um = np.asarray(wavelength_nm, dtype=float) * 1e-3
    n = A + B_um2 / lam_um**2 + C_um4 / lam_um**4
    if k_amplitude:
        energy_ev = 1239.84198 / (lam_um * 1e3)
        k = k_amplitude * np.exp(urbach_exponent * (energy_ev - 1239.84198 / band_edge_nm))
    else:
        k = np.zeros_like(n)
    return n - 1j * k


class Cauchy(Material):
    """A film described by the Cauchy formula (plus an optional Urbach tail).

    Parameters
    ----------
    name : str
        Registry name.
    A, B_um2, C_um4 : float
        Cauchy coefficients (dimensionless, um^2, um^4).
    k_amplitude, urbach_exponent, band_edge_nm : float
        Urbach tail, see `cauchy_index`.
    range_nm : (float, float)
        Validity range in nm.
    source : str
        Where the coefficients come from.

    References
    ----------
    .. [1] H. G. Tompkins, A User's Guide to Ellipsometry (1993).
    """

    def __init__(self, name, A, B_um2=0.0, C_um4=0.0, k_amplitude=0.0, urbach_exponent=0.0,
                 band_edge_nm=400.0, range_nm=(200.0, 2000.0), source="", extrapolate=False):
        super().__init__(name, range_nm, source, extrapolate)
        self.A, self.B_um2, self.C_um4 = float(A), float(B_um2), float(C_um4)
        self.k_amplitude = float(k_amplitude)
        self.urbach_exponent = float(urbach_exponent)
        self.band_edge_nm = float(band_edge_nm)
        if self.k_amplitude < 0:
            raise ValueError(f"material {name!r}: k_amplitude must be >= 0 (N = n - ik)")

    def with_coefficients(self, A=None, B_um2=None):
        """A copy with new A and/or B (the fitter varies them)."""
        return Cauchy(self.name, self.A if A is None else A, self.B_um2 if B_um2 is None else B_um2,
                      self.C_um4, self.k_amplitude, self.urbach_exponent, self.band_edge_nm,
                      self.range_nm, self.source, self.extrapolate)

    def _index(self, wavelength_nm):
        return cauchy_index(wavelength_nm, self.A, self.B_um2, self.C_um4, self.k_amplitude,
                            self.urbach_exponent, self.band_edge_nm)
