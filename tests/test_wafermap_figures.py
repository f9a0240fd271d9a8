"""Wafer-map figures: PNG files, sizes, colour maps, common lot scale, atomic writes."""

import os
from pathlib import Path

import matplotlib.image as mpimg
import numpy as np
import pytest

from filmmap.errors import FilmmapInputError
from filmmap.wafermap.figures import (ALLOWED_CMAPS, COLORBAR_LABEL, lot_contact_sheet, safe_filename,
                                      render_wafer_png, render_wafer_pngs, save_figure,
                                      wafer_map_figure, wafer_outline)
from filmmap.wafermap.sites import polar_sites

D, EE = 300.0, 3.0
SITES = polar_sites(49, D, EE)
RAINBOWS = {"jet", "rainbow", "hsv", "gist_rainbow", "nipy_spectral", "turbo"}


def _lot(n=3):
    rng = np.random.default_rng(0)
    x, y = SITES.x_mm, SITES.y_mm
    return 100 + 0.01 * x + 1e-4 * (x**2 + y**2) + rng.normal(0, 0.2, (n, 49))


def _cmaps(fig):
    names = []
    for ax in fig.axes:
        for artist in list(ax.collections) + list(ax.images):
            if hasattr(artist, "get_cmap") and artist.get_array() is not None:
                names.append(artist.get_cmap().name)
    return names


def _maps(ax):
    """The colour-mapped artists of an axes (map images, or filled contours and scatters)."""
    return [c for c in list(ax.collections) + list(ax.images)
            if hasattr(c, "norm") and c.get_array() is not None]


def test_single_wafer_png(tmp_path):
    # common practice, no source: a readable PNG of figsize * dpi pixels
    t = _lot(1)[0]
    t[5] = np.nan
    path = render_wafer_png(tmp_path / "w.png", t, None, SITES.x_mm, SITES.y_mm, D, EE,
                            wafer_id="W07", slot=7, figsize_in=(6.4, 5.6), dpi=50)
    # a blank 320 x 280 canvas is 1.1 kB as PNG, this map 11 kB: 5 kB tells them apart
    assert path.stat().st_size > 5000
    img = mpimg.imread(path)
    assert img.shape[:2] == (280, 320)
    assert img[..., :3].std() > 0.05                 # not a blank canvas
    assert sorted(os.listdir(tmp_path)) == ["w.png"]  # no temporary file left behind


def test_figure_content_and_colormap():
    # Kovesi (2015) / Nunez et al. (2018): only perceptually uniform maps, never a rainbow
    t = _lot(1)[0]
    fig = wafer_map_figure(t, None, SITES.x_mm, SITES.y_mm, D, EE, wafer_id="W07", slot=7,
                           cmap="cividis")
    names = _cmaps(fig)
    assert names and set(names) <= set(ALLOWED_CMAPS) and not set(names) & RAINBOWS
    title = fig._suptitle.get_text()
    assert "W07" in title and "slot 7" in title and "±" in title
    texts = [tx.get_text() for tx in fig.axes[0].texts]
    labels = [tx for tx in texts if tx.replace(".", "", 1).isdigit()]
    assert labels == [f"{v:.1f}" for v in t]           # every site labelled with its value
    assert fig.axes[1].get_ylabel() == COLORBAR_LABEL
    with pytest.raises(FilmmapInputError):
        wafer_map_figure(t, None, SITES.x_mm, SITES.y_mm, D, EE, cmap="jet")


def test_outline_notch_at_minus_y():
    # common practice, no source: the notch points toward -y
    x, y = wafer_outline(D)
    r = np.hypot(x, y)
    k = np.argmin(r)
    assert r[k] < D / 2 * 0.99 and x[k] == pytest.approx(0.0) and y[k] < 0


def test_contact_sheet_common_scale(tmp_path):
    # Tufte (1990), small multiples: one colour scale, one colour bar for the lot
    t = _lot(5)
    t[2] += 3.0                                      # one wafer much thicker
    fig = lot_contact_sheet(t, None, SITES.x_mm, SITES.y_mm, D, EE,
                            wafer_ids=[f"W{i}" for i in range(5)], slots=[1, 2, 3, 4, 5],
                            title="lot A", dpi=40)
    bars = [ax for ax in fig.axes if ax.get_ylabel() == COLORBAR_LABEL]
    assert len(bars) == 1
    # every wafer on one axes (one axes per wafer costs more than the wafer): 5 maps, 5 labels
    panels = [ax for ax in fig.axes if ax not in bars]
    assert len(panels) == 1
    maps = _maps(panels[0])
    assert len(maps) == 5
    assert sorted(t.get_text().split(" ")[0] for t in panels[0].texts) == [f"W{i}" for i in range(5)]
    limits = {(round(c.norm.vmin, 9), round(c.norm.vmax, 9)) for c in maps}
    assert len(limits) == 1
    vmin, vmax = limits.pop()
    assert vmin <= np.nanmin(t) and vmax >= np.nanmax(t)
    assert set(_cmaps(fig)) <= set(ALLOWED_CMAPS)
    img = mpimg.imread(save_figure(fig, tmp_path / "sheet.png"))
    w_in, h_in = fig.get_size_inches()
    assert img.shape[:2] == (round(h_in * 40), round(w_in * 40))


def test_parallel_render(tmp_path):
    # Python docs, concurrent.futures: two worker processes, one PNG per wafer
    t = _lot(3)
    paths = render_wafer_pngs(tmp_path / "maps", t, None, SITES.x_mm, SITES.y_mm, D, EE,
                              wafer_ids=["A/1", "A2", "A3"], slots=[1, 2, 3], workers=2, dpi=30)
    # an id the clean-up changed carries a hash of the original, so 'A/1' and 'A_1' differ
    first = safe_filename("A/1") + ".png"
    assert first.startswith("A_1-") and first != safe_filename("A_1") + ".png"
    assert [p.name for p in paths] == [first, "A2.png", "A3.png"]
    assert sorted(os.listdir(tmp_path / "maps")) == sorted([first, "A2.png", "A3.png"])
    for p in paths:
        assert mpimg.imread(p).shape[:2] == (168, 192)
    with pytest.raises(FilmmapInputError):
        render_wafer_pngs(tmp_path, t, None, SITES.x_mm, SITES.y_mm, D, EE,
                          wafer_ids=["a", "a", "b"])


def test_atomic_write_keeps_old_file_on_failure(tmp_path, monkeypatch):
    # Python docs, os.replace: the destination changes only when the new file is complete;
    # a failure after the temporary file was written leaves the old file and no temporary
    import filmmap.wafermap.figures as figmod

    dest = tmp_path / "w.png"
    dest.write_bytes(b"old")
    fig = figmod.Figure(figsize=(1, 1), dpi=20)

    def no_rename(src, dst):
        assert Path(src).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"   # complete PNG written
        raise RuntimeError("disk full")

    monkeypatch.setattr(figmod.os, "replace", no_rename)
    with pytest.raises(RuntimeError):
        save_figure(fig, dest)
    assert dest.read_bytes() == b"old"
    assert os.listdir(tmp_path) == ["w.png"]


def _points(ax):
    """Every (x, y) drawn as a marker or scatter point on an axes."""
    pts = []
    for line in ax.lines:
        if line.get_marker() not in (None, "None", "", " "):
            pts += list(zip(line.get_xdata(), line.get_ydata()))
    for coll in ax.collections:
        if type(coll).__name__ == "PathCollection":          # scatter points
            pts += [tuple(p) for p in np.asarray(coll.get_offsets())]
    return pts


def _ring_layout():
    """12 sites on a 100 mm ring: no site at the centre, so (0, 0) is never a real site."""
    ang = np.deg2rad(np.arange(0, 360, 30))
    return 100 * np.cos(ang), 100 * np.sin(ang)


def test_missing_site_is_not_drawn_at_the_centre():
    # A site the wafer lacks (NaN coordinates) is not a measurement: nothing at (0, 0)
    # (the finding: it was drawn over the real centre site). Common practice, no source.
    x, y = _ring_layout()
    x[4] = y[4] = np.nan
    t = 500 + 0.01 * np.nan_to_num(x)
    fig = wafer_map_figure(t, None, x, y, D, EE, wafer_id="W1", lot_id="LOT-7")
    ax = fig.axes[0]
    pts = _points(ax)
    assert pts and not any(abs(px) < 1e-9 and abs(py) < 1e-9 for px, py in pts)
    assert "LOT-7" in fig._suptitle.get_text()                 # lot id on every map


def test_failed_site_is_marked_and_counted():
    x, y = _ring_layout()
    t = 500 + 0.01 * x
    ok = np.ones(12, bool)
    ok[[2, 7]] = False
    fig = wafer_map_figure(np.where(ok, t, np.nan), ok, x, y, D, EE)
    ax = fig.axes[0]
    marked = [line for line in ax.lines if line.get_marker() == "X"]
    assert len(marked) == 1
    xy = set(zip(np.round(marked[0].get_xdata(), 6), np.round(marked[0].get_ydata(), 6)))
    assert xy == {(round(x[2], 6), round(y[2], 6)), (round(x[7], 6), round(y[7], 6))}
    assert "failed fit (2 sites)" in [t.get_text() for t in ax.get_legend().get_texts()]


def test_contact_sheet_with_uneven_layouts_draws_every_wafer():
    # One wafer lacks a site, another has a different pattern: each wafer keeps its own
    # sites on one common scale (one colour bar), and no panel is dropped.
    x, y = SITES.x_mm, SITES.y_mm
    t = _lot(3)
    x2, y2 = np.tile(x, (3, 1)), np.tile(y, (3, 1))
    x2[1, 10] = y2[1, 10] = np.nan
    t[1, 10] = np.nan
    x2[2] = 0.9 * x
    y2[2] = 0.9 * y
    fig = lot_contact_sheet(t, None, x2, y2, D, EE, wafer_ids=["A", "B", "C"], slots=[1, 2, 3],
                            out_of_spec=[False, True, False], lot_id="LOT-9")
    sheet = [ax for ax in fig.axes if ax.get_ylabel() != COLORBAR_LABEL][0]
    labels = {t.get_text().split(" ")[0]: t for t in sheet.texts}
    assert sorted(labels) == ["A", "B", "C"]                  # no wafer dropped
    assert "LOT-9" in fig._suptitle.get_text()
    assert "OUT OF SPEC" in labels["B"].get_text() and "OUT OF SPEC" not in labels["A"].get_text()

    def points_of(wafer):
        """Marks of one panel, relative to its centre (the label sits 0.54 D above it)."""
        cx, top = labels[wafer].get_position()
        cy = top - 0.54 * D
        return [(round(px - cx, 6), round(py - cy, 6)) for px, py in _points(sheet)
                if abs(px - cx) <= 0.55 * D and abs(py - cy) <= 0.55 * D]

    # wafer B: the missing site is not drawn, and nothing but the centre site at (0, 0)
    pts_b = points_of("B")
    assert (round(x[10], 6), round(y[10], 6)) not in pts_b
    assert sum(abs(px) < 1e-6 and abs(py) < 1e-6 for px, py in pts_b) == 1
    assert len(pts_b) == 48
    # wafer C is drawn at its own coordinates
    assert (round(0.9 * x[30], 6), round(0.9 * y[30], 6)) in points_of("C")
    # one common scale: every wafer's map has the same colour limits
    lims = {(round(c.norm.vmin, 6), round(c.norm.vmax, 6)) for c in _maps(sheet)}
    assert len(lims) == 1


def test_contact_sheet_png_matches_the_figure_layout_and_bounds_its_pixels():
    # The panel-by-panel sheet has the figure's size in pixels (same layout), keeps its
    # pixels under max_pixels for a large lot, and carries the common colour scale's
    # colours: the thickest wafer's yellow end of viridis appears (Tufte 1990, one scale)
    import io

    from PIL import Image

    from filmmap.wafermap.figures import contact_sheet_png

    t = _lot(5)
    t[2] += 3.0
    kw = dict(wafer_ids=[f"W{i}" for i in range(5)], slots=[1, 2, 3, 4, 5], lot_id="L", dpi=40)
    fig = lot_contact_sheet(t, None, SITES.x_mm, SITES.y_mm, D, EE, **kw)
    img = Image.open(io.BytesIO(contact_sheet_png(t, None, SITES.x_mm, SITES.y_mm, D, EE, **kw)))
    w_in, h_in = fig.get_size_inches()
    # each cell and band is rounded to whole pixels: a few pixels either way (measured 0)
    assert abs(img.size[0] - w_in * 40) <= 3 and abs(img.size[1] - h_in * 40) <= 3
    rgb = np.asarray(img.convert("RGB")).reshape(-1, 3).astype(int)
    yellow = np.array([253, 231, 37])                              # viridis(1.0)
    # anti-aliasing and PNG colours round it slightly (measured 12 in summed RGB units)
    assert np.min(np.abs(rgb - yellow).sum(axis=1)) < 40
    small = Image.open(io.BytesIO(contact_sheet_png(np.tile(t, (8, 1)), None, SITES.x_mm,
                                                    SITES.y_mm, D, EE, max_pixels=2e5)))
    # cells rounded to whole pixels may overshoot the budget a little
    assert small.size[0] * small.size[1] <= 2e5 * 1.02


def _boxes_overlap(a, b):
    """Whether boxes (x0, y0, x1, y1) overlap (touching is not)."""
    return a[0] < b[2] and b[0] < a[2] and a[1] < b[3] and b[1] < a[3]


def _dense_layout(n=300, d=150.0, seed=2):
    """``n`` sites spread at random over a wafer: far denser than the labels can all fit."""
    rng = np.random.default_rng(seed)
    r = 0.47 * d * np.sqrt(rng.uniform(size=n))
    a = rng.uniform(0, 2 * np.pi, n)
    return r * np.cos(a), r * np.sin(a)


@pytest.mark.parametrize("layout", ["dense", "49 sites"])
def test_site_labels_never_overlap_each_other_nor_cross_the_outline(layout):
    # the drawn texts' own bounding boxes (matplotlib's extents at draw time) must not
    # intersect one another, and must lie inside the wafer outline (common practice)
    if layout == "dense":
        x, y = _dense_layout()
        d, ee = 150.0, 3.0
    else:
        x, y, d, ee = SITES.x_mm, SITES.y_mm, D, EE
    t = 1000 + 0.05 * x + np.random.default_rng(0).normal(0, 2, x.size)
    fig = wafer_map_figure(t, None, x, y, d, ee, wafer_id="W1", lot_id="L")
    fig.canvas.draw()
    renderer = fig.canvas.get_renderer()
    ax = fig.axes[0]
    labels = [tx for tx in ax.texts if tx.get_visible() and tx.get_text().replace(".", "", 1)
              .isdigit()]
    boxes = [tx.get_window_extent(renderer).extents for tx in labels]
    assert all(not _boxes_overlap(a, b) for i, a in enumerate(boxes) for b in boxes[i + 1:])
    cx, cy = ax.transData.transform((0.0, 0.0))
    radius = ax.transData.transform((d / 2, 0.0))[0] - cx
    corners = np.array([(b[i], b[j]) for b in boxes for i in (0, 2) for j in (1, 3)])
    assert np.all(np.hypot(corners[:, 0] - cx, corners[:, 1] - cy) <= radius)
    if layout == "dense":
        assert 0.2 * x.size < len(labels) < x.size     # thinned, not emptied
    else:
        assert len(labels) == x.size                     # a usual map keeps every value


def test_stamped_site_labels_do_not_overlap_and_keep_clear_of_site_marks():
    # the PNG path stamps the labels into the pixels: its boxes follow the same rule, and
    # no label covers a site's mark
    from filmmap.wafermap.figures import MapCanvas, _prepare_map

    x, y = _dense_layout(200)
    t = 1000 + 0.05 * x
    canvas = MapCanvas(150.0, 3.0, stamp_labels=True)
    prepared = _prepare_map(t, None, x, y, 150.0, 3.0, wafer_id="W1")
    canvas.draw(*prepared)
    boxes = canvas.label_boxes
    assert 20 < len(boxes) < x.size
    assert all(not _boxes_overlap(a, b) for i, a in enumerate(boxes) for b in boxes[i + 1:])
    sites_px = canvas.ax.transData.transform(np.column_stack([x, y]))
    inside = [(b[0] < px < b[2]) and (b[1] < py < b[3]) for b in boxes for px, py in sites_px]
    assert not any(inside)
    png = canvas.png()
    assert png[:8] == b"\x89PNG\r\n\x1a\n"


def test_place_site_labels_tries_the_other_sides_before_leaving_a_label_out():
    from filmmap.wafermap.figures import place_site_labels

    # two sites 10 px apart side by side, labels 30 x 10 px: the first label goes above
    # its site, the second cannot (it would overlap the first) and goes below its own
    boxes = place_site_labels([(100, 100), (110, 100)], [(30, 10), (30, 10)], 2.0,
                              (100, 100), 80.0)
    assert np.all(np.isfinite(boxes))
    assert not _boxes_overlap(boxes[0], boxes[1])
    assert boxes[0][1] == 102 and boxes[1][3] == 98
    # no room anywhere (a site at the outline, a label wider than the wafer): left out
    out = place_site_labels([(100, 100)], [(200, 10)], 2.0, (100, 100), 50.0)
    assert np.all(np.isnan(out))


@pytest.mark.parametrize("size_pt", [6.0, 7.0])
def test_stamped_numbers_are_freetypes_own_pixels(size_pt):
    # the site values and ticks are put together from single glyphs (no rasterising of
    # each new number); the result must be the pixels FreeType gives the whole string
    # (matplotlib's own text rendering), number after number
    from filmmap.wafermap.figures import _TextStamps

    stamps = _TextStamps(size_pt, 100)
    assert stamps.composes_exactly()
    values = np.random.default_rng(4).uniform(-60, 2500, 200)
    for text in [f"{v:.1f}" for v in values] + [f"{v:.0f}" for v in values] + ["\u22120.5"]:
        assert np.array_equal(stamps._ink(stamps._raster(text)[0]),
                              stamps._ink(stamps._compose(text)[0])), text


def test_map_pngs_keep_white_white_and_black_black(tmp_path):
    # the map PNGs take a fixed palette (colour map and greys): the figure's white must stay
    # white and the text black, not a near grey (Pillow maps through coarse colour steps)
    from PIL import Image

    t = _lot(2)
    paths = render_wafer_pngs(tmp_path, t, None, SITES.x_mm, SITES.y_mm, D, EE,
                              wafer_ids=["A", "B"], workers=1)
    rgb = np.asarray(Image.open(paths[0]).convert("RGB")).reshape(-1, 3)
    assert tuple(rgb[0]) == (255, 255, 255)                      # the top-left corner
    assert np.any(np.all(rgb == 0, axis=1))                      # black text


_FORK_STAMPS = _FORK_TEXTS = _FORK_EXPECTED = None


def _rasterise_all(_):
    """In a forked worker: how many of the texts come out other than the parent's pixels."""
    wrong = 0
    for _repeat in range(3):
        for text, expected in zip(_FORK_TEXTS, _FORK_EXPECTED):
            try:
                wrong += not np.array_equal(_FORK_STAMPS._raster(text)[0], expected)
            except RuntimeError:        # FreeType: "failed to load glyph"
                wrong += 1
    return wrong


@pytest.mark.skipif(not hasattr(os, "fork"), reason="needs fork()")
def test_forked_map_workers_rasterise_text_as_the_parent_does():
    # A FreeType font object opened before a fork shares its file position with every
    # forked process; two of them loading glyphs at once read each other's bytes (matplotlib
    # issue #13723, fixed there for its own font cache by PR #14535). filmmap's stamps once
    # kept such an object and CI failed with "failed to load glyph". Measured with an
    # inherited font object forced on the stamps: 83 to 701 of each worker's 1500
    # rasterisations wrong; fetched per process (as now): none.
    import multiprocessing as mp

    from filmmap.wafermap.figures import _TextStamps

    global _FORK_STAMPS, _FORK_TEXTS, _FORK_EXPECTED
    _FORK_STAMPS = _TextStamps(7.0, 100, cache=False)
    values = np.random.default_rng(5).uniform(-60, 2500, 400)
    _FORK_TEXTS = [f"{v:.1f}" for v in values] + [f"Wafer W{i} lot DEMO" for i in range(100)]
    _FORK_EXPECTED = [_FORK_STAMPS._raster(t)[0] for t in _FORK_TEXTS]
    with mp.get_context("fork").Pool(2) as pool:
        assert pool.map(_rasterise_all, range(4)) == [0, 0, 0, 0]


def _cached_mathtext_layouts(_):
    from matplotlib.mathtext import MathTextParser

    return MathTextParser._parse_cached.cache_info().currsize


@pytest.mark.skipif(not hasattr(os, "fork"), reason="needs fork()")
def test_forked_workers_start_without_the_parents_mathtext_fonts():
    # the parent's parsed mathtext (a log axis's "10^1" ticks) holds its FreeType font
    # objects; a forked worker drawing the same text must not use them (matplotlib issue
    # #13723: a font object shares its file position across fork()). matplotlib's private
    # cache is read here: the test skips where it no longer exists.
    import importlib
    import multiprocessing as mp

    from matplotlib.mathtext import MathTextParser

    importlib.import_module("filmmap.wafermap.figures")     # registers the fork hook

    if not hasattr(getattr(MathTextParser, "_parse_cached", None), "cache_info"):
        pytest.skip("this matplotlib keeps no mathtext cache")
    MathTextParser("agg").parse(r"$10^{1}$", dpi=100)
    assert _cached_mathtext_layouts(0) >= 1
    with mp.get_context("fork").Pool(1) as pool:
        assert pool.map(_cached_mathtext_layouts, [0]) == [0]
