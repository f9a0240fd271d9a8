"""Within-wafer uniformity statistics (WIWNU), vectorised over the wafers of a lot.

Definitions (common practice, no source; filmmap pins them here). Over the N
*usable* sites of a wafer - inside the edge exclusion, finite thickness, fit
flag ok - with thickness t_i in nm:

* ``sites_used`` = N
* ``mean_nm``  = (1/N) sum t_i
* ``sigma_nm`` = sqrt( sum (t_i - mean)^2 / (N - 1) )  (sample standard deviation)
* ``nu_pct``   = 100 sigma / mean  (1-sigma non-uniformity, NU%)
* ``min_nm``, ``max_nm`` = smallest and largest t_i
* ``range_nm`` = max - min
* ``halfrange_pct`` = 100 (max - min) / (2 mean)  (half-range non-uniformity)

Degenerate wafers: N = 0 gives NaN for every figure (``sites_used`` 0);
N = 1 gives mean = min = max = that value, range 0 and half-range 0 %, but
sigma and NU% NaN (no spread can be estimated from one site). NU% and
half-range % are NaN when the mean is not positive.
"""

from __future__ import annotations

from dataclasses import dataclass, fields

import numpy as np

from filmmap.wafermap.sites import check_wafer, inside_edge_exclusion, lot_arrays


@dataclass(frozen=True)
class WaferStats:
    """Uniformity figures per wafer; each attribute has shape (W,) (scalar for one wafer).

    Attributes
    ----------
    sites_used : number of usable sites (int).
    mean_nm, sigma_nm : mean and sample standard deviation, nm.
    nu_pct : 100 sigma / mean, %.
    min_nm, max_nm, range_nm : extremes and their difference, nm.
    halfrange_pct : 100 (max - min) / (2 mean), %.
    """

    sites_used: np.ndarray
    mean_nm: np.ndarray
    sigma_nm: np.ndarray
    nu_pct: np.ndarray
    min_nm: np.ndarray
    max_nm: np.ndarray
    range_nm: np.ndarray
    halfrange_pct: np.ndarray

    def as_dict(self):
        """The figures as a plain ``{name: array}`` dict (e.g. for an xarray Dataset)."""
        return {f.name: getattr(self, f.name) for f in fields(self)}


def usable_sites(thickness_nm, ok, x_mm, y_mm, diameter_mm, edge_exclusion_mm):
    """Mask of the sites that enter the statistics.

    Parameters
    ----------
    thickness_nm : array_like, shape (W, n_sites) or (n_sites,)
        Thickness in nm, NaN for a missing site.
    ok : array_like of bool or None
        Fit-quality flag broadcastable to ``thickness_nm``; None = all ok.
    x_mm, y_mm : array_like, shape (n_sites,)
        Site coordinates in mm.
    diameter_mm, edge_exclusion_mm : float
        Wafer diameter and edge exclusion in mm.

    Returns
    -------
    numpy.ndarray of bool, same shape as ``thickness_nm``
        ok & finite & inside the edge exclusion.

    References
    ----------
    .. [1] Common practice, no source.
    """
    t, good, x, y, single = lot_arrays(thickness_nm, ok, x_mm, y_mm)
    use = good & inside_edge_exclusion(x, y, diameter_mm, edge_exclusion_mm)
    return use[0] if single else use


def within_wafer_stats(thickness_nm, ok, x_mm, y_mm, diameter_mm, edge_exclusion_mm):
    """Within-wafer mean, sigma, NU%, extremes and half-range of every wafer.

    Parameters
    ----------
    thickness_nm : array_like, shape (W, n_sites) or (n_sites,)
        Thickness in nm, NaN for a missing site.
    ok : array_like of bool or None
        Fit-quality flag per site broadcastable to ``thickness_nm``; None = all ok.
    x_mm, y_mm : array_like, shape (n_sites,)
        Site coordinates in mm (wafer-centre origin).
    diameter_mm : float
        Wafer diameter in mm.
    edge_exclusion_mm : float
        Edge exclusion in mm; sites beyond D/2 - edge exclusion are ignored.

    Returns
    -------
    WaferStats
        Arrays of shape (W,), or scalars for a 1-D input; definitions and the
        0- and 1-site cases in the module docstring.

    References
    ----------
    .. [1] Common practice, no source: mean, sample standard deviation
       (N - 1 denominator), 1-sigma non-uniformity and half-range
       non-uniformity as used for furnace film uniformity.
    """
    d, ee = check_wafer(diameter_mm, edge_exclusion_mm)
    t, good, x, y, single = lot_arrays(thickness_nm, ok, x_mm, y_mm)
    use = good & inside_edge_exclusion(x, y, d, ee)
    n = use.sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(use, t, 0.0).sum(axis=1) / n
        # two-pass variance: deviations from the mean, not E[t^2] - mean^2
        dev = np.where(use, t - mean[:, None], 0.0)
        var = np.where(n >= 2, np.einsum("ij,ij->i", dev, dev) / (n - 1), np.nan)
        sigma = np.sqrt(var)
        lo = np.where(n > 0, np.where(use, t, np.inf).min(axis=1), np.nan)
        hi = np.where(n > 0, np.where(use, t, -np.inf).max(axis=1), np.nan)
        span = hi - lo
        positive = mean > 0
        nu = np.where(positive, 100.0 * sigma / mean, np.nan)
        half = np.where(positive, 100.0 * span / (2.0 * mean), np.nan)
    out = dict(sites_used=n, mean_nm=mean, sigma_nm=sigma, nu_pct=nu, min_nm=lo, max_nm=hi,
               range_nm=span, halfrange_pct=half)
    if single:
        out = {k: v[0] for k, v in out.items()}
    return WaferStats(**out)
