"""Materials by name, so a lot file can say ``material = "SiO2"``."""

from __future__ import annotations

import tomllib
from functools import lru_cache
from importlib import resources
from pathlib import Path

from filmmap.errors import FilmmapInputError
from filmmap.materials.base import Material
from filmmap.materials.cauchy import Cauchy
from filmmap.materials.sellmeier import Sellmeier
from filmmap.materials.tabulated import Tabulated


def reference_file(name):
    """Path of a file in ``reference/`` whether filmmap is installed or run from a checkout."""
    try:
        candidate = resources.files("filmmap.reference").joinpath(name)
        if candidate.is_file():
            return Path(str(candidate))
    except ModuleNotFoundError:
        pass
    path = Path(__file__).resolve().parents[2] / "reference" / name
    if not path.is_file():
        raise FileNotFoundError(f"reference data file {name!r} not found")
    return path


def _sio2(extrapolate=False):
    data = tomllib.loads(reference_file("sio2_malitson1965.toml").read_text(encoding="utf-8"))
    return Sellmeier("SiO2", data["B"], data["C_um"], data["range_nm"], data["source"], extrapolate)


def _si(extrapolate=False):
    table = Tabulated.from_csv(reference_file("si_green2008.csv"), name="Si", extrapolate=extrapolate)
    table.source = "M. A. Green, Sol. Energy Mater. Sol. Cells 92, 1305 (2008)"
    return table


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
