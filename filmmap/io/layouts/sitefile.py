"""One file per site: two columns, wavelength and reflectance (three for psi and delta).

Columns separated by a comma, a tab or blanks; an optional header line of names
(``wavelength_nm,R``) is skipped, ``#`` lines are comments. The wafer and the site
(and optionally the slot) come from the file name by file_pattern, e.g.
``{wafer}_site{site}.txt``; x_mm and y_mm from site_map; the slot from slot_map
when the name has none.
"""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np

from filmmap.errors import FilmmapInputError
from filmmap.io.layouts.common import build_table, fields_from_name, number, read_data_lines
from filmmap.io.techniques import QUANTITIES

NAME = "site-files"
TECHNIQUES = ("reflectance", "ellipsometry")
WAFER_PER_FILE = False
EXAMPLE = """\
# W2-04_site3.txt
wavelength_nm,R
400,0.2512
410,0.2633
420,0.2741
"""

_SPLIT = re.compile(r"\s*[,\t]\s*|\s+")


def read(path, technique, unit, maps):
    """One site's file as a one-row `SpectraTable`."""
    path = Path(path)
    lines, sha = read_data_lines(path)
    quantities = QUANTITIES[technique]
    ncol = 1 + len(quantities)
    if lines and not re.match(r"[+-]?[\d.]", lines[0][1]):
        lines = lines[1:]          # a header of names
    if not lines:
        raise FilmmapInputError("no data lines; expected one line per wavelength: "
                                f"wavelength_nm and {', '.join(quantities)}", file=path)
    wl, vals = [], []
    for n, row in lines:
        cells = _SPLIT.split(row)
        if len(cells) != ncol:
            raise FilmmapInputError(f"{len(cells)} columns; expected {ncol}: wavelength_nm and "
                                    f"{', '.join(quantities)}", file=path, line=n)
        wl.append(number(cells[0], path, n, "wavelength_nm"))
        vals.append([number(c, path, n, q) for c, q in zip(cells[1:], quantities)])
    vals = np.array(vals)
    named = fields_from_name(path, maps, ("wafer", "site"))
    return build_table(path, sha, technique, unit, maps, wafer=[named["wafer"]],
                       site=[named["site"]], wavelength=np.array(wl),
                       data={q: vals[None, :, k] for k, q in enumerate(quantities)},
                       line=[lines[0][0]], slot=[named["slot"]] if "slot" in named else None,
                       wl_lines=[n for n, _ in lines])
