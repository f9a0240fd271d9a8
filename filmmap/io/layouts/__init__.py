"""Input layouts behind one reader entry: `read_spectra` and the registry `LAYOUTS`.

One module per layout, each with ``NAME``, ``EXAMPLE`` (a short file, shown in
docs/formats.md) and ``read(path, technique, unit, maps) -> SpectraTable``:

============  ================================================================
layout        file
============  ================================================================
wide          filmmap's own CSV, one row per site (the default, pinned)
long          one row per site and wavelength
transposed    one row per wavelength, one column per site; one wafer per file
site-files    one two-column file per site (wafer and site from the name)
jcamp         JCAMP-DX, one spectrum per file (optional ``jcamp`` package)
============  ================================================================

The lot file picks one with ``layout`` in ``[measurement]`` and supplies what the
files lack: ``site_map``, ``slot_map``, ``file_pattern`` (`filmmap.io.layouts.maps`).
"""

from __future__ import annotations

from filmmap.errors import FilmmapInputError
from filmmap.io.layouts import jcamp, long, sitefile, transposed, wide
from filmmap.io.layouts.common import Maps

#: Layout name -> module.
LAYOUTS = {m.NAME: m for m in (wide, long, transposed, sitefile, jcamp)}

#: Layouts whose files each hold part of a wafer (a wafer spans several files).
PARTIAL_WAFER_LAYOUTS = ("site-files", "jcamp")

__all__ = ["LAYOUTS", "Maps", "PARTIAL_WAFER_LAYOUTS", "read_spectra"]


def read_spectra(path, technique, reflectance_unit="fraction", layout="wide", maps=None):
    """Read one spectra file of any layout.

    Parameters
    ----------
    path : path-like
        The file; opened read-only, never modified.
    technique : {"reflectance", "ellipsometry", "intensity"}
    reflectance_unit : {"fraction", "percent"}
        Unit of the reflectance values in the file (JCAMP-DX files declare their own).
    layout : str
        A key of `LAYOUTS`.
    maps : Maps, optional
        Site map, slot map and file-name pattern of the lot.

    Returns
    -------
    filmmap.io.spectra_csv.SpectraTable

    Raises
    ------
    FilmmapInputError
        Naming the file, line and field, and what was expected.
    """
    if layout not in LAYOUTS:
        raise FilmmapInputError(f"unknown layout {layout!r}; expected one of "
                                f"{', '.join(LAYOUTS)}", file=path, field="measurement.layout")
    if technique == "intensity" and layout != "wide":
        raise FilmmapInputError("raw intensities (reference_file) are read from the wide layout "
                                "only", file=path, field="measurement.layout")
    return LAYOUTS[layout].read(path, technique, reflectance_unit, maps or Maps())
