"""Fitting: thickness (and optional dispersion) from batches of spectra."""

from filmmap.fitting.fit import (DEFAULT_SEARCH_NM, FitResult, default_sigma, fit_spectra,
                                 free_parameters, thickness_search_range)
from filmmap.fitting.model import ELLIPSOMETRY, REFLECTANCE, FreeParameter, SpectralModel

__all__ = ["fit_spectra", "FitResult", "free_parameters", "FreeParameter", "SpectralModel",
           "default_sigma", "thickness_search_range", "DEFAULT_SEARCH_NM", "REFLECTANCE",
           "ELLIPSOMETRY"]
