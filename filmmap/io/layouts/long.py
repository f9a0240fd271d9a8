"""Long (tidy) CSV: one row per site and wavelength.

Columns, in any order: ``site``, ``wavelength_nm`` and ``R`` (reflectance) or
``psi`` and ``delta`` (degrees); optional ``wafer`` (else ``{wafer}`` of
file_pattern), ``slot`` (else file_pattern or slot_map) and ``x_mm``, ``y_mm``
(else site_map). Every site of a file must have the same wavelengths; rows may
come in any order. An error on a site names the line of its first row.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from filmmap.errors import FilmmapInputError
from filmmap.io.layouts.common import (build_table, fields_from_name, integer, number,
                                       read_data_lines)
from filmmap.io.techniques import QUANTITIES

NAME = "long"
TECHNIQUES = ("reflectance", "ellipsometry")
WAFER_PER_FILE = True
EXAMPLE = """\
wafer,site,wavelength_nm,R
W2-04,1,400,0.2512
W2-04,1,410,0.2633
W2-04,2,400,0.2498
W2-04,2,410,0.2620
"""

_OPTIONAL = ("wafer", "slot", "x_mm", "y_mm")


def read(path, technique, unit, maps):
    """One long CSV file as a `SpectraTable`."""
    path = Path(path)
    lines, sha = read_data_lines(path)
    if not lines:
        raise FilmmapInputError("empty file; expected a header and one row per site and "
                                "wavelength", file=path)
    hline, header = lines[0]
    cols = [c.strip() for c in header.split(",")]
    quantities = QUANTITIES[technique]
    known = ("site", "wavelength_nm") + quantities + _OPTIONAL
    for c in cols:
        if c not in known:
            raise FilmmapInputError(f"unknown column {c!r}; expected {', '.join(known)} (a long "
                                    "layout: one row per site and wavelength)", file=path,
                                    line=hline, field=c)
    for c in ("site", "wavelength_nm") + quantities:
        if c not in cols:
            raise FilmmapInputError(f"missing column {c!r}; the long layout needs site, "
                                    f"wavelength_nm and {' and '.join(quantities)}", file=path,
                                    line=hline, field=c)
    if len(set(cols)) != len(cols):
        raise FilmmapInputError("a column appears twice in the header", file=path, line=hline)
    ix = {c: i for i, c in enumerate(cols)}
    named = fields_from_name(path, maps, ("wafer",)) if "wafer" not in ix else {}
    sites = {}   # (wafer, site) -> {"line", "slot", "x", "y", "wl": [], q: []}
    for n, row in lines[1:]:
        cells = [c.strip() for c in row.split(",")]
        if len(cells) != len(cols):
            raise FilmmapInputError(f"{len(cells)} cells; expected {len(cols)} as in the header",
                                    file=path, line=n)
        wafer = cells[ix["wafer"]] if "wafer" in ix else named["wafer"]
        site = integer(cells[ix["site"]], path, n, "site")
        rec = sites.setdefault((wafer, site), {"line": n, "wl": [], **{q: [] for q in quantities}})
        for key in ("slot", "x_mm", "y_mm"):
            if key in ix:
                v = (integer if key == "slot" else number)(cells[ix[key]], path, n, key)
                if rec.setdefault(key, v) != v:
                    raise FilmmapInputError(f"{key} {v:g} differs from {rec[key]:g} on line "
                                            f"{rec['line']} for the same site; expected one "
                                            f"{key} per site", file=path, line=n, field=key)
        rec["wl"].append(number(cells[ix["wavelength_nm"]], path, n, "wavelength_nm"))
        for q in quantities:
            rec[q].append(number(cells[ix[q]], path, n, q))
    if not sites:
        raise FilmmapInputError("no data rows after the header", file=path, line=hline)
    keys = list(sites)
    wl = np.array(sites[keys[0]]["wl"])
    order = np.argsort(wl, kind="stable")
    for k in keys[1:]:
        other = np.array(sites[k]["wl"])
        if other.size != wl.size or not np.array_equal(np.sort(other), wl[order]):
            raise FilmmapInputError(
                f"wafer {k[0]!r} site {k[1]} has {other.size} wavelengths that differ from "
                f"those of wafer {keys[0][0]!r} site {keys[0][1]} ({wl.size}); expected the "
                "same wavelengths at every site", file=path, line=sites[k]["line"],
                field="wavelength_nm")
    data = {}
    for q in quantities:
        rows = []
        for k in keys:
            w = np.array(sites[k]["wl"])
            v = np.array(sites[k][q])
            # each site in the first site's wavelength order, whatever its row order
            rows.append(v[np.argsort(w, kind="stable")][np.argsort(order, kind="stable")])
        data[q] = np.array(rows)
    slot = [sites[k]["slot"] for k in keys] if "slot" in ix else (
        [named["slot"]] * len(keys) if "slot" in named else None)
    has_xy = "x_mm" in ix and "y_mm" in ix
    return build_table(path, sha, technique, unit, maps, wafer=[k[0] for k in keys],
                       site=[k[1] for k in keys], wavelength=wl, data=data,
                       line=[sites[k]["line"] for k in keys], slot=slot,
                       x_mm=[sites[k]["x_mm"] for k in keys] if has_xy else None,
                       y_mm=[sites[k]["y_mm"] for k in keys] if has_xy else None)
