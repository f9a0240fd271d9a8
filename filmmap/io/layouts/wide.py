"""The wide CSV (filmmap's own, pinned): one row per site, ``wafer, slot, site, x_mm, y_mm, R@..``.

Format: `filmmap.io.spectra_csv`. A file with every one of those columns is read by
that (strict, fast) parser; this module adds the micrometre check, which the wide
reader alone turns into a less helpful material-range error later.

With maps, rows need only what the instrument writes: ``site`` and the spectral
columns, plus ``wafer`` (else ``{wafer}`` of file_pattern); ``slot`` comes from
file_pattern or slot_map when absent, ``x_mm``, ``y_mm`` from site_map.
"""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np

from filmmap.errors import FilmmapInputError
from filmmap.io.layouts.common import (build_table, check_wavelengths, fields_from_name,
                                       integer, number, read_data_lines)
from filmmap.io.spectra_csv import REQUIRED_COLUMNS, read_spectra_csv
from filmmap.io.techniques import QUANTITIES

NAME = "wide"
TECHNIQUES = ("reflectance", "ellipsometry", "intensity")
WAFER_PER_FILE = True
EXAMPLE = """\
wafer,slot,site,x_mm,y_mm,R@400,R@410,R@420
W2-04,4,1,0.000,0.000,0.2512,0.2633,0.2741
W2-04,4,2,36.000,0.000,0.2498,0.2620,0.2736
W2-05,5,1,0.000,0.000,0.2509,0.2630,0.2740
W2-05,5,2,36.000,0.000,0.2501,0.2624,0.2737
"""

_SPECTRAL = re.compile(r"(R|psi|delta|I)@(.+)\Z")


def read(path, technique, unit, maps):
    """One wide CSV file as a `SpectraTable` (all columns, or fewer completed by the maps)."""
    path = Path(path)
    no_maps = maps.site_xy is None and maps.slot_of is None and maps.pattern is None
    header = None if no_maps else _peek_header(path)
    if header is None or all(c in header for c in REQUIRED_COLUMNS) or technique == "intensity":
        # the pinned reader, which also says what is wrong with a file it cannot read
        table = read_spectra_csv(path, technique, unit)
        check_wavelengths(table.wavelength_nm, table.path, max(1, int(table.line[0]) - 1))
        return table
    lines, sha = read_data_lines(path)
    return _read_mapped(path, sha, technique, unit, maps, lines,
                        [c.strip() for c in lines[0][1].split(",")])


def _peek_header(path, limit=1 << 16):
    """The header's column names from the file's first bytes, or None (the full reader
    then reports what is wrong); reading only the head keeps large lots read once."""
    try:
        with open(path, "rb") as fh:
            head = fh.read(limit).decode("utf-8-sig", errors="replace")
    except OSError:
        return None
    for line in head.replace("\r", "\n").split("\n"):
        if line.strip() and not line.strip().startswith("#"):
            return [c.strip() for c in line.split(",")]
    return None


def _read_mapped(path, sha, technique, unit, maps, lines, header):
    hline = lines[0][0]
    quantities = QUANTITIES[technique]
    fixed, spectral = {}, {q: {} for q in quantities}
    for j, c in enumerate(header):
        m = _SPECTRAL.match(c)
        if c in ("wafer", "slot", "site", "x_mm", "y_mm"):
            fixed[c] = j
        elif m and m.group(1) in quantities:
            wl = number(m.group(2), path, hline, c)
            if wl in spectral[m.group(1)]:
                raise FilmmapInputError(f"two {m.group(1)} columns at {wl:g} nm", file=path,
                                        line=hline, field=c)
            spectral[m.group(1)][wl] = j
        else:
            want = ", ".join(f"{q}@<nm>" for q in quantities)
            raise FilmmapInputError(f"unknown column {c!r}; expected wafer, slot, site, x_mm, "
                                    f"y_mm and {want}", file=path, line=hline, field=c)
    if "site" not in fixed:
        raise FilmmapInputError("missing column 'site'; expected the site number on every row",
                                file=path, line=hline, field="site")
    if ("x_mm" in fixed) != ("y_mm" in fixed):
        raise FilmmapInputError("x_mm and y_mm come together; expected both or neither (then "
                                "site_map)", file=path, line=hline)
    wl = sorted(spectral[quantities[0]])
    if not wl or any(sorted(spectral[q]) != wl for q in quantities):
        raise FilmmapInputError(f"expected {' and '.join(quantities)} columns at the same "
                                "wavelengths", file=path, line=hline)
    named = fields_from_name(path, maps, ("wafer",)) if "wafer" not in fixed else {}
    rows = {k: [] for k in ("wafer", "slot", "site", "x_mm", "y_mm", "line")}
    values = {q: [] for q in quantities}
    for n, row in lines[1:]:
        cells = [c.strip() for c in row.split(",")]
        if len(cells) != len(header):
            raise FilmmapInputError(f"{len(cells)} cells; expected {len(header)} as in the "
                                    "header", file=path, line=n)
        rows["wafer"].append(cells[fixed["wafer"]] if "wafer" in fixed else named["wafer"])
        rows["site"].append(integer(cells[fixed["site"]], path, n, "site"))
        if "slot" in fixed:
            rows["slot"].append(integer(cells[fixed["slot"]], path, n, "slot"))
        for key in ("x_mm", "y_mm"):
            if key in fixed:
                rows[key].append(number(cells[fixed[key]], path, n, key))
        rows["line"].append(n)
        for q in quantities:
            values[q].append([number(cells[spectral[q][w]], path, n, header[spectral[q][w]])
                              for w in wl])
    if not rows["line"]:
        raise FilmmapInputError("no data rows after the header; expected one row per site",
                                file=path, line=hline)
    slot = rows["slot"] or ([named["slot"]] * len(rows["line"]) if "slot" in named else None)
    return build_table(path, sha, technique, unit, maps, wafer=rows["wafer"], site=rows["site"],
                       wavelength=np.array(wl), data={q: np.array(v) for q, v in values.items()},
                       line=rows["line"], slot=slot, x_mm=rows["x_mm"] or None,
                       y_mm=rows["y_mm"] or None)
