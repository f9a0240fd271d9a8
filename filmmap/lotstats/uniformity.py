"""Non-uniformity: the one definition, 100 x sample standard deviation / mean, in percent.

Used for within-wafer (WIW, over the sites of a wafer) and wafer-to-wafer (WTW, over the
wafer means of a lot) non-uniformity alike, and for the predicted profiles of the advice
and the run-to-run estimate.
"""

from __future__ import annotations

import numpy as np

__all__ = ["nonuniformity_pct", "percent_of_mean"]


def percent_of_mean(sigma, mean):
    """``100 sigma / mean`` in percent, NaN where the mean is not positive.

    Parameters
    ----------
    sigma : array_like
        Standard deviation, in the unit of `mean` (e.g. nm).
    mean : array_like
        Mean, same unit.

    Returns
    -------
    numpy.ndarray or float
        Percent; NaN where ``mean <= 0`` or either value is NaN.
    """
    sigma = np.asarray(sigma, dtype=float)
    mean = np.asarray(mean, dtype=float)
    with np.errstate(invalid="ignore", divide="ignore"):
        out = np.where(mean > 0, 100.0 * sigma / mean, np.nan)
    return float(out) if out.ndim == 0 else out


def nonuniformity_pct(values, axis=None):
    """1-sigma non-uniformity of `values`, NaN ignored: 100 s / mean, s with n - 1.

    Parameters
    ----------
    values : array_like
        Thicknesses (nm) or wafer means (nm); NaN entries are left out.
    axis : int, optional
        Axis to reduce (None = all values).

    Returns
    -------
    float or numpy.ndarray
        Percent; NaN where fewer than 2 values remain or the mean is not positive.

    References
    ----------
    .. [1] Non-uniformity as 100 sigma / mean with the n - 1 (sample) standard deviation,
       as used for furnace film uniformity: common practice, no source.
    """
    x = np.asarray(values, dtype=float)
    finite = np.isfinite(x)
    n = finite.sum(axis=axis)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(finite, x, 0.0).sum(axis=axis) / n
        dev = np.where(finite, x - (mean if axis is None else np.expand_dims(mean, axis)), 0.0)
        var = (dev * dev).sum(axis=axis) / (n - 1)
        sigma = np.where(n >= 2, np.sqrt(var), np.nan)
    return percent_of_mean(sigma, mean)
