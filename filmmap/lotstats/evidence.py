"""Which sites' spectra are kept as evidence: the failed, the suspect, the worst-fitting.

A measured-vs-model overlay explains why a site failed (a particle scales the fringes
down, a probe off the wafer gives a flat spectrum, a scale error the right shape at
another level). Keeping every spectrum of a lot costs memory that grows with the lot
(``--keep-spectra``); the report needs only a few: the worst sites of each failure cause
taken in turn, the suspect sites, and a few worst-fitting accepted ones.
`evidence_rows` chooses them - at most `EVIDENCE_SITES` plus the worst accepted - in the
order the report shows them (`filmmap.report.evidence`).
"""

from __future__ import annotations

import numpy as np

from filmmap.lotstats.causes import failure_cause

EVIDENCE_SITES = 48
"""Most failed and suspect sites per lot whose spectra are kept without --keep-spectra.

Four times the report page's dozen (`filmmap.report.evidence.MAX_ON_PAGE`): a round of
each cause in turn reaches the page's sites with room to spare for the causes a lot has
(common practice, no source)."""

N_WORST_ACCEPTED = 4
"""Accepted, not suspect sites with the worst fit quality also kept: what a good fit of the
lot looks like next to the bad ones."""


def take_in_turn(queues, limit):
    """The first item of each queue, then the second of each, ..., at most ``limit`` items.

    Parameters
    ----------
    queues : sequence of sequence
    limit : int

    Returns
    -------
    list
    """
    chosen, depth = [], 0
    while len(chosen) < limit and any(depth < len(q) for q in queues):
        for q in queues:
            if depth < len(q) and len(chosen) < limit:
                chosen.append(q[depth])
        depth += 1
    return chosen


def evidence_rows(ok, suspect, note, quality, limit=EVIDENCE_SITES,
                  n_worst_accepted=N_WORST_ACCEPTED):
    """Rows of the sites whose spectra are kept as evidence, in the report's order.

    The failed sites grouped by cause (`filmmap.lotstats.causes.failure_cause`, causes with more sites first) and the
    suspect sites after them, each group worst first (highest ``quality``), taken in turn
    (`take_in_turn`) up to ``limit``; then the ``n_worst_accepted`` accepted, not suspect
    sites of highest ``quality``.

    Parameters
    ----------
    ok : array_like of bool, shape (n,)
        Accepted fits.
    suspect : array_like of bool, shape (n,)
        Suspect flags (`filmmap.fitting.suspect.flag_suspects`).
    note : array_like of str, shape (n,)
        Fit notes.
    quality : array_like of float, shape (n,)
        Fit quality (reduced chi-square, dimensionless); NaN ranks last.
    limit : int
        Most failed plus suspect rows.
    n_worst_accepted : int
        Accepted rows added after them.

    Returns
    -------
    numpy.ndarray of int
        Distinct rows, at most ``limit + n_worst_accepted``.
    """
    ok = np.asarray(ok, dtype=bool)
    suspect = np.asarray(suspect, dtype=bool) & ok
    q = np.asarray(quality, dtype=float)
    q = np.where(np.isfinite(q), q, -np.inf)
    note = np.asarray(note)
    groups = {}
    for k in np.flatnonzero(~ok):
        groups.setdefault(failure_cause(note[k]), []).append(k)
    worst_first = [sorted(rows, key=lambda k: -q[k])
                   for rows in sorted(groups.values(), key=lambda rows: -len(rows))]
    sus = np.flatnonzero(suspect)
    if sus.size:
        worst_first.append(list(sus[np.argsort(-q[sus], kind="stable")]))
    chosen = take_in_turn(worst_first, int(limit))
    good = np.flatnonzero(ok & ~suspect)
    chosen += list(good[np.argsort(-q[good], kind="stable")][:int(n_worst_accepted)])
    return np.asarray(chosen, dtype=np.intp)


def batch_evidence_rows(ok, note, quality, limit=EVIDENCE_SITES,
                        n_worst_accepted=N_WORST_ACCEPTED):
    """Rows of one batch of a lot whose spectra may be lot evidence (`evidence_rows`).

    A batch does not know which of its sites the lot will call suspect (that needs the
    lot's median fit quality), nor how the lot's causes rank, so it keeps more: the failed
    sites of each cause in turn and the worst failed sites regardless of cause (each up to
    ``limit``), and the ``limit + n_worst_accepted`` accepted sites of highest ``quality``
    (the lot's suspect and worst accepted sites are among the highest of their batch). The
    lot's choice is then among them, but for a rare tie at the end of the last round of
    causes; a site missed so is shown without its spectrum.

    Returns
    -------
    numpy.ndarray of int
        Distinct rows of the batch, sorted, at most ``3 * limit + n_worst_accepted``.
    """
    ok = np.asarray(ok, dtype=bool)
    q = np.asarray(quality, dtype=float)
    q = np.where(np.isfinite(q), q, -np.inf)
    by_cause = evidence_rows(ok, np.zeros_like(ok), note, q, limit,
                             n_worst_accepted=limit + n_worst_accepted)
    failed = np.flatnonzero(~ok)
    worst_failed = failed[np.argsort(-q[failed], kind="stable")][:int(limit)]
    return np.union1d(by_cause, worst_failed).astype(np.intp)


__all__ = ["EVIDENCE_SITES", "N_WORST_ACCEPTED", "batch_evidence_rows", "evidence_rows",
           "take_in_turn"]
