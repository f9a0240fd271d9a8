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

import hashlib
import itertools
import math
import os
import re
from concurrent.futures import ProcessPoolExecutor
from pathlib import Path

import matplotlib
import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.cm import ScalarMappable
from matplotlib.colors import Normalize
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from matplotlib.markers import TICKRIGHT
from matplotlib.patches import Circle
from matplotlib.patheffects import withStroke
from matplotlib.ticker import MaxNLocator, ScalarFormatter
from matplotlib.transforms import offset_copy

from filmmap.atomic import write_bytes_atomic
from filmmap.errors import FilmmapInputError
from filmmap.wafermap.sites import check_wafer, inside_edge_exclusion, lot_arrays
from filmmap.wafermap.stats import within_wafer_stats
from filmmap.wafermap.surface import tps_polar_surface
from filmmap.workers import end_with_parent, lower_priority

def _forget_inherited_mathtext_fonts():
    """In a forked child, drop the parent's cached mathtext layouts.

    matplotlib empties its font cache in a forked child (`os.register_at_fork`), because a
    FreeType font object opened before a fork shares its file position with the other
    processes and two of them loading glyphs at once read each other's bytes ("failed to
    load glyph"). Its cache of parsed mathtext (log-axis tick labels, for one) still holds
    font objects of the parent; emptied here, a child that draws the same text opens its
    own fonts. Skipped quietly where matplotlib keeps no such cache.

    References
    ----------
    .. [1] matplotlib issue #13723 and pull request #14535 (the font cache emptied at fork).
    .. [2] Python documentation, os.register_at_fork.
    """
    import sys

    parser = getattr(sys.modules.get("matplotlib.mathtext"), "MathTextParser", None)
    cached = getattr(parser, "_parse_cached", None)
    if hasattr(cached, "cache_clear"):
        cached.cache_clear()


if hasattr(os, "register_at_fork"):
    os.register_at_fork(after_in_child=_forget_inherited_mathtext_fonts)

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


def _band_values(levels):
    """The value each colour band is coloured by, as filled contours colour them.

    Band 0 lies below ``levels[0]``, band k between ``levels[k-1]`` and ``levels[k]``, the
    last above ``levels[-1]``: their middles, and half a band beyond the ends for the two
    outer ones (the ``extend="both"`` colours of ``contourf``).
    """
    levels = np.asarray(levels, dtype=float)
    return np.concatenate([[levels[0] - (levels[1] - levels[0]) / 2],
                           0.5 * (levels[:-1] + levels[1:]),
                           [levels[-1] + (levels[-1] - levels[-2]) / 2]])


def _band_index(values, levels):
    """Colour band (see `_band_values`) of each value for evenly spaced ``levels``; -1 for NaN."""
    levels = np.asarray(levels, dtype=float)
    step = (levels[-1] - levels[0]) / (levels.size - 1)
    k = (np.asarray(values) - levels[0]) * (1.0 / step)
    np.floor(k, out=k)
    k += 1
    np.clip(k, 0, levels.size, out=k)
    nan = np.isnan(k)
    k[nan] = -1
    return k.astype(np.int16)


def _band_colours(levels, norm, cmap):
    """Opaque RGBA colour of each band (see `_band_values`), each packed in one uint32 as
    the bytes of an RGBA pixel (`_paint_field`)."""
    rgba = cmap(Normalize(norm.vmin, norm.vmax)(_band_values(levels)), bytes=True)
    rgba[:, 3] = 255
    return np.ascontiguousarray(rgba, dtype=np.uint8).view(np.uint32).ravel()


#: Sampling plans (mesh -> pixels) kept per process: one per site layout and figure size.
_PLAN_CACHE_SIZE = 8
_PLANS = {}


def _polar_axes(gx, gy):
    """(azimuths rad, radii mm) when the 2-D mesh is a polar grid, else None.

    A polar grid as `PolarSurface.mesh` makes it: rows are azimuths (increasing, unwrapped),
    columns radii from the centre (increasing).
    """
    if gx.ndim != 2 or gx.shape != gy.shape or min(gx.shape) < 2:
        return None
    radius = np.hypot(gx[0], gy[0])
    theta = np.unwrap(np.arctan2(gy[:, -1], gx[:, -1]))
    if not (radius[-1] > 0 and np.all(np.diff(radius) > 0) and np.all(np.diff(theta) > 0)):
        return None
    tol = 1e-9 * radius[-1]
    if not (np.allclose(gx, radius[None, :] * np.cos(theta)[:, None], rtol=0, atol=tol)
            and np.allclose(gy, radius[None, :] * np.sin(theta)[:, None], rtol=0, atol=tol)):
        return None
    return theta, radius


def _bilinear(rows_axis, cols_axis, row_at, col_at):
    """Gather indices (4, m) and weights (4, m) of bilinear interpolation on a grid whose row
    and column coordinates are the increasing ``rows_axis`` and ``cols_axis``."""
    n_rows, n_cols = rows_axis.size, cols_axis.size
    fi = np.interp(row_at, rows_axis, np.arange(n_rows))
    fj = np.interp(col_at, cols_axis, np.arange(n_cols))
    i0 = np.clip(np.floor(fi).astype(np.intp), 0, n_rows - 2)
    j0 = np.clip(np.floor(fj).astype(np.intp), 0, n_cols - 2)
    a, b = fi - i0, fj - j0
    k = i0 * n_cols + j0
    index = np.stack([k, k + 1, k + n_cols, k + n_cols + 1])
    weight = np.stack([(1 - a) * (1 - b), (1 - a) * b, a * (1 - b), a * b])
    return index, weight


def _sampling_plan(gx, gy, extent, nx, ny):
    """How to sample a map mesh at the pixel centres of an ``nx`` x ``ny`` image over ``extent``.

    Supports the polar meshes of `PolarSurface.mesh` and the Cartesian grids of `tps_surface`
    (1-D x and y), both interpolated bilinearly in their own grid coordinates, as filled
    contours of the mesh are; None for any other mesh. Cached: the plan depends only on the
    grid and the pixels, the same for every wafer of a site layout.

    Returns
    -------
    (inside, matrix) or None
        Flat indices of the pixels the mesh covers, and the sparse matrix (pixels x mesh
        values, 4 weights a row) that takes the flattened Z to those pixels.
    """
    from scipy.sparse import csr_matrix

    gx, gy = np.asarray(gx, dtype=float), np.asarray(gy, dtype=float)
    key = (gx.shape, gy.shape, hash(gx.tobytes()), hash(gy.tobytes()), tuple(extent), nx, ny)
    if key in _PLANS:
        return _PLANS[key]
    x0, x1, y0, y1 = extent
    px = x0 + (np.arange(nx) + 0.5) * (x1 - x0) / nx
    py = y0 + (np.arange(ny) + 0.5) * (y1 - y0) / ny
    PX, PY = np.meshgrid(px, py)
    plan = None
    if gx.ndim == 1 and gy.ndim == 1 and gx.size >= 2 and gy.size >= 2 \
            and np.all(np.diff(gx) > 0) and np.all(np.diff(gy) > 0):
        inside = ((PX >= gx[0]) & (PX <= gx[-1]) & (PY >= gy[0]) & (PY <= gy[-1])).ravel()
        plan = (np.flatnonzero(inside),
                *_bilinear(gy, gx, PY.ravel()[inside], PX.ravel()[inside]), gx.size * gy.size)
    elif (polar := _polar_axes(gx, gy)) is not None:
        theta, radius = polar
        r = np.hypot(PX, PY).ravel()
        th = theta[0] + np.mod(np.arctan2(PY, PX).ravel() - theta[0], 2 * np.pi)
        inside = (r <= radius[-1]) & (th <= theta[-1])
        plan = (np.flatnonzero(inside), *_bilinear(theta, radius, th[inside], r[inside]),
                gx.size)
    if plan is not None:
        # one sparse product per wafer: a fraction of the time of gathering and weighting
        inside, index, weight, n_values = plan
        rows = np.repeat(np.arange(inside.size), index.shape[0])
        plan = (inside, csr_matrix((weight.T.ravel(), (rows, index.T.ravel())),
                                   shape=(inside.size, n_values)))
    if len(_PLANS) >= _PLAN_CACHE_SIZE:
        _PLANS.clear()
    _PLANS[key] = plan
    return plan


def _field_bands(gx, gy, z, extent, nx, ny, levels):
    """The colour band (`_band_index`) of the map at each pixel of an image over ``extent``.

    Returns an (ny, nx) int16 array (row 0 at the bottom, y0), -1 where the mesh has no
    value (beyond the measured radius), or None when the mesh form is not supported.
    """
    plan = _sampling_plan(gx, gy, extent, nx, ny)
    if plan is None:
        return None
    inside, matrix = plan
    band = np.full(nx * ny, -1, np.int16)
    band[inside] = _band_index(matrix @ np.asarray(z, dtype=float).ravel(), levels)
    return band.reshape(ny, nx)


def _pixels_of(ax, extent):
    """Pixels (nx, ny) that ``extent`` (data units) covers on ``ax`` as it is laid out now."""
    x0, x1, y0, y1 = extent
    p = ax.transData.transform([(x0, y0), (x1, y1)])
    return max(2, int(round(abs(p[1, 0] - p[0, 0])))), max(2, int(round(abs(p[1, 1] - p[0, 1]))))


def _shade(ax, gx, gy, z, norm, cmap, levels, radius_mm, offset=(0.0, 0.0), image=None,
           pixels_only=False):
    """The map field in fine bands (`_fine_levels` of the tick boundaries ``levels``).

    Drawn as one image sampled at the axes' own pixels (one image is a fraction of the
    drawing time of the contour paths of 40-odd bands); a mesh form that cannot be sampled
    so falls back to filled contours. ``image``: an AxesImage to reuse (`MapCanvas`);
    with ``pixels_only`` its data are left as they are (the caller draws the pixels itself
    with `_paint_field`, and does not draw the image).
    A fresh Normalize per panel: a shared one makes matplotlib re-run a callback of every
    earlier panel for each new one (contact-sheet time growing with the square of the
    wafers).

    Returns
    -------
    (artist, bands)
        The image (or contour set), and the band of each image pixel (`_field_bands`;
        None for contours) for drawing the same pixels without matplotlib (`_paint_field`).
    """
    fine = _fine_levels(levels)
    ox, oy = float(offset[0]), float(offset[1])
    extent = (ox - radius_mm, ox + radius_mm, oy - radius_mm, oy + radius_mm)
    nx, ny = _pixels_of(ax, extent)
    gx_, gy_ = np.asarray(gx, dtype=float), np.asarray(gy, dtype=float)
    # sampled about the wafer's own centre (the plan does not depend on where it is drawn)
    bands = _field_bands(gx_, gy_, z, (-radius_mm, radius_mm, -radius_mm, radius_mm), nx, ny,
                         fine)
    own_norm = Normalize(norm.vmin, norm.vmax)
    if bands is None:
        return ax.contourf(gx_ + ox, gy_ + oy, np.ma.masked_invalid(z), levels=fine, cmap=cmap,
                           norm=own_norm, extend="both"), None
    if image is not None and pixels_only:
        image.set_extent(extent)
        return image, bands
    values = np.append(_band_values(fine), np.nan)[bands]      # band -1: the appended NaN
    if image is None:
        image = ax.imshow(values, extent=extent, origin="lower", cmap=cmap, norm=own_norm,
                          interpolation="nearest", aspect=ax.get_aspect(), zorder=1)
    else:
        image.set_data(values)
        image.set_extent(extent)
        image.set_norm(own_norm)
    return image, bands


def _paint_field(buffer, ax, extent, bands, colours):
    """Write the map pixels straight into an Agg canvas buffer (H, W, 4 uint8, contiguous
    RGBA), as the image of `_shade` would be drawn with nearest sampling at one image pixel
    per screen pixel: the colour of each band (``colours``, `_band_colours`) is looked up
    once, no resampling (`MapCanvas.png`, `_SheetPanel`)."""
    x0, x1, y0, y1 = extent
    p = ax.transData.transform([(x0, y1)])[0]          # top-left corner, pixels (y up)
    H = buffer.shape[0]
    col0, row0 = int(round(p[0])), int(round(H - p[1]))
    top_down = bands[::-1]
    # the part of the image inside the buffer
    r0, c0 = max(0, -row0), max(0, -col0)
    r1 = min(top_down.shape[0], H - row0)
    c1 = min(top_down.shape[1], buffer.shape[1] - col0)
    if r0 >= r1 or c0 >= c1:
        return
    top_down = top_down[r0:r1, c0:c1]
    # one uint32 per RGBA pixel: a quarter of the element copies of a per-channel write
    pixels = buffer.view(np.uint32)[..., 0]
    region = pixels[row0 + r0:row0 + r1, col0 + c0:col0 + c1]
    np.copyto(region, colours[top_down], where=top_down >= 0)      # band -1: untouched


def _draw_wafer(ax, diameter_mm, edge_exclusion_mm, gx, gy, z, x, y, t, use, norm, cmap,
                levels, present=None, failed=None, offset=(0.0, 0.0)):
    """Map, outline, edge-exclusion ring and sites on one axes (limits already set); return
    the mappable.

    ``present`` marks the sites the wafer has (a missing site is not drawn at all);
    ``failed`` the measured sites whose fit failed (a white X, clearly not data).
    ``offset`` (mm) places the wafer on a shared axes (`lot_contact_sheet` draws every wafer
    on one axes: one axes per wafer costs more than the wafer itself).
    """
    r = diameter_mm / 2
    ox_, oy_ = float(offset[0]), float(offset[1])
    x, y = np.asarray(x) + ox_, np.asarray(y) + oy_
    present = np.ones(x.shape, bool) if present is None else np.asarray(present, bool)
    failed = (present & ~np.isfinite(t)) if failed is None else np.asarray(failed, bool) & present
    mappable = None
    if z is not None and np.isfinite(z).sum() >= 4:
        mappable = _shade(ax, gx, gy, z, norm, cmap, levels, r, offset=(ox_, oy_))[0]
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


#: Font size of the site value labels, pt.
LABEL_FONTSIZE = 6.0

#: A white halo around the site value labels (about one pixel at 100 dpi): legible on dark
#: and light map colours alike.
LABEL_HALO = [withStroke(linewidth=1.5, foreground="white")]


def _overlaps(box, boxes):
    """Which rows of ``boxes`` (k, 4: x0, y0, x1, y1) overlap ``box`` (touching is not)."""
    return ((box[0] < boxes[:, 2]) & (boxes[:, 0] < box[2]) & (box[1] < boxes[:, 3])
            & (boxes[:, 1] < box[3]))


def place_site_labels(anchor_px, size_px, gap_px, centre_px, radius_px, keep_out_px=None):
    """Places for site labels such that none overlaps another label or a site mark and
    none crosses the wafer outline; labels with no free place are left out.

    Greedy, in the order given: each label takes the first free place of above its site,
    below it, right of it, left of it, then the four diagonal places. A lot's usual maps
    keep every label; a dense map is thinned to the labels that fit (the values of all
    sites are in lot.nc and sites.csv).

    Parameters
    ----------
    anchor_px : array_like, shape (n, 2)
        Site positions in pixels (x to the right, y up).
    size_px : array_like, shape (n, 2)
        Width and height of each label's box in pixels.
    gap_px : array_like, shape (n,) or float
        Distance from the site to its label's box in pixels (clear of the site's mark).
    centre_px : (float, float)
        Wafer centre in pixels.
    radius_px : float
        Wafer radius in pixels: every box lies inside this circle.
    keep_out_px : array_like, shape (m, 4), optional
        Boxes (x0, y0, x1, y1, pixels) no label may overlap: the site marks.

    Returns
    -------
    numpy.ndarray, shape (n, 4)
        Each label's box (x0, y0, x1, y1) in pixels; a row of NaN for a label left out.

    References
    ----------
    .. [1] Common practice, no source: greedy label placement over a few candidate places.
    """
    anchor = np.asarray(anchor_px, dtype=float).reshape(-1, 2)
    size = np.asarray(size_px, dtype=float).reshape(-1, 2)
    n = anchor.shape[0]
    gap = np.broadcast_to(np.asarray(gap_px, dtype=float), (n,))
    keep_out = np.asarray(keep_out_px if keep_out_px is not None else np.zeros((0, 4)),
                          dtype=float).reshape(-1, 4)
    # every label's 8 candidate boxes (n, 8, 4), in the order tried
    ax_, ay_, w, h, g = anchor[:, 0:1], anchor[:, 1:2], size[:, 0:1], size[:, 1:2], gap[:, None]
    d = g / math.sqrt(2.0)
    x0 = np.hstack([ax_ - w / 2, ax_ - w / 2, ax_ + g, ax_ - g - w,
                    ax_ + d, ax_ - d - w, ax_ + d, ax_ - d - w])
    y0 = np.hstack([ay_ + g, ay_ - g - h, ay_ - h / 2, ay_ - h / 2,
                    ay_ + d, ay_ + d, ay_ - d - h, ay_ - d - h])
    cand = np.stack([x0, y0, x0 + w, y0 + h], axis=-1)
    # what does not depend on the other labels: inside the circle, clear of every mark
    cx, cy = float(centre_px[0]), float(centre_px[1])
    far_x = np.maximum(np.abs(cand[..., 0] - cx), np.abs(cand[..., 2] - cx))
    far_y = np.maximum(np.abs(cand[..., 1] - cy), np.abs(cand[..., 3] - cy))
    free = np.hypot(far_x, far_y) <= radius_px          # the box's farthest corner
    if keep_out.size:
        c, k = cand[:, :, None, :], keep_out[None, None, :, :]
        free &= ~np.any((c[..., 0] < k[..., 2]) & (k[..., 0] < c[..., 2])
                        & (c[..., 1] < k[..., 3]) & (k[..., 1] < c[..., 3]), axis=-1)
    boxes = np.full((n, 4), np.nan)
    placed = np.zeros((0, 4))
    for i in range(n):
        options = np.flatnonzero(free[i])
        for j in options:
            if not _overlaps(cand[i, j], placed).any():
                boxes[i] = cand[i, j]
                placed = np.vstack([placed, cand[i, j]])
                break
    return boxes


class _Blitter:
    """Draws only the changing artists of a figure over its saved static pixels (Agg).

    The first `pixels` draws the whole figure with the changing artists hidden and keeps
    those pixels; every call then restores them, lets ``paint`` write pixels directly (the
    map field) and draws just the changing artists, in the order given. The static part
    (axes, frames, colour-bar gradient, fixed texts) is then drawn once per process instead
    of once per wafer (matplotlib's "blitting").
    """

    def __init__(self, fig):
        self.fig, self.background = fig, None

    def pixels(self, changing, hidden=(), paint=None):
        """(H, W, 4) uint8 RGBA view of the canvas, valid until the next drawing.

        Parameters
        ----------
        changing : list of Artist
            Drawn over the background in this order (when visible).
        hidden : list of Artist
            Not drawn by matplotlib (``paint`` draws them), kept out of the background.
        paint : callable(buffer), optional
            Writes into the (H, W, 4) canvas buffer before ``changing`` is drawn.

        ``changing`` and ``hidden`` must hold every artist that may differ from the first
        call on.
        """
        canvas = self.fig.canvas
        if self.background is None:
            every = [*changing, *hidden]
            shown = [a.get_visible() for a in every]
            for a in every:
                a.set_visible(False)
            canvas.draw()
            self.background = canvas.copy_from_bbox(self.fig.bbox)
            for a, v in zip(every, shown):
                a.set_visible(v)
        else:
            canvas.restore_region(self.background)
        renderer = canvas.get_renderer()
        if paint is not None:
            paint(np.asarray(renderer.buffer_rgba()))
        for artist in changing:
            if artist.get_visible():
                artist.draw(renderer)
        return np.asarray(renderer.buffer_rgba())


def _marker_px(style, dpi):
    """Half the size in pixels of a site mark of ``style`` (a marker dict of ``ax.plot``)."""
    return 0.5 * (float(style["ms"]) + float(style.get("mew", 1.0))) * dpi / 72.0


#: Marker of a site used in the map's statistics.
USED_MARKER = dict(ls="none", marker=".", ms=2.5, color="black", mew=0.0)

#: Font size of the colour bar's tick labels, pt.
TICK_FONTSIZE = 7.0

#: Font size of a wafer map's title, pt.
TITLE_FONTSIZE = 10.0


def _wafer_artists(ax, d, ee, cmap, aspect):
    """The reusable artists of one wafer's axes, limits set and axis off: the thickness
    field (an image whose pixels are painted later), the outline, the edge-exclusion ring
    (None without one) and the empty used / excluded / failed site marks.

    Parameters
    ----------
    ax : matplotlib.axes.Axes
    d, ee : float
        Wafer diameter and edge exclusion, mm.
    cmap : matplotlib.colors.Colormap
    aspect : str
        The field image's aspect (``"equal"`` or ``"auto"``).

    Returns
    -------
    tuple (field, outline, ring, used, outside, failed)
    """
    r = d / 2.0
    ax.set_xlim(-1.05 * r, 1.05 * r)
    ax.set_ylim(-1.05 * r, 1.05 * r)
    ax.set_axis_off()
    field = ax.imshow(np.full((2, 2), np.nan), extent=(-r, r, -r, r), origin="lower",
                      cmap=cmap, norm=Normalize(0.0, 1.0), interpolation="nearest",
                      aspect=aspect, zorder=1)
    ox, oy = wafer_outline(d)
    outline = ax.plot(ox, oy, color="black", lw=1.0, zorder=3)[0]
    ring = None
    if ee > 0:
        ring = ax.add_patch(Circle((0.0, 0.0), r - ee, fill=False, ls="--", lw=0.7,
                                   ec="0.35", zorder=3))
    return (field, outline, ring, ax.plot([], [], zorder=4, **USED_MARKER)[0],
            ax.plot([], [], zorder=4, **EXCLUDED_MARKER)[0],
            ax.plot([], [], zorder=5, **FAILED_MARKER)[0])


class MapCanvas:
    """One wafer-map figure, reused for wafer after wafer (one per worker process).

    The outline, the edge-exclusion ring, the axes, the colour bar and the map image are
    made once; each `draw` updates only the map's pixels, the site marks, the labels, the
    colour-bar ticks and the title. `png` draws only what changed over the figure's static
    pixels (`_Blitter`), writes the map's pixels directly (`_paint_field`) and stamps the
    site values and tick labels (`_TextStamps`): a map in about a tenth of the time of a
    figure drawn anew (benchmarks/report.py).

    Parameters
    ----------
    diameter_mm, edge_exclusion_mm : float
        Wafer diameter and edge exclusion in mm.
    cmap : str
        One of `ALLOWED_CMAPS`.
    figsize_in : (float, float)
        Figure size in inches.
    dpi : float
        Resolution in dots per inch.
    stamp_labels : bool
        `png` draws the fast way (labels stamped); without it `png` draws the figure
        itself, labels as texts.
    """

    def __init__(self, diameter_mm, edge_exclusion_mm, cmap="viridis", figsize_in=(6.4, 5.6),
                 dpi=100, stamp_labels=False):
        d, ee = float(diameter_mm), float(edge_exclusion_mm)
        self.key = (d, ee, cmap, tuple(figsize_in), float(dpi))
        self.d, self.ee, self.cmap, self.dpi = d, ee, _colormap(cmap), float(dpi)
        self.palette = map_palette(cmap)
        self.font = _TextStamps(LABEL_FONTSIZE, dpi, halo=True)
        self.tick_font = _TextStamps(TICK_FONTSIZE, dpi)
        self.title_font = _TextStamps(TITLE_FONTSIZE, dpi, cache=False)
        self._title_ascent = self.title_font.line_px - self.title_font.glyphs("lp")[3]
        self.stamp_labels = bool(stamp_labels)
        r = d / 2
        fig = Figure(figsize=figsize_in, dpi=dpi)
        FigureCanvasAgg(fig)
        ax = fig.add_axes((0.05, 0.05, 0.72, 0.81))
        cax = fig.add_axes((0.80, 0.14, 0.03, 0.64))
        ax.set_aspect("equal")
        # tick machinery is most of the render time; the notch orients
        (self.field, self.outline, self.ring, self.used, self.outside,
         self.failed) = _wafer_artists(ax, d, ee, self.cmap, "equal")
        ax.text(-1.04 * r, -1.04 * r, f"Ø {d:g} mm, edge exclusion {ee:g} mm, notch at -y",
                fontsize=7, color="0.3", ha="left", va="bottom")
        self.legend_handle = Line2D([], [], **FAILED_MARKER)
        self.legend = ax.legend(handles=[self.legend_handle], labels=[" "], loc="upper right",
                                bbox_to_anchor=(1.02, 1.02), fontsize=7, frameon=False)
        self.legend.set_visible(False)
        # the colour bar: one gradient image filling the bar, drawn once; its ticks (marks
        # and labels, not the axis machinery, which costs more than the map) follow each
        # wafer's scale
        cax.imshow(np.linspace(0, 1, 256)[:, None], aspect="auto", cmap=self.cmap,
                   origin="lower", extent=(0, 1, 0, 1), interpolation="nearest")
        cax.set_xlim(0, 1)
        cax.set_ylim(0, 1)
        cax.set_xticks([])
        cax.set_yticks([])
        cax.set_ylabel(COLORBAR_LABEL, fontsize=9)
        cax.yaxis.set_label_position("right")
        width_px = cax.bbox.width
        cax.yaxis.set_label_coords(1.0 + (3.5 + 3.5 + 5.5 * TICK_FONTSIZE * 0.62 + 4.0)
                                   * dpi / 72.0 / width_px, 0.5)
        self.tick_marks = cax.plot([], [], ls="none", marker=TICKRIGHT, ms=3.5, mew=0.8,
                                   color="black", clip_on=False,
                                   transform=cax.get_yaxis_transform())[0]
        self._tick_place = offset_copy(cax.get_yaxis_transform(), fig=fig, x=7.0, y=0.0,
                                       units="points")
        self.tick_labels = []
        self.title = fig.suptitle("", fontsize=TITLE_FONTSIZE, parse_math=False)
        self.fig, self.ax, self.cax = fig, ax, cax
        ax.apply_aspect()       # the final box of the map: its pixels and label places
        self.labels = []        # site values as texts of the figure (not stamped)
        self.label_boxes = np.zeros((0, 4))
        self._stamped = []      # (font, text, x, y, grey, on_baseline) of the stamped texts
        self._scratch = []      # artists of one wafer only (a scatter when there is no map)
        self._paint = None
        self._blit = _Blitter(fig)

    def draw(self, gx, gy, z, x, y, t, use, present, failed, bounds, value_fmt, title):
        """Draw one wafer (arguments as prepared by `wafer_map_figure`); return the figure."""
        ax, r = self.ax, self.d / 2
        for artist in self._scratch:
            artist.remove()
        self._scratch = []
        lo, hi = float(bounds[0]), float(bounds[-1])
        norm = Normalize(lo, hi)
        shaded, self._paint = None, None
        if z is not None and np.isfinite(z).sum() >= 4:
            shaded, bands = _shade(ax, gx, gy, z, norm, self.cmap, bounds, r, image=self.field,
                                   pixels_only=self.stamp_labels)
            if bands is not None:
                colours = _band_colours(_fine_levels(bounds), norm, self.cmap)
                extent = self.field.get_extent()
                self._paint = lambda buf: _paint_field(buf, ax, extent, bands, colours)
        self.field.set_visible(shaded is self.field)
        if shaded is not None and shaded is not self.field:
            self._scratch.append(shaded)            # filled contours of an unusual mesh
        if shaded is None:   # no map (too few sites): colour the sites themselves
            self._scratch.append(ax.scatter(x[use], y[use], c=t[use], cmap=self.cmap,
                                            norm=norm, s=30, edgecolors="black",
                                            linewidths=0.4, zorder=4))
        self.used.set_data(x[use], y[use])
        outside = present & ~use & ~failed
        self.outside.set_data(x[outside], y[outside])
        self.failed.set_data(x[failed], y[failed])
        n_failed = int(failed.sum())
        self.legend.set_visible(n_failed > 0)
        if n_failed:
            text = f"failed fit ({n_failed} site{'s' if n_failed != 1 else ''})"
            self.legend_handle.set_label(text)
            self.legend.get_texts()[0].set_text(text)
        self._stamped = []
        self._place_labels(x, y, t, use, present, failed, outside, value_fmt)
        self._colour_bar_ticks(bounds)
        self.title.set_text(title)
        if self.stamp_labels:
            self._stamp_title(title)
        return self.fig

    def _stamp_title(self, title):
        """The title's lines as stamps, placed as the figure's title is: centred, its first
        line's top at the title's anchor, lines 1.2 line heights apart (matplotlib's)."""
        font = self.title_font
        cx, top = self.title.get_transform().transform(self.title.get_position())
        for k, line in enumerate(title.split("\n")):
            baseline = top - self._title_ascent - k * 1.2 * font.line_px
            self._stamped.append((font, line, cx, baseline, 0.0, True))

    @staticmethod
    def _texts(pool, n, parent=None, **style):
        """``n`` texts of ``pool`` (made on ``parent`` as needed), the rest hidden."""
        while len(pool) < n:
            pool.append(parent.text(0, 0, "", **style))
        for text in pool[n:]:
            text.set_visible(False)
        return pool[:n]

    def _colour_bar_ticks(self, bounds):
        """Tick marks and labels of the colour bar at ``bounds`` (every few of them)."""
        lo, hi = float(bounds[0]), float(bounds[-1])
        ticks = np.asarray(bounds[::max(1, len(bounds) // 7)], dtype=float)
        where = (ticks - lo) / (hi - lo)            # the bar's axes run 0..1 over lo..hi
        self.tick_marks.set_data(np.ones_like(where), where)
        texts = _tick_texts(ticks, lo, hi)
        if self.stamp_labels:
            at = self._tick_place.transform(np.column_stack([np.ones_like(where), where])) \
                if texts else np.zeros((0, 2))
            for (px, py), text in zip(at, texts):
                w, _ = self.tick_font.box_size(text)
                self._stamped.append((self.tick_font, text, px - _TextStamps.PAD_PX + w / 2,
                                      py, 0.0, False))
            self._texts(self.tick_labels, 0)
            return
        for label, yi, text in zip(
                self._texts(self.tick_labels, len(texts), self.cax, ha="left", va="center",
                            fontsize=TICK_FONTSIZE, transform=self._tick_place), where, texts):
            label.set_position((1.0, yi))
            label.set_text(text)
            label.set_visible(True)

    def _place_labels(self, x, y, t, use, present, failed, outside, value_fmt):
        """Site values next to their sites, none overlapping (`place_site_labels`)."""
        show = present & np.isfinite(t)
        texts = [value_fmt.format(v) for v in t[show]]
        to_px = self.ax.transData
        anchor = to_px.transform(np.column_stack([x[show], y[show]])) if texts else \
            np.zeros((0, 2))
        marks = []
        for mask, style in ((use, USED_MARKER), (outside, EXCLUDED_MARKER),
                            (failed, FAILED_MARKER)):
            if mask.any():
                half = _marker_px(style, self.dpi)
                pts = to_px.transform(np.column_stack([x[mask], y[mask]]))
                marks.append(np.column_stack([pts - half, pts + half]))
        keep_out = np.concatenate(marks) if marks else np.zeros((0, 4))
        half = np.where(use[show], _marker_px(USED_MARKER, self.dpi),
                        _marker_px(EXCLUDED_MARKER, self.dpi))
        centre = to_px.transform((0.0, 0.0))
        radius = to_px.transform((self.d / 2, 0.0))[0] - centre[0]
        sizes = np.array([self.font.box_size(s) for s in texts]).reshape(-1, 2)
        boxes = place_site_labels(anchor, sizes, half + 1.0, centre, radius - 1.0, keep_out)
        kept = np.isfinite(boxes[:, 0])
        self.label_boxes = boxes[kept]
        greys = np.where(use[show], 0.0, 0.35)[kept]
        texts = [s for s, k in zip(texts, kept) if k]
        if self.stamp_labels:
            self._stamped += [(self.font, s, 0.5 * (b[0] + b[2]), 0.5 * (b[1] + b[3]), g, False)
                              for b, s, g in zip(self.label_boxes, texts, greys)]
            self._texts(self.labels, 0)
            return
        # texts in data coordinates: they stay by their sites at any resolution of the figure
        centres = to_px.inverted().transform(np.column_stack(
            [self.label_boxes[:, [0, 2]].mean(axis=1), self.label_boxes[:, [1, 3]].mean(axis=1)]))
        for label, (cx, cy), text, grey in zip(
                self._texts(self.labels, len(texts), self.ax, ha="center", va="center",
                            fontsize=LABEL_FONTSIZE, zorder=6, path_effects=LABEL_HALO),
                centres, texts, greys):
            label.set_position((cx, cy))
            label.set_text(text)
            label.set_color(str(grey) if grey else "black")
            label.set_visible(True)

    def _layers(self):
        """(artists `png` draws, artists it stamps or paints instead) for `_Blitter`."""
        extra = [self.ring] if self.ring is not None else []
        return ([*self._scratch, self.outline, *extra, self.used, self.outside, self.failed,
                 self.legend, self.tick_marks],
                [self.field, self.title, *self.labels, *self.tick_labels])

    def prepare(self):
        """Draw the static part of the figure now (with ``stamp_labels``), so that worker
        processes forked afterwards start with it drawn."""
        if self.stamp_labels and self._blit.background is None:
            self._blit.pixels(*self._layers())

    def png(self):
        """The current wafer as palette PNG bytes (`png_bytes`), labels stamped in."""
        if not self.stamp_labels:
            return png_bytes(self.fig)
        changing, hidden = self._layers()
        rgba = self._blit.pixels(changing, hidden=hidden, paint=self._paint)
        _stamp_all(rgba[..., :3], self._stamped)
        return encode_png(rgba, MAP_PNG_COMPRESS_LEVEL, palette=self.palette)


def _tick_texts(ticks, lo, hi):
    """Tick labels as a colour bar's axis over ``lo``..``hi`` would write them (its default
    formatter, without an offset or a power of ten)."""
    formatter = ScalarFormatter(useOffset=False)
    formatter.set_scientific(False)             # no "x 10^n" beside the bar either
    formatter.create_dummy_axis()
    formatter.axis.set_view_interval(lo, hi)
    formatter.set_locs(ticks)
    return [formatter(v) for v in ticks]


def _stamp_all(rgb, items):
    """``rgb`` (changed in place: the canvas's pixels, drawn anew for the next wafer) with
    the stamped texts ``items`` of (`_TextStamps`, text, x, y, grey, on_baseline) in it."""
    for font in {id(item[0]): item[0] for item in items}.values():
        font.stamp_into(rgb, [item[1:] for item in items if item[0] is font])
    return rgb


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
        _draw_wafer(ax, d, ee, *mesh, x, y, ti, ui, norm, cm, bounds, present=pi, failed=fi,
                    offset=(cx, cy))
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


class _SheetPanel:
    """One contact-sheet panel (map below, caption above), reused for every wafer.

    Everything on it changes from wafer to wafer, so `pixels` draws just these artists over
    a blank panel (`_Blitter`): no axes or figure machinery per wafer.
    """

    def __init__(self, diameter_mm, edge_exclusion_mm, cmap, cell_w_px, cell_h_px, dpi,
                 panel_in, cap_in):
        d, ee = diameter_mm, edge_exclusion_mm
        self.d, self.cmap = d, cmap
        fig = Figure(figsize=(cell_w_px / dpi, cell_h_px / dpi), dpi=dpi)
        FigureCanvasAgg(fig)
        ax = fig.add_axes((0.04, 0.04 * panel_in / (panel_in + cap_in),
                           0.92, 0.92 * panel_in / (panel_in + cap_in)))
        (self.field, self.outline, self.ring, self.used, self.outside,
         self.failed) = _wafer_artists(ax, d, ee, cmap, "auto")
        self.out_of_spec = ax.add_patch(Circle((0.0, 0.0), 0.518 * d, fill=False, lw=2.2,
                                               ec="black", clip_on=False, zorder=6))
        # the caption (wafer, slot, NU), stamped: centred, its last line's box 2 pt above
        # the map's axes
        self.caption_fonts = {False: _TextStamps(7.0, dpi, cache=False),
                              True: _TextStamps(7.0, dpi, cache=False, weight="bold")}
        self.caption_at = (ax.bbox.x0 + ax.bbox.width / 2, ax.bbox.y1 + 2.0 / 72.0 * dpi)
        self.ax, self.fig = ax, fig
        self._scratch = []
        self._blit = _Blitter(fig)

    def pixels(self, mesh, x, y, t, use, present, failed, norm, colours, bounds, caption,
               out_of_spec):
        """(H, W, 3) view of one wafer's panel (valid until the next call); ``colours``: the
        band colours of the common scale (`_band_colours`)."""
        for artist in self._scratch:
            artist.remove()
        self._scratch = []
        gx, gy, z = mesh
        shaded = paint = None
        if z is not None and np.isfinite(z).sum() >= 4:
            shaded, bands = _shade(self.ax, gx, gy, z, norm, self.cmap, bounds, self.d / 2,
                                   image=self.field, pixels_only=True)
            if bands is not None:
                extent = self.field.get_extent()
                paint = lambda buf: _paint_field(buf, self.ax, extent, bands, colours)  # noqa: E731
        self.field.set_visible(shaded is self.field)
        if shaded is not None and shaded is not self.field:
            self._scratch.append(shaded)
        if shaded is None:   # no map (too few sites): colour the sites themselves
            self._scratch.append(self.ax.scatter(
                x[use], y[use], c=t[use], cmap=self.cmap, norm=Normalize(norm.vmin, norm.vmax),
                s=30, edgecolors="black", linewidths=0.4, zorder=4))
        self.used.set_data(x[use], y[use])
        outside = present & ~use & ~failed
        self.outside.set_data(x[outside], y[outside])
        self.failed.set_data(x[failed], y[failed])
        self.out_of_spec.set_visible(bool(out_of_spec))
        extra = [self.ring] if self.ring is not None else []
        rgb = self._blit.pixels([*self._scratch, self.outline, *extra, self.used,
                                 self.outside, self.failed, self.out_of_spec],
                                hidden=[self.field], paint=paint)[..., :3]
        font = self.caption_fonts[bool(out_of_spec)]
        x, bottom = self.caption_at
        lines = caption.split("\n")
        baseline = bottom + font.line_descent_px
        items = [(line, x, baseline + (len(lines) - 1 - k) * 1.2 * font.line_px, 0.0, True)
                 for k, line in enumerate(lines)]
        font.stamp_into(rgb, items)         # the panel's pixels, drawn anew for each wafer
        return rgb


def contact_sheet_png(thickness_nm, ok, x_mm, y_mm, diameter_mm, edge_exclusion_mm, *,
                      wafer_ids=None, slots=None, ncols=None, cmap="viridis", levels=12,
                      panel_in=2.0, dpi=100, out_of_spec=None, lot_id="", title=None,
                      max_pixels=MAX_SHEET_PIXELS, surfaces=None, between_panels=None):
    """The lot contact sheet as palette PNG bytes, drawn one panel at a time.

    The same sheet as `lot_contact_sheet` (arguments alike), but each wafer is drawn on one
    small reused panel figure whose pixels are pasted into the sheet: the memory is one
    panel and the sheet's pixels, not a figure holding every wafer's contours, so it stays
    bounded and grows linearly in time however many wafers the lot has. ``surfaces``: list
    of (wafer rows, PolarSurface) already computed for each site layout (not recomputed).
    ``between_panels``: called after each panel (work interleaved with the sheet, such as
    `MapRendering.pump`).

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
    panel = _SheetPanel(d, ee, cm, cell_w, cell_h, dpi, panel_in, cap_in)
    colours = _band_colours(_fine_levels(bounds), norm, cm)
    for i in range(W):
        mesh_of, x, y, ti, ui, pi, fi, nu = per[i]
        label = ids[i] + ("" if slots is None else f" (slot {slots[i]})")
        nu_text = f"NU {nu:.2f} %" if np.isfinite(nu) else "NU —"
        if oos[i]:
            nu_text = "OUT OF SPEC · " + nu_text
        img = panel.pixels(_mesh(*mesh_of), x, y, ti, ui, pi, fi, norm, colours, bounds,
                           f"{label}\n{nu_text}", oos[i])
        row, col = divmod(i, ncols)
        y0, x0 = head_px + row * cell_h, col * cell_w
        h, w = min(img.shape[0], cell_h), min(img.shape[1], cell_w)
        sheet[y0:y0 + h, x0:x0 + w] = img[:h, :w]
        if between_panels is not None:
            between_panels()
    del panel
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
    return encode_png(sheet, SHEET_PNG_COMPRESS_LEVEL, palette=map_palette(cmap))


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
    if dpi is not None and dpi != fig.dpi:
        fig.set_dpi(dpi)
    canvas = fig.canvas if isinstance(fig.canvas, FigureCanvasAgg) else FigureCanvasAgg(fig)
    canvas.draw()
    return encode_png(np.asarray(canvas.buffer_rgba()))


#: zlib level of the wafer-map PNGs: a third less encoding time than the default 6 for
#: a quarter more bytes (about 40 kB a map; measured on 40 maps of benchmarks/report.py).
MAP_PNG_COMPRESS_LEVEL = 2

#: zlib level of the contact sheet: 0.09 s instead of 0.16 s for 0.93 MB instead of 0.78 MB
#: at 150 wafers (measured; report.html embeds it, and stays well under its 3 MB).
SHEET_PNG_COMPRESS_LEVEL = 4


def encode_png(rgb, compress_level=6, palette=None):
    """An (H, W, 3) RGB or (H, W, 4) RGBA uint8 image as palette PNG bytes (`png_bytes`).

    Parameters
    ----------
    rgb : numpy.ndarray, shape (H, W, 3) or (H, W, 4), uint8
        An RGBA canvas buffer is read in place (its alpha is left out).
    compress_level : int
        zlib level 0-9 (Pillow's PNG writer): higher is smaller and slower.
    palette : PIL.Image.Image, optional
        A fixed palette (`map_palette`) each pixel takes its nearest colour from, without
        dithering; default a palette of `PNG_COLOURS` made for this image.

    Returns
    -------
    bytes
    """
    import io

    from PIL import Image

    if rgb.ndim == 3 and rgb.shape[2] == 4:
        # read in place and dropped to RGB in C: a fraction of copying a strided RGB view
        rgba = np.ascontiguousarray(rgb)
        image = Image.frombuffer("RGBA", (rgba.shape[1], rgba.shape[0]), rgba, "raw", "RGBA",
                                 0, 1).convert("RGB")
    else:
        image = Image.fromarray(rgb, "RGB")
    if palette is None:
        image = image.quantize(PNG_COLOURS, method=Image.Quantize.FASTOCTREE)
    else:
        image = image.quantize(palette=palette, dither=Image.Dither.NONE)
    buf = io.BytesIO()
    image.save(buf, format="png", compress_level=int(compress_level))
    return buf.getvalue()


#: Greys of a map's fixed palette (`map_palette`): black, white and one grey in each
#: 8-level step between them. Pillow maps a colour to a palette through a cache of such
#: steps (5 bits of red and blue): with a single grey in each step, white stays white (with
#: greys closer together, white came out as 252) and black black.
PALETTE_GREYS = (0, *range(12, 248, 8), 255)

#: Colours of a map's fixed palette taken along its colour map (the rest of the 256 are
#: `PALETTE_GREYS`).
PALETTE_MAP_COLOURS = 256 - len(PALETTE_GREYS)

_PALETTES = {}


def map_palette(cmap):
    """The fixed palette of map images: `PALETTE_MAP_COLOURS` colours along ``cmap`` and
    the `PALETTE_GREYS` from black to white.

    A map figure is made of its colour map's colours (field, colour bar) and greys (texts,
    outline, marks); mapping each pixel to the nearest of these is a quarter of the time
    of finding a palette for every image (octree), with the colour map's steps below one
    256-level colour-map step and only the blends at edges moved to a neighbour colour.

    Parameters
    ----------
    cmap : str
        One of `ALLOWED_CMAPS`.

    Returns
    -------
    PIL.Image.Image
        A "P" image holding the palette (as `encode_png` takes it).
    """
    from PIL import Image

    if cmap not in _PALETTES:
        along = (_colormap(cmap)(np.linspace(0.0, 1.0, PALETTE_MAP_COLOURS))[:, :3] * 255)
        greys = np.repeat(np.asarray(PALETTE_GREYS, dtype=float)[:, None], 3, axis=1)
        image = Image.new("P", (1, 1))
        image.putpalette(np.concatenate([along, greys]).round().astype(np.uint8).ravel()
                         .tolist())
        _PALETTES[cmap] = image
    return _PALETTES[cmap]


def _margin(image):
    """A 2-D ``image`` with a one-pixel blank margin (np.pad, at a tenth of its cost)."""
    out = np.zeros((image.shape[0] + 2, image.shape[1] + 2), image.dtype)
    out[1:-1, 1:-1] = image
    return out


class _TextStamps:
    """Texts stamped into rendered pixels with matplotlib's own FreeType font object.

    A wafer map's 49 value labels, its colour-bar ticks and its title are most of its
    drawing time when drawn as matplotlib texts (layout and glyph rendering of every text of
    every map). Rasterised here in one FreeType call per text and alpha-blended into the
    image, they take a fraction of that: the same glyphs. The values of a lot repeat
    ("591.2" appears on many wafers), so with ``cache`` each distinct text is made once per
    process, and a number from its characters' glyphs (`_compose`: FreeType's pixels,
    without rasterising each new number). `box_size` gives the box a label needs (the one
    matplotlib gives the text: its width, and the height of a line with ascenders and
    descenders), for `place_site_labels`.

    Parameters
    ----------
    fontsize_pt : float
        Font size, pt.
    dpi : float
        Resolution of the image, dots per inch.
    cache : bool
        Keep each text's bitmap (texts that repeat: labels, ticks; not titles).
    halo : bool
        A white halo one pixel wide around the glyphs (texts over the map).
    weight : str
        Font weight ("normal", "bold").
    """

    #: Margin around a label's glyphs, px.
    PAD_PX = 1.5

    #: Most texts kept per font (bounded memory on a pathological lot).
    MAX_CACHED = 20000

    def __init__(self, fontsize_pt, dpi, cache=True, halo=False, weight="normal"):
        from matplotlib.font_manager import FontProperties, findfont

        self.font_path = findfont(FontProperties(family=["sans-serif"], weight=weight))
        self.size, self.dpi, self.keep = float(fontsize_pt), float(dpi), bool(cache)
        self.halo = bool(halo)
        self.cache, self.chars, self.words, self._exact = {}, {}, {}, None
        font = self.font
        font.set_size(self.size, self.dpi)
        font.set_text("lp", 0.0)
        self.line_px = font.get_width_height()[1] / 64.0      # as matplotlib's line height
        self.line_descent_px = font.get_descent() / 64.0

    @property
    def font(self):
        """matplotlib's FreeType font object of this process (and thread): never one made
        before a fork, whose file position the forked processes would share (matplotlib
        empties its font cache in a forked child)."""
        from matplotlib.font_manager import get_font

        return get_font(self.font_path)

    #: Characters of numbers, which `_compose` puts together from their single glyphs.
    NUMBER_CHARS = frozenset("0123456789.-\u2212+")

    def _freetype(self, text):
        """FreeType's image of ``text`` (uint8) and its metrics in 26.6 units: (image,
        advance, height, descent, x_min)."""
        font = self.font                # shared with matplotlib: set the size every time
        font.set_size(self.size, self.dpi)
        font.set_text(text, 0.0)
        advance, height = font.get_width_height()
        descent, x_min = font.get_descent(), font.get_bitmap_offset()[0]
        font.draw_glyphs_to_bitmap(antialiased=True)
        return np.asarray(font.get_image(), dtype=np.uint8), advance, height, descent, x_min

    def _raster(self, text):
        """(FreeType's image of ``text``, uint8; its advance px; its descent px)."""
        image, advance, _, descent, _ = self._freetype(text)
        return image, advance / 64.0, descent / 64.0

    def _char(self, ch):
        """One character's glyph bitmap and metrics (26.6 units), rasterised once."""
        got = self.chars.get(ch)
        if got is None:
            image, advance, height, descent, x_min = self._freetype(ch)
            y_max = height - descent
            left, top = math.floor(x_min / 64), math.ceil(y_max / 64)
            # where FreeType's image of one glyph holds it (its +2 margin, matplotlib's
            # FT2Font::draw_glyphs_to_bitmap)
            col, row = int(left - x_min / 64.0), int(y_max / 64.0 - top + 1)
            got = self.chars[ch] = (image[row:, col:].copy(), advance, x_min, y_max, -descent,
                                    left, top)
        return got

    def _compose(self, text):
        """(image, advance px, descent px) of a number put together from its characters'
        glyphs as FreeType's ``set_text`` places them (hinted whole-pixel advances, no
        kerning between these characters; glyphs or-ed together, as matplotlib does): the
        same pixels without rasterising the string (`composes_exactly` checks this)."""
        parts, pen = [], 0
        for ch in text:
            got = self._char(ch)
            parts.append((pen, got))
            pen += got[1]
        x_min = min(p + g[2] for p, g in parts)
        y_max = max(g[3] for _, g in parts)
        y_min = min(g[4] for _, g in parts)
        image = np.zeros(((y_max - y_min) // 64 + 4, (pen - x_min) // 64 + 4), np.uint8)
        for p, (bitmap, _, _, _, _, left, top) in parts:
            col, row = int(left + p / 64 - x_min / 64.0), int(y_max / 64.0 - top + 1)
            region = image[row:row + bitmap.shape[0], col:col + bitmap.shape[1]]
            np.bitwise_or(region, bitmap[:region.shape[0], :region.shape[1]], out=region)
        return image, pen / 64.0, -y_min / 64.0

    def _word(self, word):
        """FreeType's image of one word and its metrics (26.6 units), kept per process."""
        got = self.words.get(word)
        if got is None:
            image, advance, height, descent, x_min = self._freetype(word)
            if len(self.words) >= self.MAX_CACHED:
                self.words.clear()
            got = self.words[word] = (image, advance, x_min, height - descent)
        return got

    def _line(self, text):
        """(image, advance px, descent px) of a line of words set on one baseline, each word
        rasterised once per process (the words of titles and captions repeat: "Wafer",
        "mean", "nm"); within a word FreeType's pixels, words at whole-pixel positions."""
        space = self._word(" ")[1] if " " in text else 0
        placed, pen = [], 0
        for word in text.split(" "):
            if word:
                image, advance, x_min, y_max = self._word(word)
                # FreeType's image: column 0 at x_min, the baseline on row y_max + 1 (px)
                placed.append((image, (pen + x_min) / 64.0, round(y_max / 64.0) + 1))
                pen += advance
            pen += space
        pen -= space
        if not placed:
            return np.zeros((3, 3), np.uint8), 0.0, 1.0
        x0 = min(x for _, x, _ in placed)
        base = max(b for _, _, b in placed)
        below = max(image.shape[0] - b for image, _, b in placed)
        width = max(int(round(x - x0)) + image.shape[1] for image, x, _ in placed)
        line = np.zeros((base + below, width), np.uint8)
        for image, x, b in placed:
            col, row = int(round(x - x0)), base - b
            region = line[row:row + image.shape[0], col:col + image.shape[1]]
            np.bitwise_or(region, image, out=region)
        return line, pen / 64.0, float(below - 1)

    @staticmethod
    def _ink(image):
        """``image`` cut to its ink with one blank pixel around (nothing for no ink)."""
        rows, cols = np.flatnonzero(image.any(axis=1)), np.flatnonzero(image.any(axis=0))
        if not rows.size:
            return np.zeros((2, 2), image.dtype)
        return _margin(image[rows[0]:rows[-1] + 1, cols[0]:cols[-1] + 1])

    def composes_exactly(self, probes=("0123456789", "-1.5", "\u22120.25", "1000.0", "98.7",
                                        "+7")):
        """Whether `_compose` gives FreeType's own pixels for ``probes`` (with this font,
        size and matplotlib's hinting); numbers are composed only then."""
        if self._exact is None:
            self._exact = all(np.array_equal(self._ink(self._raster(t)[0]),
                                             self._ink(self._compose(t)[0])) for t in probes)
        return self._exact

    def glyphs(self, text):
        """(glyph alpha (h, w) float32 0-1, its white halo's alpha, layout width px, descent
        px) of ``text``; the bitmaps have a one-pixel margin (centred texts: around their
        ink)."""
        got = self.cache.get(text)
        if got is None:
            if self.keep and set(text) <= self.NUMBER_CHARS and self.composes_exactly():
                image, width, descent = self._compose(text)
            elif not self.keep:                 # a title or caption line: by words
                image, width, descent = self._line(text)
            else:
                image, width, descent = self._raster(text)
            # texts stamped centred (cached ones) are centred on their ink, whichever way
            # they were made
            image = self._ink(image) if self.keep else _margin(image)
            glyph = image.astype(np.float32) / 255.0
            # a white halo one pixel wide keeps the text legible on dark and light map
            # colours: the glyphs grown by one pixel (the largest of each 3 x 3 block)
            h, w = glyph.shape
            grown = _margin(glyph)
            halo = glyph.copy()
            for dy in range(3):
                for dx in range(3):
                    np.maximum(halo, grown[dy:dy + h, dx:dx + w], out=halo)
            got = (glyph, halo, width, descent)
            if self.keep:
                if len(self.cache) >= self.MAX_CACHED:
                    self.cache.clear()
                self.cache[text] = got
        return got

    def box_size(self, text):
        """(width, height) in pixels of the box of ``text``, margins included."""
        bitmap, _, width, _ = self.glyphs(text)
        return (max(width + 2, bitmap.shape[1]) + 2 * self.PAD_PX,
                self.line_px + 2 + 2 * self.PAD_PX)

    def stamp_into(self, out, items):
        """Blend texts into the (H, W, 3) uint8 image ``out``.

        ``items``: (text, x, y, grey 0-1, on_baseline) in pixels with y up; the text is
        centred on x, and centred on y, or with its baseline on y when ``on_baseline``.
        """
        H, W = out.shape[:2]
        for text, x, y, grey, on_baseline in items:
            a, halo, _, descent = self.glyphs(text)
            h, w = a.shape
            x0 = int(round(x - w / 2))
            bottom = (y - descent - 1) if on_baseline else (y - h / 2)   # 1: the margin
            y0 = int(round(H - bottom - h))                       # rows count from the top
            xa, ya = max(x0, 0), max(y0, 0)
            xb, yb = min(x0 + w, W), min(y0 + h, H)
            if xa >= xb or ya >= yb:
                continue
            al = a[ya - y0:yb - y0, xa - x0:xb - x0, None]
            region = out[ya:yb, xa:xb].astype(np.float32)
            if self.halo:
                white = halo[ya - y0:yb - y0, xa - x0:xb - x0, None]
                region *= 1.0 - white
                region += 255.0 * white
            region *= 1.0 - al
            region += al * (255.0 * grey)
            out[ya:yb, xa:xb] = region.round().astype(np.uint8)


def save_figure(fig, path, dpi=None):
    """Write a figure as PNG atomically (`filmmap.atomic.write_bytes_atomic`).

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
    return write_bytes_atomic(path, png_bytes(fig, dpi), durable=False)


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


def map_canvas(diameter_mm, edge_exclusion_mm, cmap="viridis", figsize_in=(6.4, 5.6),
               dpi=100):
    """This process's `MapCanvas` for map PNGs of this geometry (made and kept on first use).

    Called before the map workers are forked (while the fitting workers still work), it
    spares each worker making and drawing its figure: they inherit it.

    Parameters
    ----------
    diameter_mm, edge_exclusion_mm : float
        Wafer diameter and edge exclusion in mm.
    cmap, figsize_in, dpi
        As for `wafer_map_figure`.

    Returns
    -------
    MapCanvas
    """
    key = (float(diameter_mm), float(edge_exclusion_mm), cmap, tuple(figsize_in), float(dpi))
    canvas = _CANVAS.get(key)
    if canvas is None:
        _CANVAS.clear()                       # one geometry at a time: bounded memory
        canvas = _CANVAS[key] = MapCanvas(diameter_mm, edge_exclusion_mm, cmap, figsize_in,
                                          dpi, stamp_labels=True)
        canvas.prepare()
    return canvas


def _render_task(task):
    """Render one map PNG, reusing this process's `MapCanvas` of the same geometry."""
    path, args, kwargs = task
    t, ok, x, y, d, ee = args
    kw = dict(kwargs)
    canvas = map_canvas(d, ee, kw.pop("cmap", "viridis"), tuple(kw.pop("figsize_in", (6.4, 5.6))),
                        float(kw.pop("dpi", 100)))
    prepared = _prepare_map(t, ok, x, y, d, ee, **kw)
    canvas.draw(*prepared)
    return str(write_bytes_atomic(path, canvas.png(), durable=False))


def _render_chunk(tasks):
    """Several map PNGs in one worker call (fewer round trips to the pool), at a lower
    priority than the process waiting for other work (`filmmap.workers.lower_priority`)."""
    lower_priority()
    return [_render_task(task) for task in tasks]


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


class MapRendering:
    """Wafer-map PNGs rendered by worker processes while this process does other work.

    `add` queues the maps of wafers (one call per site layout); `pump` hands the workers
    more maps and collects finished ones without waiting (call it now and then from the
    work done meanwhile: the contact sheet, report.pdf); `finish` waits for the rest. Maps
    are sent in chunks, at most `window` wafers in flight, so a lot's meshes are never all
    in memory or in the pool's queue. With one worker the maps are drawn here by `finish`.

    Parameters
    ----------
    workers : int
        Worker processes (``concurrent.futures.ProcessPoolExecutor``); 1: this process.
    progress : callable(n), optional
        Called with the number of maps as they are written (a progress display's
        ``update``).
    mp_context : multiprocessing context, optional
        Start method for the workers (default: the platform's).

    References
    ----------
    .. [1] Python documentation, concurrent.futures.ProcessPoolExecutor.
    """

    #: Wafers per task sent to a worker.
    CHUNK = 4

    def __init__(self, workers=2, progress=None, mp_context=None):
        workers = int(workers)
        if workers < 1:
            raise FilmmapInputError("workers must be >= 1", field="workers")
        self.workers, self.mp_context = workers, mp_context
        self.tick = progress or (lambda n: None)
        self.window = 8 * self.CHUNK * workers
        self._tasks = []            # generators of tasks, one per `add`
        self._slots = []            # per `add`: the list its paths are written into
        self._pending = {}          # future -> (slot list, first index, count)
        self._pool = None
        self._frozen = False
        self._in_flight = 0

    def add(self, out_dir, thickness_nm, ok, x_mm, y_mm, diameter_mm, edge_exclusion_mm, *,
            wafer_ids, slots=None, surface=None, common_scale=False, **kwargs):
        """Queue one map per wafer (arguments as `render_wafer_pngs`); return the list that
        receives the written paths (in wafer order, complete after `finish`)."""
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
        out = Path(out_dir)
        out.mkdir(parents=True, exist_ok=True)
        s = tps_polar_surface(t, good, x, y, d, ee) if surface is None else surface
        if common_scale:
            use = good & inside_edge_exclusion(x, y, d, ee)
            lo, hi = _value_range(*[_mesh(s, i, W)[2] for i in range(W)], t[use])
            kwargs.setdefault("vmin", lo)
            kwargs.setdefault("vmax", hi)
        paths = [None] * W

        def tasks():
            # made one at a time: a lot's meshes are never all in memory (or in the queue)
            for i in range(W):
                kw = dict(kwargs, wafer_id=ids[i], slot=None if slots is None else slots[i],
                          surface=_mesh(s, i, W))
                yield paths, i, (out / names[i], (t[i], good[i], x, y, d, ee), kw)

        self._tasks.append(tasks())
        return paths

    def _next_chunk(self):
        chunk = []
        while self._tasks and len(chunk) < self.CHUNK:
            try:
                item = next(self._tasks[0])
            except StopIteration:
                self._tasks.pop(0)
                continue
            if chunk and item[0] is not chunk[0][0]:     # one `add` per chunk
                self._tasks[0] = itertools.chain([item], self._tasks[0])
                break
            chunk.append(item)
        return chunk

    def _collect(self, future):
        paths, first, count = self._pending.pop(future)
        self._in_flight -= count
        for k, path in enumerate(future.result()):
            paths[first + k] = Path(path)
        self.tick(count)

    def pump(self):
        """Collect finished maps and keep the workers supplied; never waits."""
        if self.workers == 1:
            return
        for future in [f for f in self._pending if f.done()]:
            self._collect(future)
        while self._in_flight < self.window:
            chunk = self._next_chunk()
            if not chunk:
                break
            future = self._submit(_render_chunk, [task for _, _, task in chunk])
            self._pending[future] = (chunk[0][0], chunk[0][1], len(chunk))
            self._in_flight += len(chunk)

    def _submit(self, fn, *args, **kwargs):
        import gc

        first = self._pool is None
        if first:
            # the workers end with this process (a watchdog on the parent), never left as
            # orphans
            self._pool = ProcessPoolExecutor(max_workers=self.workers,
                                             mp_context=self.mp_context,
                                             initializer=end_with_parent)
            # the objects made so far are left out of garbage collections until `close`:
            # in a forked worker a collection would touch, and so copy, every inherited
            # page, and here it would go through them again and again while the figures
            # and reports are made (together a tenth of the CPU time of a 150-wafer lot)
            gc.freeze()
            self._frozen = True
        return self._pool.submit(fn, *args, **kwargs)

    def submit(self, fn, *args, **kwargs):
        """Run ``fn(*args, **kwargs)`` in a worker (here, at once, with one worker), queued
        after the maps already sent; returns a future (see `result`)."""
        from concurrent.futures import Future

        if self.workers == 1:
            future = Future()
            future.set_result(fn(*args, **kwargs))
            return future
        return self._submit(fn, *args, **kwargs)

    def result(self, future):
        """The result of a `submit`, collecting finished maps and sending more meanwhile."""
        from concurrent.futures import FIRST_COMPLETED, wait

        while not future.done():
            wait([future, *self._pending], return_when=FIRST_COMPLETED)
            self.pump()
        return future.result()

    def _draw_here(self, chunk):
        for paths, i, task in chunk:
            paths[i] = Path(_render_task(task))
            self.tick(1)

    def finish(self):
        """Render or wait for every queued map.

        With workers, this process draws maps too from here on (it has nothing else to
        do): the workers keep a short queue, this process takes the next chunk after it.
        """
        from concurrent.futures import FIRST_COMPLETED, wait

        if self.workers == 1:
            while chunk := self._next_chunk():
                self._draw_here(chunk)
            return
        self.window = min(self.window, 2 * self.CHUNK * self.workers)
        while True:
            self.pump()
            chunk = self._next_chunk()
            if chunk:
                self._draw_here(chunk)
                continue
            if not self._pending:
                return
            done, _ = wait(self._pending, return_when=FIRST_COMPLETED)
            for future in done:
                self._collect(future)

    def close(self):
        """End the workers (pending maps are cancelled)."""
        import gc

        if self._pool is not None:
            self._pool.shutdown(wait=True, cancel_futures=True)
            self._pool = None
        self._pending.clear()
        if self._frozen:
            gc.unfreeze()               # collected as before from here on
            self._frozen = False

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()


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
        Called with the number of maps as they are written (a progress display's
        ``update``).
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
    one = len(wafer_ids) == 1                  # a pool for one map costs more than the map
    with MapRendering(1 if one else workers, progress, mp_context) as maps:
        paths = maps.add(out_dir, thickness_nm, ok, x_mm, y_mm, diameter_mm, edge_exclusion_mm,
                         wafer_ids=wafer_ids, slots=slots, surface=surface,
                         common_scale=common_scale, **kwargs)
        maps.finish()
    return paths
