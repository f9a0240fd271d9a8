"""Histogram of the fit quality (reduced chi-square) of every measured site.

The reduced chi-square spans decades (about 1 for a fit that explains the
data down to the noise, far above 1 for a poor fit), so the histogram uses
logarithmic bins on a log axis (Bevington & Robinson 2003, ch. 11: the
reduced chi-square and its expected value 1). Accepted and failed fits are
stacked in two shades; sites without a value (not measured, or no fit at
all) are counted in a note, never drawn.
"""

from __future__ import annotations

import math

import matplotlib
import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.ticker import FuncFormatter

from filmmap.bridge import site_grid

X_LABEL = "Fit quality: reduced χ² (log scale)"
Y_LABEL = "Sites"

_VIRIDIS = matplotlib.colormaps["viridis"]


def _minor_label(value, _pos=None):
    """Label the 2 and 5 minor ticks of a log axis in plain numbers ('0.2', '5', '20')."""
    if not value > 0:
        return ""
    mantissa = value / 10 ** math.floor(math.log10(value) + 1e-9)
    return f"{value:g}" if round(mantissa) in (2, 5) else ""


def fit_quality_values(ds):
    """Fit quality of the measured sites, split by verdict.

    Parameters
    ----------
    ds : xarray.Dataset
        With ``fit_quality``, ``fit_ok`` and ``fit_note`` (dims wafer, site).

    Returns
    -------
    dict
        ``ok`` and ``failed``: 1-D arrays of finite, positive values;
        ``no_value``: measured sites without a finite positive value;
        ``measured``: measured sites.
    """
    g = site_grid(ds)
    q, ok, measured = g.fit_quality, g.fit_ok, g.measured
    good = measured & np.isfinite(q) & (q > 0)
    return {"ok": q[good & ok], "failed": q[good & ~ok],
            "no_value": int(np.count_nonzero(measured & ~good)),
            "measured": int(np.count_nonzero(measured))}


def draw_fit_quality(ax, ds, *, fontsize=8):
    """Draw the fit-quality histogram of ``ds`` on an Axes; return the Axes."""
    v = fit_quality_values(ds)
    allv = np.concatenate([v["ok"], v["failed"]])
    if allv.size:
        lo, hi = float(allv.min()), float(allv.max())
        lo, hi = min(lo, 0.5), max(hi, 2.0)            # always show the region around 1
        bins = np.logspace(math.log10(lo) - 0.02, math.log10(hi) + 0.02, 31)
        data, colours, labels = [], [], []
        if v["ok"].size:
            data.append(v["ok"])
            colours.append(_VIRIDIS(0.30))
            labels.append(f"fit accepted ({v['ok'].size})")
        if v["failed"].size:
            data.append(v["failed"])
            colours.append("0.62")
            labels.append(f"fit not accepted ({v['failed'].size})")
        ax.hist(data, bins=bins, stacked=True, color=colours, label=labels, edgecolor="white",
                linewidth=0.4)
        ax.set_xscale("log")
        plain = FuncFormatter(lambda v, _pos: f"{v:g}")
        ax.xaxis.set_major_formatter(plain)
        ax.xaxis.set_minor_formatter(FuncFormatter(_minor_label))
        ax.axvline(1.0, color="black", lw=0.9, ls="--", label="reduced χ² = 1 (noise level)")
        ax.legend(fontsize=fontsize - 0.5, frameon=False, loc="upper right")
    else:
        ax.text(0.5, 0.5, "no site has a fit-quality value", transform=ax.transAxes,
                ha="center", va="center", fontsize=fontsize + 1, color="0.3")
    if v["no_value"]:
        ax.text(0.01, 0.98, f"{v['no_value']} measured site(s) without a fit-quality value "
                "(not drawn)", transform=ax.transAxes, ha="left", va="top",
                fontsize=fontsize - 1, color="0.3")
    ax.set_xlabel(X_LABEL, fontsize=fontsize + 1)
    ax.set_ylabel(Y_LABEL, fontsize=fontsize + 1)
    ax.tick_params(which="both", labelsize=fontsize)
    return ax


def fit_quality_figure(ds, *, figsize_in=(8.0, 3.6), dpi=100, title=None):
    """The fit-quality histogram as a Figure (Agg canvas, no pyplot).

    References
    ----------
    .. [1] P. R. Bevington and D. K. Robinson, Data Reduction and Error
       Analysis for the Physical Sciences, 3rd ed. (McGraw-Hill, 2003):
       reduced chi-square, expected value about 1 for a correct model.
    """
    fig = Figure(figsize=figsize_in, dpi=dpi, layout="constrained")
    FigureCanvasAgg(fig)
    ax = fig.add_subplot()
    draw_fit_quality(ax, ds)
    ax.set_title(title or "Fit quality of every measured site", fontsize=10, parse_math=False)
    return fig
