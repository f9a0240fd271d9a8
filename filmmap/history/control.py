"""Control-chart statistics of a furnace's run history: Shewhart individuals charts with the
Western Electric run rules, and EWMA charts (pure numpy).

Individuals chart (Shewhart).  One value per lot (the lot mean, the wafer-to-wafer
non-uniformity WTW, the mean within-wafer non-uniformity WIW).  The limits come from a
*baseline window* of lots judged to be in control: the centre line is the mean of the
baseline values and sigma is estimated from their average moving range,
``sigma = MR_bar / d2`` with ``MR_bar`` the mean of ``|x_i - x_(i-1)|`` over successive
baseline values and ``d2 = 1.128`` (the mean range of two standard normal values).  The
control limits are ``centre +/- 3 sigma``.  Every lot, in the baseline or after it, is
then judged against those limits.

Western Electric run rules (1956 handbook), with ``z = (x - centre) / sigma``:

1. one point beyond 3 sigma (``|z| > 3``);
2. two of three successive points beyond 2 sigma on the same side;
3. four of five successive points beyond 1 sigma on the same side;
4. eight successive points on the same side of the centre line.

A rule is flagged on the point that completes its pattern, and only when that point is
itself part of the pattern (beyond the zone on that side); each later point that
extends the pattern is flagged again.  Near the start of a series a window is shortened
to the points available (two successive points beyond 2 sigma already are two of any
three that contain them).  "Beyond" is strict; a point exactly on the centre line is on
neither side and breaks a rule-4 run.  Points that are NaN (a lot without the figure) are
skipped: they are neither flagged nor counted, and the rules run over the remaining
points in order.

EWMA chart (Roberts 1959).  ``z_i = lambda x_i + (1 - lambda) z_(i-1)`` with ``z_0`` the
target; limits ``target +/- L sigma sqrt(lambda / (2 - lambda) (1 - (1 - lambda)^(2i)))``,
exact for the i-th observation (they widen to the asymptotic
``L sigma sqrt(lambda / (2 - lambda))``).  A point beyond a limit is flagged.  Target
and sigma are given or, like the individuals chart, taken from the baseline window.  NaN
points are skipped: the statistic is NaN there, the recursion carries over them and i
counts only the observations used.

Both chart types share one base, `ControlChart`: the charted values, sigma, the
limits and the flags per point, with the behaviour built on them (`out_of_control`,
`first_signal`, `flagged_by`, `signal_text`).  The figures of these charts are
`filmmap.history.chart_figures`; the history page is `filmmap.report.history_page`.

Units: as the charted metric (nm for the lot mean, percent for WTW and WIW).

References
----------
.. [1] W. A. Shewhart, Economic Control of Quality of Manufactured Product, Van Nostrand
   (1931).
.. [2] Western Electric Company, Statistical Quality Control Handbook (1956).
.. [3] S. W. Roberts, "Control chart tests based on geometric moving averages",
   Technometrics 1, 239-250 (1959).
.. [4] D. C. Montgomery, Introduction to Statistical Quality Control, Wiley (moving-range
   estimate of sigma with d2 = 1.128 for ranges of two; the EWMA limits above).
"""

from __future__ import annotations

import math
from abc import ABC, abstractmethod
from dataclasses import dataclass
from typing import ClassVar

import numpy as np

from filmmap.errors import FilmmapInputError

__all__ = ["D2_PAIRS", "EWMA_RULE", "METRICS", "MIN_BASELINE_LOTS", "RULE_TEXT", "ControlChart",
           "EwmaChart", "IndividualsChart", "baseline_limits", "baseline_warnings",
           "control_charts", "ewma_chart", "individuals_chart", "metric_series",
           "western_electric_flags"]

#: d2 for subgroups of two: the expected range of two independent N(0, 1) values,
#: 2 / sqrt(pi) = 1.128.
D2_PAIRS = 1.128

#: The Western Electric rules, by number.
RULE_TEXT = {
    1: "one point beyond 3 sigma",
    2: "two of three successive points beyond 2 sigma, same side",
    3: "four of five successive points beyond 1 sigma, same side",
    4: "eight successive points on one side of the centre line",
}

#: Flag number used by the EWMA chart for a point beyond its limits.
EWMA_RULE = 0

#: Charted lot metrics: record attribute -> (caption, unit).
METRICS = {
    "lot_mean_nm": ("Lot mean thickness", "nm"),
    "wtw_pct": ("Wafer-to-wafer non-uniformity (WTW)", "%"),
    "wiw_mean_pct": ("Mean within-wafer non-uniformity (WIW)", "%"),
}


#: Fewest baseline lots for control limits that are more than provisional: 20 to 25
#: subgroups is the usual advice for setting Shewhart limits (D. C. Montgomery, Introduction
#: to Statistical Quality Control, 6th ed., Wiley (2009), section 5.3 - from memory).
MIN_BASELINE_LOTS = 20


# --------------------------------------------------------------------------- limits

def _as_values(values):
    x = np.asarray([np.nan if v is None else v for v in np.ravel(values)], dtype=float)
    if np.any(np.isinf(x)):
        raise FilmmapInputError("chart values must be finite or NaN (missing)", field="values")
    return x


def _baseline_mask(n, baseline):
    """Boolean mask of the baseline window among n points."""
    if baseline is None:
        return np.ones(n, bool)
    if isinstance(baseline, slice):
        mask = np.zeros(n, bool)
        mask[baseline] = True
        return mask
    if isinstance(baseline, (int, np.integer)) and not isinstance(baseline, bool):
        if baseline < 2:
            raise FilmmapInputError(f"a baseline needs at least 2 points, got {baseline}",
                                    field="baseline")
        mask = np.zeros(n, bool)
        mask[:int(baseline)] = True
        return mask
    b = np.asarray(baseline)
    if b.dtype == bool:
        if b.shape != (n,):
            raise FilmmapInputError(f"baseline mask has {b.size} entries for {n} points",
                                    field="baseline")
        return b.copy()
    mask = np.zeros(n, bool)
    try:
        mask[b.astype(int)] = True
    except (IndexError, ValueError):
        raise FilmmapInputError("baseline indices out of range", field="baseline") from None
    return mask


def baseline_limits(values, baseline=None):
    """Centre and sigma of an individuals chart from a baseline window.

    Parameters
    ----------
    values : array_like of float
        One value per lot, in run order (NaN or None = missing), in the metric's unit.
    baseline : int, slice, array_like of int or bool, optional
        The baseline window: the first n points (int), a slice, indices or a mask;
        default all points.

    Returns
    -------
    centre : float
        Mean of the finite baseline values (metric unit).
    sigma : float
        ``MR_bar / 1.128``, with ``MR_bar`` the mean absolute difference of successive
        finite baseline values (metric unit).

    Raises
    ------
    FilmmapInputError
        With fewer than two finite baseline values, or when they are all equal (sigma
        would be 0).

    References
    ----------
    .. [1] D. C. Montgomery, Introduction to Statistical Quality Control, Wiley: the
       individuals chart with the moving range of span two, d2 = 1.128.
    """
    x = _as_values(values)
    mask = _baseline_mask(x.size, baseline)
    b = x[mask & np.isfinite(x)]
    if b.size < 2:
        raise FilmmapInputError(f"the baseline has {b.size} usable point(s); control limits "
                                "need at least 2", field="baseline")
    sigma = float(np.mean(np.abs(np.diff(b)))) / D2_PAIRS
    if not sigma > 0:
        raise FilmmapInputError("the baseline values are all equal: no spread to set limits "
                                "from", field="baseline")
    return float(np.mean(b)), sigma


# --------------------------------------------------------------------------- rules

def _window_count(flag, m):
    """For each i, how many of flag[max(0, i-m+1)..i] are true."""
    cs = np.concatenate([[0], np.cumsum(flag, dtype=int)])
    i = np.arange(flag.size)
    return cs[i + 1] - cs[np.maximum(0, i - m + 1)]


def western_electric_flags(z, rules=(1, 2, 3, 4)):
    """Western Electric run rules on standardised values.

    Parameters
    ----------
    z : array_like of float
        ``(x - centre) / sigma`` in run order (dimensionless); NaN points are skipped.
    rules : iterable of int
        Rules to apply (1 to 4, see the module notes).

    Returns
    -------
    tuple of tuple of int
        For each point, the numbers of the rules it triggers, ascending (empty when
        none, and always for NaN points).

    Raises
    ------
    FilmmapInputError
        For a rule number other than 1-4.

    References
    ----------
    .. [1] Western Electric Company, Statistical Quality Control Handbook (1956).
    """
    rules = tuple(sorted(set(int(r) for r in rules)))
    bad = [r for r in rules if r not in RULE_TEXT]
    if bad:
        raise FilmmapInputError(f"unknown run rule(s) {bad}; expected 1-4", field="rules")
    zz = np.asarray(z, dtype=float).ravel()
    keep = np.flatnonzero(np.isfinite(zz))
    v = zz[keep]
    fired = {r: np.zeros(v.size, bool) for r in rules}
    if 1 in rules:
        fired[1] = np.abs(v) > 3.0
    for r, level, k, m in ((2, 2.0, 2, 3), (3, 1.0, 4, 5)):
        if r in rules:
            hi, lo = v > level, v < -level
            fired[r] = (hi & (_window_count(hi, m) >= k)) | (lo & (_window_count(lo, m) >= k))
    if 4 in rules:
        up, down = v > 0, v < 0
        i = np.arange(v.size)
        fired[4] = (i >= 7) & ((_window_count(up, 8) == 8) | (_window_count(down, 8) == 8))
    out = [()] * zz.size
    any_fired = np.zeros(v.size, bool)
    for r in rules:
        any_fired |= fired[r]
    for j in np.flatnonzero(any_fired):
        out[keep[j]] = tuple(r for r in rules if fired[r][j])
    return tuple(out)



def _limits(x, baseline, centre, sigma):
    """Centre and sigma as given, the missing ones from the baseline window; checked."""
    if centre is None or sigma is None:
        c0, s0 = baseline_limits(x, baseline)
        centre = c0 if centre is None else centre
        sigma = s0 if sigma is None else sigma
    centre, sigma = float(centre), float(sigma)
    if not (math.isfinite(sigma) and sigma > 0 and math.isfinite(centre)):
        raise FilmmapInputError(f"sigma must be finite and > 0, centre finite; got {sigma!r}, "
                                f"{centre!r}", field="sigma")
    return centre, sigma


@dataclass(frozen=True)
class ControlChart(ABC):
    """What every control chart has: values, sigma, limits and a flag tuple per point.

    Attributes
    ----------
    values : numpy.ndarray
        Charted values in run order (metric unit, NaN = missing).
    sigma : float
        Process sigma of one value (metric unit).
    ucl, lcl : float or numpy.ndarray
        Upper and lower control limits (metric unit; per point for the EWMA chart).
    flags : tuple of tuple of int
        Rule numbers triggered per point (empty: in control).
    kind : str
        Class attribute: the chart's name in words (``"individuals"``, ``"EWMA"``).

    References
    ----------
    .. [1] D. C. Montgomery, Introduction to Statistical Quality Control, Wiley (control
       charts in general).
    """

    values: np.ndarray
    sigma: float
    ucl: object
    lcl: object
    flags: tuple

    kind: ClassVar[str] = ""

    @property
    def out_of_control(self):
        """Boolean mask of points with at least one signal."""
        return np.array([bool(f) for f in self.flags], dtype=bool)

    @property
    def first_signal(self):
        """Index of the first flagged point, or None."""
        idx = np.flatnonzero(self.out_of_control)
        return int(idx[0]) if idx.size else None

    def flagged_by(self, rule):
        """Indices of the points that trigger ``rule``."""
        return [i for i, f in enumerate(self.flags) if rule in f]

    @abstractmethod
    def signal_text(self, flags):
        """A point's signal (its entry of ``flags``) in words (each chart says its own)."""


@dataclass(frozen=True)
class IndividualsChart(ControlChart):
    """A Shewhart individuals chart with its run-rule flags.

    Attributes
    ----------
    values, sigma, flags
        As `ControlChart`; ``flags`` holds the Western Electric rules triggered per point
        (see `western_electric_flags`).
    ucl, lcl : float
        ``centre +/- 3 sigma`` (metric unit).
    centre : float
        Centre line (metric unit).
    z : numpy.ndarray
        ``(values - centre) / sigma`` (dimensionless).
    baseline : numpy.ndarray of bool
        Points of the baseline window.
    rules : tuple of int
        Rules applied.

    References
    ----------
    .. [1] Western Electric Company, Statistical Quality Control Handbook (1956).
    """

    centre: float
    z: np.ndarray
    baseline: np.ndarray
    rules: tuple

    kind: ClassVar[str] = "individuals"

    def signal_text(self, flags):
        """``"rule 1: one point beyond 3 sigma; ..."`` for a point's rules."""
        return "; ".join(f"rule {r}: {RULE_TEXT[r]}" for r in flags)


def individuals_chart(values, baseline=None, *, centre=None, sigma=None, rules=(1, 2, 3, 4)):
    """Shewhart individuals chart with Western Electric run rules.

    Parameters
    ----------
    values : array_like of float
        One value per lot in run order (metric unit; NaN or None = missing).
    baseline : int, slice, array_like, optional
        Baseline window for the limits (see `baseline_limits`); default all points.
        Ignored for whichever of ``centre`` and ``sigma`` is given.
    centre : float, optional
        Known centre line (metric unit).
    sigma : float, optional
        Known process sigma (metric unit, > 0).
    rules : iterable of int
        Western Electric rules to apply (default all four).

    Returns
    -------
    IndividualsChart

    Raises
    ------
    FilmmapInputError
        For too small a baseline, a non-positive sigma or an unknown rule.

    References
    ----------
    .. [1] W. A. Shewhart, Economic Control of Quality of Manufactured Product (1931).
    .. [2] Western Electric Company, Statistical Quality Control Handbook (1956).
    .. [3] D. C. Montgomery, Introduction to Statistical Quality Control, Wiley
       (moving-range sigma, d2 = 1.128).
    """
    x = _as_values(values)
    centre, sigma = _limits(x, baseline, centre, sigma)
    z = (x - centre) / sigma
    flags = western_electric_flags(z, rules)
    return IndividualsChart(values=x, centre=centre, sigma=sigma, ucl=centre + 3.0 * sigma,
                            lcl=centre - 3.0 * sigma, z=z, flags=flags,
                            baseline=_baseline_mask(x.size, baseline),
                            rules=tuple(sorted(set(int(r) for r in rules))))


@dataclass(frozen=True)
class EwmaChart(ControlChart):
    """An EWMA chart with exact time-varying limits.

    Attributes
    ----------
    values, sigma, flags
        As `ControlChart`; ``flags`` is ``(0,)`` (`EWMA_RULE`) where the statistic is
        beyond a limit, else ``()``.
    ucl, lcl : numpy.ndarray
        Limits at each point (metric unit; NaN where the value is missing).
    statistic : numpy.ndarray
        EWMA ``z_i`` (metric unit; NaN where the value is missing).
    target : float
        Centre line (metric unit).
    lam, L : float
        Smoothing constant lambda (0 < lambda <= 1) and limit width in sigmas.

    References
    ----------
    .. [1] S. W. Roberts, Technometrics 1, 239-250 (1959).
    """

    statistic: np.ndarray
    target: float
    lam: float
    L: float

    kind: ClassVar[str] = "EWMA"

    def signal_text(self, flags):
        """``"beyond the EWMA limits"``."""
        return "beyond the EWMA limits"


def ewma_chart(values, lam=0.2, L=3.0, *, target=None, sigma=None, baseline=None):
    """EWMA control chart (Roberts 1959) with exact limits.

    Parameters
    ----------
    values : array_like of float
        One value per lot in run order (metric unit; NaN or None = missing).
    lam : float
        Smoothing constant lambda, 0 < lambda <= 1 (dimensionless; lambda = 1 is the
        individuals chart).
    L : float
        Width of the limits in sigmas of the statistic (> 0).
    target : float, optional
        Centre line and ``z_0`` (metric unit); default the baseline mean.
    sigma : float, optional
        Process sigma of one value (metric unit); default from the baseline's average
        moving range (`baseline_limits`).
    baseline : int, slice, array_like, optional
        Baseline window for the defaults.

    Returns
    -------
    EwmaChart

    Raises
    ------
    FilmmapInputError
        For lambda outside (0, 1], a non-positive L or sigma, or too small a baseline.

    Notes
    -----
    ``z_i = lambda x_i + (1 - lambda) z_(i-1)``, ``z_0 = target``; limits
    ``target +/- L sigma sqrt(lambda / (2 - lambda) (1 - (1 - lambda)^(2 i)))``.

    References
    ----------
    .. [1] S. W. Roberts, "Control chart tests based on geometric moving averages",
       Technometrics 1, 239-250 (1959).
    .. [2] D. C. Montgomery, Introduction to Statistical Quality Control, Wiley (the
       exact limits above).
    """
    x = _as_values(values)
    lam, L = float(lam), float(L)
    if not 0 < lam <= 1:
        raise FilmmapInputError(f"lambda must be in (0, 1], got {lam!r}", field="lam")
    if not (math.isfinite(L) and L > 0):
        raise FilmmapInputError(f"L must be finite and > 0, got {L!r}", field="L")
    target, sigma = _limits(x, baseline, target, sigma)
    stat = np.full(x.size, np.nan)
    ucl = np.full(x.size, np.nan)
    lcl = np.full(x.size, np.nan)
    zprev, i = target, 0
    ratio = lam / (2.0 - lam)
    for k, v in enumerate(x):
        if not np.isfinite(v):
            continue
        i += 1
        zprev = lam * v + (1.0 - lam) * zprev
        half = L * sigma * math.sqrt(ratio * (1.0 - (1.0 - lam) ** (2 * i)))
        stat[k], ucl[k], lcl[k] = zprev, target + half, target - half
    beyond = np.isfinite(stat) & ((stat > ucl) | (stat < lcl))
    flags = tuple((EWMA_RULE,) if b else () for b in beyond)
    return EwmaChart(values=x, statistic=stat, target=target, sigma=sigma, lam=lam, L=L,
                     ucl=ucl, lcl=lcl, flags=flags)


# --------------------------------------------------------------------------- history

def metric_series(rows, metric):
    """One metric of each recorded lot, in the order given.

    Parameters
    ----------
    rows : sequence of filmmap.history.store.LotRecord
        Lots in run order (as `filmmap.history.store.lots` returns them).
    metric : str
        A key of `METRICS`: ``"lot_mean_nm"`` (nm), ``"wtw_pct"`` or ``"wiw_mean_pct"``
        (percent).

    Returns
    -------
    numpy.ndarray
        NaN where a lot lacks the figure.

    References
    ----------
    .. [1] Wafer-to-wafer and within-wafer non-uniformity: common practice, no source.
    """
    if metric not in METRICS:
        raise FilmmapInputError(f"unknown metric {metric!r}; expected one of {list(METRICS)}",
                                field="metric")
    return _as_values([getattr(r, metric) for r in rows])


def control_charts(rows, *, baseline=20, lam=0.2, L=3.0, rules=(1, 2, 3, 4)):
    """Individuals and EWMA charts of every metric of a furnace's history.

    Parameters
    ----------
    rows : sequence of LotRecord
        Lots in run order.
    baseline : int, slice, array_like, optional
        Baseline window (default the first 20 lots, or all when fewer).
    lam, L : float
        EWMA smoothing constant and limit width (defaults 0.2 and 3).
    rules : iterable of int
        Western Electric rules for the individuals charts.

    Returns
    -------
    dict
        metric -> ``(IndividualsChart, EwmaChart)``; a metric whose baseline has fewer
        than two distinct finite values is left out.

    References
    ----------
    .. [1] Western Electric Company, Statistical Quality Control Handbook (1956).
    .. [2] S. W. Roberts, Technometrics 1, 239-250 (1959).
    """
    n = len(rows)
    if isinstance(baseline, (int, np.integer)) and not isinstance(baseline, bool):
        baseline = max(2, min(int(baseline), n))
    out = {}
    for metric in METRICS:
        x = metric_series(rows, metric)
        try:
            centre, sigma = baseline_limits(x, baseline)
        except FilmmapInputError:
            continue
        out[metric] = (individuals_chart(x, baseline, centre=centre, sigma=sigma, rules=rules),
                       ewma_chart(x, lam, L, target=centre, sigma=sigma))
    return out


def baseline_warnings(charts):
    """Plain-text warnings on limits set from too few lots (see `MIN_BASELINE_LOTS`)."""
    out = []
    for metric, pair in (charts or {}).items():
        ind = pair[0] if isinstance(pair, tuple) else pair
        if isinstance(ind, IndividualsChart):
            n = int(np.asarray(ind.baseline).sum())
            if n < MIN_BASELINE_LOTS:
                cap = METRICS.get(metric, (metric, ""))[0]
                out.append(f"{cap}: control limits from only {n} lot(s) - provisional; "
                           f"{MIN_BASELINE_LOTS} or more lots are usually wanted")
    return out
