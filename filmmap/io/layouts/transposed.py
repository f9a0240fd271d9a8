"""Transposed wide CSV: one row per wavelength, one column per site; one wafer per file.

Header: ``wavelength_nm`` then one column per site, named by the site number
(reflectance; ``R:<site>`` is accepted too) or ``psi:<site>`` and ``delta:<site>``
(ellipsometry). The wafer (and optionally the slot) comes from the file name by
file_pattern, x_mm and y_mm from site_map, the slot from slot_map when the name has
none. An error on a value names its line (the wavelength's row) and column.
"""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np

from filmmap.errors import FilmmapInputError
from filmmap.io.layouts.common import build_table, fields_from_name, number, read_data_lines
from filmmap.io.techniques import QUANTITIES

NAME = "transposed"
TECHNIQUES = ("reflectance", "ellipsometry")
WAFER_PER_FILE = True
EXAMPLE = """\
wavelength_nm,1,2,3
400,0.2512,0.2498,0.2505
410,0.2633,0.2620,0.2627
420,0.2741,0.2736,0.2738
430,0.2840,0.2835,0.2838
"""

_COLUMN = re.compile(r"(?:(R|psi|delta):)?(\d+)\Z")


def read(path, technique, unit, maps):
    """One transposed CSV file (one wafer) as a `SpectraTable`."""
    path = Path(path)
    lines, sha = read_data_lines(path)
    if len(lines) < 2:
        raise FilmmapInputError("expected a header and one row per wavelength", file=path)
    hline, header = lines[0]
    cols = [c.strip() for c in header.split(",")]
    if cols[0] != "wavelength_nm":
        raise FilmmapInputError(f"first column {cols[0]!r}; expected 'wavelength_nm' (a "
                                "transposed layout: one row per wavelength)", file=path,
                                line=hline, field=cols[0])
    quantities = QUANTITIES[technique]
    where = {q: {} for q in quantities}   # quantity -> site -> column index
    for j, c in enumerate(cols[1:], start=1):
        m = _COLUMN.match(c)
        q = (m.group(1) or "R") if m else None
        if m is None or q not in quantities:
            want = "<site>" if quantities == ("R",) else "psi:<site> and delta:<site>"
            raise FilmmapInputError(f"column {c!r}; expected {want} (site numbers)", file=path,
                                    line=hline, field=c)
        site = int(m.group(2))
        if site in where[q]:
            raise FilmmapInputError(f"site {site} has two {q} columns", file=path, line=hline,
                                    field=c)
        where[q][site] = j
    sites = sorted(where[quantities[0]])
    for q in quantities[1:]:
        if sorted(where[q]) != sites:
            raise FilmmapInputError(f"the {q} columns name other sites than the "
                                    f"{quantities[0]} columns; expected both for every site",
                                    file=path, line=hline)
    wl, values = [], []
    for n, row in lines[1:]:
        cells = [c.strip() for c in row.split(",")]
        if len(cells) != len(cols):
            raise FilmmapInputError(f"{len(cells)} cells; expected {len(cols)} as in the header",
                                    file=path, line=n)
        wl.append(number(cells[0], path, n, "wavelength_nm"))
        values.append([number(c, path, n, cols[j]) if j else 0.0 for j, c in enumerate(cells)])
    values = np.array(values)
    data = {q: np.array([values[:, where[q][s]] for s in sites]) for q in quantities}
    named = fields_from_name(path, maps, ("wafer",))
    # a site's spectrum is a column: its "line" is the header, where the site is named
    return build_table(path, sha, technique, unit, maps, wafer=[named["wafer"]] * len(sites),
                       site=sites, wavelength=np.array(wl), data=data,
                       line=[hline] * len(sites),
                       slot=[named["slot"]] * len(sites) if "slot" in named else None,
                       wl_lines=[n for n, _ in lines[1:]])
