"""Lot-level checks of spectra tables: a lot's files against each other, the wafer, the boat.

Each reader checks its own file; `check_tables` checks what only the whole lot shows: one
technique and one wavelength set, slots inside the boat, sites inside the wafer, each
wafer in one file (or, for layouts with a file per site, in one slot), no (wafer, site)
twice. `check_rows_consistent` is the row rule shared by the single-file readers and the
lot check.
"""

from __future__ import annotations

import math
import os

import numpy as np

from filmmap.errors import FilmmapInputError

__all__ = ["check_tables", "check_rows_consistent"]

#: Slack (mm) when testing "inside the wafer": a site exactly on the edge
#: counts as inside despite float rounding.
_RADIUS_SLACK_MM = 1e-6


def check_tables(tables, wafer_diameter_mm, boat_slots=None, wafer_per_file=True):
    """Check a lot's spectra tables against each other, the wafer and the boat.

    Parameters
    ----------
    tables : sequence of SpectraTable
        All files of one lot.
    wafer_diameter_mm : float
        Wafer diameter in mm; every site must lie within the radius.
    boat_slots : int, optional
        Number of boat slots; every slot must lie in ``1..boat_slots``.
    wafer_per_file : bool
        Each wafer in one file (False for layouts with a file per site).

    Returns
    -------
    None

    Raises
    ------
    FilmmapInputError
        Naming the file(s) and line(s): no tables; mixed techniques; a
        different wavelength set; a slot outside the boat; a site outside the
        wafer; a wafer in two files; a wafer in two slots; two wafers in one
        slot; a duplicate (wafer, site).
    """
    tables = list(tables)
    if not tables:
        raise FilmmapInputError("no spectra files to check; expected at least one")
    radius = float(wafer_diameter_mm) / 2.0
    if not (math.isfinite(radius) and radius > 0):
        raise FilmmapInputError(f"wafer diameter must be a positive number of mm, "
                                f"got {wafer_diameter_mm!r}", field="wafer_diameter_mm")
    seen = {}
    for t in tables:
        key = os.path.abspath(t.path)
        if key in seen:
            raise FilmmapInputError("file is listed twice; expected each spectra file once",
                                    file=t.path)
        seen[key] = t
    ref = tables[0]
    for t in tables[1:]:
        if t.technique != ref.technique:
            raise FilmmapInputError(
                f"technique {t.technique!r} differs from {ref.technique!r} of {ref.path}; "
                "expected all files of a lot to use one technique", file=t.path)
        same = (t.wavelength_nm.size == ref.wavelength_nm.size
                and np.allclose(t.wavelength_nm, ref.wavelength_nm, rtol=1e-9, atol=0.0))
        if not same:
            raise FilmmapInputError(
                f"wavelength set differs from {ref.path}: "
                f"{_describe_difference(t.wavelength_nm, ref.wavelength_nm)}; "
                "expected the same wavelength columns in every file", file=t.path,
                line=max(1, int(t.line[0]) - 1) if t.line.size else None)
    for t in tables:
        if boat_slots is not None:
            out = (t.slot < 1) | (t.slot > int(boat_slots))
            if out.any():
                r = int(np.argmax(out))
                raise FilmmapInputError(
                    f"slot {int(t.slot[r])} is outside the boat (slots 1..{int(boat_slots)})",
                    file=t.path, line=int(t.line[r]), field="slot")
        rr = np.hypot(t.x_mm, t.y_mm)
        out = ~(rr <= radius + _RADIUS_SLACK_MM)
        if out.any():
            r = int(np.argmax(out))
            raise FilmmapInputError(
                f"site {int(t.site[r])} at (x, y) = ({t.x_mm[r]:g}, {t.y_mm[r]:g}) mm lies "
                f"{rr[r]:g} mm from the centre, outside the wafer radius {radius:g} mm",
                file=t.path, line=int(t.line[r]), field="x_mm")
    first_file = {}
    for t in tables:
        for w in dict.fromkeys(str(x) for x in t.wafer.tolist()):
            r = int(np.argmax(t.wafer == w))
            if w in first_file and str(first_file[w][0]) != str(t.path) and (
                    wafer_per_file or first_file[w][2] != int(t.slot[r])):
                other, oline, oslot = first_file[w]
                slot = int(t.slot[r])
                if oslot != slot:
                    msg = (f"wafer {w!r} is in slot {slot} here but in slot {oslot} in "
                           f"{other}:{oline}; expected one slot per wafer")
                else:
                    msg = (f"wafer {w!r} appears in two files: {other}:{oline} and here; "
                           "expected each wafer in one file")
                raise FilmmapInputError(msg, file=t.path, line=int(t.line[r]), field="wafer")
            first_file.setdefault(w, (t.path, int(t.line[r]), int(t.slot[r])))
    check_rows_consistent(
        (row for t in tables for row in zip(t.wafer.tolist(), t.slot.tolist(), t.site.tolist(),
                                            ((t.path, n) for n in t.line.tolist()))), "lot")


def _describe_difference(wl, ref):
    if wl.size != ref.size:
        return (f"{wl.size} wavelengths {wl[0]:g}-{wl[-1]:g} nm here, "
                f"{ref.size} wavelengths {ref[0]:g}-{ref[-1]:g} nm there")
    i = int(np.argmax(~np.isclose(wl, ref, rtol=1e-9, atol=0.0)))
    return f"column {i + 1} of the spectrum is at {wl[i]:g} nm here but {ref[i]:g} nm there"


def check_rows_consistent(rows, who):
    """Rows must have distinct (wafer, site), one slot per wafer and one wafer per slot.

    Parameters
    ----------
    rows : iterable of (wafer, slot, site, where)
        ``where`` is ``(file, line)``.
    who : str
        ``"file"`` (one file: an error names the file and the line) or ``"lot"``.
    """
    by_site, slot_of_wafer, wafer_of_slot = {}, {}, {}
    for wafer, slot, site, where in rows:
        wafer = str(wafer)
        key = (wafer, site)
        if key in by_site:
            first = by_site[key]
            raise FilmmapInputError(
                f"duplicate wafer {wafer!r} site {site}: also at {_loc(first, where, who)}; "
                "expected each (wafer, site) once", file=where[0], line=where[1], field="site")
        by_site[key] = where
        seen = _first_other(slot_of_wafer, wafer, slot, where)
        if seen is not None:
            raise FilmmapInputError(
                f"wafer {wafer!r} is in slot {slot} here but in slot {seen[0]} at "
                f"{_loc(seen[1], where, who)}; expected one slot per wafer",
                file=where[0], line=where[1], field="slot")
        seen = _first_other(wafer_of_slot, slot, wafer, where)
        if seen is not None:
            raise FilmmapInputError(
                f"slot {slot} holds wafer {wafer!r} here but wafer {seen[0]!r} at "
                f"{_loc(seen[1], where, who)}; expected one wafer per slot",
                file=where[0], line=where[1], field="slot")


def _first_other(first_of, key, value, where):
    """Record the first ``(value, where)`` of ``key``; return it when ``value`` differs."""
    seen = first_of.setdefault(key, (value, where))
    return seen if seen[0] != value else None


def _loc(first, where, who):
    if who == "file" or str(first[0]) == str(where[0]):
        return f"line {first[1]}"
    return f"{first[0]}:{first[1]}"
