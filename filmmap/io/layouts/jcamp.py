"""JCAMP-DX spectra, one site per file, through the optional ``jcamp`` package.

JCAMP-DX is the IUPAC open standard for spectra (McDonald & Wilks, Appl. Spectrosc.
42 (1988) 151; IUPAC recommendations, Lampen et al. 1994 and later). A file holds one
spectrum: ``##XUNITS=`` NANOMETERS or MICROMETERS (declared micrometres are converted,
not a mistake), ``##YUNITS=`` REFLECTANCE (a fraction) or a percent unit (``%``,
PERCENT), the data as ``##XYPOINTS=(XY..XY)`` or ``##XYDATA=(X++(Y..Y))``. Reflectance
only. The wafer and site come from the file name by file_pattern, x_mm and y_mm from
site_map, the slot from the name or slot_map.

Needs ``pip install 'filmmap[jcamp]'``.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from filmmap.errors import FilmmapInputError
from filmmap.io.layouts.common import build_table, fields_from_name
from filmmap.io.textfile import read_text_file

NAME = "jcamp"
TECHNIQUES = ("reflectance",)
WAFER_PER_FILE = False
EXAMPLE = """\
##TITLE= W2-04 site 3
##JCAMP-DX= 4.24
##XUNITS= NANOMETERS
##YUNITS= REFLECTANCE
##XYPOINTS= (XY..XY)
400, 0.2512
410, 0.2633
##END=
"""


def read(path, technique, unit, maps):
    """One JCAMP-DX file as a one-row `SpectraTable`."""
    path = Path(path)
    try:
        import jcamp
    except ImportError:
        raise FilmmapInputError("layout 'jcamp' needs the optional package: pip install "
                                "'filmmap[jcamp]'", file=path, field="measurement.layout") from None
    sha = read_text_file(path).sha256
    try:
        d = jcamp.readfile(str(path))
    except Exception as exc:  # noqa: BLE001 - the package raises many kinds on bad files
        raise FilmmapInputError(f"not a readable JCAMP-DX file ({type(exc).__name__}: {exc})",
                                file=path) from None
    if "x" not in d or "y" not in d or len(d["x"]) == 0:
        raise FilmmapInputError("no spectrum found; expected ##XYPOINTS= or ##XYDATA= data",
                                file=path)
    xunits = str(d.get("xunits", "")).strip().upper()
    yunits = str(d.get("yunits", "")).strip().upper()
    x = np.asarray(d["x"], dtype=float)
    if xunits in ("MICROMETERS", "MICRONS", "UM"):
        x = x * 1000.0
    elif xunits not in ("NANOMETERS", "NM"):
        raise FilmmapInputError(f"##XUNITS= {xunits or '(none)'}; expected NANOMETERS or "
                                "MICROMETERS", file=path, field="XUNITS")
    if "%" in yunits or "PERCENT" in yunits:
        y_unit = "percent"
    elif yunits == "REFLECTANCE":
        y_unit = "fraction"
    else:
        raise FilmmapInputError(f"##YUNITS= {yunits or '(none)'}; expected REFLECTANCE "
                                "(a fraction) or a percent unit", file=path, field="YUNITS")
    named = fields_from_name(path, maps, ("wafer", "site"))
    return build_table(path, sha, "reflectance", y_unit, maps, wafer=[named["wafer"]],
                       site=[named["site"]], wavelength=x,
                       data={"R": np.asarray(d["y"], dtype=float)[None, :]}, line=[1],
                       slot=[named["slot"]] if "slot" in named else None)
