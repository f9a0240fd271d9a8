"""The wide CSV (filmmap's own, pinned): one row per site, ``wafer, slot, site, x_mm, y_mm, R@<nm>...``.

Format: `filmmap.io.spectra_csv`. This module adds the micrometre check, which the
wide reader alone turns into a less helpful material-range error later.
"""

from __future__ import annotations

from pathlib import Path

from filmmap.io.layouts.common import check_wavelengths
from filmmap.io.spectra_csv import read_spectra_csv

NAME = "wide"
EXAMPLE = """\
wafer,slot,site,x_mm,y_mm,R@400,R@410,R@420
W2-04,4,1,0.000,0.000,0.2512,0.2633,0.2741
W2-04,4,2,36.000,0.000,0.2498,0.2620,0.2736
W2-05,5,1,0.000,0.000,0.2509,0.2630,0.2740
W2-05,5,2,36.000,0.000,0.2501,0.2624,0.2737
"""


def read(path, technique, unit, maps):
    """One wide CSV file as a `SpectraTable` (the maps are not used: the rows carry all)."""
    table = read_spectra_csv(Path(path), technique, unit)
    check_wavelengths(table.wavelength_nm, table.path, max(1, int(table.line[0]) - 1))
    return table
