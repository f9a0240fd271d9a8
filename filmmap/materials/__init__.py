"""Optical materials: callables wavelength (nm) -> complex index N = n - ik.

Pure models: no file is read here (user n,k tables: `filmmap.io.read_nk_table`; the
shipped constants: `filmmap.reference_data`).
"""

from filmmap.materials.base import Material
from filmmap.materials.cauchy import Cauchy, cauchy_index
from filmmap.materials.registry import available, get_material, register
from filmmap.materials.scaled import ScaledIndex
from filmmap.materials.sellmeier import Sellmeier, sellmeier_index
from filmmap.materials.tabulated import Tabulated

__all__ = ["Material", "Sellmeier", "Cauchy", "Tabulated", "ScaledIndex", "get_material", "register",
           "available", "sellmeier_index", "cauchy_index"]
