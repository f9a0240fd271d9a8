"""A material whose index is another model's times a constant factor.

A thermal oxide is slightly denser than fused silica, so its index sits a few
parts per thousand above the Sellmeier curve of fused silica (Malitson 1965);
thick-film fringes measure the optical thickness n d, so an index off by 0.3 %
moves a 1 um film by about 3 nm. A factor on the whole dispersion curve keeps
its shape (the dispersion of a dense oxide follows that of silica closely, from
memory, no source checked) while its level is stated or fitted.
"""

from __future__ import annotations

from filmmap.materials.base import Material


class ScaledIndex(Material):
    """N(lambda) = factor * N_base(lambda).

    Parameters
    ----------
    base : Material
        The dispersion model.
    factor : float
        Dimensionless factor on the complex index (1 = the model as it is).
    """

    def __init__(self, base, factor):
        super().__init__(base.name, base.range_nm,
                         source=f"{base.source}; index x {factor:g} (lot file index_scale)",
                         extrapolate=base.extrapolate)
        self.base = base
        self.factor = float(factor)

    def _index(self, wavelength_nm):
        return self.factor * self.base._index(wavelength_nm)
