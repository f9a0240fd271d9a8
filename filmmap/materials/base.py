"""What every optical material model shares: a name, a source, a validity range.

A material is a callable ``material(wavelength_nm) -> N`` returning the complex
refractive index ``N = n - ik`` (``k >= 0`` absorbs), the sign convention of
Azzam & Bashara (1977).
"""

from __future__ import annotations

import numpy as np

from filmmap.errors import MaterialRangeError


class Material:
    """Base class: validity range check around a model of N(lambda).

    Parameters
    ----------
    name : str
        Registry name, e.g. ``"SiO2"``.
    range_nm : (float, float)
        Wavelength range in nm where the model is valid.
    source : str
        Citation of the published data or formula.
    extrapolate : bool
        Allow evaluation outside ``range_nm`` (explicit opt-in).
    """

    def __init__(self, name, range_nm, source="", extrapolate=False):
        self.name = str(name)
        lo, hi = (float(v) for v in range_nm)
        if not lo < hi:
            raise ValueError(f"material {name!r}: range_nm must be increasing, got {range_nm}")
        self.range_nm = (lo, hi)
        self.source = source
        self.extrapolate = bool(extrapolate)

    def check_range(self, wavelength_nm):
        """Raise `MaterialRangeError` when a wavelength is outside the validity range."""
        wl = np.asarray(wavelength_nm, dtype=float)
        if self.extrapolate or wl.size == 0:
            return wl
        lo, hi = self.range_nm
        # a relative slack of 1e-9 lets exact end points through despite float rounding
        bad = (wl < lo * (1 - 1e-9)) | (wl > hi * (1 + 1e-9)) | ~np.isfinite(wl)
        if np.any(bad):
            first = wl[bad].ravel()[0]
            raise MaterialRangeError(
                f"material '{self.name}' is valid for {lo:g}-{hi:g} nm, "
                f"asked for {first:g} nm ({int(bad.sum())} wavelength(s) outside); "
                "use another material model or opt in to extrapolation",
                field="wavelength",
            )
        return wl

    def __call__(self, wavelength_nm):
        wl = self.check_range(wavelength_nm)
        return self._index(wl)

    def _index(self, wavelength_nm):  # pragma: no cover - abstract
        raise TypeError(f"{type(self).__name__} must implement _index")

    def describe(self):
        """One-line text: name, model, range and source (for provenance)."""
        lo, hi = self.range_nm
        return f"{self.name}: {type(self).__name__}, {lo:g}-{hi:g} nm; {self.source}"

    def __repr__(self):
        return f"<{type(self).__name__} {self.name} {self.range_nm[0]:g}-{self.range_nm[1]:g} nm>"
