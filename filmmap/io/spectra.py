"""What every spectra reader returns: `SpectraTable` (a file's sites) and `Spectrum` (one
dark or reference spectrum). Every layout (`filmmap.io.layouts`) builds the same table, so
what follows the reading never knows which layout a file had."""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np

__all__ = ["SpectraTable", "Spectrum"]


@dataclass(frozen=True, eq=False)
class SpectraTable:
    """The contents of one spectra file (any layout), one row per measured site.

    Attributes
    ----------
    path : pathlib.Path
        The file read.
    sha256 : str
        Hex SHA-256 of the file bytes (provenance).
    technique : str
        ``"reflectance"``, ``"ellipsometry"`` or ``"intensity"``.
    wafer : numpy.ndarray of str, shape (n_rows,)
        Wafer id of each row.
    slot : numpy.ndarray of int, shape (n_rows,)
        Boat slot (1 = load/door end).
    site : numpy.ndarray of int, shape (n_rows,)
        Site number.
    x_mm, y_mm : numpy.ndarray of float, shape (n_rows,)
        Site position from the wafer centre in mm (notch toward -y).
    wavelength_nm : numpy.ndarray of float, shape (n_wl,)
        Strictly increasing wavelengths in nm.
    data : dict of str to numpy.ndarray, each shape (n_rows, n_wl)
        ``{"R": reflectance as a fraction}``, ``{"psi": deg, "delta": deg}``
        or ``{"I": counts}``.
    line : numpy.ndarray of int, shape (n_rows,)
        1-based line number of each row in the file.

    Notes
    -----
    Treat the arrays as read-only: they are the measured data.
    """

    path: Path
    sha256: str
    technique: str
    wafer: np.ndarray
    slot: np.ndarray
    site: np.ndarray
    x_mm: np.ndarray
    y_mm: np.ndarray
    wavelength_nm: np.ndarray
    data: dict
    line: np.ndarray

    @property
    def n_rows(self):
        """Number of measured sites (rows)."""
        return int(self.slot.size)

    @property
    def n_wavelengths(self):
        """Number of wavelengths."""
        return int(self.wavelength_nm.size)

    def where(self, row):
        """``"file:line"`` of a row index, for messages."""
        return f"{self.path}:{int(self.line[row])}"


@dataclass(frozen=True, eq=False)
class Spectrum:
    """A single dark or reference intensity spectrum.

    Attributes
    ----------
    path : pathlib.Path
        The file read.
    sha256 : str
        Hex SHA-256 of the file bytes.
    wavelength_nm : numpy.ndarray of float, shape (n_wl,)
        Strictly increasing wavelengths in nm.
    counts : numpy.ndarray of float, shape (n_wl,)
        Detector intensity in counts.
    line : int
        1-based line number of the data row.
    """

    path: Path
    sha256: str
    wavelength_nm: np.ndarray
    counts: np.ndarray
    line: int
