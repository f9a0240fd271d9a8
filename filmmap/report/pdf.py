"""report.pdf: the report on A4 pages, with matplotlib's PdfPages (no other dependency).

Page order
----------
Lot pages first; per-wafer pages only on request (``wafer_pages=True``):

1. **Decision and lot summary**: the decision block of `filmmap.report.decision`
   (disposition with its rule, key numbers, the next-run action in one sentence), then
   the verdict, the cautions (the only copy), warnings and notes.
2. **Advice**, only when an advice dict is given: the predicted slot profile (vector),
   the action, what each recommendation answers, the step and zone tables, warnings and
   the per-slot numbers.
3. **Slot profile**: the plot (vector) and the reasons of the flagged slots.
4. **Tables**: the wafer-to-wafer (WTW) figures and the within-wafer (WIW) table of
   every wafer.
5. **Contact sheet** (or the reason there is none).
6. **Fit quality**: the histogram (vector) and the failed sites.
   **Evidence**, only when sites failed or are suspect: measured against model spectra
   of the worst site of each cause (`filmmap.report.evidence`), or how to get them.
7. **Index of wafers**: slot, role, failed and suspect sites and the map file of each
   wafer (left out with ``wafer_pages=True``, which adds one page per wafer instead).
8. **Provenance**: software, input files with SHA-256, stack, models and sources.

So a lot has `BASE_LOT_PAGES` = 7 lot pages (one more with failed or suspect sites,
one or more with advice) as long as every
section fits its page; a section that does not (many warnings, flagged slots, wafers,
failed sites or input files) continues on extra pages headed "(continued)", with the
table header repeated. `lot_page_count` gives the exact number for a lot before
anything is drawn; `pdf_page_plan` lists the pages. For scale: one table page holds the
WTW figures and about 50 wafers. The PDF stays a few pages long however many wafers the
lot has (the maps are in report.html and figures/).

A wafer page shows the wafer's map (from ``OUTDIR/figures``, or rendered),
its numbers and its failed sites (the first few; all of them are on the fit
quality pages).

Texts from the input files are drawn with ``parse_math=False`` (a '$' is not
mathtext). Numbers that could not be computed are shown as '—' with a
lettered reason listed under the table.
"""

from __future__ import annotations

import io
import textwrap
from dataclasses import dataclass, field
from pathlib import Path

import matplotlib as mpl
import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.backends.backend_pdf import PdfPages
from matplotlib.figure import Figure
from matplotlib.text import Text

from filmmap import __version__
from filmmap.atomic import atomic_path
from filmmap.report.advicefig import draw_advice_profile, slot_rows, time_row, zone_rows
from filmmap.report.cautions import CAUTION_PARAGRAPHS, CAUTIONS_TITLE
from filmmap.report.decision import UNITS_NOTE, advice_causes, decision, has_standard_advice
from filmmap.report.fitquality import draw_fit_quality
from filmmap.report.formatting import (MISSING, compact_dict_text, flag_text, fmt, fmt_in_spec,
                                       is_long_scalar_dict, is_number, missing_reason,
                                       scalar_text, wtw_rows)
from filmmap.report.images import ReportImages
from filmmap.report.provenance import provenance, provenance_rows
from filmmap.report.slotplot import draw_slot_profile

#: Lot pages when every section fits its page (cover, slot profile, tables,
#: contact sheet, fit quality, index of wafers, provenance); more with advice.
BASE_LOT_PAGES = 7

PAGE_IN = (8.27, 11.69)                  # A4 portrait
_MARGIN_IN = 0.6
_BODY_TOP_IN = 0.85                      # from the top edge
_BODY_BOTTOM_IN = 0.75                   # from the bottom edge
_UNIT_PT = 9.5                           # height of one body line unit
_UNIT_IN = _UNIT_PT / 72.0
#: Body capacity of a page in line units.
PAGE_UNITS = int((PAGE_IN[1] - _BODY_TOP_IN - _BODY_BOTTOM_IN) / _UNIT_IN)

_MONO_WIDTH = 118                        # characters per monospace line (7 pt)
_TEXT_WIDTH = 104                        # characters per prose line (8.5 pt sans)
_BOLD_WIDTH = 92                         # characters per bold line (9.5 pt sans)

#: Line styles: (font family, size pt, weight, height in units).
_STYLES = {
    "h": ("sans-serif", 11.0, "bold", 1.7),
    "b": ("sans-serif", 9.5, "bold", 1.3),
    "p": ("sans-serif", 8.5, "normal", 1.15),
    "m": ("monospace", 7.0, "normal", 1.0),
    "mh": ("monospace", 7.0, "bold", 1.0),
    "gap": ("sans-serif", 7.0, "normal", 0.6),
}

# Heights (in units) kept for the figures on figure pages.
_PROFILE_UNITS = 46
_FITQ_UNITS = 28
_WAFER_MAP_UNITS = 42
_WAFER_FAILED_MAX = 12
_ADVICE_PLOT_UNITS = 34


@dataclass
class PageSpec:
    """One planned page: a kind, a title, body lines and (for wafer pages) the wafer."""

    kind: str
    title: str
    lines: list = field(default_factory=list)
    wafer: object = None


def _wrap(style, text, width=None, indent=None):
    """Wrap ``text`` into body lines of ``style``; continuation lines start with ``indent``."""
    if style == "gap":
        return [("gap", "")]
    width = width or {"m": _MONO_WIDTH, "mh": _MONO_WIDTH, "b": _BOLD_WIDTH}.get(style, _TEXT_WIDTH)
    if indent is None:
        indent = "    " if style in ("m", "mh") else ""
    parts = textwrap.wrap(str(text), width=width, subsequent_indent=indent,
                          break_long_words=True, break_on_hyphens=False,
                          replace_whitespace=False, drop_whitespace=True) or [""]
    return [(style, p) for p in parts]


def _units(lines):
    return sum(_STYLES[s][3] for s, _ in lines)


def _paginate(kind, title, lines, first_capacity, repeat=()):
    """Split body lines over pages: the first holds ``first_capacity`` units, the rest a full page.

    ``repeat`` lines (a table header) are put again at the top of each
    continuation page when the break falls inside the table they head.
    """
    pages, cur, cap, used = [], [], first_capacity, 0.0
    in_table = False
    for ln in lines:
        if ln == ("__table__", ""):
            in_table = True
            continue
        if ln == ("__end_table__", ""):
            in_table = False
            continue
        h = _STYLES[ln[0]][3]
        if used + h > cap and cur:
            pages.append(cur)
            cur, cap, used = [], PAGE_UNITS, 0.0
            if in_table and repeat:
                cur.extend(repeat)
                used = _units(repeat)
        cur.append(ln)
        used += h
    pages.append(cur)
    return [PageSpec(kind if i == 0 else "text", title if i == 0 else f"{title} (continued)", p)
            for i, p in enumerate(pages)]


class _Footnotes:
    """Lettered reasons for '—' cells in the monospace tables."""

    def __init__(self):
        self.keys = {}

    def mark(self, reason):
        if reason not in self.keys:
            self.keys[reason] = chr(ord("a") + len(self.keys)) if len(self.keys) < 26 else "*"
        return f"{MISSING}({self.keys[reason]})"

    def lines(self):
        if not self.keys:
            return []
        text = "; ".join(f"({k}) {r}" for r, k in self.keys.items())
        return _wrap("m", f"{MISSING} = not computed: {text}")


def _cellnum(notes, line, fieldname, digits):
    reason = missing_reason(line, fieldname)
    return notes.mark(reason) if reason else f"{getattr(line, fieldname):.{digits}f}"


def _short(text, width):
    text = str(text)
    return text if len(text) <= width else text[:width - 1] + "…"


# --------------------------------------------------------------------------- page plans

def _decision_lines(view, advice=None):
    """The decision block (`filmmap.report.decision`) as body lines: heads page 1."""
    dec = decision(view, advice)
    d = dec.disposition
    lines = _wrap("h", f"Decision: {d.action.upper()}, lot {d.status}")
    for r in d.reasons:
        lines += _wrap("p", f"• {r}", indent="   ")
    lines += _wrap("p", d.rule)
    lines += [("gap", "")]
    for k, v in dec.key_numbers:
        lines += _wrap("m", f"{k:<44s}{v}", indent=" " * 44)
    lines += [("gap", "")]
    lines += _wrap("b", "Next run: " + (dec.action or dec.no_action_reason))
    lines += _wrap("p", dec.caution)
    return lines


def _cover_lines(view, advice=None):
    w = view.wtw
    lines = _decision_lines(view, advice) + [("gap", "")]
    meta = [f"furnace: {view.furnace or 'not given'}", f"run date: {view.run_date or 'not given'}",
            f"{len(view.wafers)} wafers measured, {view.n_sites_measured} sites, "
            f"boat of {view.boat_size} slots",
            (f"target {view.target_nm:g} nm ± {view.tolerance_pct:g} %"
             if view.target_nm is not None else "no target given")]
    for m in meta:
        lines += _wrap("p", m)
    lines += [("gap", "")] + _wrap("h", "Verdict") + _wrap("b", view.verdict) + [("gap", "")]
    lines += _wrap("h", "More lot figures")
    for k, v in (("WTW range", fmt(w.range_nm, 2, "nm", "no product wafer with a usable mean")),
                 ("flat zone", "slots {}-{}".format(*view.profile.flat_zone)
                  if view.profile.flat_zone else f"{MISSING} (none)"),
                 ("extra dummies suggested", f"load end {view.profile.extra_dummies['load']}, "
                  f"source end {view.profile.extra_dummies['source']} (advisory)")):
        lines += _wrap("m", f"{k:<32s}{v}")
    lines += [("gap", "")] + _wrap("h", CAUTIONS_TITLE)
    extra = advice.get("caution") if isinstance(advice, dict) else None
    for para in CAUTION_PARAGRAPHS + ((f"About the advice: {extra}",)
                                      if isinstance(extra, str) else ()):
        lines += _wrap("p", para) + [("gap", "")]
    lines += _wrap("h", "Warnings")
    if view.warnings:
        for x in view.warnings:
            lines += _wrap("p", f"• {x}", indent="   ")
    else:
        lines += _wrap("p", "None.")
    if view.notes:
        lines += [("gap", "")] + _wrap("h", "Notes on the slot profile")
        for x in view.notes:
            lines += _wrap("p", f"• {x}", indent="   ")
    return lines


def _profile_lines(view):
    lines = []
    if view.profile.reasons:
        lines += _wrap("h", "Flagged slots")
        for s, r in view.profile.reasons.items():
            tag = " (edge)" if s in view.profile.edge_slots else ""
            lines += _wrap("m", f"slot {s}{tag}: {r}")
    return lines


_WIW_FMT = "{:<20s} {:>4s} {:<7s} {:>9s} {:>8s} {:>7s} {:>8s} {:>7s} {:>9s} {:>7s} {:<8s}"
_WIW_HEAD = ("wafer", "slot", "role", "mean nm", "sigma nm", "NU %", "range nm", "h-r %",
             "used/meas", "in spec", "flag")


def _table_lines(view):
    lines = _wrap("h", "Wafer to wafer (WTW), product wafers")
    for k, v in wtw_rows(view):
        lines += _wrap("m", f"{k:<44s}{v}", indent=" " * 44)
    lines += [("gap", "")] + _wrap("h", "Within wafer (WIW), every wafer")
    notes = _Footnotes()
    rows = []
    for w in view.wafers:
        spec = fmt_in_spec(w.in_spec, w, view.target_nm is not None)
        if spec.startswith(MISSING):
            spec = notes.mark(spec[len(MISSING):].strip(" ()"))
        rows.append(("m", _WIW_FMT.format(
            _short(w.wafer, 20), str(w.slot), w.role, _cellnum(notes, w, "mean_nm", 2),
            _cellnum(notes, w, "sigma_nm", 3), _cellnum(notes, w, "nu_pct", 3),
            _cellnum(notes, w, "range_nm", 2), _cellnum(notes, w, "halfrange_pct", 3),
            f"{w.sites_used}/{w.sites_measured}", spec, flag_text(w))))
    head = [("mh", _WIW_FMT.format(*_WIW_HEAD))]
    lines += [("__table__", "")] + head + rows + [("__end_table__", "")]
    lines += notes.lines()
    lines += _wrap("p", f"sigma: sample standard deviation over the usable sites; NU = 100 sigma "
                        f"/ mean; h-r = half-range 100 (max - min) / (2 mean). Flag: edge = edge "
                        f"slot, flagged = off the slot profile, excluded = fewer than "
                        f"{view.min_sites} usable sites (left out of the lot figures).")
    return lines, head


_FAILED_FMT = "{:<20s} {:>4s} {:>5s} {:>7s} {:>7s} {:>10s}  {}"
_FAILED_HEAD = ("wafer", "slot", "site", "x mm", "y mm", "fit qual.", "fit note")


def _failed_rows(sites):
    return [("m", _FAILED_FMT.format(_short(f.wafer, 20), str(f.slot), str(f.site),
                                     fmt(f.x_mm, 1), fmt(f.y_mm, 1),
                                     fmt(f.fit_quality, 3) if is_number(f.fit_quality)
                                     else MISSING, _short(f.note, 56)))
            for f in sites]


def _fit_lines(view):
    n = len(view.failed_sites)
    lines = _wrap("h", f"Failed sites ({n} of {view.n_sites_measured} measured)")
    head = [("mh", _FAILED_FMT.format(*_FAILED_HEAD))]
    if n:
        counts = ", ".join(f"{r}: {c}" for r, c in view.failure_counts.items())
        lines += _wrap("p", f"By reason: {counts}")
        lines += ([("__table__", "")] + head + _failed_rows(view.failed_sites)
                  + [("__end_table__", "")])
        if any(len(f.note) > 56 for f in view.failed_sites):
            lines += _wrap("p", "Long fit notes are cut at 56 characters here; report.html and "
                                "lot.nc hold them in full.")
    else:
        lines += _wrap("p", "None: every measured site has an accepted fit.")
    return lines, head


def _advice_generic_lines(advice):
    """An advice dict without the standard keys, walked as it is."""
    lines = []

    def walk(value, key, depth):
        pad = "  " * depth
        if key is not None and is_long_scalar_dict(value):
            lines.extend(_wrap("m", f"{pad}{key}: {compact_dict_text(value)}",
                               indent=pad + "    "))
        elif isinstance(value, dict):
            if key is not None:
                lines.extend(_wrap("m", f"{pad}{key}" if key == "-" else f"{pad}{key}:"))
            for k, v in value.items():
                walk(v, k, depth + (key is not None))
        elif isinstance(value, (list, tuple)):
            lines.extend(_wrap("m", f"{pad}{key}" if key in (None, "-") else f"{pad}{key}:"))
            if not value:
                lines.extend(_wrap("m", f"{pad}  (none)"))
            for v in value:
                if isinstance(v, (dict, list, tuple)):
                    walk(v, "-", depth + 1)
                else:
                    lines.extend(_wrap("m", f"{pad}  - {scalar_text(v)}", indent=pad + "    "))
        else:
            lines.extend(_wrap("m", f"{pad}{key}: {scalar_text(value)}", indent=pad + "    "))

    walk(dict(advice), None, 0)
    return lines


_ZONE_FMT = "{:<12s} {:>7s}  {:>17s}  {:>13s}  {:>8s}  {:>8s}"
_SLOT_FMT = "{:>5s} {:>14s} {:>12s} {:>16s} {:>18s}"


def _advice_lines(advice, view=None):
    """The advice page: the action, causes, step and zone tables, warnings, per-slot table.

    The cautions are on page 1 only (once); the advice page points to them.
    """
    if view is None or not has_standard_advice(advice):
        return _advice_generic_lines(advice)
    lines = _wrap("b", decision(view, advice).action)
    lines += _wrap("p", UNITS_NOTE + " Advisory only: the cautions on page 1 apply.")
    lines += [("gap", "")] + _wrap("h", "What each recommendation answers")
    for rec, cause in advice_causes(advice, view):
        lines += _wrap("p", f"• {rec}: {cause}", indent="   ")
    lines += [("gap", "")] + _wrap("h", "Step time")
    step, now, nxt, ch, bd = time_row(advice)
    lines += _wrap("m", f"{step}: {now} min now -> {nxt} min next ({ch} %, bound {bd} %)")
    zrows = zone_rows(advice, view)
    if zrows:
        lines += [("gap", "")] + _wrap("h", "Heater zones (K)")
        lines += [("mh", _ZONE_FMT.format("zone", "slots", "error now (est.)", "advised trim",
                                          "bound", "at bound"))]
        lines += [("m", _ZONE_FMT.format(*(_short(c, 16) for c in r))) for r in zrows]
    warns = advice.get("warnings") or []
    lines += [("gap", "")] + _wrap("h", "Warnings about the advice")
    for x in warns or ["None."]:
        lines += _wrap("p", f"• {x}", indent="   ")
    srows = slot_rows(advice, view)
    if srows:
        lines += [("gap", "")] + _wrap("h", "Per slot")
        head = [("mh", _SLOT_FMT.format("slot", "measured nm", "model now nm",
                                        "predicted next nm", "eff. offset now K"))]
        lines += [("__table__", "")] + head + [("m", _SLOT_FMT.format(*r)) for r in srows]
        lines += [("__end_table__", "")]
    return lines


def _provenance_lines(prov):
    lines = []
    for k, v in provenance_rows(prov):
        lines += _wrap("m", f"{k:<24s}{v}", indent=" " * 24)
    lines += [("gap", "")] + _wrap("h", f"Input files ({len(prov['inputs'])}): SHA-256, file")
    if prov["inputs_problem"]:
        lines += _wrap("p", prov["inputs_problem"])
    for i in prov["inputs"]:
        lines += _wrap("m", f"{i['sha256']}  {i['file']}", indent=" " * 66)
    lines += [("gap", "")] + _wrap("h", "Film stack and material sources")
    for ln in prov["stack"].splitlines() or [""]:
        lines += _wrap("m", ln, indent=" " * 10)
    lines += [("gap", "")] + _wrap("h", "Models and their published sources")
    for model, source in prov["models"]:
        lines += _wrap("p", f"• {model}", indent="   ")
        lines += _wrap("p", f"   {source}", indent="      ")
    return lines


def _index_lines(view):
    """Index of the wafers: where each wafer's map and numbers are (no per-wafer pages)."""
    from filmmap.wafermap.figures import safe_filename

    n_fail, n_susp = {}, {}
    for f in view.failed_sites:
        n_fail[f.wafer] = n_fail.get(f.wafer, 0) + 1
    for f in view.suspect_sites:
        n_susp[f.wafer] = n_susp.get(f.wafer, 0) + 1
    lines = _wrap("p", "Each wafer's thickness map is figures/<wafer>.png in the output folder "
                       "and in report.html; its numbers are in the within-wafer table. "
                       "Per-wafer pages in this PDF: reduce with --pdf-wafer-pages.")
    head = [("mh", _INDEX_FMT.format("wafer", "slot", "role", "failed", "suspect", "map file"))]
    rows = [("m", _INDEX_FMT.format(_short(w.wafer, 20), str(w.slot), w.role,
                                    str(n_fail.get(w.wafer, 0)), str(n_susp.get(w.wafer, 0)),
                                    "figures/" + _short(safe_filename(w.wafer), 60) + ".png"))
            for w in view.wafers]
    return lines + [("__table__", "")] + head + rows + [("__end_table__", "")], head


_INDEX_FMT = "{:<20s} {:>4s} {:<7s} {:>6s} {:>7s}  {}"


def pdf_page_plan(view, ds, advice=None, prov=None, wafer_pages=False):
    """The pages of report.pdf, in order (see the module docstring).

    Parameters
    ----------
    view : LotView
    ds : xarray.Dataset
    advice : dict, optional
    prov : dict, optional
        `filmmap.report.provenance.provenance` output (computed when omitted).
    wafer_pages : bool
        One page per wafer at the end (default: an index of the wafers instead, so the
        PDF's size and memory do not grow a page per wafer).

    Returns
    -------
    list of PageSpec
        Lot pages (kinds ``cover``, ``advice``, ``profile``, ``tables``, ``contact``,
        ``fitq``, ``index``, ``provenance`` and ``text`` for continuations), then with
        ``wafer_pages`` one ``wafer`` page per wafer.
    """
    prov = prov or provenance(ds, advice)
    pages = []
    pages += _paginate("cover", f"Lot {view.lot_id}: furnace-run report",
                       _cover_lines(view, advice), PAGE_UNITS)
    if advice:
        plot = _ADVICE_PLOT_UNITS if images_advice_plot(advice) else 0
        al = _advice_lines(advice, view)
        head = [ln for ln in al if ln[0] == "mh"][-1:]
        pages += _paginate("advice", "Advice for the next run (advisory only)", al,
                           PAGE_UNITS - plot, head)
    pages += _paginate("profile", "Slot profile", _profile_lines(view),
                       PAGE_UNITS - _PROFILE_UNITS)
    tl, th = _table_lines(view)
    pages += _paginate("tables", "Wafer-to-wafer and within-wafer tables", tl, PAGE_UNITS, th)
    pages.append(PageSpec("contact", "Lot contact sheet"))
    fl, fh = _fit_lines(view)
    pages += _paginate("fitq", "Fit quality", fl, PAGE_UNITS - _FITQ_UNITS, fh)
    if view.failed_sites or view.suspect_sites:
        pages.append(PageSpec("evidence", "Evidence: measured against model spectra"))
    if not wafer_pages:
        il, ih = _index_lines(view)
        pages += _paginate("index", "Index of wafers", il, PAGE_UNITS, ih)
    pages += _paginate("provenance", "Provenance", _provenance_lines(prov), PAGE_UNITS)
    if wafer_pages:
        for w in view.wafers:
            pages.append(PageSpec("wafer", f"Wafer {w.wafer}: slot {w.slot}, {w.role}", wafer=w))
    return pages


def images_advice_plot(advice):
    """True when the advice page carries the predicted slot-profile plot."""
    return has_standard_advice(advice) and bool(advice.get("predicted_nm_by_slot_next"))


def lot_page_count(view, ds, advice=None):
    """Number of lot pages (before any wafer page) of report.pdf for this lot."""
    return sum(1 for p in pdf_page_plan(view, ds, advice) if p.kind != "wafer")


# --------------------------------------------------------------------------- drawing

def _new_page():
    fig = Figure(figsize=PAGE_IN, dpi=100)
    FigureCanvasAgg(fig)
    return fig


def _fy(inches_from_top):
    return 1.0 - inches_from_top / PAGE_IN[1]


def _fx(inches_from_left):
    return inches_from_left / PAGE_IN[0]


def _draw_frame(fig, title, lot_id, number, total):
    fig.text(_fx(_MARGIN_IN), _fy(0.55), title, fontsize=13, weight="bold", va="baseline",
             ha="left", parse_math=False)
    fig.text(_fx(_MARGIN_IN), _fy(PAGE_IN[1] - 0.4),
             f"filmmap {__version__} · lot {lot_id} · advisory only, see the cautions on page 1",
             fontsize=6.5, color="0.35", ha="left", va="baseline", parse_math=False)
    fig.text(_fx(PAGE_IN[0] - _MARGIN_IN), _fy(PAGE_IN[1] - 0.4), f"page {number} of {total}",
             fontsize=6.5, color="0.35", ha="right", va="baseline")


class _CourierText(Text):
    """A table line in the PDF's own Courier (one of its 14 standard fonts): written as one
    string, not glyph by glyph as an embedded font is (matplotlib lays out and tracks each
    glyph of an embedded font in Python, most of a big lot's PDF time). Only for text that
    Courier's WinAnsi encoding holds (`_courier_can_write`); same 0.6 em advance as
    DejaVu Sans Mono, so the columns stay where they were."""

    def draw(self, renderer):
        # set and reset the one setting (an rc_context copies all of them, twice a line)
        before = mpl.rcParams["pdf.use14corefonts"]
        mpl.rcParams["pdf.use14corefonts"] = True
        try:
            super().draw(renderer)
        finally:
            mpl.rcParams["pdf.use14corefonts"] = before


def _courier_can_write(text):
    try:
        text.encode("cp1252")
    except UnicodeEncodeError:
        return False
    return True


def _draw_lines(fig, lines, top_in):
    y = top_in
    for style, text in lines:
        family, size, weight, h = _STYLES[style]
        y += h * _UNIT_IN
        if style != "gap" and text:
            x, yb = _fx(_MARGIN_IN), _fy(y - 0.25 * _UNIT_IN)
            if family == "monospace" and _courier_can_write(text):
                fig.add_artist(_CourierText(x, yb, text, fontsize=size, family="Courier",
                                            weight="medium" if weight == "normal" else weight,
                                            ha="left", va="baseline", parse_math=False,
                                            transform=fig.transFigure))
            else:
                fig.text(x, yb, text, fontsize=size, family=family, weight=weight, ha="left",
                         va="baseline", parse_math=False)
    return y


#: Resolution of raster images placed on a PDF page (dots per inch of the page): a larger
#: PNG is scaled down to it before embedding, so a big lot's contact sheet does not make
#: the PDF slow to write and heavy to hold.
PDF_IMAGE_DPI = 200


def _draw_png(fig, png, top_in, height_in, width_in=None):
    from PIL import Image

    width_in = width_in or PAGE_IN[0] - 2 * _MARGIN_IN
    pil = Image.open(io.BytesIO(png))
    w_px, h_px = pil.size
    scale = min(width_in / w_px, height_in / h_px)
    w, h = w_px * scale, h_px * scale
    if w_px > w * PDF_IMAGE_DPI * 1.05:
        # scaled with a box filter, then back to a palette (the image's own when it has
        # one: a quarter of the time of finding one): few colours compress well
        scaled = pil.convert("RGB").resize((max(1, int(w * PDF_IMAGE_DPI)),
                                            max(1, int(h * PDF_IMAGE_DPI))), Image.BOX)
        pil = (scaled.quantize(palette=pil, dither=Image.Dither.NONE) if pil.mode == "P"
               else scaled.quantize(192, method=Image.Quantize.FASTOCTREE))
    img = np.asarray(pil.convert("RGB"))
    left = (PAGE_IN[0] - w) / 2
    ax = fig.add_axes((_fx(left), _fy(top_in + h), w / PAGE_IN[0], h / PAGE_IN[1]))
    ax.imshow(img, interpolation="none")
    ax.set_axis_off()
    return top_in + h


def _wafer_lines(view, w):
    def num(fieldname, digits, unit):
        reason = missing_reason(w, fieldname)
        return f"{MISSING} ({reason})" if reason else f"{getattr(w, fieldname):.{digits}f} {unit}"

    rows = [("mean", num("mean_nm", 2, "nm")), ("sigma (1σ, n - 1)", num("sigma_nm", 3, "nm")),
            ("NU (100 sigma / mean)", num("nu_pct", 3, "%")),
            ("min / max", f"{num('min_nm', 2, 'nm')} / {num('max_nm', 2, 'nm')}"),
            ("range", num("range_nm", 2, "nm")), ("half-range", num("halfrange_pct", 3, "%")),
            ("sites measured / fit ok / used",
             f"{w.sites_measured} / {w.sites_fit_ok} / {w.sites_used}"),
            ("in spec", fmt_in_spec(w.in_spec, w, view.target_nm is not None)),
            ("in lot figures", "yes" if w.in_lot_stats else "no")]
    lines = []
    for k, v in rows:
        lines += _wrap("m", f"{k:<34s}{v}", indent=" " * 34)
    if w.flag_reason:
        lines += _wrap("m", ("edge slot: " if w.edge else "flagged slot: ") + w.flag_reason)
    if w.note:
        lines += _wrap("m", "left out of the lot figures: " + w.note)
    failed = [f for f in view.failed_sites if f.wafer == w.wafer]
    if failed:
        lines += [("gap", "")] + _wrap("h", f"Failed sites on this wafer ({len(failed)})")
        lines += [("mh", _FAILED_FMT.format(*_FAILED_HEAD))]
        lines += _failed_rows(failed[:_WAFER_FAILED_MAX])
        if len(failed) > _WAFER_FAILED_MAX:
            lines += _wrap("m", f"... and {len(failed) - _WAFER_FAILED_MAX} more: all are listed "
                                "on the fit-quality pages")
    return lines


def _plot_axes(fig, top_in, band_in, bottom, height):
    """Axes of a plot across the text column, in a band ``band_in`` inches tall starting
    ``top_in`` from the top of the page: the axes' bottom edge at ``bottom`` and its height
    ``height``, both fractions of the band (room left for the tick labels and the title)."""
    return fig.add_axes((_fx(_MARGIN_IN + 0.55), _fy(top_in + band_in * bottom),
                         (PAGE_IN[0] - 2 * _MARGIN_IN - 0.65) / PAGE_IN[0],
                         band_in * height / PAGE_IN[1]))


def _render_page(page, view, ds, images, number, total, advice=None):
    fig = _new_page()
    _draw_frame(fig, page.title, view.lot_id, number, total)
    top = _BODY_TOP_IN
    if page.kind == "advice" and images_advice_plot(advice):
        h = _ADVICE_PLOT_UNITS * _UNIT_IN
        ax = _plot_axes(fig, top, h, 0.86, 0.80)
        draw_advice_profile(ax, view, advice, fontsize=7)
        ax.set_title("Slot profile now and predicted after the advice", fontsize=8.5)
        top += h
    elif page.kind == "profile":
        h = _PROFILE_UNITS * _UNIT_IN
        ax = _plot_axes(fig, top, h, 0.70, 0.66)
        draw_slot_profile(ax, view, fontsize=7.5)
        top += h
    elif page.kind == "fitq":
        h = _FITQ_UNITS * _UNIT_IN
        ax = _plot_axes(fig, top, h, 0.82, 0.74)
        draw_fit_quality(ax, ds, fontsize=7.5)
        top += h
    elif page.kind == "evidence":
        png, sites, hints, n_bad = images.evidence()
        lines = _wrap("p", f"{n_bad} failed or suspect site(s). Shown: the worst of each cause "
                           "in turn, then the worst-fitting accepted sites.")
        if png is not None:
            top = _draw_png(fig, png, top + 0.1, 6.4) + 0.15
        else:
            lines += _wrap("p", "The spectra were not kept, so no overlay is drawn: run reduce "
                                "again with --keep-spectra (writes spectra.nc).")
        for s, h in zip(sites, hints):
            lines += _wrap("m", f"{_short(s.wafer, 20)} slot {s.slot} site {s.site}: "
                                f"{s.verdict}, {s.kind}" + (f"; {h}" if h else ""),
                           indent="    ")
        _draw_lines(fig, lines, top)
        return fig
    elif page.kind == "contact":
        png, why = images.contact_sheet()
        if png is not None:
            _draw_png(fig, png, top + 0.1, PAGE_IN[1] - top - _BODY_BOTTOM_IN - 0.2)
        else:
            _draw_lines(fig, _wrap("p", f"No contact sheet: {why}"), top)
    elif page.kind == "wafer":
        w = page.wafer
        png, why = images.wafer_map(w.wafer)
        h = _WAFER_MAP_UNITS * _UNIT_IN
        if png is not None:
            _draw_png(fig, png, top, h - 0.1)
        else:
            _draw_lines(fig, _wrap("p", f"No map: {why}"), top)
        top += h
        _draw_lines(fig, _wafer_lines(view, w), top)
        return fig
    _draw_lines(fig, page.lines, top)
    return fig


def write_pdf_report(view, ds, outdir, *, images=None, advice=None, dpi=100, wafer_pages=False,
                     progress=None, between_pages=None):
    """Write ``OUTDIR/report.pdf`` atomically (temporary file in OUTDIR, then os.replace).

    Parameters
    ----------
    view : LotView
    ds : xarray.Dataset
    outdir : str or path-like
        Output folder (must exist).
    images : ReportImages, optional
        Shared image cache (pass the one used for report.html).
    advice : dict, optional
        Next-run advice: adds the advice page(s).
    dpi : float
        Resolution of images rendered here.
    wafer_pages : bool
        Add one page per wafer (default: an index of the wafers).
    progress : callable(n_pages) -> object with update(n) and close(), optional
        Progress display factory.
    between_pages : callable(), optional
        Called after each page (work interleaved with the PDF, such as keeping the map
        workers supplied: `filmmap.wafermap.figures.MapRendering.pump`).

    Returns
    -------
    pathlib.Path
        The written PDF: `lot_page_count` lot pages (then one page per wafer with
        ``wafer_pages``).
    """
    images = images or ReportImages(view, ds, outdir, dpi=dpi)
    prov = provenance(ds, advice)
    plan = pdf_page_plan(view, ds, advice, prov, wafer_pages=wafer_pages)
    path = Path(outdir) / "report.pdf"
    meta = {"Title": f"filmmap report: lot {view.lot_id}", "Creator": f"filmmap {__version__}",
            "Subject": "oxide thickness and furnace-boat uniformity (advisory)"}
    with atomic_path(path) as tmp:
        with PdfPages(tmp, metadata=meta) as pdf:
            bar = progress(len(plan)) if progress is not None else None
            try:
                for n, page in enumerate(plan, start=1):
                    fig = _render_page(page, view, ds, images, n, len(plan), advice)
                    pdf.savefig(fig)
                    _write_page_images_now(pdf)   # the page's images leave memory now
                    fig.clear()     # free the page's artists now, not at the next collection
                    if bar is not None:
                        bar.update(1)
                    if between_pages is not None:
                        between_pages()
            finally:
                if bar is not None:
                    bar.close()
    return path


def _write_page_images_now(pdf):
    """Write the images of the pages so far into the file now, and let them go.

    matplotlib's PDF writer keeps every page's images (decoded RGBA arrays) until the file
    is closed, so the memory of report.pdf grew with the wafer count (about 1.4 MB a wafer
    map, gigabytes for a 1,200-wafer lot).  An image is its own PDF object, referenced by
    name from the pages, so it can be written as soon as its page is complete (between
    pages no content stream is open).  Each written image keeps only its name and object
    number, under a key that no live image id can take, for the XObject table written at
    the end; the writer's `writeImages` then writes the remaining ones only.  With a
    matplotlib that lacks these internals the images simply stay until the end, as before.
    """
    f = getattr(pdf, "_file", None)
    images = getattr(f, "_images", None)
    if not (isinstance(images, dict) and hasattr(f, "_unpack") and hasattr(f, "_writeImg")
            and hasattr(f, "reserveObject") and getattr(f, "currentstream", 0) is None):
        return
    for key in [k for k in images if not isinstance(k, tuple)]:
        image, name, ob = images.pop(key)
        data, alpha = f._unpack(image)
        smask = None
        if alpha is not None:
            smask = f.reserveObject("smask")
            f._writeImg(alpha, smask.id)
        f._writeImg(data, ob.id, smask)
        images[("written", name)] = (None, name, ob)
    if "writeImages" not in vars(f):
        write_remaining = f.writeImages

        def write_images():
            written = {k: v for k, v in images.items() if isinstance(k, tuple)}
            for k in written:
                del images[k]
            try:
                write_remaining()
            finally:
                images.update(written)

        f.writeImages = write_images
