"""Input layouts behind one reader entry: `read_spectra` and the registry `LAYOUTS`.

A layout is how a file arranges a technique's quantities (`filmmap.io.techniques`): one
module per layout, each with

``NAME``
    The name the lot file gives in ``[measurement] layout``.
``TECHNIQUES``
    The techniques it reads (a subset of `filmmap.io.techniques.TECHNIQUES`).
``WAFER_PER_FILE``
    True when each wafer lies whole in one file; False when a wafer spans files (one
    file per site), which the lot-level checks then allow.
``EXAMPLE``
    A short file, shown in docs/formats.md (a test checks it is there).
``read(path, technique, unit, maps) -> SpectraTable``
    The parser; `read_spectra` calls it after checking the layout and technique.

============  ================================================================
layout        file
============  ================================================================
wide          filmmap's own CSV, one row per site (the default, pinned)
long          one row per site and wavelength
transposed    one row per wavelength, one column per site; one wafer per file
site-files    one two-column file per site (wafer and site from the name)
jcamp         JCAMP-DX, one spectrum per file (optional ``jcamp`` package)
============  ================================================================

A new layout is one module here, its line in `LAYOUTS`, its tests and its section of
docs/formats.md ("Adding a layout" there walks through ``long``). Nothing else names
layouts: the lot-file reader, ``reduce`` and ``check`` ask this registry.

The lot file picks one with ``layout`` in ``[measurement]`` and supplies what the
files lack: ``site_map``, ``slot_map``, ``file_pattern`` (`filmmap.io.layouts.maps`).
"""

from __future__ import annotations

from filmmap.errors import FilmmapInputError
from filmmap.io.layouts import jcamp, long, sitefile, transposed, wide
from filmmap.io.layouts.common import Maps
from filmmap.io.techniques import check_arguments

#: Layout name -> module: the registration of every layout.
LAYOUTS = {m.NAME: m for m in (wide, long, transposed, sitefile, jcamp)}

#: The layout of a lot file that names none: filmmap's own CSV (pinned).
DEFAULT_LAYOUT = wide.NAME

#: Layouts whose files each hold part of a wafer (a wafer spans several files).
PARTIAL_WAFER_LAYOUTS = tuple(name for name, m in LAYOUTS.items() if not m.WAFER_PER_FILE)

__all__ = ["DEFAULT_LAYOUT", "LAYOUTS", "Maps", "PARTIAL_WAFER_LAYOUTS", "layout_problem",
           "read_spectra"]


def layout_problem(layout, technique):
    """Why ``layout`` cannot hold ``technique`` spectra, or None when it can.

    Parameters
    ----------
    layout : str
        A key of `LAYOUTS`.
    technique : str
        A technique of `filmmap.io.techniques.TECHNIQUES`.

    Returns
    -------
    str or None
        The reason, worded for the lot file's ``layout`` key.
    """
    if technique in LAYOUTS[layout].TECHNIQUES:
        return None
    if technique == "intensity":
        able = " and ".join(n for n, m in LAYOUTS.items() if "intensity" in m.TECHNIQUES)
        return f"raw intensities (reference_file) are read from the {able} layout only"
    return f"layout {layout!r} holds {' and '.join(LAYOUTS[layout].TECHNIQUES)} spectra only"


def read_spectra(path, technique, reflectance_unit="fraction", layout="wide", maps=None):
    """Read one spectra file of any layout: the one entry of every spectra reader.

    Parameters
    ----------
    path : path-like
        The file; opened read-only, never modified.
    technique : {"reflectance", "ellipsometry", "intensity"}
        What the file measures (`filmmap.io.techniques`).
    reflectance_unit : {"fraction", "percent"}
        Unit of the reflectance values in the file (JCAMP-DX files declare their own).
    layout : str
        A key of `LAYOUTS` (default ``"wide"``, filmmap's own CSV).
    maps : Maps, optional
        Site map, slot map and file-name pattern of the lot.

    Returns
    -------
    filmmap.io.spectra.SpectraTable

    Raises
    ------
    FilmmapInputError
        Naming the file, line and field, and what was expected; an unknown layout or
        one that cannot hold the technique (``field='measurement.layout'``).
    ValueError
        An unknown ``technique`` or ``reflectance_unit`` (a programming error).
    """
    check_arguments(technique, reflectance_unit)
    if layout not in LAYOUTS:
        raise FilmmapInputError(f"unknown layout {layout!r}; expected one of "
                                f"{', '.join(LAYOUTS)}", file=path, field="measurement.layout")
    problem = layout_problem(layout, technique)
    if problem:
        raise FilmmapInputError(problem, file=path, field="measurement.layout")
    return LAYOUTS[layout].read(path, technique, reflectance_unit, maps or Maps())
