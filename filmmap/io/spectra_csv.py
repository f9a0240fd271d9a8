"""The wide CSV parser: filmmap's own spectra file (pinned), one row per site.

This is the parser behind the ``wide`` layout (`filmmap.io.layouts.wide`); read spectra
through `filmmap.io.read_spectra`, which picks the layout. The lot-level checks across
files are in `filmmap.io.lotchecks`, the physics of each technique in
`filmmap.io.techniques`, the result type in `filmmap.io.spectra`.

File format (filmmap's own)
---------------------------
UTF-8 text (a leading byte-order mark is ignored), comma separated, LF,
CRLF (or bare CR) line ends.  Lines whose first non-blank character is ``#`` before the
header are comments; blank lines are ignored everywhere.  One header row,
then one row per measured site.  Columns, in any order:

``wafer``
    Wafer id (text; printable, not empty).
``slot``
    Boat position, a positive integer (1 = load/door end).
``site``
    Site number on the wafer, an integer.
``x_mm``, ``y_mm``
    Site position from the wafer centre in mm, notch toward -y.
``R@<nm>``
    Reflectance at wavelength ``<nm>`` (e.g. ``R@400``, ``R@400.5``), as a
    fraction 0-1, or in percent when read with ``reflectance_unit="percent"``
    (then converted to a fraction).  Technique ``"reflectance"``.
``psi@<nm>``, ``delta@<nm>``
    Ellipsometric angles in degrees, the same wavelength set for both.
    Technique ``"ellipsometry"``.
``I@<nm>``
    Raw detector intensity in counts (converted to reflectance by `filmmap.io.intensity`).
    Technique ``"intensity"``.

Spectral columns may come in any order: the reader sorts them by wavelength
(the sort is lossless, and interleaved ``psi``/``delta`` layouts are common),
so `SpectraTable.wavelength_nm` is always strictly increasing.  Two columns of
one quantity at the same wavelength (``R@400`` and ``R@400.0``) are rejected.
Any other column name is rejected, with the closest known name suggested.

A single dark or reference spectrum (`read_spectrum_file`) uses the same
layout with only ``I@<nm>`` columns and exactly one data row::

    # dark spectrum, shutter closed, 20 ms
    I@400,I@401,I@402
    101.5,99.8,100.2

Every problem raises `filmmap.errors.FilmmapInputError` naming the file and
the line (and column) concerned and saying what was expected.
"""

from __future__ import annotations

import csv
import difflib
import math
import re
from pathlib import Path

import numpy as np

from filmmap.bounds import MAX_BOAT_SLOTS, MAX_ID_CHARS, MAX_SITES_PER_WAFER, MAX_WAVELENGTHS
from filmmap.errors import FilmmapInputError
from filmmap.io.lotchecks import check_rows_consistent
from filmmap.io.spectra import SpectraTable, Spectrum
from filmmap.io.techniques import (DELTA_RANGE_DEG, MAX_FRACTION, PSI_RANGE_DEG, QUANTITIES,
                                   TECHNIQUE_OF_QUANTITY, check_arguments,
                                   check_percent_is_percent)
from filmmap.io.textfile import DEFAULT_MAX_BYTES, read_text_file

__all__ = ["read_spectra_csv", "read_spectrum_file", "REQUIRED_COLUMNS"]

#: Columns every spectra file must have.
REQUIRED_COLUMNS = ("wafer", "slot", "site", "x_mm", "y_mm")

#: Largest accepted |slot| and |site| (keeps them exact in a 64-bit int).
_MAX_INDEX = 10**9

_NUMBER = re.compile(
    r"[+-]?(?:(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?|nan|inf|infinity)", re.IGNORECASE | re.ASCII)
_WAVELENGTH = re.compile(r"(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?", re.ASCII)
_DECIMAL_COMMA = re.compile(r"[+-]?\d+,\d+", re.ASCII)

#: Spelling variants of a spectral column that instruments export, taken as ``R@400``:
#: ``R 400 nm``, ``R 400``, ``R(400 nm)``, ``R [400nm]``, ``R@400nm``, ``R_400nm`` - a
#: blank, a bracket or the unit marks them (common practice, no source). ``R400`` alone
#: stays a misspelling (pinned). A micrometre unit is named as a mistake.
_SPECTRAL_VARIANT = re.compile(
    r"(R|psi|delta|I)\s*[@_]?\s*[(\[]?\s*((?:\d+\.?\d*|\.\d+))\s*(nm|um|µm)?\s*[)\]]?",
    re.IGNORECASE)
_PREFIX_CASE = {p.lower(): p for p in ("R", "psi", "delta", "I")}


# --------------------------------------------------------------------------- file level

def _header_and_rows(text, path):
    """Split text into the header line and the (line number, text) of each data row."""
    if not text.strip():
        raise FilmmapInputError("empty file; expected a header row and data rows", file=path)
    lines = text.split("\n")
    header_at = None
    for i, line in enumerate(lines):
        stripped = line.strip()
        if not stripped or stripped.startswith("#"):
            continue
        header_at = i
        break
    if header_at is None:
        raise FilmmapInputError("no header row: the file holds only comments and blank lines",
                                file=path)
    rows, numbers = [], []
    for i in range(header_at + 1, len(lines)):
        line = lines[i]
        if line and not line.isspace():
            rows.append(line)
            numbers.append(i + 1)
    return header_at + 1, lines[header_at], rows, numbers


def _split_csv_line(line, path, lineno):
    try:
        return next(csv.reader([line], strict=True))
    except (csv.Error, StopIteration) as exc:
        raise FilmmapInputError(f"malformed CSV quoting ({exc}); expected comma-separated cells",
                                file=path, line=lineno) from None


def _separator_problem(header_line, first_row):
    """A message when the file is semicolon- or tab-separated, else None."""
    for sep, name in ((";", "semicolon"), ("\t", "tab")):
        if header_line.count(sep) > header_line.count(","):
            msg = f"the file looks {name}-separated; filmmap expects comma-separated CSV"
            if first_row is not None and any(_DECIMAL_COMMA.fullmatch(c.strip())
                                             for c in first_row.split(sep)):
                msg += " with decimal points (this file also uses decimal commas, e.g. 0,45)"
            return msg
    return None


# --------------------------------------------------------------------------- header

def _suggest(name):
    """Closest known column name, or None."""
    known = list(REQUIRED_COLUMNS)
    base, sep, rest = name.partition("@")
    if sep:
        known += [f"{p}@{rest.strip()}" for p in ("R", "psi", "delta", "I")]
    else:
        # 'R400' or 'psi 400' -> 'R@400'
        m = re.fullmatch(r"([A-Za-z]+)[\s_:-]*([\d.]+)", name)
        if m:
            for p in ("R", "psi", "delta", "I"):
                if m.group(1).lower() == p.lower():
                    return f"{p}@{m.group(2)}"
    match = difflib.get_close_matches(name, known, n=1, cutoff=0.6)
    if not match and sep:
        match = [p + "@" + rest.strip() for p in ("R", "psi", "delta", "I")
                 if base.strip().lower() == p.lower()]
    return match[0] if match else None


#: Parsed headers by (header text, technique, required columns): the files of
#: a lot share one header, and splitting and classifying 600 column names costs
#: as much as parsing several data rows.
_HEADER_CACHE: dict = {}
_HEADER_CACHE_SIZE = 64


def _parse_header(header_text, first_row, path, lineno, technique, required):
    """Split, check and classify the header line, with a small cache of successful results.

    Returns
    -------
    names : list of str
        Stripped column names.
    fixed, spectral : dict
        See `_classify_header` (fresh copies on every call).
    """
    key = (header_text, technique, required)
    hit = _HEADER_CACHE.get(key)
    if hit is None:
        cells = _split_csv_line(header_text, path, lineno)
        problem = _separator_problem(header_text, first_row)
        if problem:
            raise FilmmapInputError(problem, file=path, line=lineno)
        numeric = [bool(_NUMBER.fullmatch(c.strip())) for c in cells]
        if cells and (numeric[0] or (len(cells) > 5 and sum(numeric) >= len(cells) - 1)):
            expected = (", ".join(required) + " and " if required else "") + ", ".join(
                f"{p}@<nm>" for p in QUANTITIES[technique])
            raise FilmmapInputError(
                f"no header row: line {lineno} looks like data; expected a header naming the "
                f"columns {expected}", file=path, line=lineno)
        fixed, spectral = _classify_header(cells, path, lineno, technique, required)
        hit = (tuple(c.strip() for c in cells), fixed, spectral)
        if len(_HEADER_CACHE) >= _HEADER_CACHE_SIZE:
            _HEADER_CACHE.clear()
        _HEADER_CACHE[key] = hit
    names, fixed, spectral = hit
    return (list(names), dict(fixed),
            {p: (wl.copy(), list(cols)) for p, (wl, cols) in spectral.items()})


def _classify_header(cells, path, lineno, technique, required):
    """Classify header cells.

    Returns
    -------
    fixed : dict
        Required column name -> column index.
    spectral : dict
        Prefix -> (wavelengths sorted increasing, column indices in that order).
    """
    allowed = QUANTITIES[technique]
    expected = ", ".join(f"{p}@<nm>" for p in allowed)
    fixed, by_prefix = {}, {p: [] for p in allowed}
    for j, raw_name in enumerate(cells):
        name = raw_name.strip()
        col = j + 1
        if not name:
            raise FilmmapInputError(
                f"empty column name in header column {col}"
                + (" (trailing comma?)" if col == len(cells) else "")
                + f"; expected {', '.join(required)} and {expected} columns",
                file=path, line=lineno, field=f"column {col}")
        if name in required:
            if name in fixed:
                raise FilmmapInputError(
                    f"duplicate column {name!r} (header columns {fixed[name] + 1} and {col})",
                    file=path, line=lineno, field=name)
            fixed[name] = j
            continue
        prefix, sep, rest = name.partition("@")
        variant = _SPECTRAL_VARIANT.fullmatch(name)
        if variant and not (variant.group(3) or re.search(r"[\s(\[]", name)):
            variant = None
        if variant and not (sep and prefix in TECHNIQUE_OF_QUANTITY
                            and _WAVELENGTH.fullmatch(rest.strip())):
            if (variant.group(3) or "").lower() in ("um", "µm"):
                raise FilmmapInputError(
                    f"column {name!r} gives the wavelength in micrometres; expected nm, e.g. "
                    f"{_PREFIX_CASE[variant.group(1).lower()]}@"
                    f"{float(variant.group(2)) * 1000:g}", file=path, line=lineno, field=name)
            prefix, sep, rest = _PREFIX_CASE[variant.group(1).lower()], "@", variant.group(2)
        if sep and prefix in TECHNIQUE_OF_QUANTITY:
            if prefix not in allowed:
                raise FilmmapInputError(
                    f"column {name!r} belongs to technique {TECHNIQUE_OF_QUANTITY[prefix]!r}, but "
                    f"this file is read as technique {technique!r}, which expects {expected} "
                    "columns",
                    file=path, line=lineno, field=name)
            rest = rest.strip()
            wl = float(rest) if _WAVELENGTH.fullmatch(rest) else math.nan
            if not (math.isfinite(wl) and wl > 0):
                raise FilmmapInputError(
                    f"column {name!r}: expected {prefix}@<wavelength in nm>, a positive number "
                    f"such as {prefix}@400.5", file=path, line=lineno, field=name)
            by_prefix[prefix].append((wl, j, name))
            continue
        hint = _suggest(name)
        raise FilmmapInputError(
            f"unknown column {name!r}" + (f"; did you mean {hint!r}?" if hint else "")
            + f" (expected {', '.join(required)} and {expected} columns)",
            file=path, line=lineno, field=name)
    missing = [c for c in required if c not in fixed]
    if missing:
        raise FilmmapInputError(
            f"missing required column {missing[0]!r}"
            + (f" (also missing: {', '.join(missing[1:])})" if len(missing) > 1 else "")
            + f"; the header needs {', '.join(required)} and {expected} columns",
            file=path, line=lineno, field=missing[0])
    spectral = {}
    for prefix, cols in by_prefix.items():
        if not cols:
            raise FilmmapInputError(
                f"no {prefix}@<nm> columns; technique {technique!r} expects {expected} columns",
                file=path, line=lineno, field=f"{prefix}@<nm>")
        cols.sort(key=lambda c: c[0])
        for a, b in zip(cols, cols[1:]):
            if a[0] == b[0]:
                raise FilmmapInputError(
                    f"duplicate wavelength {a[0]:g} nm: columns {a[2]!r} (column {a[1] + 1}) and "
                    f"{b[2]!r} (column {b[1] + 1}); expected each wavelength once",
                    file=path, line=lineno, field=b[2])
        spectral[prefix] = (np.array([c[0] for c in cols]), [c[1] for c in cols])
    if technique == "ellipsometry":
        psi, delta = (set(spectral[p][0].tolist()) for p in ("psi", "delta"))
        for have, lack, other in ((psi, delta, "delta"), (delta, psi, "psi")):
            alone = sorted(have - lack)
            if alone:
                this = "psi" if other == "delta" else "delta"
                raise FilmmapInputError(
                    f"column {this}@{alone[0]:g} has no matching {other}@{alone[0]:g} column"
                    + (f" ({len(alone)} wavelengths lack one)" if len(alone) > 1 else "")
                    + "; expected psi and delta at the same wavelengths",
                    file=path, line=lineno, field=f"{this}@{alone[0]:g}")
    return fixed, spectral


# --------------------------------------------------------------------------- numeric block

def _count_problem(ncells, ncols, row_text):
    if row_text.lstrip().startswith("#"):
        return (f"row has {ncells} cells but the header has {ncols} columns; '#' comment lines "
                "are allowed only before the header")
    if ncells < ncols:
        return (f"row has {ncells} cells but the header has {ncols} columns: "
                "truncated row (file cut short or cells missing)")
    msg = f"row has {ncells} cells but the header has {ncols} columns"
    if ";" in row_text:
        msg += "; the row contains semicolons, filmmap expects comma separators"
    else:
        msg += ("; extra commas - if the file uses decimal commas (0,45), save it with decimal "
                "points (0.45)")
    return msg


def _cell_problem(cell, name):
    s = cell.strip()
    if not s:
        return f"empty cell in column {name!r}; expected a number"
    msg = f"non-numeric cell {cell!r} in column {name!r}; expected a number"
    if _DECIMAL_COMMA.fullmatch(s):
        msg += " (decimal comma? filmmap expects a decimal point, e.g. 0.45)"
    return msg


def _block_slow(rows, numbers, ncols, text_cols, num_cols, names, path):
    """Cell-by-cell parse with exact diagnostics (quoted data, or after a fast-path failure)."""
    texts = [[] for _ in text_cols]
    block = np.empty((len(rows), len(num_cols)))
    for r, (row, lineno) in enumerate(zip(rows, numbers)):
        cells = _split_csv_line(row, path, lineno)
        if len(cells) != ncols:
            raise FilmmapInputError(_count_problem(len(cells), ncols, row), file=path, line=lineno)
        for t, j in enumerate(text_cols):
            texts[t].append(cells[j].strip())
        for c, j in enumerate(num_cols):
            cell = cells[j]
            s = cell.strip()
            if not _NUMBER.fullmatch(s):
                raise FilmmapInputError(_cell_problem(cell, names[j]), file=path, line=lineno,
                                        field=names[j])
            block[r, c] = float(s)
    return texts, block


def _block_fast(rows, numbers, ncols, text_cols, num_cols, names, path):
    """Parse the data rows: text columns by str.split, numbers by one np.loadtxt call."""
    if any('"' in row for row in rows):
        return _block_slow(rows, numbers, ncols, text_cols, num_cols, names, path)
    commas = ncols - 1
    for row, lineno in zip(rows, numbers):
        if row.count(",") != commas:
            raise FilmmapInputError(_count_problem(row.count(",") + 1, ncols, row),
                                    file=path, line=lineno)
    texts = []
    for j in text_cols:
        texts.append([row.split(",", j + 1)[j].strip() for row in rows])
    try:
        block = np.loadtxt(rows, delimiter=",", usecols=num_cols, dtype=float, comments=None,
                           ndmin=2, quotechar=None)
    except (ValueError, OverflowError):
        # locate the offending cell precisely (and apply the exact same number syntax)
        return _block_slow(rows, numbers, ncols, text_cols, num_cols, names, path)
    return texts, block


def _first_bad(mask):
    """(row, column) of the first True in a 2-D mask, row-major, or None."""
    if not mask.any():
        return None
    r = int(np.argmax(mask.any(axis=1)))
    return r, int(np.argmax(mask[r]))


def _check_finite(block, numbers, num_cols, names, path):
    bad = _first_bad(~np.isfinite(block))
    if bad is not None:
        r, c = bad
        v = block[r, c]
        what = "NaN" if np.isnan(v) else ("+inf" if v > 0 else "-inf")
        name = names[num_cols[c]]
        raise FilmmapInputError(f"{what} in column {name!r}; expected a finite number",
                                file=path, line=numbers[r], field=name)


def _check_integers(values, name, numbers, path, positive):
    ok = (values == np.round(values)) & (np.abs(values) <= _MAX_INDEX)
    if positive:
        ok &= values >= 1
    if not ok.all():
        r = int(np.argmin(ok))
        kind = "a positive integer (1 = load/door end)" if positive else "an integer"
        raise FilmmapInputError(f"{name} {values[r]:g} is not {kind}", file=path,
                                line=numbers[r], field=name)
    return values.astype(np.int64)


def _check_range(values, lo, hi, col_names, numbers, path, message):
    """Reject the first value outside [lo, hi] (None = unbounded), naming line and column.

    ``message`` is formatted with ``value`` and ``column``.
    """
    mask = np.zeros(values.shape, dtype=bool)
    if lo is not None:
        mask |= values < lo
    if hi is not None:
        mask |= values > hi
    bad = _first_bad(mask)
    if bad is not None:
        r, c = bad
        text = message.format(value=f"{values[r, c]:g}", column=repr(col_names[c]))
        raise FilmmapInputError(text, file=path, line=numbers[r], field=col_names[c])


def _check_wavelength_count(spectral, path, lineno):
    """At most MAX_WAVELENGTHS columns per quantity: memory grows with sites x wavelengths."""
    for prefix, (wl, _) in spectral.items():
        if wl.size > MAX_WAVELENGTHS:
            raise FilmmapInputError(f"{wl.size} {prefix}@ columns; expected at most "
                                    f"{MAX_WAVELENGTHS} wavelengths per spectrum", file=path,
                                    line=lineno, field=f"{prefix}@")


def _check_wafer_ids(wafer, numbers, path):
    # the length first: an array of ids takes (rows x the longest id) characters
    for r, w in enumerate(wafer):
        if len(w) > MAX_ID_CHARS:
            raise FilmmapInputError(f"wafer id of {len(w)} characters ({w[:24]!r}...); expected "
                                    f"at most {MAX_ID_CHARS}", file=path, line=numbers[r],
                                    field="wafer")
    for r, w in enumerate(wafer):
        if not w:
            raise FilmmapInputError("empty wafer id; expected a text id", file=path,
                                    line=numbers[r], field="wafer")
        if not w.isprintable():
            raise FilmmapInputError(f"wafer id {w!r} contains non-printable characters",
                                    file=path, line=numbers[r], field="wafer")


# --------------------------------------------------------------------------- public readers

def read_spectra_csv(path, technique, reflectance_unit="fraction", max_bytes=DEFAULT_MAX_BYTES):
    """Read one spectra CSV file (format in the module docstring).

    Parameters
    ----------
    path : str or path-like
        The CSV file; opened read-only, never modified.
    technique : {"reflectance", "ellipsometry", "intensity"}
        What the spectral columns hold: ``R@<nm>``, ``psi@<nm>``/``delta@<nm>``
        or ``I@<nm>``.
    reflectance_unit : {"fraction", "percent"}
        Unit of the ``R@`` values in the file; percent is converted to a fraction.
    max_bytes : int
        Refuse files larger than this many bytes (default 512 MiB).

    Returns
    -------
    SpectraTable

    Raises
    ------
    FilmmapInputError
        Any problem with the file, naming the file, line and column.
    ValueError
        A bad ``technique``, ``reflectance_unit`` or ``max_bytes`` argument
        (a programming error, not bad input).

    Notes
    -----
    Reflectance must be >= 0 and, as a fraction, <= 1.5 (a larger value means
    the file is in percent).  In percent mode, values must be <= 150 and a file
    whose values are all <= 1.5 is rejected as probably holding fractions.
    psi must lie in [0, 90] deg and delta in [-180, 360] deg.  Rows must have
    distinct (wafer, site), one slot per wafer and one wafer per slot.
    """
    check_arguments(technique, reflectance_unit)
    path = Path(path)
    source = read_text_file(path, max_bytes)
    sha, text = source.sha256, source.text
    hline, header_text, rows, numbers = _header_and_rows(text, path)
    names, fixed, spectral = _parse_header(header_text, rows[0] if rows else None, path, hline,
                                           technique, REQUIRED_COLUMNS)
    if not rows:
        raise FilmmapInputError("no data rows after the header; expected one row per site",
                                file=path, line=hline)
    _check_wavelength_count(spectral, path, hline)
    prefixes = QUANTITIES[technique]
    num_cols = [fixed["slot"], fixed["site"], fixed["x_mm"], fixed["y_mm"]]
    for p in prefixes:
        num_cols += spectral[p][1]
    (wafer,), block = _block_fast(rows, numbers, len(names), [fixed["wafer"]], num_cols, names,
                                  path)
    _check_finite(block, numbers, num_cols, names, path)
    _check_wafer_ids(wafer, numbers, path)
    slot = _check_integers(block[:, 0], "slot", numbers, path, positive=True)
    if slot.max() > MAX_BOAT_SLOTS:
        r = int(np.argmax(slot > MAX_BOAT_SLOTS))
        raise FilmmapInputError(f"slot {slot[r]}; expected a boat slot 1 to {MAX_BOAT_SLOTS}",
                                file=path, line=numbers[r], field="slot")
    site = _check_integers(block[:, 1], "site", numbers, path, positive=False)
    wavelength = spectral[prefixes[0]][0]
    n_wl = wavelength.size
    data = {}
    for k, p in enumerate(prefixes):
        start = 4 + k * n_wl
        values = block[:, start:start + n_wl]
        col_names = [names[j] for j in spectral[p][1]]
        if p == "R":
            unit = "%" if reflectance_unit == "percent" else ""
            _check_range(values, 0.0, None, col_names, numbers, path,
                         "negative reflectance {value}" + unit + " in column {column}; "
                         "expected reflectance >= 0")
            if reflectance_unit == "fraction":
                _check_range(values, None, MAX_FRACTION, col_names, numbers, path,
                             "reflectance {value} in column {column} is above "
                             f"{MAX_FRACTION:g}, too large for a fraction 0-1; if the file is "
                             'in percent, set reflectance_unit = "percent" in the lot file')
            else:
                _check_range(values, None, 100 * MAX_FRACTION, col_names, numbers, path,
                             "reflectance {value}% in column {column} is above "
                             f"{100 * MAX_FRACTION:g}%; expected percent 0-100")
                check_percent_is_percent(values, path, numbers[0])
                values = values / 100.0
        elif p == "psi":
            _check_range(values, *PSI_RANGE_DEG, col_names, numbers, path,
                         "psi {value} deg in column {column} is outside "
                         f"[{PSI_RANGE_DEG[0]:g}, {PSI_RANGE_DEG[1]:g}] deg")
        elif p == "delta":
            _check_range(values, *DELTA_RANGE_DEG, col_names, numbers, path,
                         "delta {value} deg in column {column} is outside "
                         f"[{DELTA_RANGE_DEG[0]:g}, {DELTA_RANGE_DEG[1]:g}] deg")
        data[p] = np.ascontiguousarray(values)
    wafer = np.array(wafer, dtype=str)
    ids, first, counts = np.unique(wafer, return_index=True, return_counts=True)
    if counts.max() > MAX_SITES_PER_WAFER:
        k = int(np.argmax(counts))
        raise FilmmapInputError(f"wafer {ids[k]!r} has {counts[k]} sites in this file; expected "
                                f"at most {MAX_SITES_PER_WAFER} sites per wafer", file=path,
                                line=numbers[first[k]], field="site")
    line = np.asarray(numbers, dtype=np.int64)
    check_rows_consistent(
        zip(wafer.tolist(), slot.tolist(), site.tolist(), ((path, n) for n in numbers)), "file")
    return SpectraTable(path=path, sha256=sha, technique=technique, wafer=wafer, slot=slot,
                        site=site, x_mm=np.ascontiguousarray(block[:, 2]),
                        y_mm=np.ascontiguousarray(block[:, 3]), wavelength_nm=wavelength,
                        data=data, line=line)


def read_spectrum_file(path, max_bytes=DEFAULT_MAX_BYTES):
    """Read a single dark or reference intensity spectrum.

    Format: ``#`` comment lines, a header of only ``I@<nm>`` columns (any
    order; sorted by wavelength, duplicates rejected), then exactly one data
    row of finite numbers (counts).

    Parameters
    ----------
    path : str or path-like
        The file; opened read-only.
    max_bytes : int
        Refuse files larger than this many bytes.

    Returns
    -------
    Spectrum

    Raises
    ------
    FilmmapInputError
        Any problem with the file, naming the file and line.
    """
    path = Path(path)
    source = read_text_file(path, max_bytes)
    sha, text = source.sha256, source.text
    hline, header_text, rows, numbers = _header_and_rows(text, path)
    names, _, spectral = _parse_header(header_text, rows[0] if rows else None, path, hline,
                                       "intensity", ())
    if len(rows) != 1:
        raise FilmmapInputError(
            f"expected exactly one data row in a dark/reference spectrum file, found {len(rows)}",
            file=path, line=numbers[1] if len(rows) > 1 else hline)
    _check_wavelength_count(spectral, path, hline)
    wavelength, cols = spectral["I"]
    _, block = _block_fast(rows, numbers, len(names), [], cols, names, path)
    _check_finite(block, numbers, cols, names, path)
    return Spectrum(path=path, sha256=sha, wavelength_nm=wavelength,
                    counts=np.ascontiguousarray(block[0]), line=numbers[0])
