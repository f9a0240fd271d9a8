"""The slot-profile plot: wafer mean thickness along the boat.

Matplotlib ``Figure`` objects with the Agg canvas, no pyplot (as in
`filmmap.wafermap.figures`). Colours come from the viridis family and greys
only. What is drawn:

* product wafer means with error bars of +/- 1 within-wafer sigma;
* monitors (diamonds), edge slots (large squares), other flagged slots
  (open rings), wafers left out for too few usable sites (grey crosses at the
  foot of the plot);
* dummy slots shaded grey (from the dataset and the lot file's [boat]);
* the target line and its tolerance band (when a target is given) and the
  reference level of the slot profile (dotted);
* the flat zone as a bracket along the foot of the plot;
* heater-zone boundaries (dashed) with the zone names, when [furnace] has zones.

Input texts drawn here (lot id, zone names) are drawn with ``parse_math=False``
so that a '$' in them is not read as mathtext.
"""

from __future__ import annotations

import math

import matplotlib
import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from matplotlib.patches import Patch
from matplotlib.transforms import blended_transform_factory

_VIRIDIS = matplotlib.colormaps["viridis"]

#: Colours (viridis family and greys).
COLOURS = {
    "product": _VIRIDIS(0.28),
    "monitor": _VIRIDIS(0.62),
    "edge": _VIRIDIS(0.92),
    "band": _VIRIDIS(0.75),
    "target": "black",
    "reference": "0.35",
    "dummy": "0.86",
    "excluded": "0.45",
    "zone": "0.30",
    "flat": _VIRIDIS(0.45),
}

X_LABEL = "Boat slot (1 = load/door end)"
Y_LABEL = "Wafer mean thickness (nm)"


def _y_range(view):
    vals = []
    for w in view.wafers:
        if w.role == "dummy" or w.excluded or not math.isfinite(w.mean_nm):
            continue
        s = w.sigma_nm if math.isfinite(w.sigma_nm) else 0.0
        vals += [w.mean_nm - s, w.mean_nm + s]
    if view.target_nm is not None:
        half = view.tolerance_pct / 100.0 * view.target_nm
        vals += [view.target_nm - half, view.target_nm + half]
    if not vals:
        return 0.0, 1.0
    lo, hi = min(vals), max(vals)
    span = max(hi - lo, 1e-3 * max(abs(hi), 1.0))
    # room below for the flat-zone bracket and the excluded markers, above for zone names
    return lo - 0.30 * span, hi + 0.16 * span


def _runs(slots):
    """Split sorted slot numbers into runs of consecutive slots."""
    runs = []
    for s in sorted(slots):
        if runs and s == runs[-1][-1] + 1:
            runs[-1].append(s)
        else:
            runs.append([s])
    return runs


def draw_slot_profile(ax, view, *, legend=True, fontsize=8):
    """Draw the slot profile of ``view`` on a matplotlib Axes.

    Parameters
    ----------
    ax : matplotlib.axes.Axes
    view : LotView
    legend : bool
        Draw the legend below the axes.
    fontsize : float
        Base font size (points).

    Returns
    -------
    matplotlib.axes.Axes
        ``ax``.
    """
    n = view.boat_size
    xt = blended_transform_factory(ax.transData, ax.transAxes)
    handles = []

    # dummy slots
    dummy = [s for s in range(1, n + 1) if view.layout_role[s - 1] == "dummy"]
    for s in dummy:
        ax.axvspan(s - 0.5, s + 0.5, color=COLOURS["dummy"], lw=0, zorder=0)
    if dummy:
        handles.append(Patch(color=COLOURS["dummy"], label="dummy slot"))

    # spec band and target
    if view.target_nm is not None:
        half = view.tolerance_pct / 100.0 * view.target_nm
        ax.axhspan(view.target_nm - half, view.target_nm + half, color=COLOURS["band"],
                   alpha=0.22, lw=0, zorder=0.5)
        ax.axhline(view.target_nm, color=COLOURS["target"], lw=1.0, zorder=1)
        handles.append(Line2D([], [], color=COLOURS["target"], lw=1.0,
                              label=f"target {view.target_nm:g} nm"))
        handles.append(Patch(color=COLOURS["band"], alpha=0.35,
                             label=f"tolerance ± {view.tolerance_pct:g} %"))
    ref = view.profile.reference_nm
    if math.isfinite(ref):
        ax.axhline(ref, color=COLOURS["reference"], lw=0.8, ls=":", zorder=1)
        handles.append(Line2D([], [], color=COLOURS["reference"], lw=0.8, ls=":",
                              label="reference (median of centre slots)"))

    # heater zones
    if view.zones:
        for name, first, last in view.zones:
            ax.text((first + last) / 2, 0.985, name, transform=xt, ha="center", va="top",
                    fontsize=fontsize - 1, color=COLOURS["zone"], parse_math=False)
        for (_, _, last), (_, first, _) in zip(view.zones[:-1], view.zones[1:]):
            ax.axvline((last + first) / 2, color=COLOURS["zone"], lw=0.8, ls="--", zorder=1)
        handles.append(Line2D([], [], color=COLOURS["zone"], lw=0.8, ls="--",
                              label="heater-zone boundary"))

    # wafers
    def pick(pred):
        ws = [w for w in view.wafers if pred(w)]
        return (np.array([w.slot for w in ws], dtype=float), np.array([w.mean_nm for w in ws]),
                np.array([w.sigma_nm for w in ws]))

    shown = lambda w: not w.excluded and math.isfinite(w.mean_nm)  # noqa: E731
    x, m, s = pick(lambda w: w.role == "product" and shown(w))
    if x.size:
        ax.errorbar(x, m, yerr=np.nan_to_num(s), fmt="o", ms=4, color=COLOURS["product"],
                    ecolor=COLOURS["product"], elinewidth=0.8, capsize=2, zorder=3)
        handles.append(Line2D([], [], color=COLOURS["product"], marker="o", ms=4, ls="-",
                              lw=0.8, label="product: mean ± 1σ within wafer"))
    x, m, s = pick(lambda w: w.role == "monitor" and shown(w))
    if x.size:
        ax.errorbar(x, m, yerr=np.nan_to_num(s), fmt="D", ms=5, color=COLOURS["monitor"],
                    mec="black", mew=0.6, ecolor=COLOURS["monitor"], elinewidth=0.8, capsize=2,
                    zorder=3)
        handles.append(Line2D([], [], color=COLOURS["monitor"], marker="D", ms=5, mec="black",
                              mew=0.6, ls="none", label="monitor (not in lot figures)"))
    x, m, _ = pick(lambda w: w.edge and shown(w))
    if x.size:
        ax.plot(x, m, ls="none", marker="s", ms=10, color=COLOURS["edge"], mfc=COLOURS["edge"],
                mec="black", mew=0.9, zorder=2)
        for run in _runs([int(v) for v in x]):
            lo = min(mi for xi, mi in zip(x, m) if run[0] <= xi <= run[-1])
            label = f"edge slot {run[0]}" if len(run) == 1 else f"edge slots {run[0]}-{run[-1]}"
            ax.annotate(label, ((run[0] + run[-1]) / 2, lo), xytext=(0, -14),
                        textcoords="offset points", ha="center", va="top",
                        fontsize=fontsize - 1)
        handles.append(Line2D([], [], ls="none", marker="s", ms=8, color=COLOURS["edge"],
                              mfc=COLOURS["edge"], mec="black", mew=0.9, label="edge slot"))
    x, m, _ = pick(lambda w: w.flagged and not w.edge and shown(w))
    if x.size:
        ax.plot(x, m, ls="none", marker="o", ms=11, color="black", mfc="none", mec="black",
                mew=1.0, zorder=4)
        handles.append(Line2D([], [], ls="none", marker="o", ms=9, color="black", mfc="none",
                              mec="black", mew=1.0, label="flagged slot (not at an end)"))
    ex = [w.slot for w in view.wafers if w.excluded and w.role != "dummy"]
    if ex:
        ax.plot(ex, [0.03] * len(ex), transform=xt, ls="none", marker="x", ms=6,
                color=COLOURS["excluded"], mew=1.3, zorder=4)
        handles.append(Line2D([], [], ls="none", marker="x", ms=6, color=COLOURS["excluded"],
                              mew=1.3, label=f"left out (< {view.min_sites} usable sites)"))

    # flat zone bracket
    flat = view.profile.flat_zone
    if flat:
        a, b = flat[0] - 0.4, flat[1] + 0.4
        ax.plot([a, a, b, b], [0.12, 0.09, 0.09, 0.12], transform=xt, color=COLOURS["flat"],
                lw=1.4, solid_capstyle="butt", zorder=2)
        ax.text((a + b) / 2, 0.105, f"flat zone: slots {flat[0]}-{flat[1]}", transform=xt,
                ha="center", va="bottom", fontsize=fontsize - 1, color="black")
        handles.append(Line2D([], [], color=COLOURS["flat"], lw=1.4, label="flat zone"))

    if not any(shown(w) for w in view.wafers if w.role != "dummy"):
        ax.text(0.5, 0.5, "no usable wafer mean to plot", transform=ax.transAxes, ha="center",
                va="center", fontsize=fontsize + 1, color="0.3")

    ax.set_xlim(0.5, n + 0.5)
    ax.set_ylim(*_y_range(view))
    step = 1 if n <= 12 else 2 if n <= 25 else 5
    ticks = [1] + list(range(step, n + 1, step)) if step > 1 else list(range(1, n + 1))
    if ticks[-1] != n:
        ticks.append(n)
    ax.set_xticks(sorted(set(ticks)))
    ax.tick_params(labelsize=fontsize)
    ax.set_xlabel(X_LABEL, fontsize=fontsize + 1)
    ax.set_ylabel(Y_LABEL, fontsize=fontsize + 1)
    ax.grid(axis="y", color="0.9", lw=0.6, zorder=0)
    ax.set_axisbelow(True)
    ax.text(0.0, -0.085, "load (door) end", transform=ax.transAxes, ha="left", va="top",
            fontsize=fontsize - 1, color="0.3")
    ax.text(1.0, -0.085, "gas source end", transform=ax.transAxes, ha="right", va="top",
            fontsize=fontsize - 1, color="0.3")
    if legend and handles:
        ax.legend(handles=handles, loc="upper center", bbox_to_anchor=(0.5, -0.15),
                  ncol=3, fontsize=fontsize - 0.5, frameon=False)
    return ax


def slot_profile_figure(view, *, figsize_in=(10.0, 5.6), dpi=100, title=None):
    """The slot-profile plot as a matplotlib Figure (Agg canvas, no pyplot).

    Parameters
    ----------
    view : LotView
    figsize_in : (float, float)
        Figure size in inches.
    dpi : float
        Resolution in dots per inch.
    title : str, optional
        Default "Lot <id>: wafer mean thickness along the boat".

    Returns
    -------
    matplotlib.figure.Figure

    References
    ----------
    .. [1] Error bars of one within-wafer standard deviation, dummy wafers at
       the boat ends, edge slots and flat zone: common practice, no source.
    """
    fig = Figure(figsize=figsize_in, dpi=dpi, layout="constrained")
    FigureCanvasAgg(fig)
    ax = fig.add_subplot()
    draw_slot_profile(ax, view)
    if title is None:
        title = f"Lot {view.lot_id}: wafer mean thickness along the boat"
    ax.set_title(title, fontsize=11, parse_math=False)
    return fig
