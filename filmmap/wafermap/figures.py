"""Wafer-map figures: one map per wafer, a lot contact sheet, and parallel PNG rendering.

Built on ``matplotlib.figure.Figure`` with the Agg canvas directly - pyplot is
never imported, so no global figure state is created or leaked, and the
functions are safe in worker processes. Colour maps are restricted to the
perceptually uniform ``viridis`` and ``cividis`` (and their reversed forms);
a rainbow map is refused because its hue bands read as steps that are not in
the data.

Drawing conventions: x to the right, y up, notch at -y (bottom); the notch is
drawn as a 90 deg V, enlarged to 3 % of the radius (real notches are about
1 mm deep) so that it stays visible at contact-sheet size.
"""

from __future__ import annotations

import math
import os
import hashlib
import re
import uuid
from concurrent.futures import ProcessPoolExecutor
from pathlib import Path

import matplotlib
import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.cm import ScalarMappable
from matplotlib.colors import Normalize
from matplotlib.figure import Figure
from matplotlib.patches import Circle
from matplotlib.ticker import MaxNLocator

from filmmap.errors import FilmmapInputError
from filmmap.wafermap.sites import check_wafer, inside_edge_exclusion, lot_arrays
from filmmap.wafermap.stats import within_wafer_stats
from filmmap.wafermap.surface import tps_polar_surface
from filmmap.workers import end_with_parent

#: Colour maps accepted by the figure functions (perceptually uniform).
ALLOWED_CMAPS = ("viridis", "cividis", "viridis_r", "cividis_r")

#: Label of every thickness colour bar.
COLORBAR_LABEL = "Thickness (nm)"


def _colormap(name):
    if name not in ALLOWED_CMAPS:
        raise FilmmapInputError(
            f"colour map {name!r} is not allowed; use one of {', '.join(ALLOWED_CMAPS)} "
            "(perceptually uniform)", field="cmap")
    return matplotlib.colormaps[name]


def wafer_outline(diameter_mm, notch_depth_mm=None, n_points=361):
    """Closed outline of a wafer with a V notch at -y.

    Parameters
    ----------
    diameter_mm : float
        Wafer diameter in mm.
    notch_depth_mm : float, optional
        Drawn notch depth in mm; default 3 % of the radius (see module notes).
    n_points : int
        Points on the circular part.

    Returns
    -------
    (numpy.ndarray, numpy.ndarray)
        x and y in mm of a closed polygon (first point repeated at the end).

    References
    ----------
    .. [1] Common practice, no source: notch at 270 deg (-y) in wafer maps.
    """
    r = float(diameter_mm) / 2
    depth = 0.03 * r if notch_depth_mm is None else float(notch_depth_mm)
    half = np.arcsin(min(depth / r, 1.0))                     # 90 deg V: half-width = depth
    ang = np.linspace(-np.pi / 2 + half, 1.5 * np.pi - half, int(n_points))
    x = np.concatenate([r * np.cos(ang), [0.0, r * np.cos(ang[0])]])
    y = np.concatenate([r * np.sin(ang), [-(r * np.cos(half) - depth), r * np.sin(ang[0])]])
    return x, y


def _present_sites(x_mm, y_mm, present):
    """(x, y, present): coordinates with missing sites at 0 (never drawn) and the mask."""
    x = np.asarray(x_mm, dtype=float)
    y = np.asarray(y_mm, dtype=float)
    finite = np.isfinite(x) & np.isfinite(y)
    present = finite if present is None else np.asarray(present, bool) & finite
    return np.where(finite, x, 0.0), np.where(finite, y, 0.0), present


def _value_range(*arrays):
    vals = np.concatenate([np.asarray(a, dtype=float).ravel() for a in arrays])
    vals = vals[np.isfinite(vals)]
    if not vals.size:
        return 0.0, 1.0
    lo, hi = float(vals.min()), float(vals.max())
    if hi - lo < 1e-9 * max(1.0, abs(hi)):
        lo, hi = lo - 0.5, hi + 0.5
    return lo, hi


def _levels(vmin, vmax, levels):
    """Rounded contour boundaries covering [vmin, vmax] (about ``levels`` bands) and their norm."""
    bounds = MaxNLocator(max(2, int(levels)), steps=[1, 2, 2.5, 5, 10]).tick_values(vmin, vmax)
    return bounds, Normalize(bounds[0], bounds[-1])


def _mesh(surface, i, n_wafers):
    """(X, Y, Z) of wafer i from a PolarSurface or a Cartesian Surface of a lot."""
    if hasattr(surface, "mesh"):
        if np.ndim(surface.measured_radius_mm) == 0:
            if n_wafers != 1:
                raise FilmmapInputError("surface holds one wafer, thickness several",
                                        field="surface")
            return surface.mesh()
        return surface.mesh(i)
    z = np.asarray(surface.thickness_nm)
    z = z.reshape(n_wafers, len(surface.y_mm), len(surface.x_mm))[i]
    return surface.x_mm, surface.y_mm, z


#: Marker of a site whose fit failed (drawn over the map; listed in the reports).
FAILED_MARKER = dict(ls="none", marker="X", ms=7.5, mfc="white", mec="black", mew=0.9)
#: Marker of a site outside the edge exclusion (measured, not used).
EXCLUDED_MARKER = dict(ls="none", marker="o", ms=3.0, mfc="none", mec="0.35", mew=0.6)


#: Colour bands per colour-bar tick interval: fine enough that noise in the sites does not
#: make blobs of one colour (the bands read as a continuous scale; common practice, no source).
BANDS_PER_TICK = 4


def _fine_levels(bounds):
    """Contour levels: each tick interval of ``bounds`` split into `BANDS_PER_TICK` bands."""
    bounds = np.asarray(bounds, dtype=float)
    return np.linspace(bounds[0], bounds[-1], BANDS_PER_TICK * (bounds.size - 1) + 1)


def _shade(ax, gx, gy, z, norm, cmap, levels):
    """Filled contours on fine bands (`_fine_levels` of the tick boundaries ``levels``).

    A fresh Normalize per panel: a shared one makes matplotlib re-run a callback of every
    earlier panel for each new one (contact-sheet time growing with the square of the
    wafers).
    """
    return ax.contourf(gx, gy, np.ma.masked_invalid(z), levels=_fine_levels(levels), cmap=cmap,
                       norm=Normalize(norm.vmin, norm.vmax), extend="both")


def _draw_wafer(ax, diameter_mm, edge_exclusion_mm, gx, gy, z, x, y, t, use, norm, cmap,
                levels, labels, value_fmt, fontsize, present=None, failed=None,
                offset=(0.0, 0.0), set_limits=True):
    """Map, outline, edge-exclusion ring and sites on one axes; return the mappable.

    ``present`` marks the sites the wafer has (a missing site is not drawn at all);
    ``failed`` the measured sites whose fit failed (a white X, clearly not data).
    ``offset`` (mm) places the wafer on a shared axes (the contact sheet draws every wafer
    on one axes: one axes per wafer costs more than the wafer itself).
    """
    r = diameter_mm / 2
    ox_, oy_ = float(offset[0]), float(offset[1])
    if ox_ or oy_:
        gx, gy = np.asarray(gx) + ox_, np.asarray(gy) + oy_
        x, y = np.asarray(x) + ox_, np.asarray(y) + oy_
    present = np.ones(x.shape, bool) if present is None else np.asarray(present, bool)
    failed = (present & ~np.isfinite(t)) if failed is None else np.asarray(failed, bool) & present
    mappable = None
    if z is not None and np.isfinite(z).sum() >= 4:
        mappable = _shade(ax, gx, gy, z, norm, cmap, levels)
    ox, oy = wafer_outline(diameter_mm)
    ax.plot(ox + ox_, oy + oy_, color="black", lw=1.0)
    if edge_exclusion_mm > 0:
        ax.add_patch(Circle((ox_, oy_), r - edge_exclusion_mm, fill=False, ls="--", lw=0.7,
                            ec="0.35"))
    if mappable is None:   # no map (too few sites): colour the sites themselves
        mappable = ax.scatter(x[use], y[use], c=t[use], cmap=cmap,
                              norm=Normalize(norm.vmin, norm.vmax), s=30,
                              edgecolors="black", linewidths=0.4)
    ax.plot(x[use], y[use], ls="none", marker=".", ms=2.5, color="black")
    outside = present & ~use & ~failed
    if outside.any():
        ax.plot(x[outside], y[outside], **EXCLUDED_MARKER)
    if failed.any():
        ax.plot(x[failed], y[failed], **FAILED_MARKER)
    if labels:
        # labels above the site, below it near the top edge, so none crosses the outline
        dy = 0.03 * r
        for xi, yi, ti, ui in zip(x[present], y[present], t[present], use[present]):
            if np.isfinite(ti):
                up = yi < 0.82 * r
                ax.text(xi, yi + (dy if up else -dy), value_fmt.format(ti), ha="center",
                        va="bottom" if up else "top", fontsize=fontsize,
                        color="black" if ui else "0.35")
    if set_limits:
        ax.set_xlim(-1.05 * r, 1.05 * r)
        ax.set_ylim(-1.05 * r, 1.05 * r)
        ax.set_aspect("equal")
    return mappable


def wafer_map_figure(thickness_nm, ok, x_mm, y_mm, diameter_mm, edge_exclusion_mm, *,
                     wafer_id="", slot=None, surface=None, vmin=None, vmax=None,
                     cmap="viridis", levels=12, figsize_in=(6.4, 5.6), dpi=100,
                     value_fmt="{:.1f}", lot_id="", present=None):
    """Thickness map of one wafer as a matplotlib Figure (Agg canvas, no pyplot).

    Parameters
    ----------
    thickness_nm : array_like, shape (n_sites,)
        Thickness in nm, NaN for a missing site.
    ok : array_like of bool or None, shape (n_sites,)
        Fit-quality flag; None = all ok. Unusable sites are drawn as grey crosses.
    x_mm, y_mm : array_like, shape (n_sites,)
        Site coordinates in mm (wafer-centre origin, notch toward -y).
    diameter_mm, edge_exclusion_mm : float
        Wafer diameter and edge exclusion in mm.
    wafer_id : str
        Shown in the title.
    slot : int, optional
        Boat/cassette slot shown in the title.
    surface : (X_mm, Y_mm, Z_nm), optional
        A precomputed map in any form ``contourf`` takes: 1-D x (nx,), y (ny,)
        with Z (ny, nx) as from `tps_surface`, or 2-D meshes as from
        `PolarSurface.mesh`. Default: `tps_polar_surface` of this wafer.
    vmin, vmax : float, optional
        Colour scale limits in nm; default the range of the map and the sites.
    cmap : str
        One of `ALLOWED_CMAPS`.
    levels : int
        Approximate number of filled contour bands (rounded boundaries).
    figsize_in : (float, float)
        Figure size in inches; the PNG is ``figsize_in * dpi`` pixels.
    dpi : float
        Resolution in dots per inch.
    value_fmt : str
        Format of the site values (nm).
    lot_id : str
        Lot id, shown in the title (every figure names its lot).
    present : array_like of bool, shape (n_sites,), optional
        Sites the wafer has; a missing site (False) is not drawn (its coordinates may be
        anything). Default: every site with finite coordinates. A present site without
        an accepted fit is drawn as a white X (failed).

    Returns
    -------
    matplotlib.figure.Figure

    References
    ----------
    .. [1] P. Kovesi, "Good colour maps: how to design them", arXiv:1509.03700
       (2015) (perceptual uniformity; why rainbow maps mislead).
    .. [2] J. R. Nuñez, C. R. Anderton and R. S. Renslow, "Optimizing colormaps
       with consideration for color vision deficiency", PLoS ONE 13, e0199239
       (2018) (cividis).
    """
    _colormap(cmap)
    prepared = _prepare_map(thickness_nm, ok, x_mm, y_mm, diameter_mm, edge_exclusion_mm,
                            wafer_id=wafer_id, slot=slot, surface=surface, vmin=vmin, vmax=vmax,
                            levels=levels, value_fmt=value_fmt, lot_id=lot_id, present=present)
    d, ee = check_wafer(diameter_mm, edge_exclusion_mm)
    return MapCanvas(d, ee, cmap, figsize_in, dpi).draw(*prepared)


def _prepare_map(thickness_nm, ok, x_mm, y_mm, diameter_mm, edge_exclusion_mm, *, wafer_id="",
                 slot=None, surface=None, vmin=None, vmax=None, levels=12, value_fmt="{:.1f}",
                 lot_id="", present=None):
    """The arguments of `MapCanvas.draw` for one wafer (see `wafer_map_figure`)."""
    d, ee = check_wafer(diameter_mm, edge_exclusion_mm)
    x_mm, y_mm, present = _present_sites(x_mm, y_mm, present)
    t, good, x, y, single = lot_arrays(thickness_nm, ok, x_mm, y_mm)
    good = good & present
    if not single and t.shape[0] != 1:
        raise FilmmapInputError("wafer_map_figure draws one wafer: thickness must be 1-D",
                                field="thickness_nm")
    t, good = t[0], good[0]
    use = good & inside_edge_exclusion(x, y, d, ee)
    if surface is None:
        gx, gy, z = tps_polar_surface(t, good, x, y, d, ee).mesh()
    else:
        gx, gy, z = (np.asarray(a, dtype=float) for a in surface)
    lo, hi = _value_range(z, t[use])
    bounds, _ = _levels(lo if vmin is None else float(vmin), hi if vmax is None else float(vmax),
                        levels)
    st = within_wafer_stats(t, good, x, y, d, ee)
    head = (f"Lot {lot_id} · " if lot_id else "") + f"Wafer {wafer_id}" + (
        "" if slot is None else f"  slot {slot}")
    title = (f"{head}\nmean {st.mean_nm:.2f} ± {st.sigma_nm:.2f} nm (1σ), "
             f"NU {st.nu_pct:.2f} %, {int(st.sites_used)} sites")
    return gx, gy, z, x, y, t, use, present, present & ~good, bounds, value_fmt, title


class MapCanvas:
    """One wafer-map figure, reused for wafer after wafer (one per worker process).

    The outline, the edge-exclusion ring, the axes and the colour bar are made once; each
    `draw` replaces only the map, the site marks, the labels, the scale and the title.
    Making a figure, its axes and a colour bar is about half the time of a map, so a
    lot's maps cost about half as much drawn this way (measured in benchmarks/report.py).

    Parameters
    ----------
    diameter_mm, edge_exclusion_mm : float
    cmap : str
        One of `ALLOWED_CMAPS`.
    figsize_in : (float, float)
    dpi : float
    """

    def __init__(self, diameter_mm, edge_exclusion_mm, cmap="viridis", figsize_in=(6.4, 5.6),
                 dpi=100, stamp_labels=False):
        from matplotlib.lines import Line2D

        # stamp_labels: labels blended into the PNG by `png` (fast), not texts of the figure
        self.stamps = _LabelStamps(6.0, dpi) if stamp_labels else None
        self._stamp_items = []

        self.key = (float(diameter_mm), float(edge_exclusion_mm), cmap, tuple(figsize_in),
                    float(dpi))
        d, ee = float(diameter_mm), float(edge_exclusion_mm)
        self.d, self.ee, self.cmap = d, ee, _colormap(cmap)
        r = d / 2
        fig = Figure(figsize=figsize_in, dpi=dpi)
        FigureCanvasAgg(fig)
        ax = fig.add_axes((0.05, 0.05, 0.72, 0.81))
        cax = fig.add_axes((0.80, 0.14, 0.03, 0.64))
        ox, oy = wafer_outline(d)
        ax.plot(ox, oy, color="black", lw=1.0, zorder=3)
        if ee > 0:
            ax.add_patch(Circle((0.0, 0.0), r - ee, fill=False, ls="--", lw=0.7, ec="0.35",
                                zorder=3))
        ax.set_xlim(-1.05 * r, 1.05 * r)
        ax.set_ylim(-1.05 * r, 1.05 * r)
        ax.set_aspect("equal")
        ax.set_axis_off()       # tick machinery is most of the render time; the notch orients
        ax.text(-1.04 * r, -1.04 * r, f"Ø {d:g} mm, edge exclusion {ee:g} mm, notch at -y",
                fontsize=7, color="0.3", ha="left", va="bottom")
        self.used = ax.plot([], [], ls="none", marker=".", ms=2.5, color="black", zorder=4)[0]
        self.outside = ax.plot([], [], zorder=4, **EXCLUDED_MARKER)[0]
        self.failed = ax.plot([], [], zorder=5, **FAILED_MARKER)[0]
        self.legend_handle = Line2D([], [], **FAILED_MARKER)
        # the colour bar: one gradient image whose extent and ticks follow each wafer's scale
        self.bar = cax.imshow(np.linspace(0, 1, 256)[:, None], aspect="auto", cmap=self.cmap,
                              origin="lower", extent=(0, 1, 0, 1), interpolation="nearest")
        cax.xaxis.set_visible(False)
        cax.yaxis.tick_right()
        cax.yaxis.set_label_position("right")
        cax.set_ylabel(COLORBAR_LABEL, fontsize=9)
        cax.tick_params(labelsize=7)
        self.title = fig.suptitle("", fontsize=10, parse_math=False)
        self.fig, self.ax, self.cax = fig, ax, cax
        self.labels = []
        self._dynamic = []

    def draw(self, gx, gy, z, x, y, t, use, present, failed, bounds, value_fmt, title):
        """Draw one wafer (arguments as prepared by `wafer_map_figure`); return the figure."""
        ax, r = self.ax, self.d / 2
        for artist in self._dynamic:
            artist.remove()
        self._dynamic = []
        lo, hi = float(bounds[0]), float(bounds[-1])
        norm = Normalize(lo, hi)
        if z is not None and np.isfinite(z).sum() >= 4:
            cs = _shade(ax, gx, gy, z, norm, self.cmap, bounds)
            self._dynamic.append(cs)
        else:   # no map (too few sites): colour the sites themselves
            self._dynamic.append(ax.scatter(x[use], y[use], c=t[use], cmap=self.cmap,
                                            norm=norm, s=30, edgecolors="black",
                                            linewidths=0.4, zorder=4))
        self.used.set_data(x[use], y[use])
        outside = present & ~use & ~failed
        self.outside.set_data(x[outside], y[outside])
        self.failed.set_data(x[failed], y[failed])
        if failed.any():
            n = int(failed.sum())
            self.legend_handle.set_label(f"failed fit ({n} site{'s' if n != 1 else ''})")
            self._dynamic.append(ax.legend(handles=[self.legend_handle], loc="upper right",
                                           bbox_to_anchor=(1.02, 1.02), fontsize=7,
                                           frameon=False))
        # labels above the site, below it near the top edge, so none crosses the outline
        show = present & np.isfinite(t)
        if self.stamps is not None:
            self._stamp_items = [(xi, yi, value_fmt.format(ti), 0.0 if ui else 0.35,
                                  yi < 0.82 * r)
                                 for xi, yi, ti, ui in zip(x[show], y[show], t[show], use[show])]
            show = np.zeros_like(show)
        while len(self.labels) < int(show.sum()):
            self.labels.append(ax.text(0, 0, "", ha="center", fontsize=6.0, zorder=6))
        dy = 0.03 * r
        for label, xi, yi, ti, ui in zip(self.labels, x[show], y[show], t[show], use[show]):
            up = yi < 0.82 * r
            label.set_position((xi, yi + (dy if up else -dy)))
            label.set_verticalalignment("bottom" if up else "top")
            label.set_text(value_fmt.format(ti))
            label.set_color("black" if ui else "0.35")
            label.set_visible(True)
        for label in self.labels[int(show.sum()):]:
            label.set_visible(False)
        self.bar.set_extent((0, 1, lo, hi))
        self.cax.set_ylim(lo, hi)
        self.cax.set_yticks(bounds[::max(1, len(bounds) // 7)])
        self.title.set_text(title)
        return self.fig

    def png(self):
        """The current wafer as palette PNG bytes (`png_bytes`), labels stamped in."""
        if self.stamps is None:
            return png_bytes(self.fig)
        self.fig.canvas.draw()
        rgb = np.asarray(self.fig.canvas.buffer_rgba())[..., :3]
        H = rgb.shape[0]
        dy = 0.03 * self.d / 2
        pts = [(xi, yi + (dy if up else -dy)) for xi, yi, _, _, up in self._stamp_items]
        disp = self.ax.transData.transform(pts) if pts else np.zeros((0, 2))
        items = [(px, H - py, text, grey, up) for (px, py), (_, _, text, grey, up)
                 in zip(disp, self._stamp_items)]
        return encode_png(self.stamps.stamp(rgb, items))


#: Largest contact sheet in pixels (see `lot_contact_sheet`): 12 Mpx is a 150-wafer lot at
#: 100 dpi with room to spare; larger lots are drawn at a lower resolution.
MAX_SHEET_PIXELS = 12e6


def _layout_groups(x2, y2):
    """Rows of wafers sharing one site layout (NaN = missing site), as a list of arrays."""
    key = np.nan_to_num(np.stack([x2, y2], axis=1), nan=np.inf)
    _, inverse = np.unique(key.reshape(key.shape[0], -1), axis=0, return_inverse=True)
    inverse = inverse.ravel()
    return [np.flatnonzero(inverse == g) for g in np.unique(inverse)]


def _sheet_panels(thickness_nm, ok, x_mm, y_mm, diameter_mm, edge_exclusion_mm, wafer_ids,
                  slots, surface, out_of_spec, levels, surfaces=None):
    """Per-wafer drawing data of a contact sheet and its common colour boundaries.

    ``surfaces``: optional list of (rows, PolarSurface) already computed per site layout.
    """
    given = {tuple(int(i) for i in rows): srf for rows, srf in (surfaces or ())}
    d, ee = check_wafer(diameter_mm, edge_exclusion_mm)
    t = np.atleast_2d(np.asarray(thickness_nm, dtype=float))
    W, n_sites = t.shape
    x2 = np.broadcast_to(np.asarray(x_mm, dtype=float), (W, n_sites))
    y2 = np.broadcast_to(np.asarray(y_mm, dtype=float), (W, n_sites))
    ok2 = np.ones((W, n_sites), bool) if ok is None else np.broadcast_to(
        np.asarray(ok, bool), (W, n_sites))
    ids = [str(i + 1) for i in range(W)] if wafer_ids is None else [str(v) for v in wafer_ids]
    if len(ids) != W or (slots is not None and len(slots) != W):
        raise FilmmapInputError(f"wafer_ids and slots need one entry per wafer ({W})",
                                field="wafer_ids")
    oos = np.zeros(W, bool) if out_of_spec is None else np.asarray(out_of_spec, bool)
    # one surface computation per site layout (usually one for the whole lot)
    groups = _layout_groups(x2, y2)
    if surface is not None and len(groups) != 1:
        raise FilmmapInputError("a precomputed surface needs one site layout for the lot",
                                field="surface")
    per = [None] * W
    for rows in groups:
        x, y, present = _present_sites(x2[rows[0]], y2[rows[0]], None)
        tg, good, x, y, _ = lot_arrays(t[rows], ok2[rows], x, y)
        good = good & present
        use = good & inside_edge_exclusion(x, y, d, ee)
        s = surface if surface is not None else given.get(tuple(int(i) for i in rows))
        if s is None:
            s = tps_polar_surface(tg, good, x, y, d, ee)
        nu = within_wafer_stats(tg, good, x, y, d, ee).nu_pct
        for k, i in enumerate(rows):
            # the mesh is made when the panel is drawn: held for every wafer at once it
            # would be most of a large lot's memory
            per[i] = ((s, k, len(rows)), x, y, tg[k], use[k], present, present & ~good[k],
                      float(np.atleast_1d(nu)[k]))
    lo, hi = _value_range(*[_mesh(*p[0])[2] for p in per], *[p[3][p[4]] for p in per])
    bounds, norm = _levels(lo, hi, levels)
    return d, ee, W, ids, oos, per, bounds, norm


def lot_contact_sheet(thickness_nm, ok, x_mm, y_mm, diameter_mm, edge_exclusion_mm, *,
                      wafer_ids=None, slots=None, surface=None, ncols=None, cmap="viridis",
                      levels=12, panel_in=2.0, dpi=100, title=None, out_of_spec=None,
                      lot_id="", max_pixels=MAX_SHEET_PIXELS):
    """Every wafer of a lot in a grid, on one common colour scale with one colour bar.

    Parameters
    ----------
    thickness_nm : array_like, shape (W, n_sites)
        Thickness in nm, NaN for a missing site or a failed fit.
    ok : array_like of bool or None
        Fit-quality flag broadcastable to ``thickness_nm``; None = all ok.
    x_mm, y_mm : array_like, shape (n_sites,) or (W, n_sites)
        Site coordinates in mm: one layout for the lot, or one per wafer with NaN where
        a wafer lacks a site (uneven layouts: each wafer is mapped from its own sites,
        and a missing site is not drawn).
    diameter_mm, edge_exclusion_mm : float
        Wafer diameter and edge exclusion in mm.
    wafer_ids : sequence of str, length W, optional
        Panel labels; default "1".."W".
    slots : sequence of int, length W, optional
        Slots shown with the ids.
    surface : PolarSurface or Surface, optional
        Precomputed map of the lot (one layout only); default `tps_polar_surface`.
    ncols : int, optional
        Panels per row; default ceil(sqrt(W)).
    cmap : str
        One of `ALLOWED_CMAPS`.
    levels : int
        Colour-bar ticks (about ``levels`` / 2) and the bands of the contour fallback.
    panel_in : float
        Panel size in inches.
    dpi : float
        Resolution in dots per inch.
    title : str, optional
        Sheet title (default names the lot).
    out_of_spec : sequence of bool, length W, optional
        Wafers whose mean is out of spec: a thick frame and "OUT OF SPEC" in the label.
    lot_id : str
        Lot id for the default title.
    max_pixels : float
        Largest image in pixels: a bigger sheet gets a lower resolution (same layout), so
        that the memory to draw and encode it stays bounded however many wafers the lot
        has.

    Returns
    -------
    matplotlib.figure.Figure

    References
    ----------
    .. [1] E. R. Tufte, Envisioning Information (Graphics Press, 1990),
       "small multiples": a shared scale makes panels comparable.
    """
    cm = _colormap(cmap)
    d, ee, W, ids, oos, per, bounds, norm = _sheet_panels(
        thickness_nm, ok, x_mm, y_mm, diameter_mm, edge_exclusion_mm, wafer_ids, slots, surface,
        out_of_spec, levels)
    ncols = int(np.ceil(np.sqrt(W))) if ncols is None else max(1, int(ncols))
    nrows = max(1, int(np.ceil(W / ncols)))
    title = title or (f"Lot {lot_id}: thickness (nm), common scale" if lot_id else None)
    bar_in, head_in, cap_in = 1.1, 0.5 if title else 0.15, 0.45
    width = ncols * panel_in + bar_in
    height = nrows * (panel_in + cap_in) + head_in
    dpi = min(float(dpi), math.sqrt(float(max_pixels) / (width * height)))
    fig = Figure(figsize=(width, height), dpi=dpi)
    FigureCanvasAgg(fig)
    # every wafer on ONE axes in mm, panels placed by offsets: the data scale k (mm per
    # inch) makes a panel's map span 92 % of panel_in, as separate axes did
    k = 1.05 * d / (0.92 * panel_in)
    cell_h = panel_in + cap_in
    grid_w, grid_h = ncols * panel_in, nrows * cell_h
    ax = fig.add_axes((0.0, (height - head_in - grid_h) / height, grid_w / width,
                       grid_h / height))
    ax.set_xlim(0.0, grid_w * k)
    ax.set_ylim(0.0, grid_h * k)
    ax.set_axis_off()
    for i in range(W):
        row, col = divmod(i, ncols)
        cx = (col + 0.5) * panel_in * k
        cy = ((nrows - row - 1) * cell_h + 0.5 * panel_in) * k
        mesh_of, x, y, ti, ui, pi, fi, nu = per[i]
        mesh = _mesh(*mesh_of)
        _draw_wafer(ax, d, ee, *mesh, x, y, ti, ui, norm, cm, bounds, False, "", 0,
                    present=pi, failed=fi, offset=(cx, cy), set_limits=False)
        label = ids[i] + ("" if slots is None else f" (slot {slots[i]})")
        nu_text = f"NU {nu:.2f} %" if np.isfinite(nu) else "NU —"
        if oos[i]:
            ax.add_patch(Circle((cx, cy), 0.518 * d, fill=False, lw=2.2, ec="black"))
            nu_text = "OUT OF SPEC · " + nu_text
        ax.text(cx, cy + 0.54 * d, f"{label}\n{nu_text}", ha="center", va="bottom",
                fontsize=7, parse_math=False, weight="bold" if oos[i] else "normal")
    cax = fig.add_axes((1 - 0.75 * bar_in / width, 0.15, 0.18 * bar_in / width, 0.7))
    fig.colorbar(ScalarMappable(norm=norm, cmap=cm), cax=cax,
                 ticks=bounds[::max(1, len(bounds) // 7)])
    cax.set_ylabel(COLORBAR_LABEL, fontsize=9)
    cax.tick_params(labelsize=7)
    if title:
        fig.suptitle(title, fontsize=11, y=1 - 0.1 / height, va="top", parse_math=False)
    return fig


def contact_sheet_png(thickness_nm, ok, x_mm, y_mm, diameter_mm, edge_exclusion_mm, *,
                      wafer_ids=None, slots=None, ncols=None, cmap="viridis", levels=12,
                      panel_in=2.0, dpi=100, out_of_spec=None, lot_id="", title=None,
                      max_pixels=MAX_SHEET_PIXELS, surfaces=None):
    """The lot contact sheet as palette PNG bytes, drawn one panel at a time.

    The same sheet as `lot_contact_sheet` (arguments alike), but each wafer is drawn on one
    small reused panel figure whose pixels are pasted into the sheet: the memory is one
    panel and the sheet's pixels, not a figure holding every wafer's contours, so it stays
    bounded and grows linearly in time however many wafers the lot has. ``surfaces``: list
    of (wafer rows, PolarSurface) already computed for each site layout (not recomputed).

    Returns
    -------
    bytes
    """
    cm = _colormap(cmap)
    d, ee, W, ids, oos, per, bounds, norm = _sheet_panels(
        thickness_nm, ok, x_mm, y_mm, diameter_mm, edge_exclusion_mm, wafer_ids, slots, None,
        out_of_spec, levels, surfaces)
    ncols = int(np.ceil(np.sqrt(W))) if ncols is None else max(1, int(ncols))
    nrows = max(1, int(np.ceil(W / ncols)))
    title = title or (f"Lot {lot_id}: thickness (nm), common scale" if lot_id else None)
    bar_in, head_in, cap_in = 1.1, 0.5 if title else 0.15, 0.45
    width, height = ncols * panel_in + bar_in, nrows * (panel_in + cap_in) + head_in
    dpi = min(float(dpi), math.sqrt(float(max_pixels) / (width * height)))
    cell_w, cell_h = int(round(panel_in * dpi)), int(round((panel_in + cap_in) * dpi))
    head_px, bar_px = int(round(head_in * dpi)), int(round(bar_in * dpi))
    sheet = np.full((head_px + nrows * cell_h, ncols * cell_w + bar_px, 3), 255, np.uint8)

    def pixels(fig):
        fig.canvas.draw()
        return np.asarray(fig.canvas.buffer_rgba())[..., :3]

    # one panel figure for every wafer: map below, caption above, as in lot_contact_sheet
    pfig = Figure(figsize=(cell_w / dpi, cell_h / dpi), dpi=dpi)
    FigureCanvasAgg(pfig)
    pax = pfig.add_axes((0.04, 0.04 * panel_in / (panel_in + cap_in),
                         0.92, 0.92 * panel_in / (panel_in + cap_in)))
    r = d / 2
    pax.set_xlim(-1.05 * r, 1.05 * r)
    pax.set_ylim(-1.05 * r, 1.05 * r)
    pax.set_axis_off()
    static = set(pax.get_children())
    caption = pax.set_title("", fontsize=7, pad=2, parse_math=False)
    for i in range(W):
        mesh_of, x, y, ti, ui, pi, fi, nu = per[i]
        mesh = _mesh(*mesh_of)
        _draw_wafer(pax, d, ee, *mesh, x, y, ti, ui, norm, cm, bounds, False, "", 0,
                    present=pi, failed=fi, set_limits=False)
        label = ids[i] + ("" if slots is None else f" (slot {slots[i]})")
        nu_text = f"NU {nu:.2f} %" if np.isfinite(nu) else "NU —"
        if oos[i]:
            pax.add_patch(Circle((0.0, 0.0), 0.518 * d, fill=False, lw=2.2, ec="black",
                                 clip_on=False))
            nu_text = "OUT OF SPEC · " + nu_text
        caption.set_text(f"{label}\n{nu_text}")
        caption.set_fontweight("bold" if oos[i] else "normal")
        row, col = divmod(i, ncols)
        img = pixels(pfig)
        y0, x0 = head_px + row * cell_h, col * cell_w
        h, w = min(img.shape[0], cell_h), min(img.shape[1], cell_w)
        sheet[y0:y0 + h, x0:x0 + w] = img[:h, :w]
        for artist in set(pax.get_children()) - static:
            if artist is not caption:
                artist.remove()
    del pfig
    # colour bar and title, each drawn once
    bfig = Figure(figsize=(bar_px / dpi, nrows * cell_h / dpi), dpi=dpi)
    FigureCanvasAgg(bfig)
    cax = bfig.add_axes((0.25, 0.15, 0.18, 0.7))
    bfig.colorbar(ScalarMappable(norm=norm, cmap=cm), cax=cax,
                  ticks=bounds[::max(1, len(bounds) // 7)])
    cax.set_ylabel(COLORBAR_LABEL, fontsize=9)
    cax.tick_params(labelsize=7)
    img = pixels(bfig)
    h, w = min(img.shape[0], sheet.shape[0] - head_px), min(img.shape[1], bar_px)
    sheet[head_px:head_px + h, ncols * cell_w:ncols * cell_w + w] = img[:h, :w]
    if title:
        tfig = Figure(figsize=(sheet.shape[1] / dpi, head_px / dpi), dpi=dpi)
        FigureCanvasAgg(tfig)
        tfig.text(0.5, 0.8, title, fontsize=11, ha="center", va="top", parse_math=False)
        img = pixels(tfig)
        h, w = min(img.shape[0], head_px), min(img.shape[1], sheet.shape[1])
        sheet[:h, :w] = img[:h, :w]
    return encode_png(sheet)


def write_bytes_atomic(data, path):
    """Write ``data`` to ``path`` through a temporary file and os.replace; return the path."""
    path = Path(path)
    tmp = path.with_name(f".{path.name}.{os.getpid()}.{uuid.uuid4().hex[:12]}.tmp")
    try:
        with open(tmp, "xb") as fh:
            fh.write(data)
        os.replace(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    return path


#: Colours of the palette PNGs (maps, contact sheet, report images).
PNG_COLOURS = 192


def png_bytes(fig, dpi=None):
    """A figure as a palette PNG (`PNG_COLOURS` colours): about 3 x smaller than RGBA.

    The figure is drawn once on its Agg canvas; its pixels are reduced to a palette by
    Pillow's fast octree quantiser (Pillow is a dependency of matplotlib). Maps use one
    colour map and greys, so the palette holds them without visible steps.

    Parameters
    ----------
    fig : matplotlib.figure.Figure
    dpi : float, optional
        Resolution; default the figure's own.

    Returns
    -------
    bytes
    """
    import io

    from PIL import Image

    if dpi is not None and dpi != fig.dpi:
        fig.set_dpi(dpi)
    canvas = fig.canvas if isinstance(fig.canvas, FigureCanvasAgg) else FigureCanvasAgg(fig)
    canvas.draw()
    return encode_png(np.asarray(canvas.buffer_rgba())[..., :3].copy())


def encode_png(rgb):
    """An (H, W, 3) uint8 image as palette PNG bytes (see `png_bytes`)."""
    import io

    from PIL import Image

    image = Image.fromarray(rgb, "RGB").quantize(PNG_COLOURS, method=Image.Quantize.FASTOCTREE)
    buf = io.BytesIO()
    image.save(buf, format="png", compress_level=6)
    return buf.getvalue()


class _LabelStamps:
    """Site labels stamped into the rendered pixels, each distinct text rasterised once.

    A wafer map's 49 value labels are most of its drawing time when drawn as matplotlib
    texts (font layout and glyph rendering for every label of every map). The values of a
    lot repeat ("591.2" appears on many wafers), so each distinct string is rasterised
    once per process with matplotlib's own FreeType font object and then alpha-blended
    into the image: the same glyphs, a fraction of the time.
    """

    def __init__(self, fontsize_pt, dpi):
        from matplotlib.font_manager import FontProperties, findfont, get_font

        self.font = get_font(findfont(FontProperties(family=["sans-serif"])))
        self.size, self.dpi = float(fontsize_pt), float(dpi)
        self.cache = {}

    def bitmap(self, text):
        img = self.cache.get(text)
        if img is None:
            self.font.set_size(self.size, self.dpi)
            self.font.set_text(text, 0.0)
            self.font.draw_glyphs_to_bitmap(antialiased=True)
            img = self.cache[text] = np.asarray(self.font.get_image(), dtype=np.float32) / 255.0
            if len(self.cache) > 20000:      # bounded memory on a pathological lot
                self.cache.clear()
        return img

    def stamp(self, rgb, items):
        """Blend ``items`` of (x px, y px from the top, text, grey 0-1, above) into ``rgb``."""
        H, W = rgb.shape[:2]
        out = rgb.astype(np.float32)
        for px, py, text, grey, above in items:
            a = self.bitmap(text)
            h, w = a.shape
            x0 = int(round(px - w / 2))
            y0 = int(round(py - h)) if above else int(round(py))
            xa, ya = max(x0, 0), max(y0, 0)
            xb, yb = min(x0 + w, W), min(y0 + h, H)
            if xa >= xb or ya >= yb:
                continue
            al = a[ya - y0:yb - y0, xa - x0:xb - x0, None]
            region = out[ya:yb, xa:xb]
            region *= 1.0 - al
            region += al * (255.0 * grey)
        return out.round().astype(np.uint8)


def save_figure(fig, path, dpi=None):
    """Write a figure as PNG atomically: a temporary file in the same folder, then os.replace.

    Parameters
    ----------
    fig : matplotlib.figure.Figure
    path : str or path-like
        Destination ``.png``; its folder must exist.
    dpi : float, optional
        Resolution; default the figure's own.

    Returns
    -------
    pathlib.Path
        ``path``. Readers never see a half-written file; on error the
        temporary file is removed and the destination is left untouched.

    References
    ----------
    .. [1] Python documentation, os.replace (atomic rename on POSIX and Windows
       when source and destination are on the same file system).
    """
    path = Path(path)
    tmp = path.with_name(f".{path.name}.{os.getpid()}.{uuid.uuid4().hex[:12]}.tmp")
    try:
        data = png_bytes(fig, dpi)
        with open(tmp, "xb") as fh:
            fh.write(data)
        os.replace(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    return path


def render_wafer_png(path, thickness_nm, ok, x_mm, y_mm, diameter_mm, edge_exclusion_mm,
                     **kwargs):
    """`wafer_map_figure` written atomically to ``path`` (PNG); keyword arguments pass through.

    Parameters
    ----------
    path : str or path-like
        Destination ``.png``.
    thickness_nm, ok, x_mm, y_mm, diameter_mm, edge_exclusion_mm
        As for `wafer_map_figure` (one wafer, nm and mm).
    **kwargs
        Passed to `wafer_map_figure`.

    Returns
    -------
    pathlib.Path

    References
    ----------
    .. [1] Common practice, no source.
    """
    fig = wafer_map_figure(thickness_nm, ok, x_mm, y_mm, diameter_mm, edge_exclusion_mm,
                           **kwargs)
    return save_figure(fig, path)


_CANVAS = {}


def _render_task(task):
    """Render one map PNG, reusing this process's `MapCanvas` of the same geometry."""
    path, args, kwargs = task
    t, ok, x, y, d, ee = args
    kw = dict(kwargs)
    cmap = kw.pop("cmap", "viridis")
    figsize_in, dpi = tuple(kw.pop("figsize_in", (6.4, 5.6))), float(kw.pop("dpi", 100))
    key = (float(d), float(ee), cmap, figsize_in, dpi)
    canvas = _CANVAS.get(key)
    if canvas is None:
        _CANVAS.clear()                       # one geometry at a time: bounded memory
        canvas = _CANVAS[key] = MapCanvas(d, ee, cmap, figsize_in, dpi, stamp_labels=True)
    prepared = _prepare_map(t, ok, x, y, d, ee, **kw)
    canvas.draw(*prepared)
    path = Path(path)
    tmp = path.with_name(f".{path.name}.{os.getpid()}.{uuid.uuid4().hex[:12]}.tmp")
    try:
        with open(tmp, "xb") as fh:
            fh.write(canvas.png())
        os.replace(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    return str(path)


def safe_filename(text):
    """A file-name-safe, distinct form of a wafer id.

    Characters other than letters, digits, . _ - become _; an id that had to be
    changed, or is longer than 80 characters, gets a short SHA-256 suffix of the
    original, so distinct ids give distinct names.

    Parameters
    ----------
    text : str

    Returns
    -------
    str

    References
    ----------
    .. [1] Common practice, no source.
    """
    text = str(text)
    name = re.sub(r"[^A-Za-z0-9._-]", "_", text).lstrip(".")
    if name != text or len(name) > 80:
        # an id changed by the clean-up (or cut short) gets a hash of the original, so two
        # ids never share a file and names stay far below the file-system limit
        digest = hashlib.sha256(text.encode("utf-8")).hexdigest()[:8]
        name = f"{name[:80] or '_'}-{digest}"
    return name


def render_wafer_pngs(out_dir, thickness_nm, ok, x_mm, y_mm, diameter_mm, edge_exclusion_mm, *,
                      wafer_ids, slots=None, workers=2, surface=None, common_scale=False,
                      mp_context=None, progress=None, **kwargs):
    """One map PNG per wafer, rendered in parallel worker processes, each written atomically.

    Parameters
    ----------
    out_dir : str or path-like
        Output folder (created if missing); files are ``<wafer_id>.png``
        (see `safe_filename`).
    thickness_nm : array_like, shape (W, n_sites)
        Thickness in nm, NaN for a missing site.
    ok : array_like of bool or None
        Fit-quality flag broadcastable to ``thickness_nm``; None = all ok.
    x_mm, y_mm : array_like, shape (n_sites,)
        Site coordinates in mm.
    diameter_mm, edge_exclusion_mm : float
        Wafer diameter and edge exclusion in mm.
    wafer_ids : sequence of str, length W
        Wafer ids (titles and file names; must give distinct file names).
    slots : sequence of int, length W, optional
        Slots for the titles.
    workers : int
        Worker processes (``concurrent.futures.ProcessPoolExecutor``); 1 renders
        in this process.
    surface : PolarSurface or Surface, optional
        Precomputed map of the lot (default: `tps_polar_surface`, computed
        once here for all wafers, vectorised).
    common_scale : bool
        Use one colour scale for the whole lot instead of one per wafer.
    mp_context : multiprocessing context, optional
        Start method for the workers (default: the platform's).
    progress : callable(n), optional
        Called with 1 as each map is written (a progress display's ``update``).
    **kwargs
        Passed to `wafer_map_figure` (cmap, levels, figsize_in, dpi, ...).

    Returns
    -------
    list of pathlib.Path
        The written files, in wafer order.

    References
    ----------
    .. [1] Python documentation, concurrent.futures.ProcessPoolExecutor.
    """
    d, ee = check_wafer(diameter_mm, edge_exclusion_mm)
    if "cmap" in kwargs:
        _colormap(kwargs["cmap"])
    t, good, x, y, _ = lot_arrays(thickness_nm, ok, x_mm, y_mm)
    W = t.shape[0]
    ids = [str(v) for v in wafer_ids]
    if len(ids) != W or (slots is not None and len(slots) != W):
        raise FilmmapInputError(f"wafer_ids and slots need one entry per wafer ({W})",
                                field="wafer_ids")
    names = [safe_filename(i) + ".png" for i in ids]
    if len(set(names)) != W:
        raise FilmmapInputError("wafer ids must give distinct file names", field="wafer_ids")
    workers = int(workers)
    if workers < 1:
        raise FilmmapInputError("workers must be >= 1", field="workers")
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    s = tps_polar_surface(t, good, x, y, d, ee) if surface is None else surface
    if common_scale:
        use = good & inside_edge_exclusion(x, y, d, ee)
        lo, hi = _value_range(*[_mesh(s, i, W)[2] for i in range(W)], t[use])
        kwargs.setdefault("vmin", lo)
        kwargs.setdefault("vmax", hi)

    def tasks():
        # made one at a time: a lot's meshes are never all in memory (or in the pool's queue)
        for i in range(W):
            kw = dict(kwargs, wafer_id=ids[i], slot=None if slots is None else slots[i],
                      surface=_mesh(s, i, W))
            yield out / names[i], (t[i], good[i], x, y, d, ee), kw

    tick = progress or (lambda n: None)
    written = []
    if workers == 1 or W == 1:
        for task in tasks():
            written.append(Path(_render_task(task)))
            tick(1)
        return written
    from concurrent.futures import FIRST_COMPLETED, wait

    window = 4 * workers
    # the workers end with this process (a watchdog on the parent), never left as orphans
    with ProcessPoolExecutor(max_workers=min(workers, W), mp_context=mp_context,
                             initializer=end_with_parent) as pool:
        pending, done_paths = {}, {}
        for k, task in enumerate(tasks()):
            pending[pool.submit(_render_task, task)] = k
            while len(pending) >= window:
                finished, _ = wait(pending, return_when=FIRST_COMPLETED)
                for f in finished:
                    done_paths[pending.pop(f)] = Path(f.result())
                    tick(1)
        for f in list(pending):
            done_paths[pending.pop(f)] = Path(f.result())
            tick(1)
    return [done_paths[k] for k in range(W)]
