"""Sellmeier dispersion formula for transparent dielectrics."""

from __future__ import annotations

import numpy as np

from filmmap.materials.base import Material


def sellmeier_index(wavelength_nm, B, C_um):
    """Refractive index from the Sellmeier formula.

    Parameters
    ----------
    wavelength_nm : array_like
        Vacuum wavelength in nm.
    B : sequence of float
        Dimensionless oscillator strengths.
    C_um : sequence of float
        Resonance wavelengths in micrometres.

    Returns
    -------
    numpy.ndarray of float
        n (real; the formula describes a lossless medium).

    Notes
    -----
    n^2 - 1 = sum_i B_i lambda^2 / (lambda^2 - C_i^2) with lambda in micrometres.

    References
    ----------
    .. [1] W. Sellmeier, Ann. Phys. Chem. 219, 272 (1871).
    .. [2] I. H. Malitson, J. Opt. Soc. Am. 55, 1205-1209 (1965).
    """
    lam2 = (np.asarray(wavelength_nm, dtype=float) * 1e-3) ** 2
    n2 = np.ones_like(lam2)
    for b, c in zip(B, C_um):
        n2 = n2 + b * lam2 / (lam2 - c * c)
    return np.sqrt(n2)


class Sellmeier(Material):
    """A lossless material described by any number of Sellmeier terms.

    Parameters
    ----------
    name : str
        Registry name.
    B : sequence of float
        Oscillator strengths (dimensionless).
    C_um : sequence of float
        Resonance wavelengths in micrometres (same length as ``B``).
    range_nm : (float, float)
        Validity range in nm.
    source : str
        Citation.
    extrapolate : bool
        Allow evaluation outside ``range_nm``.

    References
    ----------
    .. [1] I. H. Malitson, "Interspecimen comparison of the refractive index of
       fused silica", J. Opt. Soc. Am. 55, 1205-1209 (1965).
    """

    def __init__(self, name, B, C_um, range_nm, source="", extrapolate=False):
        super().__init__(name, range_nm, source, extrapolate)
        self.B = tuple(float(b) for b in B)
        self.C_um = tuple(float(c) for c in C_um)
        if len(self.B) != len(self.C_um) or not self.B:
            raise ValueError(f"material {name!r}: B and C_um need the same non-zero length")

    def _index(self, wavelength_nm):
        return sellmeier_index(wavelength_nm, self.B, self.C_um).astype(complex)
