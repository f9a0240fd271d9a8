"""The advice as a person reads it: tables by zone and by slot, and the predicted slot profile.

Made from an advice dict of `filmmap.growth.advice.advise` (its pinned keys plus
``zone_errors_C``, ``predicted_nm_by_slot_now`` / ``_next``, ``model``); nothing is
recomputed here. Temperature differences are in K (the advice keys ending ``_C`` hold
differences, for which 1 K = 1 °C).
"""

from __future__ import annotations

import math

import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from matplotlib.patches import Patch

from filmmap.report.formatting import MISSING, is_number, signed
from filmmap.report.slotplot import COLOURS, X_LABEL

#: Header of the zone table.
ZONE_HEADER = ("zone", "slots", "estimated zone error now (K)", "advised trim (K)",
               "bound (K)", "at bound")

#: Header of the per-slot table.
SLOT_HEADER = ("slot", "measured mean (nm)", "model now (nm)", "predicted next (nm)",
               "effective offset now (K)")


def _slot_dict(advice, key):
    raw = advice.get(key) or {}
    out = {}
    for k, v in raw.items():
        try:
            out[int(k)] = float(v) if is_number(v) else math.nan
        except (TypeError, ValueError):
            continue
    return out


def zone_rows(advice, view=None):
    """Rows of the zone table (`ZONE_HEADER`), as text.

    Parameters
    ----------
    advice : dict
    view : LotView, optional
        For the zones' slot ranges.

    Returns
    -------
    list of tuple of str
    """
    trims = advice.get("zone_offsets_C") or {}
    errs = advice.get("zone_errors_C") or {}
    bound = (advice.get("model") or {}).get("max_offset_C")
    ranges = {name: f"{a}-{b}" for name, a, b in (view.zones if view is not None else ())}
    rows = []
    for zone, trim in trims.items():
        at = is_number(bound) and is_number(trim) and abs(trim) >= float(bound) - 1e-6
        rows.append((str(zone), ranges.get(zone, MISSING),
                     signed(errs.get(zone), 2),
                     signed(trim, 2),
                     f"± {float(bound):.1f}" if is_number(bound) else MISSING,
                     "yes" if at else "no"))
    return rows


def time_row(advice):
    """(step, now min, next min, change %, bound %) as text."""
    now, nxt = advice.get("minutes_now"), advice.get("minutes_next")
    bound = (advice.get("model") or {}).get("max_time_change_pct")
    change = 100.0 * (nxt / now - 1.0) if is_number(now) and is_number(nxt) and now else None
    return (str(advice.get("adjust_step", "")), f"{now:.2f}" if is_number(now) else MISSING,
            f"{nxt:.2f}" if is_number(nxt) else MISSING,
            signed(change, 2),
            f"± {float(bound):g}" if is_number(bound) else MISSING)


def slot_rows(advice, view):
    """Rows of the per-slot table (`SLOT_HEADER`), slot order, as text."""
    now = _slot_dict(advice, "predicted_nm_by_slot_now")
    nxt = _slot_dict(advice, "predicted_nm_by_slot_next")
    eff = _slot_dict(advice, "effective_offset_C_by_slot")
    measured = {w.slot: w.mean_nm for w in view.wafers} if view is not None else {}

    def f(d, s, digits):
        v = d.get(s)
        return f"{v:.{digits}f}" if is_number(v) else MISSING

    return [(str(s), f(measured, s, 2), f(now, s, 2), f(nxt, s, 2), signed(eff.get(s), 2))
            for s in sorted(set(now) | set(nxt) | set(eff))]


def draw_advice_profile(ax, view, advice, *, fontsize=8):
    """Slot profile now (model at the measured lot) and predicted next, with the tolerance band.

    Parameters
    ----------
    ax : matplotlib.axes.Axes
    view : LotView
    advice : dict
    fontsize : float

    Returns
    -------
    matplotlib.axes.Axes
    """
    now = _slot_dict(advice, "predicted_nm_by_slot_now")
    nxt = _slot_dict(advice, "predicted_nm_by_slot_next")
    handles = []
    target = view.target_nm if view.target_nm is not None else advice.get("target_nm")
    if is_number(target):
        tol = view.tolerance_pct
        if tol is not None:
            half = tol / 100.0 * target
            ax.axhspan(target - half, target + half, color=COLOURS["band"], alpha=0.22, lw=0)
            handles.append(Patch(color=COLOURS["band"], alpha=0.35,
                                 label=f"tolerance ± {tol:g} %"))
        ax.axhline(target, color=COLOURS["target"], lw=1.0)
        handles.append(Line2D([], [], color=COLOURS["target"], lw=1.0,
                              label=f"target {target:g} nm"))
    for (_, _, last), (_, first, _) in zip(view.zones[:-1], view.zones[1:]):
        ax.axvline((last + first) / 2, color=COLOURS["zone"], lw=0.8, ls="--")
    for name, first, last in view.zones:
        ax.text((first + last) / 2, 0.98, name, transform=ax.get_xaxis_transform(),
                ha="center", va="top", fontsize=fontsize - 1, color=COLOURS["zone"],
                parse_math=False)
    ms = [(w.slot, w.mean_nm) for w in view.wafers
          if w.role == "product" and not w.excluded and is_number(w.mean_nm)]
    if ms:
        ax.plot(*zip(*ms), ls="none", marker="o", ms=3.5, color="0.35", zorder=3)
        handles.append(Line2D([], [], ls="none", marker="o", ms=3.5, color="0.35",
                              label="measured wafer mean"))
    for data, colour, style, label in ((now, COLOURS["product"], "-", "model now"),
                                       (nxt, COLOURS["edge"], "-", "predicted next run")):
        s = np.array(sorted(data), dtype=float)
        if s.size:
            v = np.array([data[int(k)] for k in s])
            ax.plot(s, v, ls=style, lw=1.8 if "next" in label else 1.0, marker=".",
                    color=colour, mec="black" if "next" in label else colour, mew=0.3,
                    zorder=4)
            handles.append(Line2D([], [], color=colour, lw=1.8 if "next" in label else 1.0,
                                  label=label))
    ax.set_xlim(0.5, view.boat_size + 0.5)
    ax.set_xlabel(X_LABEL, fontsize=fontsize + 1)
    ax.set_ylabel("Thickness (nm)", fontsize=fontsize + 1)
    ax.tick_params(labelsize=fontsize)
    ax.grid(axis="y", color="0.9", lw=0.6)
    ax.set_axisbelow(True)
    ax.legend(handles=handles, loc="lower right", fontsize=fontsize - 0.5, framealpha=0.9)
    return ax


def advice_profile_figure(view, advice, *, figsize_in=(10.0, 4.2), dpi=100):
    """`draw_advice_profile` on its own Figure (Agg canvas, no pyplot)."""
    fig = Figure(figsize=figsize_in, dpi=dpi, layout="constrained")
    FigureCanvasAgg(fig)
    ax = fig.add_subplot()
    draw_advice_profile(ax, view, advice)
    ax.set_title(f"Lot {view.lot_id}: slot profile now and predicted after the advice "
                 f"({advice.get('adjust_step', '')} {advice.get('minutes_next', math.nan):.1f} "
                 "min, zone trims)", fontsize=10, parse_math=False)
    return fig


__all__ = ["SLOT_HEADER", "ZONE_HEADER", "advice_profile_figure", "draw_advice_profile",
           "slot_rows", "time_row", "zone_rows"]
