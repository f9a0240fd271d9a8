"""Optical materials: callables wavelength (nm) -> complex index N = n - ik."""

from filmmap.materials.base import Material
from filmmap.materials.cauchy import Cauchy, cauchy_index
from filmmap.materials.registry import available, get_material, reference_file, register
from filmmap.materials.scaled import ScaledIndex
from filmmap.materials.sellmeier import Sellmeier, sellmeier_index
from filmmap.materials.tabulated import Tabulated

__all__ = ["Material", "Sellmeier", "Cauchy", "Tabulated", "ScaledIndex", "get_material", "register",
           "available", "reference_file", "sellmeier_index", "cauchy_index"]
