"""Which wafers enter the lot statistics: the minimum-usable-sites rule.

A wafer mean from a handful of sites says little about the wafer. A wafer with
``sites_used < min_sites`` is *excluded*: its mean counts as NaN in every lot figure (grand
mean, WTW non-uniformity, slot profile, advice, history), while its own numbers are still
listed as measured. The default of 5 sites (centre plus one cross) is the smallest site
pattern that samples the wafer beyond its centre (common practice, no source).
"""

from __future__ import annotations

import numpy as np

from filmmap.errors import FilmmapInputError

#: Fewest usable sites for a wafer to enter the lot statistics.
DEFAULT_MIN_SITES = 5

__all__ = ["DEFAULT_MIN_SITES", "check_min_sites", "usable_wafers", "lot_means", "exclusion_note"]


def check_min_sites(min_sites):
    """`min_sites` as an int >= 1, or FilmmapInputError naming the field."""
    if isinstance(min_sites, bool) or int(min_sites) != min_sites or min_sites < 1:
        raise FilmmapInputError(f"min_sites must be an integer >= 1, got {min_sites!r}",
                                field="min_sites")
    return int(min_sites)


def usable_wafers(sites_used, min_sites=DEFAULT_MIN_SITES):
    """True for the wafers with at least `min_sites` usable sites.

    Parameters
    ----------
    sites_used : array_like
        Usable sites per wafer (NaN counts as 0).
    min_sites : int
        Fewest usable sites (>= 1).

    Returns
    -------
    numpy.ndarray of bool
    """
    used = np.nan_to_num(np.asarray(sites_used, dtype=float), nan=0.0)
    return used >= check_min_sites(min_sites)


def lot_means(mean_nm, sites_used, min_sites=DEFAULT_MIN_SITES):
    """Wafer means as the lot statistics use them: NaN for an excluded wafer.

    Parameters
    ----------
    mean_nm : array_like
        Within-wafer means, nm.
    sites_used : array_like
        Usable sites per wafer.
    min_sites : int
        Fewest usable sites.

    Returns
    -------
    numpy.ndarray
        nm.
    """
    return np.where(usable_wafers(sites_used, min_sites), np.asarray(mean_nm, dtype=float),
                    np.nan)


def exclusion_note(sites_used, min_sites):
    """Why a wafer is left out, in words."""
    used = int(sites_used)
    return (f"only {used} usable site{'s' if used != 1 else ''}, fewer than {int(min_sites)}: "
            "left out of the lot statistics")
