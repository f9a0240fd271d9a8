"""Materials by name, so a lot file can say ``material = "SiO2"``.

The built-in materials take their published constants from `filmmap.reference_data` (the
shipped reference files); this module reads no file. A user material's n,k table is read
by `filmmap.io.nktable.read_nk_table`.
"""

from __future__ import annotations

from functools import lru_cache

from filmmap.errors import FilmmapInputError
from filmmap.materials.base import Material
from filmmap.materials.cauchy import Cauchy
from filmmap.materials.sellmeier import Sellmeier
from filmmap.materials.tabulated import Tabulated
from filmmap.reference_data import reference_table, reference_toml


def _sio2(extrapolate=False):
    data = reference_toml("sio2_malitson1965.toml")
    return Sellmeier("SiO2", data["B"], data["C_um"], data["range_nm"], data["source"], extrapolate)


def _si(extrapolate=False):
    columns, _comments = reference_table("si_green2008.csv")
    return Tabulated("Si", columns["wavelength_nm"], columns["n"], columns["k"],
                     source="M. A. Green, Sol. Energy Mater. Sol. Cells 92, 1305 (2008)",
                     extrapolate=extrapolate)


def _air(extrapolate=True):
    # n = 1 exactly: ambient air differs by ~3e-4, below what these measurements resolve
    return Cauchy("air", 1.0, range_nm=(100.0, 100000.0), source="vacuum, n = 1", extrapolate=True)


def _nitride(extrapolate=False):
    # A typical LPCVD Si3N4 Cauchy set for examples and tests (from memory, not a published fit)
    return Cauchy("Si3N4", 1.98, 0.018, 0.0, range_nm=(250.0, 1700.0),
                  source="typical LPCVD nitride Cauchy coefficients (from memory)", extrapolate=extrapolate)


_BUILTIN = {"SiO2": _sio2, "Si": _si, "air": _air, "Si3N4": _nitride}
_USER: dict[str, Material] = {}


@lru_cache(maxsize=None)
def _builtin(name, extrapolate):
    return _BUILTIN[name](extrapolate)


def register(material):
    """Add a user material (a `Material` instance) to the registry under its name."""
    if not isinstance(material, Material):
        raise TypeError("register() takes a filmmap Material")
    _USER[material.name] = material
    return material


def available():
    """Names the registry knows."""
    return sorted(set(_BUILTIN) | set(_USER))


def get_material(spec, extrapolate=False):
    """Resolve a material name (or pass a `Material` through).

    Parameters
    ----------
    spec : str or Material
        A registry name such as ``"SiO2"``, ``"Si"``, or a Material.
    extrapolate : bool
        Explicit opt-in to evaluate outside the validity range.
    """
    if isinstance(spec, Material):
        return spec
    if spec in _USER:
        return _USER[spec]
    if spec in _BUILTIN:
        return _builtin(spec, bool(extrapolate))
    raise FilmmapInputError(f"unknown material {spec!r}; known: {', '.join(available())}",
                            field="material")
