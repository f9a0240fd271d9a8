"""Figures of a furnace's run history: trend (individuals) charts and EWMA charts.

Each figure draws one chart of `filmmap.history.control` (the statistics live there):
points in run order, the centre line, the control limits (the individuals chart's
+/- 1 and 2 sigma zones too), the baseline window shaded, flagged points ringed.  Figures
are matplotlib ``Figure`` objects on the Agg canvas, never pyplot, drawn in greys and the
viridis colours; `save_chart` writes them atomically.  The history page that shows them is
`filmmap.report.history_page`.

Units: as the charted metric (nm for the lot mean, percent for WTW and WIW).

References
----------
.. [1] Western Electric Company, Statistical Quality Control Handbook (1956).
.. [2] S. W. Roberts, "Control chart tests based on geometric moving averages",
   Technometrics 1, 239-250 (1959).
"""

from __future__ import annotations

import math

import matplotlib
import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure

from filmmap.history.control import METRICS, MIN_BASELINE_LOTS, control_charts

__all__ = ["COLOURS", "NON_NEGATIVE", "ewma_figure", "history_figures", "save_chart",
           "trend_figure"]

_VIRIDIS = matplotlib.colormaps["viridis"]
COLOURS = {"line": "0.55", "point": _VIRIDIS(0.25), "flag": _VIRIDIS(0.9),
           "flag_edge": "black", "centre": "black", "limit": "0.25", "zone": "0.7",
           "baseline": "0.92", "ewma": _VIRIDIS(0.45), "raw": "0.7", "target": "black"}

#: Metrics that cannot be negative (spreads): their lower control limit is drawn at 0.
NON_NEGATIVE = ("wtw_pct", "wiw_mean_pct")


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
