"""Site map and slot map: what instrument files often leave out.

Site map (``site_map`` in ``[measurement]``): either a built-in pattern by name and
count, or a CSV file ``site,x_mm,y_mm`` (one row per site, mm from the wafer
centre, notch toward -y).

- ``"polar-<n>"``: the polar patterns of `filmmap.wafermap.sites` (n = 1, 5, 9,
  13, 17, 25, 49, 121): a centre site and rings, the outer ring on the
  edge-exclusion radius.
- ``"cartesian-<n>"``: a k x k square grid, n = k^2 (1, 4, 9, ..., 121), corners
  on the edge-exclusion radius, pitch 2 R/(sqrt(2) (k - 1)); sites numbered row
  by row from +y down, each row from -x to +x (common practice, no source).

Slot map (``slot_map``): a CSV file ``wafer,slot``. The slot can also come from a
``{slot}`` field of ``file_pattern``.

Bad maps are refused naming the map file and line: a repeated site or wafer, two
wafers in one slot, a site outside the wafer.
"""

from __future__ import annotations

import math
import re

import numpy as np

from filmmap.errors import FilmmapInputError
from filmmap.io.layouts.common import Maps, integer, number, read_data_lines

CARTESIAN_COUNTS = tuple(k * k for k in range(1, 12))


def cartesian_sites(n_sites, diameter_mm, edge_exclusion_mm):
    """(site, x_mm, y_mm) of the built-in k x k grid (see the module docstring)."""
    k = math.isqrt(int(n_sites))
    if k * k != int(n_sites) or not 1 <= k <= 11:
        raise FilmmapInputError(f"no built-in Cartesian pattern with {n_sites} sites; choose "
                                f"one of {', '.join(map(str, CARTESIAN_COUNTS))}",
                                field="measurement.site_map")
    r = diameter_mm / 2 - edge_exclusion_mm
    half = r / math.sqrt(2)
    coord = np.linspace(-half, half, k) if k > 1 else np.zeros(1)
    xs, ys = [], []
    for y in coord[::-1]:
        for x in coord:
            xs.append(float(x))
            ys.append(float(y))
    return np.arange(1, k * k + 1), np.array(xs), np.array(ys)


def builtin_site_map(name, diameter_mm, edge_exclusion_mm):
    """{site: (x_mm, y_mm)} of a built-in pattern name, or None when ``name`` is not one."""
    m = re.fullmatch(r"(polar|cartesian)-(\d+)", name)
    if m is None:
        return None
    n = int(m.group(2))
    if m.group(1) == "polar":
        from filmmap.wafermap.sites import polar_sites

        try:
            s = polar_sites(n, diameter_mm, edge_exclusion_mm)
        except FilmmapInputError as exc:
            raise FilmmapInputError(exc.reason, field="measurement.site_map") from None
        site, x, y = s.site, s.x_mm, s.y_mm
    else:
        site, x, y = cartesian_sites(n, diameter_mm, edge_exclusion_mm)
    return {int(a): (float(b), float(c)) for a, b, c in zip(site, x, y)}


def _rows(path, columns):
    lines, sha = read_data_lines(path)
    if not lines:
        raise FilmmapInputError(f"empty map; expected a header {','.join(columns)}", file=path)
    hline, header = lines[0]
    cols = [c.strip() for c in header.split(",")]
    if cols != list(columns):
        raise FilmmapInputError(f"header {header!r}; expected {','.join(columns)}", file=path,
                                line=hline)
    out = []
    for n, row in lines[1:]:
        cells = [c.strip() for c in row.split(",")]
        if len(cells) != len(columns):
            raise FilmmapInputError(f"{len(cells)} cells; expected {len(columns)}: "
                                    f"{','.join(columns)}", file=path, line=n)
        out.append((n, cells))
    if not out:
        raise FilmmapInputError("no rows after the header", file=path, line=hline)
    return out, sha


def read_site_map(path, diameter_mm):
    """{site: (x_mm, y_mm)} and the SHA-256 of a site-map CSV (``site,x_mm,y_mm``)."""
    rows, sha = _rows(path, ("site", "x_mm", "y_mm"))
    out, first = {}, {}
    for n, (s, x, y) in rows:
        site = integer(s, path, n, "site")
        xy = (number(x, path, n, "x_mm"), number(y, path, n, "y_mm"))
        if site in out:
            raise FilmmapInputError(f"site {site} also on line {first[site]}; expected each "
                                    "site once", file=path, line=n, field="site")
        if math.hypot(*xy) > diameter_mm / 2 + 1e-6:
            raise FilmmapInputError(f"site {site} at ({xy[0]:g}, {xy[1]:g}) mm lies outside "
                                    f"the wafer radius {diameter_mm / 2:g} mm", file=path,
                                    line=n, field="x_mm")
        out[site], first[site] = xy, n
    return out, sha


def read_slot_map(path):
    """{wafer: slot} and the SHA-256 of a slot-map CSV (``wafer,slot``)."""
    rows, sha = _rows(path, ("wafer", "slot"))
    out, line_of, wafer_in = {}, {}, {}
    for n, (w, s) in rows:
        if not w:
            raise FilmmapInputError("empty wafer id; expected one", file=path, line=n,
                                    field="wafer")
        slot = integer(s, path, n, "slot")
        if slot < 1:
            raise FilmmapInputError(f"slot {slot}; expected a boat slot >= 1", file=path,
                                    line=n, field="slot")
        if w in out:
            raise FilmmapInputError(f"wafer {w!r} also on line {line_of[w]}; expected each "
                                    "wafer once", file=path, line=n, field="wafer")
        if slot in wafer_in:
            raise FilmmapInputError(f"slot {slot} also holds wafer {wafer_in[slot][0]!r} (line "
                                    f"{wafer_in[slot][1]}); expected one wafer per slot",
                                    file=path, line=n, field="slot")
        out[w], line_of[w], wafer_in[slot] = slot, n, (w, n)
    return out, sha


def lot_maps(measurement):
    """`Maps` of a lot's ``[measurement]`` and the (path, sha256) of the map files read.

    Parameters
    ----------
    measurement : filmmap.io.lotfile.MeasurementConfig

    Returns
    -------
    (Maps, list of (str, str))
    """
    m = measurement
    site_xy = slot_of = None
    site_file = slot_file = None
    inputs = []
    site_map = getattr(m, "site_map", None)
    if isinstance(site_map, dict):                 # written inline in the lot file
        site_xy, site_file = dict(site_map), "the lot file's site_map"  # checked there
    elif site_map is not None:
        builtin = builtin_site_map(str(site_map), m.wafer_diameter_mm, m.edge_exclusion_mm)
        if builtin is not None:
            site_xy, site_file = builtin, str(site_map)
        else:
            site_xy, sha = read_site_map(site_map, m.wafer_diameter_mm)
            site_file = str(site_map)
            inputs.append((site_file, sha))
    slot_map = getattr(m, "slot_map", None)
    if isinstance(slot_map, dict):
        slot_of, slot_file = dict(slot_map), "the lot file's slot_map"
    elif slot_map is not None:
        slot_of, sha = read_slot_map(slot_map)
        slot_file = str(slot_map)
        inputs.append((slot_file, sha))
    return Maps(site_xy=site_xy, slot_of=slot_of, pattern=getattr(m, "file_pattern", None),
                site_map_file=site_file, slot_map_file=slot_file), inputs
