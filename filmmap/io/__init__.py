"""Input readers (spectra CSV files, the lot file) and atomic output writes."""

from filmmap.io.atomic import atomic_path, write_bytes_atomic, write_text_atomic
from filmmap.io.lotfile import (BoatConfig, CauchySpec, FurnaceConfig, LayerConfig, LotConfig,
                                LotInfo, MeasurementConfig, RecipeStep, StackConfig, TargetConfig,
                                Zone, read_lot_file)
from filmmap.io.spectra_csv import (DEFAULT_MAX_BYTES, SpectraTable, Spectrum, check_tables,
                                    read_spectra_csv, read_spectrum_file)

__all__ = [
    "read_spectra_csv", "read_spectrum_file", "check_tables", "SpectraTable", "Spectrum",
    "DEFAULT_MAX_BYTES",
    "read_lot_file", "LotConfig", "LotInfo", "MeasurementConfig", "StackConfig", "LayerConfig",
    "CauchySpec", "TargetConfig", "BoatConfig", "Zone", "FurnaceConfig", "RecipeStep",
    "atomic_path", "write_bytes_atomic", "write_text_atomic",
]
