"""Input readers (the lot file, spectra of every layout) and atomic output writes.

- `read_lot_file` (`filmmap.io.lotfile`): the lot description.
- `read_spectra` (`filmmap.io.layouts`): one spectra file of any layout, the one entry of
  the spectra readers; `read_spectra_csv` is the wide CSV parser behind layout ``wide``.
- `check_tables` (`filmmap.io.lotchecks`): a lot's spectra files against each other.
- `intensity_to_reflectance`, `read_dark_and_reference` (`filmmap.io.intensity`):
  raw-intensity mode.
- `read_nk_table` (`filmmap.io.nktable`): a user material's n,k table.
- `read_text_file` (`filmmap.io.textfile`): the strict text-file reading they all share.
"""

from filmmap.atomic import atomic_path, write_bytes_atomic, write_text_atomic
from filmmap.io.intensity import intensity_to_reflectance, read_dark_and_reference
from filmmap.io.layouts import LAYOUTS, read_spectra
from filmmap.io.lotchecks import check_tables
from filmmap.io.lotfile import (BoatConfig, CauchySpec, FurnaceConfig, LayerConfig, LotConfig,
                                LotInfo, MeasurementConfig, RecipeStep, StackConfig, TargetConfig,
                                Zone, read_lot_file)
from filmmap.io.nktable import read_nk_table
from filmmap.io.spectra import SpectraTable, Spectrum
from filmmap.io.spectra_csv import read_spectra_csv, read_spectrum_file
from filmmap.io.techniques import REFLECTANCE_UNITS, TECHNIQUES
from filmmap.io.textfile import DEFAULT_MAX_BYTES, read_text_file

__all__ = [
    "read_spectra", "LAYOUTS", "TECHNIQUES", "REFLECTANCE_UNITS",
    "read_spectra_csv", "read_spectrum_file", "check_tables", "SpectraTable", "Spectrum",
    "intensity_to_reflectance", "read_dark_and_reference", "read_nk_table",
    "DEFAULT_MAX_BYTES", "read_text_file",
    "read_lot_file", "LotConfig", "LotInfo", "MeasurementConfig", "StackConfig", "LayerConfig",
    "CauchySpec", "TargetConfig", "BoatConfig", "Zone", "FurnaceConfig", "RecipeStep",
    "atomic_path", "write_bytes_atomic", "write_text_atomic",
]
