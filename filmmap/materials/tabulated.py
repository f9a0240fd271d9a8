"""Tabulated n, k data with shape-preserving interpolation (the table comes as arrays; a
user's CSV table is read by `filmmap.io.nktable.read_nk_table`)."""

from __future__ import annotations

import numpy as np
from scipy.interpolate import PchipInterpolator

from filmmap.materials.base import Material


class Tabulated(Material):
    """Material defined by a table of n and k against wavelength.

    n and k are interpolated separately with a piecewise-cubic Hermite
    (PCHIP) interpolant: smooth (C1), and shape preserving, so it never
    overshoots between nodes and k built from non-negative nodes stays
    non-negative.

    Parameters
    ----------
    name : str
        Registry name.
    wavelength_nm : array_like
        Strictly increasing node wavelengths in nm.
    n, k : array_like
        Refractive index and extinction coefficient at the nodes (N = n - ik, k >= 0).
    source : str
        Citation of the data.
    extrapolate : bool
        Allow evaluation outside the table (linear continuation by PCHIP).

    References
    ----------
    .. [1] F. N. Fritsch and R. E. Carlson, "Monotone piecewise cubic
       interpolation", SIAM J. Numer. Anal. 17, 238-246 (1980).
    """

    def __init__(self, name, wavelength_nm, n, k, source="", extrapolate=False):
        wl = np.asarray(wavelength_nm, dtype=float)
        n = np.asarray(n, dtype=float)
        k = np.asarray(k, dtype=float)
        if wl.ndim != 1 or wl.size < 2 or n.shape != wl.shape or k.shape != wl.shape:
            raise ValueError(f"material {name!r}: need >= 2 nodes with matching wavelength, n, k")
        if np.any(np.diff(wl) <= 0):
            raise ValueError(f"material {name!r}: table wavelengths must be strictly increasing")
        if np.any(k < 0):
            raise ValueError(f"material {name!r}: k must be >= 0 (N = n - ik convention)")
        super().__init__(name, (wl[0], wl[-1]), source, extrapolate)
        self.wavelength_nm, self.n, self.k = wl, n, k
        self._n = PchipInterpolator(wl, n, extrapolate=True)
        self._k = PchipInterpolator(wl, k, extrapolate=True)

    def _index(self, wavelength_nm):
        wl = np.asarray(wavelength_nm, dtype=float)
        n = self._n(wl)
        k = self._k(wl)
        if self.extrapolate:
            # outside the table: straight lines with the end slopes, not the end cubics
            lo, hi = self.wavelength_nm[0], self.wavelength_nm[-1]
            for edge, side in ((lo, wl < lo), (hi, wl > hi)):
                if np.any(side):
                    dw = wl[side] - edge
                    n[side] = self._n(edge) + self._n.derivative()(edge) * dw
                    k[side] = self._k(edge) + self._k.derivative()(edge) * dw
        return n - 1j * np.clip(k, 0.0, None)
