"""Which sign convention of Delta the data follow: a check on a sample of spectra.

Ellipsometers differ in the sign convention of Delta: filmmap uses the one of
Azzam & Bashara (1977) and Tompkins (1993), Delta = 180 deg for a bare
transparent substrate below its Brewster angle (N = n - ik, time factor
exp(+i w t)); data written with the opposite sign carry 360 - Delta. Such data
fit the stack badly at every thickness, or (single wavelength) land on another
thickness. Fitting a sample both ways tells which convention the data follow.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class ConventionCheck:
    """Outcome of `check_delta_convention` on a sample of spectra.

    Attributes
    ----------
    n_sampled : int
        Spectra fitted both ways.
    accepted_as_given, accepted_reversed : int
        Accepted fits with Delta as given and with 360 - Delta.
    median_chi2_as_given, median_chi2_reversed : float
        Median reduced chi-square of the two ways.
    """

    n_sampled: int
    accepted_as_given: int
    accepted_reversed: int
    median_chi2_as_given: float
    median_chi2_reversed: float

    @property
    def reversed_fits_better(self):
        """True when 360 - Delta explains the data far better than Delta as given.

        "Far better": at least half the sample more accepted, or a median reduced
        chi-square ten times lower while the data as given fit poorly (above 3).
        Both thresholds are ours (common practice, no source): wide enough that noise
        never triggers them, since a real convention error changes the fit entirely.
        """
        if self.n_sampled == 0:
            return False
        more = self.accepted_reversed - self.accepted_as_given >= 0.5 * self.n_sampled
        lower = (self.median_chi2_as_given > 3.0
                 and self.median_chi2_reversed < 0.1 * self.median_chi2_as_given)
        return bool(more or lower)

    @staticmethod
    def combine(checks):
        """One check from several (e.g. the batches of a lot); medians are sample-weighted."""
        checks = [c for c in checks if c is not None and c.n_sampled]
        if not checks:
            return ConventionCheck(0, 0, 0, np.nan, np.nan)
        w = np.array([c.n_sampled for c in checks], dtype=float)
        return ConventionCheck(
            int(w.sum()), sum(c.accepted_as_given for c in checks),
            sum(c.accepted_reversed for c in checks),
            float(np.average([c.median_chi2_as_given for c in checks], weights=w)),
            float(np.average([c.median_chi2_reversed for c in checks], weights=w)))


REVERSED_DELTA_HINT = ("Delta convention: the data fit far better with 360 - Delta; the "
                       "instrument seems to write the opposite sign (set delta_convention = "
                       "\"reversed\" in [measurement])")
"""The words a user sees, once per lot and in the reasons of the rejected sites."""


def check_delta_convention(fit, psi, delta, sample=24):
    """Fit a sample of spectra with Delta as given and with 360 - Delta.

    Parameters
    ----------
    fit : callable (psi, delta) -> FitResult
        The lot's fit (same stack, wavelengths, angle and free parameters).
    psi, delta : numpy.ndarray (n, m)
        Psi and Delta in degrees.
    sample : int
        At most this many spectra, spread evenly over the batch.

    Returns
    -------
    ConventionCheck
    """
    n = psi.shape[0]
    if n == 0:
        return ConventionCheck(0, 0, 0, np.nan, np.nan)
    idx = np.unique(np.linspace(0, n - 1, min(sample, n)).round().astype(int))
    a = fit(psi[idx], delta[idx])
    b = fit(psi[idx], np.mod(360.0 - delta[idx], 360.0))
    return ConventionCheck(int(idx.size), int(a.ok.sum()), int(b.ok.sum()),
                           float(np.nanmedian(a.reduced_chi2)), float(np.nanmedian(b.reduced_chi2)))
