"""Slot-profile plot and fit-quality histogram: content, labels and colours.

Sources beside each check: a paper (author, year) or "common practice, no source".
"""

import matplotlib
import numpy as np
from matplotlib.colors import to_rgba
from matplotlib.patches import Polygon, Rectangle

from filmmap.lotstats import lot_view
from filmmap.report import fit_quality_figure, slot_profile_figure
from filmmap.report.slotplot import X_LABEL, Y_LABEL
from test_report_lotview import TARGET, TOL, make_config, make_lot

VIRIDIS = np.array([matplotlib.colormaps["viridis"](v)[:3] for v in np.linspace(0, 1, 256)])
CIVIDIS = np.array([matplotlib.colormaps["cividis"](v)[:3] for v in np.linspace(0, 1, 256)])


def _allowed(colour):
    """Grey (r = g = b) or a colour of the viridis / cividis maps."""
    r, g, b = to_rgba(colour)[:3]
    if max(r, g, b) - min(r, g, b) < 1e-6:
        return True
    c = np.array([r, g, b])
    return min(np.abs(VIRIDIS - c).max(axis=1).min(), np.abs(CIVIDIS - c).max(axis=1).min()) < 0.01


def _colours(fig):
    out = []
    for ax in fig.axes:
        for ln in ax.lines:
            out += [ln.get_color(), ln.get_markerfacecolor(), ln.get_markeredgecolor()]
        for p in ax.patches:
            out += [p.get_facecolor(), p.get_edgecolor()]
        for c in ax.collections:
            out += list(c.get_facecolors()) + list(c.get_edgecolors())
    return [c for c in out if not (isinstance(c, str) and c == "none") and to_rgba(c)[3] > 0]


def _view():
    ds = make_lot(2, slots=range(4, 16), roles=["product"] * 5 + ["monitor"] + ["product"] * 6,
                  true_nm={4: 970.0, 5: 970.0}, failed={9: 11})
    cfg = make_config(boat=18, dummies=(1, 2, 3, 16, 17, 18), monitors=(9,),
                      zones=(("load", 1, 6), ("centre", 7, 12), ("source", 13, 18)))
    return ds, lot_view(ds, cfg)


def test_slot_profile_content():
    # Wafer means with +/- 1 sigma error bars against slot, target and tolerance band,
    # dummy slots shaded, zone boundaries drawn (common practice, no source).
    ds, view = _view()
    fig = slot_profile_figure(view, dpi=40)
    ax = fig.axes[0]
    assert ax.get_xlabel() == X_LABEL and "slot" in X_LABEL.lower()
    assert ax.get_ylabel() == Y_LABEL and "(nm)" in Y_LABEL
    # product points: 12 slots - 1 monitor - 1 excluded (slot 13: 2 usable sites)
    product_line = next(ln for ln in ax.lines if ln.get_marker() == "o"
                        and ln.get_linestyle() == "None" and ln.get_markerfacecolor() != "none")
    assert sorted(product_line.get_xdata()) == [4, 5, 6, 7, 8, 10, 11, 12, 14, 15]
    monitor = next(ln for ln in ax.lines if ln.get_marker() == "D")
    assert list(monitor.get_xdata()) == [9]
    edge = next(ln for ln in ax.lines if ln.get_marker() == "s")
    assert list(edge.get_xdata()) == [4, 5]
    excluded = next(ln for ln in ax.lines if ln.get_marker() == "x")
    assert list(excluded.get_xdata()) == [13]
    # target line and band
    hlines = [ln for ln in ax.lines if len(set(ln.get_ydata())) == 1 and
              list(ln.get_xdata()) == [0, 1]]
    assert any(ln.get_ydata()[0] == TARGET for ln in hlines)
    spans = [p for p in ax.patches if isinstance(p, (Rectangle, Polygon))]
    ys = [sorted({round(v, 6) for v in
                  p.get_path().transformed(p.get_patch_transform()).vertices[:, 1]})
          for p in spans if isinstance(p, Rectangle)]
    band = [TARGET * (1 - TOL / 100), TARGET * (1 + TOL / 100)]
    assert any(np.allclose([y[0], y[-1]], band) for y in ys if len(y) >= 2)
    # heater-zone boundaries at 6.5 and 12.5 (dashed vertical lines)
    vlines = sorted(ln.get_xdata()[0] for ln in ax.lines
                    if ln.get_linestyle() == "--" and list(ln.get_ydata()) == [0, 1])
    assert vlines == [6.5, 12.5]
    texts = {t.get_text() for t in ax.texts}
    assert {"load", "centre", "source"} <= texts
    assert "flat zone: slots 6-15" in texts
    assert any("edge slots 4-5" == t for t in texts)
    assert ax.get_xlim() == (0.5, 18.5)


def test_slot_profile_colours_viridis_or_grey():
    # Only the perceptually uniform viridis / cividis families or greys (Kovesi 2015;
    # Nunez et al. 2018).
    _, view = _view()
    fig = slot_profile_figure(view, dpi=40)
    cols = _colours(fig)
    assert len(cols) > 10          # points, bars, band and lines were really collected
    bad = [c for c in cols if not _allowed(c)]
    assert not bad


def test_fit_quality_histogram():
    # Reduced chi-square spans decades: log axis, accepted and failed fits separated,
    # reference line at 1 (Bevington & Robinson 2003).
    ds, _ = _view()
    fig = fit_quality_figure(ds, dpi=40)
    ax = fig.axes[0]
    assert ax.get_xscale() == "log"
    assert "reduced" in ax.get_xlabel() and ax.get_ylabel() == "Sites"
    heights = sum(p.get_height() for p in ax.patches if isinstance(p, Rectangle))
    assert heights == ds.sizes["wafer"] * ds.sizes["site"]   # every measured site counted once
    labels = [t.get_text() for t in ax.get_legend().get_texts()]
    assert "fit not accepted (11)" in labels and "fit accepted (145)" in labels
    assert not [c for c in _colours(fig) if not _allowed(c)]
