"""Suspect sites: accepted fits whose quality is far worse than their lot's typical one.

Within one lot every site is measured by the same instrument with the same
stack, so the reduced chi-square of good sites clusters around one value. A
site whose fit is many times worse than that, while still under the absolute
"wrong stack" limit, usually has a local cause: a particle or scratch, the
probe half off the wafer edge, a local contamination. Its thickness is still
reported, flagged so that a user looks at its spectrum before trusting it.
"""

from __future__ import annotations

import numpy as np

SUSPECT_FACTOR = 10.0
"""A site is suspect when its reduced chi-square exceeds this many times the lot median
(common practice, no source: a factor that noise alone reaches essentially never with
the tens to hundreds of points of a spectrum)."""

SUSPECT_FLOOR = 2.0
"""...and exceeds this absolute value, so a lot fitted far below its noise model (median
0.05, say) does not flag sites that fit to the noise."""


def flag_suspects(reduced_chi2, ok, factor=SUSPECT_FACTOR, floor=SUSPECT_FLOOR):
    """Suspect flags and their reasons for the accepted fits of a lot.

    Parameters
    ----------
    reduced_chi2 : numpy.ndarray (n,)
        Fit quality of every site (dimensionless).
    ok : numpy.ndarray (n,) of bool
        Accepted fits; only these can be suspect, and only they set the median.
    factor, floor : float
        Thresholds: suspect when reduced_chi2 > max(factor * median, floor).

    Returns
    -------
    suspect : numpy.ndarray (n,) of bool
    reason : numpy.ndarray (n,) of str
        "" where not suspect.
    """
    red = np.asarray(reduced_chi2, dtype=float)
    ok = np.asarray(ok, dtype=bool)
    suspect = np.zeros(red.shape, dtype=bool)
    reason = np.full(red.shape, "", dtype=object)
    good = ok & np.isfinite(red)
    if good.sum() < 3:
        return suspect, reason.astype(str)
    median = float(np.median(red[good]))
    limit = max(factor * median, floor)
    suspect = good & (red > limit)
    for k in np.nonzero(suspect)[0]:
        reason[k] = (f"suspect: fit quality {red[k]:.3g} is {red[k] / max(median, 1e-300):.0f} x "
                     f"the lot median {median:.3g} (a particle, the probe off the wafer edge or "
                     "a local film defect?); look at its spectrum before trusting the thickness")
    return suspect, reason.astype(str)
