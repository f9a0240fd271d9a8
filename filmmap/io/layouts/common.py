"""What every input layout shares: the maps, the line and cell parsing, the table built.

A layout reader turns one file into a `filmmap.io.spectra.SpectraTable` (rows are
sites). What the file does not carry (slot, x_mm, y_mm, sometimes the wafer and the
site) comes from the `Maps` of the lot file: a site map (site number -> x_mm, y_mm),
a slot map (wafer id -> slot) and a file-name pattern (``{wafer}``, ``{site}``,
``{slot}`` fields).

Common mistakes are named for every layout (after common practice, no source):
wavelengths in micrometres (here), reflectance in percent read as a fraction (and the
reverse), ellipsometric angles in radians or Delta outside both conventions (the
technique's checks, `filmmap.io.techniques.check_values`).
"""

from __future__ import annotations

import re
from dataclasses import dataclass

import numpy as np

from filmmap.errors import FilmmapInputError
from filmmap.io.lotchecks import check_rows_consistent
from filmmap.io.spectra import SpectraTable
from filmmap.io.techniques import check_values
from filmmap.io.textfile import read_text_file

#: Largest wavelength (in the file's numbers) that is taken as micrometres, not nm:
#: optical thickness metrology works at 190-2500 nm, i.e. 0.19-2.5 um, so a set of
#: wavelengths all below 20 cannot be nm (common practice, no source).
MICROMETRE_LIMIT = 20.0


@dataclass(frozen=True)
class Maps:
    """What the lot file adds to files that do not carry it (picklable for workers).

    Attributes
    ----------
    site_xy : dict {int: (float, float)} or None
        Site number -> (x_mm, y_mm), from ``site_map``.
    slot_of : dict {str: int} or None
        Wafer id -> boat slot, from ``slot_map``.
    pattern : str or None
        File-name pattern with ``{wafer}``, ``{site}``, ``{slot}`` fields, from
        ``file_pattern``.
    site_map_file, slot_map_file : str or None
        Where the maps came from (for messages).
    """

    site_xy: dict | None = None
    slot_of: dict | None = None
    pattern: str | None = None
    site_map_file: str | None = None
    slot_map_file: str | None = None


def data_lines(text):
    """(line number, stripped text) of the lines that are neither blank nor ``#`` comments."""
    return [(i + 1, line.strip()) for i, line in enumerate(text.split("\n"))
            if line.strip() and not line.strip().startswith("#")]


def read_data_lines(path):
    """`data_lines` of a text file (read by `filmmap.io.textfile.read_text_file`) and its
    SHA-256."""
    source = read_text_file(path)
    return data_lines(source.text), source.sha256


def number(cell, path, line, field):
    """float of a cell, or an error naming file, line and field."""
    try:
        v = float(cell)
    except ValueError:
        hint = " (decimal comma? expected a point)" if re.fullmatch(r"[+-]?\d+,\d+", cell) else ""
        raise FilmmapInputError(f"{cell!r} is not a number{hint}; expected a number",
                                file=path, line=line, field=field) from None
    if not np.isfinite(v):
        raise FilmmapInputError(f"{cell!r} is not a finite number", file=path, line=line,
                                field=field)
    return v


def integer(cell, path, line, field):
    v = number(cell, path, line, field)
    if v != int(v):
        raise FilmmapInputError(f"{cell!r} is not an integer; expected a whole {field} number",
                                file=path, line=line, field=field)
    return int(v)


def pattern_regex(pattern):
    """Compiled regex of a file-name pattern (``{wafer}``, ``{site}``, ``{slot}`` fields)."""
    out, pos = "", 0
    for m in re.finditer(r"\{(wafer|site|slot)\}", pattern):
        out += re.escape(pattern[pos:m.start()])
        out += (r"(?P<wafer>.+?)" if m.group(1) == "wafer" else rf"(?P<{m.group(1)}>\d+)")
        pos = m.end()
    return re.compile(out + re.escape(pattern[pos:]) + r"\Z")


def fields_from_name(path, maps, need):
    """The ``{wafer}``, ``{site}``, ``{slot}`` fields of a file name by the lot's pattern.

    Parameters
    ----------
    path : pathlib.Path
    maps : Maps
    need : tuple of str
        Fields the layout needs from the name.

    Returns
    -------
    dict
    """
    if maps.pattern is None:
        raise FilmmapInputError(
            f"this layout takes {' and '.join(need)} from the file name; expected "
            "file_pattern in [measurement], e.g. \"{wafer}_site{site}.csv\"", file=path,
            field="measurement.file_pattern")
    m = pattern_regex(maps.pattern).match(path.name)
    if m is None:
        raise FilmmapInputError(f"file name does not match file_pattern {maps.pattern!r}",
                                file=path, field="measurement.file_pattern")
    got = m.groupdict()
    missing = [f for f in need if f not in got]
    if missing:
        raise FilmmapInputError(f"file_pattern {maps.pattern!r} has no {{{missing[0]}}} field; "
                                f"expected one for this layout", file=path,
                                field="measurement.file_pattern")
    return {k: (v if k == "wafer" else int(v)) for k, v in got.items()}


def check_wavelengths(wl, path, line, field="wavelength"):
    """Strictly increasing after sorting, no duplicates, and not micrometres."""
    if wl.size and np.nanmax(wl) < MICROMETRE_LIMIT:
        raise FilmmapInputError(
            f"wavelengths {wl.min():g}-{wl.max():g} look like micrometres; expected nm "
            f"(e.g. 400, not 0.4): convert the file's wavelengths to nm", file=path, line=line,
            field=field)
    if np.any(wl <= 0):
        raise FilmmapInputError(f"wavelength {wl[wl <= 0][0]:g} is not positive; expected nm",
                                file=path, line=line, field=field)
    s = np.sort(wl)
    dup = np.nonzero(np.diff(s) == 0)[0]
    if dup.size:
        raise FilmmapInputError(f"wavelength {s[dup[0]]:g} nm appears twice; expected each "
                                "wavelength once", file=path, line=line, field=field)


def build_table(path, sha, technique, unit, maps, *, wafer, site, wavelength, data, line,
                slot=None, x_mm=None, y_mm=None, wl_lines=None):
    """A checked `SpectraTable` from a layout's columns, completed by the maps.

    Parameters
    ----------
    path : pathlib.Path
    sha : str
    technique : str
    unit : {"fraction", "percent"}
    maps : Maps
    wafer, site : sequence (rows,)
    wavelength : numpy.ndarray (n_wl,), nm, any order
    data : dict of numpy.ndarray (rows, n_wl)
    line : sequence of int (rows,)
    slot, x_mm, y_mm : sequence (rows,) or None
        None: taken from the slot map / site map.
    wl_lines : sequence of int (n_wl,), optional
        Line of each wavelength (layouts with a wavelength per line), for messages.

    Returns
    -------
    SpectraTable
    """
    line = np.asarray(line, dtype=np.int64)
    wafer = np.array([str(w) for w in wafer], dtype=str)
    site = np.asarray(site, dtype=np.int64)
    if slot is None:
        if maps.slot_of is None:
            raise FilmmapInputError("no slot in this file; expected a slot column, a {slot} "
                                    "field in file_pattern, or slot_map in [measurement]",
                                    file=path, line=int(line[0]), field="slot")
        slot = []
        for w, n in zip(wafer.tolist(), line.tolist()):
            if w not in maps.slot_of:
                raise FilmmapInputError(f"wafer {w!r} has no slot in the slot map "
                                        f"{maps.slot_map_file}; expected a row for it",
                                        file=path, line=int(n), field="wafer")
            slot.append(maps.slot_of[w])
    slot = np.asarray(slot, dtype=np.int64)
    if np.any(slot < 1):
        r = int(np.argmax(slot < 1))
        raise FilmmapInputError(f"slot {slot[r]}; expected a boat slot >= 1", file=path,
                                line=int(line[r]), field="slot")
    if x_mm is None or y_mm is None:
        if maps.site_xy is None:
            raise FilmmapInputError("no x_mm, y_mm in this file; expected them as columns or "
                                    "site_map in [measurement]", file=path, line=int(line[0]),
                                    field="site")
        xy = []
        for s, n in zip(site, line):
            if int(s) not in maps.site_xy:
                raise FilmmapInputError(f"site {int(s)} is not in the site map "
                                        f"{maps.site_map_file}; expected one of its site "
                                        "numbers", file=path, line=int(n), field="site")
            xy.append(maps.site_xy[int(s)])
        x_mm, y_mm = (np.array([p[0] for p in xy]), np.array([p[1] for p in xy]))
    wavelength = np.asarray(wavelength, dtype=float)
    check_wavelengths(wavelength, path, int(line[0]))
    order = np.argsort(wavelength, kind="stable")
    data = {k: np.ascontiguousarray(np.asarray(v, dtype=float)[:, order]) for k, v in data.items()}
    if wl_lines is not None:
        wl_lines = np.asarray(wl_lines, dtype=np.int64)[order]
    data = check_values(technique, unit, data, path, line, wl_lines)
    check_rows_consistent(zip(wafer.tolist(), slot.tolist(), site.tolist(),
                               ((path, int(n)) for n in line)), "file")
    return SpectraTable(path=path, sha256=sha, technique=technique, wafer=wafer, slot=slot,
                        site=site, x_mm=np.ascontiguousarray(np.asarray(x_mm, dtype=float)),
                        y_mm=np.ascontiguousarray(np.asarray(y_mm, dtype=float)),
                        wavelength_nm=wavelength[order], data=data, line=line)
