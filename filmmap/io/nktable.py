"""A user material's n,k table (``nk_file`` of a ``[[stack.layer]]``) as a `Tabulated` model.

Format: UTF-8 CSV; ``#`` comment lines (kept as the material's source text); a header
``wavelength_nm,n,k``; then one row per wavelength, strictly increasing, with finite n and
k >= 0 (N = n - ik: k absorbs). Read through `filmmap.io.textfile` like every input; every
problem names the file and the line.
"""

from __future__ import annotations

import csv
from pathlib import Path

import numpy as np

from filmmap.errors import FilmmapInputError
from filmmap.io.textfile import read_text_file
from filmmap.materials import Tabulated

__all__ = ["read_nk_table"]

#: Largest n,k table read, bytes (a table of a few thousand rows is far below it).
MAX_NK_TABLE_BYTES = 16 * 2**20


def read_nk_table(path, name=None, extrapolate=False, max_bytes=MAX_NK_TABLE_BYTES):
    """Read an n,k table into a `filmmap.materials.Tabulated` material.

    Parameters
    ----------
    path : str or path-like
        The CSV file; opened read-only.
    name : str, optional
        Material name (default: the file stem).
    extrapolate : bool
        Allow evaluation outside the table.
    max_bytes : int
        Refuse files larger than this many bytes.

    Returns
    -------
    filmmap.materials.Tabulated
        Interpolated by PCHIP (Fritsch & Carlson 1980); its ``source`` is the comment
        lines (or the path).

    Raises
    ------
    FilmmapInputError
        Naming the file and line: not readable text, a wrong header, a row without three
        finite numbers, a negative k, wavelengths not strictly increasing, fewer than two
        rows.
    """
    path = Path(path)
    text = read_text_file(path, max_bytes, what="n,k table").text
    comments, rows = [], []
    header = None
    for lineno, line in enumerate(text.split("\n"), start=1):
        if not line.strip():
            continue
        if line.lstrip().startswith("#"):
            comments.append(line.lstrip("# ").rstrip())
            continue
        try:
            cells = next(csv.reader([line]))
        except csv.Error as exc:
            raise FilmmapInputError(f"cannot read n,k table: {exc}", file=path,
                                    line=lineno) from None
        if header is None:
            header = [c.strip() for c in cells]
            if header[:3] != ["wavelength_nm", "n", "k"]:
                raise FilmmapInputError(
                    f"expected header 'wavelength_nm,n,k', found {','.join(header)!r}",
                    file=path, line=lineno)
            continue
        try:
            rows.append([float(c) for c in cells[:3]])
        except ValueError:
            raise FilmmapInputError(f"expected three numbers, found {line.strip()!r}",
                                    file=path, line=lineno) from None
        if len(cells) < 3 or not all(np.isfinite(rows[-1])):
            raise FilmmapInputError("expected three finite numbers wavelength_nm,n,k",
                                    file=path, line=lineno)
        if rows[-1][2] < 0:
            raise FilmmapInputError(f"k = {rows[-1][2]:g} is negative: k must be >= 0 "
                                    "(N = n - ik, k absorbs)", file=path, line=lineno)
        if len(rows) > 1 and rows[-1][0] <= rows[-2][0]:
            raise FilmmapInputError(
                f"wavelength {rows[-1][0]:g} nm does not follow {rows[-2][0]:g} nm; expected "
                "strictly increasing wavelengths", file=path, line=lineno)
    if header is None or len(rows) < 2:
        raise FilmmapInputError("n,k table needs a header and at least two rows", file=path)
    data = np.array(rows)
    try:
        return Tabulated(name or path.stem, data[:, 0], data[:, 1], data[:, 2],
                         source=" ".join(comments) or str(path), extrapolate=extrapolate)
    except ValueError as exc:
        raise FilmmapInputError(str(exc), file=path) from None
