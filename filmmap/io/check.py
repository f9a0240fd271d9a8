"""``filmmap check``: a lot file and its data validated without fitting anything.

Reads the lot file, the site and slot maps and every data file with its layout's
reader, then checks the files against each other, the wafer and the boat, exactly as
a reduce does before its first fit. Nothing is written.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from filmmap.io.layouts import PARTIAL_WAFER_LAYOUTS, read_spectra
from filmmap.io.layouts.maps import lot_maps
from filmmap.io.lotchecks import check_tables
from filmmap.io.lotfile import read_lot_file


@dataclass
class CheckReport:
    """What `check_lot` found (all counts over the whole lot)."""

    lot_id: str
    layout: str
    n_files: int
    n_wafers: int
    n_sites: int
    n_wavelengths: int
    wavelength_range_nm: tuple
    slots: list


def check_lot(lot_file):
    """Validate a lot file and its data without fitting.

    Parameters
    ----------
    lot_file : path-like

    Returns
    -------
    CheckReport

    Raises
    ------
    FilmmapInputError
        The first problem, naming file, line and field (as a reduce would).
    """
    config = read_lot_file(lot_file)
    m = config.measurement
    maps, _inputs = lot_maps(m)
    tables = [read_spectra(p, m.file_technique, m.file_unit, m.layout, maps) for p in m.files]
    boat = config.boat.slots if config.boat is not None else None
    check_tables(tables, m.wafer_diameter_mm, boat,
                 wafer_per_file=m.layout not in PARTIAL_WAFER_LAYOUTS)
    wafers = np.unique(np.concatenate([t.wafer for t in tables]))
    slots = sorted({int(s) for t in tables for s in t.slot})
    wl = tables[0].wavelength_nm
    return CheckReport(lot_id=config.lot.id, layout=m.layout, n_files=len(tables),
                       n_wafers=int(wafers.size), n_sites=int(sum(t.n_rows for t in tables)),
                       n_wavelengths=int(wl.size),
                       wavelength_range_nm=(float(wl[0]), float(wl[-1])), slots=slots)
