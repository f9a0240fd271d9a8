"""Failure causes of sites, counted the one way every report and summary counts them.

A rejected fit's note starts with its cause (`filmmap.fitting.fit`: ``no usable data``,
``no film signal``, ``wrong stack``, ``ambiguous``, ``at search bound``, ``did not
converge``, ``Delta convention``...), then a colon and the detail.
"""

from __future__ import annotations

from collections import Counter

__all__ = ["NO_REASON", "failure_cause", "count_causes"]

#: Cause of a rejected site whose note is empty.
NO_REASON = "no reason recorded"


def failure_cause(note):
    """The cause of a rejected fit: its note's text before the first ':'."""
    note = str(note or "")
    return note.split(":")[0].strip() or NO_REASON


def count_causes(notes):
    """``{cause: count}``, most frequent first.

    Parameters
    ----------
    notes : iterable of str
        Notes of the rejected sites.

    Returns
    -------
    dict
    """
    return dict(Counter(failure_cause(n) for n in notes).most_common())
