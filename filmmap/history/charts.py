"""Control charts of a furnace's run history: Shewhart individuals with the Western Electric
run rules, EWMA, their figures and a self-contained HTML page.

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

Figures are matplotlib ``Figure`` objects on the Agg canvas, never pyplot, drawn in greys
and the viridis colours; `save_chart` writes them atomically.  `history_html` builds a
self-contained page: images inline as base64 PNG, CSS inline, no script and no reference
to anything outside the page; every text taken from the history goes through
`html.escape`.

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

import base64
import html
import io
import math
from collections.abc import Mapping
from dataclasses import dataclass

import matplotlib
import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure

from filmmap.errors import FilmmapInputError

__all__ = ["D2_PAIRS", "METRICS", "RULE_TEXT", "EwmaChart", "IndividualsChart",
           "baseline_limits", "control_charts", "ewma_chart", "ewma_figure",
           "history_figures", "history_html", "individuals_chart", "metric_series",
           "save_chart", "trend_figure", "western_electric_flags", "write_history_html"]

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

_VIRIDIS = matplotlib.colormaps["viridis"]
COLOURS = {"line": "0.55", "point": _VIRIDIS(0.25), "flag": _VIRIDIS(0.9),
           "flag_edge": "black", "centre": "black", "limit": "0.25", "zone": "0.7",
           "baseline": "0.92", "ewma": _VIRIDIS(0.45), "raw": "0.7", "target": "black"}


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


@dataclass(frozen=True)
class IndividualsChart:
    """A Shewhart individuals chart with its run-rule flags.

    Attributes
    ----------
    values : numpy.ndarray
        Charted values in run order (metric unit, NaN = missing).
    centre, sigma : float
        Centre line and sigma (metric unit).
    ucl, lcl : float
        ``centre +/- 3 sigma`` (metric unit).
    z : numpy.ndarray
        ``(values - centre) / sigma`` (dimensionless).
    flags : tuple of tuple of int
        Rules triggered per point (see `western_electric_flags`).
    baseline : numpy.ndarray of bool
        Points of the baseline window.
    rules : tuple of int
        Rules applied.

    References
    ----------
    .. [1] Western Electric Company, Statistical Quality Control Handbook (1956).
    """

    values: np.ndarray
    centre: float
    sigma: float
    ucl: float
    lcl: float
    z: np.ndarray
    flags: tuple
    baseline: np.ndarray
    rules: tuple

    @property
    def out_of_control(self):
        """Boolean mask of points with at least one rule triggered."""
        return np.array([bool(f) for f in self.flags], dtype=bool)

    @property
    def first_signal(self):
        """Index of the first flagged point, or None."""
        idx = np.flatnonzero(self.out_of_control)
        return int(idx[0]) if idx.size else None

    def flagged_by(self, rule):
        """Indices of the points that trigger ``rule``."""
        return [i for i, f in enumerate(self.flags) if rule in f]


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
    if centre is None or sigma is None:
        c0, s0 = baseline_limits(x, baseline)
        centre = c0 if centre is None else centre
        sigma = s0 if sigma is None else sigma
    centre, sigma = float(centre), float(sigma)
    if not (math.isfinite(sigma) and sigma > 0 and math.isfinite(centre)):
        raise FilmmapInputError(f"sigma must be finite and > 0, centre finite; got {sigma!r}, "
                                f"{centre!r}", field="sigma")
    z = (x - centre) / sigma
    flags = western_electric_flags(z, rules)
    return IndividualsChart(values=x, centre=centre, sigma=sigma, ucl=centre + 3.0 * sigma,
                            lcl=centre - 3.0 * sigma, z=z, flags=flags,
                            baseline=_baseline_mask(x.size, baseline),
                            rules=tuple(sorted(set(int(r) for r in rules))))


@dataclass(frozen=True)
class EwmaChart:
    """An EWMA chart with exact time-varying limits.

    Attributes
    ----------
    values : numpy.ndarray
        Charted values (metric unit, NaN = missing).
    statistic : numpy.ndarray
        EWMA ``z_i`` (metric unit; NaN where the value is missing).
    target, sigma : float
        Centre line and process sigma (metric unit).
    lam, L : float
        Smoothing constant lambda (0 < lambda <= 1) and limit width in sigmas.
    ucl, lcl : numpy.ndarray
        Limits at each point (metric unit; NaN where the value is missing).
    flags : tuple of tuple of int
        ``(0,)`` where the statistic is beyond a limit, else ``()``.

    References
    ----------
    .. [1] S. W. Roberts, Technometrics 1, 239-250 (1959).
    """

    values: np.ndarray
    statistic: np.ndarray
    target: float
    sigma: float
    lam: float
    L: float
    ucl: np.ndarray
    lcl: np.ndarray
    flags: tuple

    @property
    def out_of_control(self):
        """Boolean mask of points beyond the limits."""
        return np.array([bool(f) for f in self.flags], dtype=bool)

    @property
    def first_signal(self):
        """Index of the first point beyond the limits, or None."""
        idx = np.flatnonzero(self.out_of_control)
        return int(idx[0]) if idx.size else None


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
    if target is None or sigma is None:
        c0, s0 = baseline_limits(x, baseline)
        target = c0 if target is None else target
        sigma = s0 if sigma is None else sigma
    target, sigma = float(target), float(sigma)
    if not (math.isfinite(sigma) and sigma > 0 and math.isfinite(target)):
        raise FilmmapInputError(f"sigma must be finite and > 0, got {sigma!r}", field="sigma")
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


# --------------------------------------------------------------------------- figures

def _new_figure(figsize_in, dpi):
    fig = Figure(figsize=figsize_in, dpi=dpi, layout="constrained")
    FigureCanvasAgg(fig)
    return fig, fig.add_subplot()


def _x_axis(ax, n, labels, fontsize=7):
    x = np.arange(1, n + 1)
    ax.set_xlim(0.5, n + 0.5)
    if labels is not None and n:
        step = max(1, int(math.ceil(n / 25)))
        ticks = x[::step]
        ax.set_xticks(ticks)
        ax.set_xticklabels([str(labels[t - 1]) for t in ticks], rotation=60, ha="right",
                           fontsize=fontsize)
        for t in ax.get_xticklabels():
            t.set_parse_math(False)
        ax.set_xlabel("Lot (run order)")
    else:
        ax.set_xlabel("Lot number (run order)")
    return x


def trend_figure(chart, labels=None, *, title="", ylabel="", target=None, tolerance=None,
                 floor=None,
                 figsize_in=(9.0, 4.2), dpi=100):
    """Trend chart of one lot metric with its individuals-chart limits and flags.

    Parameters
    ----------
    chart : IndividualsChart
    labels : sequence of str, optional
        One label per point (e.g. lot ids) for the x axis.
    title, ylabel : str
        Drawn as plain text (no mathtext).
    target : float, optional
        Target line (metric unit), e.g. the target thickness.
    tolerance : float, optional
        Half-width of the tolerance band around ``target`` (metric unit).
    figsize_in : (float, float)
        Size, inches.
    dpi : float
        Resolution, dots per inch.

    Returns
    -------
    matplotlib.figure.Figure
        Points joined in run order; centre line, +/- 3 sigma limits, +/- 1 and 2 sigma
        zone lines; the baseline window shaded; flagged points ringed and labelled
        with their rule numbers.

    References
    ----------
    .. [1] Western Electric Company, Statistical Quality Control Handbook (1956).
    """
    fig, ax = _new_figure(figsize_in, dpi)
    n = chart.values.size
    x = _x_axis(ax, n, labels)
    if chart.baseline.any():
        b = np.flatnonzero(chart.baseline)
        ax.axvspan(b[0] + 0.5, b[-1] + 1.5, color=COLOURS["baseline"], lw=0, zorder=0,
                   label="baseline window")
    if target is not None and tolerance is not None:
        ax.axhspan(target - tolerance, target + tolerance, color=_VIRIDIS(0.75), alpha=0.15,
                   lw=0, zorder=0.2, label="tolerance")
    if target is not None:
        ax.axhline(target, color=COLOURS["target"], lw=0.8, ls="-.", zorder=1, label="target")
    for k in (1, 2):
        for sgn in (-1, 1):
            ax.axhline(chart.centre + sgn * k * chart.sigma, color=COLOURS["zone"], lw=0.6,
                       ls=":", zorder=1)
    ax.axhline(chart.centre, color=COLOURS["centre"], lw=1.0, zorder=1, label="centre")
    ax.axhline(chart.ucl, color=COLOURS["limit"], lw=1.0, ls="--", zorder=1,
               label="±3 sigma limits")
    # a spread cannot go below zero: its lower limit is drawn there (floor = 0)
    lcl = chart.lcl if floor is None else max(chart.lcl, floor)
    ax.axhline(lcl, color=COLOURS["limit"], lw=1.0, ls="--", zorder=1)
    n_base = int(np.asarray(chart.baseline).sum())
    if n_base < MIN_BASELINE_LOTS:
        ax.text(0.01, 0.98, f"limits from {n_base} lot(s): provisional", transform=ax.transAxes,
                ha="left", va="top", fontsize=8, color="0.2")
    fin = np.isfinite(chart.values)
    ax.plot(x[fin], chart.values[fin], color=COLOURS["line"], lw=0.8, zorder=2)
    ax.plot(x[fin], chart.values[fin], "o", ms=4, color=COLOURS["point"], zorder=3,
            label="lot")
    bad = chart.out_of_control
    if bad.any():
        ax.plot(x[bad], chart.values[bad], "o", ms=9, color=COLOURS["flag"], mfc=COLOURS["flag"],
                mec=COLOURS["flag_edge"], mew=0.8, zorder=4, label="run-rule signal")
        for i in np.flatnonzero(bad):
            ax.annotate(",".join(str(r) for r in chart.flags[i]), (x[i], chart.values[i]),
                        textcoords="offset points", xytext=(0, 7), ha="center", fontsize=7)
    # the y range follows the data and the control limits (and the target), not the
    # tolerance band, which may be much wider
    span = [lcl, chart.ucl] + list(chart.values[fin]) + ([target] if target is not None
                                                               else [])
    lo, hi = float(np.min(span)), float(np.max(span))
    pad = 0.12 * (hi - lo) if hi > lo else 1.0
    ax.set_ylim(lo - pad, hi + pad)
    ax.set_ylabel(ylabel)
    ax.yaxis.label.set_parse_math(False)
    ax.set_title(title, fontsize=10, parse_math=False)
    ax.legend(fontsize=7, loc="best", framealpha=0.85)
    return fig


def ewma_figure(chart, labels=None, *, title="", ylabel="", figsize_in=(9.0, 4.2), dpi=100):
    """EWMA chart: the values, the EWMA statistic, its time-varying limits and signals.

    Parameters
    ----------
    chart : EwmaChart
    labels : sequence of str, optional
        One label per point for the x axis.
    title, ylabel : str
        Drawn as plain text (no mathtext).
    figsize_in : (float, float)
        Size, inches.
    dpi : float
        Resolution, dots per inch.

    Returns
    -------
    matplotlib.figure.Figure

    References
    ----------
    .. [1] S. W. Roberts, Technometrics 1, 239-250 (1959).
    """
    fig, ax = _new_figure(figsize_in, dpi)
    n = chart.values.size
    x = _x_axis(ax, n, labels)
    fin = np.isfinite(chart.statistic)
    ax.plot(x[fin], chart.values[fin], "o", ms=3, color=COLOURS["raw"], zorder=2,
            label="lot value")
    # the EWMA's centre is the baseline mean, not the spec target: say so
    ax.axhline(chart.target, color=COLOURS["centre"], lw=1.0, zorder=1,
               label="centre (baseline mean)")
    ax.step(x[fin], chart.ucl[fin], where="mid", color=COLOURS["limit"], lw=1.0, ls="--",
            zorder=1, label=f"limits (L = {chart.L:g})")
    ax.step(x[fin], chart.lcl[fin], where="mid", color=COLOURS["limit"], lw=1.0, ls="--",
            zorder=1)
    ax.plot(x[fin], chart.statistic[fin], "-o", ms=3.5, lw=1.2, color=COLOURS["ewma"],
            zorder=3, label=f"EWMA (lambda = {chart.lam:g})")
    bad = chart.out_of_control
    if bad.any():
        ax.plot(x[bad], chart.statistic[bad], "o", ms=8, color=COLOURS["flag"], mfc=COLOURS["flag"],
                mec=COLOURS["flag_edge"], mew=0.8, zorder=4, label="beyond limits")
    ax.set_ylabel(ylabel)
    ax.yaxis.label.set_parse_math(False)
    ax.set_title(title, fontsize=10, parse_math=False)
    ax.legend(fontsize=7, loc="best", framealpha=0.85)
    return fig


def history_figures(rows, charts=None, *, dpi=100, **chart_options):
    """Figures of a history: a trend chart and an EWMA chart per metric.

    Parameters
    ----------
    rows : sequence of LotRecord
        Lots in run order.
    charts : dict, optional
        As `control_charts` returns (computed with ``chart_options`` when None).
    dpi : float
        Resolution, dots per inch.
    **chart_options
        Passed to `control_charts` (``baseline``, ``lam``, ``L``, ``rules``).

    Returns
    -------
    dict
        Caption (str) -> matplotlib Figure, trend charts first.  The lot-mean trend
        shows the target and tolerance of the latest lot that has them.

    References
    ----------
    .. [1] Western Electric Company, Statistical Quality Control Handbook (1956).
    .. [2] S. W. Roberts, Technometrics 1, 239-250 (1959).
    """
    if charts is None:
        charts = control_charts(rows, **chart_options)
    labels = [r.lot_id for r in rows]
    target = tol = None
    for r in reversed(rows):
        if r.target_nm is not None and r.tolerance_pct is not None:
            target, tol = r.target_nm, r.target_nm * r.tolerance_pct / 100.0
            break
    figs = {}
    for metric, (ind, _ew) in charts.items():
        caption, unit = METRICS[metric]
        extra = {"target": target, "tolerance": tol} if metric == "lot_mean_nm" else {}
        figs[f"{caption}: individuals chart"] = trend_figure(
            ind, labels, title=f"{caption}: individuals chart, Western Electric rules",
            ylabel=f"{caption} ({unit})", dpi=dpi,
            floor=0.0 if metric in NON_NEGATIVE else None, **extra)
    for metric, (_ind, ew) in charts.items():
        caption, unit = METRICS[metric]
        figs[f"{caption}: EWMA chart"] = ewma_figure(
            ew, labels, title=f"{caption}: EWMA chart", ylabel=f"{caption} ({unit})", dpi=dpi)
    return figs


def save_chart(fig, path, dpi=None):
    """Write a chart as PNG atomically (`filmmap.wafermap.figures.save_figure`).

    Parameters
    ----------
    fig : matplotlib.figure.Figure
    path : str or path-like
        Destination ``.png``; its folder must exist.
    dpi : float, optional
        Resolution, dots per inch.

    Returns
    -------
    pathlib.Path

    References
    ----------
    .. [1] Python documentation, os.replace.
    """
    from filmmap.wafermap.figures import save_figure

    return save_figure(fig, path, dpi=dpi)


# --------------------------------------------------------------------------- HTML

_CSS = """
body { font-family: sans-serif; color: #1d1d1f; margin: 0 auto; max-width: 1100px;
       padding: 1rem 1.5rem 3rem; line-height: 1.4; font-size: 15px; }
h1 { font-size: 1.5rem; } h2 { font-size: 1.2rem; border-bottom: 2px solid #3b528b; }
table { border-collapse: collapse; font-size: 0.85rem; margin: 0.4rem 0; }
th, td { border-bottom: 1px solid #c9c9c9; padding: 0.2rem 0.5rem; text-align: right; }
th { background: #ececec; } td.text, th.text { text-align: left; }
tr.signal td { font-weight: bold; }
figure { margin: 0.8rem 0; } figure img { max-width: 100%; height: auto; border: 1px solid #ddd; }
figcaption { color: #555; font-size: 0.85rem; }
.caution { border: 2px solid #444; padding: 0.5rem 0.9rem; background: #f7f7f7; }
.muted { color: #555; }
"""

_CAUTION = ("Control charts and run-to-run estimates are advisory. A signal asks for the "
            "cause to be found; any recipe or zone change is for the process owner to "
            "approve, within the furnace's qualified limits and local safety rules.")


def _e(value):
    return html.escape(str(value), quote=True)


def _fmt(v, digits=2):
    if v is None or (isinstance(v, float) and not math.isfinite(v)):
        return "–"
    return f"{float(v):.{digits}f}"


def _png(image):
    if isinstance(image, (bytes, bytearray, memoryview)):
        return bytes(image)
    if isinstance(image, Figure):
        buf = io.BytesIO()
        image.savefig(buf, format="png", dpi=image.dpi)
        return buf.getvalue()
    raise FilmmapInputError(f"a chart must be PNG bytes or a matplotlib Figure, got "
                            f"{type(image).__name__}", field="charts")


def _signal_rows(rows, signals):
    out = []
    for metric, chart_pair in (signals or {}).items():
        pair = chart_pair if isinstance(chart_pair, tuple) else (chart_pair,)
        caption = METRICS.get(metric, (metric, ""))[0]
        for chart in pair:
            kind = "EWMA" if isinstance(chart, EwmaChart) else "individuals"
            for i, f in enumerate(chart.flags):
                if f and i < len(rows):
                    what = ("beyond the EWMA limits" if kind == "EWMA"
                            else "; ".join(f"rule {r}: {RULE_TEXT[r]}" for r in f))
                    out.append((i, rows[i], caption, kind, what))
    return sorted(out, key=lambda t: (t[0], t[2], t[3]))


#: Fewest baseline lots for control limits that are more than provisional: 20 to 25
#: subgroups is the usual advice for setting Shewhart limits (D. C. Montgomery, Introduction
#: to Statistical Quality Control, 6th ed., Wiley (2009), section 5.3 - from memory).
MIN_BASELINE_LOTS = 20

#: Metrics that cannot be negative (spreads): their lower control limit is drawn at 0.
NON_NEGATIVE = ("wtw_pct", "wiw_mean_pct")


def chart_filename(caption):
    """File name of a chart, from what it shows: ``"Lot mean thickness: EWMA chart"`` ->
    ``"lot_mean_thickness_ewma.png"``."""
    import re

    text = caption.lower().replace("individuals chart", "individuals").replace(
        "ewma chart", "ewma")
    text = re.sub(r"\((wtw|wiw)\)", "", text)
    slug = re.sub(r"[^a-z0-9]+", "_", text).strip("_")
    return f"{slug}.png"


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


def next_run_lines(nxt):
    """A run-to-run estimate (``NextRun.as_dict()``) in words with units, one item a line.

    The zone trims of the run-to-run estimate are absolute: the trims to have in force
    during the next run, relative to the zones' untrimmed set points (unlike the
    single-lot advice, whose trims are changes to the set points of the measured run).
    """
    def num(v, fmt):
        return "—" if v is None or (isinstance(v, float) and not math.isfinite(v)) else fmt.format(v)

    lines = []
    step, now, nxt_min = nxt.get("adjust_step"), nxt.get("minutes_now"), nxt.get("minutes_next")
    clip = {-1: " (at its lower bound)", 1: " (at its upper bound)"}.get(nxt.get("time_clipped"), "")
    lines.append(f"{step} step: {num(now, '{:.1f}')} min now -> {num(nxt_min, '{:.1f}')} min "
                 f"next{clip}")
    trims = nxt.get("zone_trims_C") or {}
    if trims:
        # round before the sign so that 1e-14 reads +0.0, not a float artefact
        text = ", ".join(f"{z} {round(float(v), 1) + 0.0:+.1f} K" for z, v in trims.items()
                         if v is not None)
        clipped = nxt.get("clipped_zones") or []
        lines.append("zone trims to have in force next run (absolute, relative to the "
                     f"untrimmed set points): {text}"
                     + (f" (at the bound: {', '.join(clipped)})" if clipped else ""))
    lines.append(f"predicted lot mean {num(nxt.get('predicted_mean_nm'), '{:.1f}')} nm"
                 + (f", predicted WTW NU {num(nxt.get('predicted_wtw_pct'), '{:.2f}')} %"
                    if nxt.get("predicted_wtw_pct") is not None else ""))
    for w in nxt.get("warnings") or []:
        lines.append(f"warning: {w}")
    return lines


def history_html(rows, charts, *, title="filmmap run history", signals=None, next_run=None):
    """A self-contained HTML page of a furnace's history.

    Parameters
    ----------
    rows : sequence of LotRecord
        Lots in run order.
    charts : mapping
        Caption -> PNG bytes or matplotlib Figure (e.g. `history_figures`), shown in
        order.
    title : str
        Page title (escaped).
    signals : dict, optional
        As `control_charts` returns: its flagged points are listed, the lots with a
        signal are set in bold in the lot table, and limits from fewer than
        `MIN_BASELINE_LOTS` lots are called provisional.
    next_run : dict, optional
        A run-to-run estimate (``NextRun.as_dict()``), shown in words (`next_run_lines`).

    Returns
    -------
    str
        HTML5 with every image inline (``data:image/png;base64``), CSS inline, no
        script and no reference outside the page; every text from the history escaped
        with `html.escape`.

    References
    ----------
    .. [1] Python documentation, ``html.escape`` and ``base64``.
    .. [2] Western Electric Company, Statistical Quality Control Handbook (1956).
    """
    if not isinstance(charts, Mapping):
        raise FilmmapInputError("charts must be a mapping caption -> image", field="charts")
    sig = _signal_rows(rows, signals)
    flagged = {i for i, *_ in sig}
    furnaces = sorted({r.furnace for r in rows if r.furnace})
    p = ["<!DOCTYPE html>", '<html lang="en"><head><meta charset="utf-8">',
         f"<title>{_e(title)}</title><style>{_CSS}</style></head><body>",
         f"<h1>{_e(title)}</h1>",
         f'<p class="muted">{len(rows)} lot(s)'
         + (f"; furnace(s): {_e(', '.join(furnaces))}" if furnaces else "") + "</p>",
         f'<p class="caution">{_e(_CAUTION)}</p>']
    p.append("<h2>Lots</h2><table><thead><tr>"
             + "".join(f'<th class="text">{h}</th>' for h in
                       ("#", "Run date", "Lot", "Furnace", "Recipe SHA-256"))
             + "<th>Lot mean (nm)</th><th>WTW (%)</th><th>Mean WIW (%)</th>"
             "<th>Target (nm)</th><th>Wafers</th></tr></thead><tbody>")
    for i, r in enumerate(rows):
        cls = ' class="signal"' if i in flagged else ""
        rh = r.recipe_sha256
        p.append(f"<tr{cls}><td class=\"text\">{i + 1}</td>"
                 f'<td class="text">{_e(r.run_date or "–")}</td>'
                 f'<td class="text">{_e(r.lot_id)}</td><td class="text">{_e(r.furnace or "–")}</td>'
                 f'<td class="text"><code>{_e(rh[:12] if rh else "–")}</code></td>'
                 f"<td>{_fmt(r.lot_mean_nm)}</td><td>{_fmt(r.wtw_pct, 3)}</td>"
                 f"<td>{_fmt(r.wiw_mean_pct, 3)}</td><td>{_fmt(r.target_nm, 1)}</td>"
                 f"<td>{len(r.wafers)}</td></tr>")
    p.append("</tbody></table>")
    if signals is not None:
        p.append("<h2>Signals</h2>")
        if sig:
            p.append('<table><thead><tr><th class="text">#</th><th class="text">Lot</th>'
                     '<th class="text">Metric</th><th class="text">Chart</th>'
                     '<th class="text">Signal</th></tr></thead><tbody>')
            for i, r, caption, kind, what in sig:
                p.append(f'<tr><td class="text">{i + 1}</td><td class="text">{_e(r.lot_id)}</td>'
                         f'<td class="text">{_e(caption)}</td><td class="text">{_e(kind)}</td>'
                         f'<td class="text">{_e(what)}</td></tr>')
            p.append("</tbody></table>")
        else:
            p.append("<p>No point triggers a run rule or leaves the EWMA limits.</p>")
        for metric, pair in signals.items():
            ind = pair[0] if isinstance(pair, tuple) else pair
            if isinstance(ind, IndividualsChart):
                cap, unit = METRICS.get(metric, (metric, ""))
                p.append(f'<p class="muted">{_e(cap)}: centre {_fmt(ind.centre, 3)} {_e(unit)}, '
                         f"sigma {_fmt(ind.sigma, 4)} {_e(unit)} (average moving range / 1.128 "
                         f"over {int(ind.baseline.sum())} baseline lot(s)).</p>")
    warns = baseline_warnings(signals)
    if warns:
        p.append('<h2>Warnings</h2><ul>' + "".join(f"<li>{_e(w)}</li>" for w in warns)
                 + "</ul>")
    if next_run:
        p.append("<h2>Run-to-run estimate for the next run (advisory only)</h2><ul>"
                 + "".join(f"<li>{_e(x)}</li>" for x in next_run_lines(next_run)) + "</ul>"
                 + f'<p class="caution">{_e(next_run.get("caution") or _CAUTION)}</p>')
    if charts:
        p.append("<h2>Charts</h2>")
        for caption, image in charts.items():
            data = base64.b64encode(_png(image)).decode("ascii")
            p.append(f'<figure><img alt="{_e(caption)}" src="data:image/png;base64,{data}">'
                     f"<figcaption>{_e(caption)}</figcaption></figure>")
    p.append("</body></html>")
    return "\n".join(p) + "\n"


def write_history_html(path, rows, charts, **options):
    """`history_html` written atomically to ``path`` (UTF-8).

    Parameters
    ----------
    path : str or path-like
        Destination ``.html``; its folder must exist.
    rows, charts, **options
        As for `history_html`.

    Returns
    -------
    pathlib.Path

    References
    ----------
    .. [1] Python documentation, os.replace.
    """
    from filmmap.io.atomic import write_text_atomic

    return write_text_atomic(path, history_html(rows, charts, **options))
