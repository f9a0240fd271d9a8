"""history.html: a furnace's run history on one self-contained page.

The page shows the recorded lots (a table), the control-chart signals with the limits they
were judged against, warnings on provisional limits, the run-to-run estimate for the
next run in words, and the charts (`filmmap.history.chart_figures`), with the history
caution of `filmmap.cautions`.  Like report.html it is one file: images inline as base64
PNG (`filmmap.report.markup`), CSS inline, no script and no reference to anything outside
the page; every text taken from the history goes through the reports' escaping, and a
missing number reads as the reports' '—' (`filmmap.report.formatting`).

The page is built from what `filmmap.history` computes (records, `control_charts`,
`next_run_from_history`); the ``filmmap history`` command assembles it with
`filmmap.pipeline.history_report`.

References
----------
.. [1] Python documentation, ``html.escape`` and ``base64``.
.. [2] Western Electric Company, Statistical Quality Control Handbook (1956).
"""

from __future__ import annotations

import io
import re
from collections.abc import Mapping

from matplotlib.figure import Figure

from filmmap.errors import FilmmapInputError
from filmmap.history.control import D2_PAIRS, METRICS, IndividualsChart, baseline_warnings
from filmmap.report.cautions import CONTROL_CHART_CAUTION
from filmmap.report.formatting import MISSING, fmt, signed
from filmmap.report.markup import e, img_tag

__all__ = ["HISTORY_HTML", "chart_filename", "history_html", "next_run_lines",
           "write_history_html"]

#: File name of the history page in the output folder of ``filmmap history``.
HISTORY_HTML = "history.html"

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
            for i, f in enumerate(chart.flags):
                if f and i < len(rows):
                    out.append((i, rows[i], caption, chart.kind, chart.signal_text(f)))
    return sorted(out, key=lambda t: (t[0], t[2], t[3]))


def chart_filename(caption):
    """File name of a chart, from what it shows: ``"Lot mean thickness: EWMA chart"`` ->
    ``"lot_mean_thickness_ewma.png"``."""
    text = caption.lower().replace("individuals chart", "individuals").replace(
        "ewma chart", "ewma")
    text = re.sub(r"\((wtw|wiw)\)", "", text)
    slug = re.sub(r"[^a-z0-9]+", "_", text).strip("_")
    return f"{slug}.png"


def next_run_lines(nxt):
    """A run-to-run estimate (``NextRun.as_dict()``) in words with units, one item a line.

    The zone trims of the run-to-run estimate are absolute: the trims to have in force
    during the next run, relative to the zones' untrimmed set points (unlike the
    single-lot advice, whose trims are changes to the set points of the measured run).
    """
    lines = []
    step, now, nxt_min = nxt.get("adjust_step"), nxt.get("minutes_now"), nxt.get("minutes_next")
    clip = {-1: " (at its lower bound)", 1: " (at its upper bound)"}.get(nxt.get("time_clipped"), "")
    lines.append(f"{step} step: {fmt(now, 1)} min now -> {fmt(nxt_min, 1)} min "
                 f"next{clip}")
    trims = nxt.get("zone_trims_C") or {}
    if trims:
        text = ", ".join(f"{z} {signed(v, 1, 'K')}" for z, v in trims.items()
                         if v is not None)
        clipped = nxt.get("clipped_zones") or []
        lines.append("zone trims to have in force next run (absolute, relative to the "
                     f"untrimmed set points): {text}"
                     + (f" (at the bound: {', '.join(clipped)})" if clipped else ""))
    lines.append(f"predicted lot mean {fmt(nxt.get('predicted_mean_nm'), 1)} nm"
                 + (f", predicted WTW NU {fmt(nxt.get('predicted_wtw_pct'), 2)} %"
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
        (`filmmap.report.markup.e`, `html.escape`).

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
         f"<title>{e(title)}</title><style>{_CSS}</style></head><body>",
         f"<h1>{e(title)}</h1>",
         f'<p class="muted">{len(rows)} lot(s)'
         + (f"; furnace(s): {e(', '.join(furnaces))}" if furnaces else "") + "</p>",
         f'<p class="caution">{e(CONTROL_CHART_CAUTION)}</p>']
    p.append("<h2>Lots</h2><table><thead><tr>"
             + "".join(f'<th class="text">{h}</th>' for h in
                       ("#", "Run date", "Lot", "Furnace", "Recipe SHA-256"))
             + "<th>Lot mean (nm)</th><th>WTW (%)</th><th>Mean WIW (%)</th>"
             "<th>Target (nm)</th><th>Wafers</th></tr></thead><tbody>")
    for i, r in enumerate(rows):
        cls = ' class="signal"' if i in flagged else ""
        rh = r.recipe_sha256
        p.append(f"<tr{cls}><td class=\"text\">{i + 1}</td>"
                 f'<td class="text">{e(r.run_date or MISSING)}</td>'
                 f'<td class="text">{e(r.lot_id)}</td><td class="text">{e(r.furnace or MISSING)}</td>'
                 f'<td class="text"><code>{e(rh[:12] if rh else MISSING)}</code></td>'
                 f"<td>{fmt(r.lot_mean_nm)}</td><td>{fmt(r.wtw_pct, 3)}</td>"
                 f"<td>{fmt(r.wiw_mean_pct, 3)}</td><td>{fmt(r.target_nm, 1)}</td>"
                 f"<td>{len(r.wafers)}</td></tr>")
    p.append("</tbody></table>")
    if signals is not None:
        p.append("<h2>Signals</h2>")
        if sig:
            p.append('<table><thead><tr><th class="text">#</th><th class="text">Lot</th>'
                     '<th class="text">Metric</th><th class="text">Chart</th>'
                     '<th class="text">Signal</th></tr></thead><tbody>')
            for i, r, caption, kind, what in sig:
                p.append(f'<tr><td class="text">{i + 1}</td><td class="text">{e(r.lot_id)}</td>'
                         f'<td class="text">{e(caption)}</td><td class="text">{e(kind)}</td>'
                         f'<td class="text">{e(what)}</td></tr>')
            p.append("</tbody></table>")
        else:
            p.append("<p>No point triggers a run rule or leaves the EWMA limits.</p>")
        for metric, pair in signals.items():
            ind = pair[0] if isinstance(pair, tuple) else pair
            if isinstance(ind, IndividualsChart):
                cap, unit = METRICS.get(metric, (metric, ""))
                p.append(f'<p class="muted">{e(cap)}: centre {fmt(ind.centre, 3)} {e(unit)}, '
                         f"sigma {fmt(ind.sigma, 4)} {e(unit)} (average moving range / {D2_PAIRS:g} "
                         f"over {int(ind.baseline.sum())} baseline lot(s)).</p>")
    warns = baseline_warnings(signals)
    if warns:
        p.append('<h2>Warnings</h2><ul>' + "".join(f"<li>{e(w)}</li>" for w in warns)
                 + "</ul>")
    if next_run:
        p.append("<h2>Run-to-run estimate for the next run (advisory only)</h2><ul>"
                 + "".join(f"<li>{e(x)}</li>" for x in next_run_lines(next_run)) + "</ul>"
                 + f'<p class="caution">{e(next_run.get("caution") or CONTROL_CHART_CAUTION)}</p>')
    if charts:
        p.append("<h2>Charts</h2>")
        for caption, image in charts.items():
            p.append(f"<figure>{img_tag(_png(image), caption)}"
                     f"<figcaption>{e(caption)}</figcaption></figure>")
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
    from filmmap.atomic import write_text_atomic

    return write_text_atomic(path, history_html(rows, charts, **options))
