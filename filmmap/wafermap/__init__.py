"""Wafer maps: site patterns, within-wafer statistics, Zernike terms, surfaces and figures.

Pure functions on numpy arrays, vectorised over the wafers of a lot. Shared
conventions: thickness in nm with shape (n_wafers, n_sites) (NaN = missing),
an ``ok`` mask of the same (or broadcastable) shape, site coordinates x_mm,
y_mm of shape (n_sites,) with the origin at the wafer centre and the notch
toward -y, angles in degrees from +x counter-clockwise. Figures live in
`filmmap.wafermap.figures` (imported on demand, it loads matplotlib).
"""

from filmmap.wafermap.sites import (LAYOUTS, SITE_COUNTS, Sites, check_wafer,
                                    inside_edge_exclusion, polar_sites, ring_sites)
from filmmap.wafermap.stats import WaferStats, usable_sites, within_wafer_stats
from filmmap.wafermap.surface import (LeaveOneOut, PolarSurface, Surface, grid_axes,
                                      tps_loo, tps_polar_surface, tps_surface)
from filmmap.wafermap.zernike import (RadialProfile, ZernikeFit, choose_order, measured_radius,
                                      n_terms, noll_to_nm, noll_zernike, radial_profile,
                                      zernike_basis, zernike_evaluate, zernike_fit,
                                      zernike_radial)

__all__ = [
    "LAYOUTS", "SITE_COUNTS", "Sites", "check_wafer", "inside_edge_exclusion", "polar_sites",
    "ring_sites", "WaferStats", "usable_sites", "within_wafer_stats", "LeaveOneOut",
    "PolarSurface", "Surface", "grid_axes", "tps_loo", "tps_polar_surface", "tps_surface",
    "RadialProfile", "ZernikeFit", "choose_order", "measured_radius", "n_terms", "noll_to_nm",
    "noll_zernike", "radial_profile", "zernike_basis", "zernike_evaluate", "zernike_fit",
    "zernike_radial",
]
