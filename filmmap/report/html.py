"""report.html: one self-contained file for screen and print.

Everything is inside the file: images as ``data:image/png;base64`` URIs, CSS
inline in ``<style>``, no script, no external font, no link to anything
outside the page (only ``#`` anchors within it). Every text that comes from
the input files (lot id, furnace, wafer ids, fit notes, file names, stack
description, advice values) goes through `html.escape`. Tags are always
closed, so the page is well-formed for a strict parser.

Sections, in order: header with the verdict and the cautions, slot profile,
wafer-to-wafer (WTW) table, within-wafer (WIW) table, lot contact sheet, one
section per wafer, fit quality with the failed sites, warnings and notes,
advice (only when an advice dict is given, with the cautions beside it),
provenance. In print, each section starts a new page and a wafer section is
kept on one page.
"""

from __future__ import annotations

from pathlib import Path

from filmmap.atomic import atomic_path
from filmmap.report.advicefig import (SLOT_HEADER, ZONE_HEADER, slot_rows, time_row,
                                      zone_rows)
from filmmap.report.cautions import CAUTION_PARAGRAPHS, CAUTIONS_TITLE
from filmmap.report.decision import (IN_SPEC, OUT_OF_SPEC, UNITS_NOTE, advice_causes, decision,
                                     has_standard_advice)
from filmmap.report.formatting import (MISSING, compact_dict_text, flag_text, fmt, fmt_in_spec,
                                       fmt_wafer, is_long_scalar_dict, scalar_text, signed,
                                       wtw_rows)
from filmmap.report.images import ReportImages
from filmmap.report.markup import e
from filmmap.report.markup import img_tag as _img
from filmmap.report.provenance import provenance, provenance_rows

#: id and alt text of the slot-profile image.
SLOT_PROFILE_IMG_ID = "slot-profile"
SLOT_PROFILE_ALT = "Slot profile: wafer mean thickness against boat slot"

#: What an edge slot is, by the rule the lot view used (`filmmap.lotstats.view.with_boat_model`).
EDGE_RULE_STATISTICAL = ("Edge slots: flagged product slots contiguous with an end of the "
                         "product region.")
EDGE_RULE_BOAT_MODEL = ("Edge slots: slots the advised run still leaves out of tolerance "
                        "because of an end effect of the boat model; other flagged slots are "
                        "answered by the advised time and trims.")

_CSS = """
:root { --ink: #1d1d1f; --muted: #555; --rule: #c9c9c9; --accent: #3b528b; --band: #eef2e6; }
* { box-sizing: border-box; }
body { font-family: sans-serif; color: var(--ink); margin: 0 auto; max-width: 1100px;
       padding: 1rem 1.5rem 3rem; line-height: 1.4; font-size: 15px; }
h1 { font-size: 1.6rem; margin: 0.2rem 0; }
h2 { font-size: 1.25rem; border-bottom: 2px solid var(--accent); padding-bottom: 0.2rem;
     margin-top: 2.2rem; }
h3 { font-size: 1.05rem; margin: 1.2rem 0 0.4rem; }
.meta { color: var(--muted); margin: 0.2rem 0; }
.verdict { font-size: 1.1rem; font-weight: bold; border-left: 6px solid var(--accent);
           padding: 0.5rem 0.8rem; background: #f3f4f8; }
.cautions { border: 2px solid #444; padding: 0.5rem 0.9rem; background: #f7f7f7; }
.cautions h2, .cautions h3 { border: none; margin-top: 0.3rem; }
nav ul { list-style: none; padding: 0; display: flex; flex-wrap: wrap; gap: 0.3rem 1rem; }
nav a { color: var(--accent); }
table { border-collapse: collapse; margin: 0.4rem 0; font-size: 0.88rem; }
th, td { border-bottom: 1px solid var(--rule); padding: 0.2rem 0.5rem; text-align: right;
         vertical-align: top; }
th { background: #ececec; }
td.text, th.text { text-align: left; }
tr.edge td { background: var(--band); }
tr.excluded td { color: var(--muted); font-style: italic; }
td.out { font-weight: bold; }
table.kv th { text-align: left; background: none; font-weight: normal; color: var(--muted); }
table.kv td { text-align: left; }
figure { margin: 0.6rem 0; }
figure img { max-width: 100%; height: auto; border: 1px solid #ddd; }
figcaption { color: var(--muted); font-size: 0.85rem; }
.missing { color: var(--muted); font-style: italic; }
.compact { font-size: 0.82rem; margin: 0; }
pre { white-space: pre-wrap; word-break: break-all; background: #f5f5f5; padding: 0.5rem;
      font-size: 0.82rem; }
code { font-size: 0.82rem; word-break: break-all; }
.wafer { border-top: 1px solid var(--rule); padding-top: 0.4rem; }
.wafer-body { display: flex; flex-wrap: wrap; gap: 1rem; align-items: flex-start; }
.wafer-body figure { flex: 1 1 420px; max-width: 560px; }
.advice-wrap { display: flex; flex-wrap: wrap; gap: 1rem; align-items: flex-start; }
.advice-wrap > div { flex: 2 1 420px; }
.advice-wrap > aside { flex: 1 1 260px; }
footer { margin-top: 3rem; color: var(--muted); font-size: 0.8rem; }
.decision { border: 3px solid var(--accent); padding: 0.5rem 0.9rem 0.6rem; margin: 0.6rem 0;
            background: #fafbfd; }
.decision h2 { border: none; margin: 0.1rem 0 0.3rem; font-size: 1.35rem; }
.decision.hold { border-color: #6b1f1f; }
.decision.review { border-color: #7a5a00; }
.decision .status { display: inline-block; padding: 0.05rem 0.5rem; color: #fff;
                    background: var(--accent); border-radius: 3px; }
.decision.hold .status { background: #6b1f1f; }
.decision.review .status { background: #7a5a00; }
.decision ul { margin: 0.2rem 0 0.3rem 1.2rem; padding: 0; }
.decision .rule { color: var(--muted); font-size: 0.82rem; margin: 0.2rem 0; }
.decision .action { font-size: 1.02rem; margin: 0.4rem 0 0.2rem; }
.decision .short-caution { font-size: 0.85rem; margin: 0.2rem 0; color: var(--muted); }
.decision table.kv { margin: 0.2rem 0; }
.decision table.kv th, .decision table.kv td { padding: 0.1rem 0.5rem; }
details summary { cursor: pointer; color: var(--accent); margin: 0.4rem 0; }
.evidence-grid { display: flex; flex-wrap: wrap; gap: 0.6rem; }
@media print {
  @page { size: A4; margin: 14mm; }
  body { max-width: none; padding: 0; font-size: 10pt; }
  nav { display: none; }
  section { break-before: page; page-break-before: always; }
  section.first { break-before: auto; page-break-before: auto; }
  .wafer { break-inside: avoid; page-break-inside: avoid; }
  .wafer + .wafer { break-before: page; page-break-before: always; }
  figure, tr, .cautions, .verdict { break-inside: avoid; page-break-inside: avoid; }
  thead { display: table-header-group; }
  table { font-size: 8pt; }
  h2 { break-after: avoid; page-break-after: avoid; }
  .decision, .verdict, .cautions, th { -webkit-print-color-adjust: exact; print-color-adjust: exact; }
}
"""


def _cell(text, cls=None):
    c = f' class="{cls}"' if cls else ""
    t = str(text)
    if t.startswith(MISSING):
        c = ' class="missing"' if not cls else f' class="{cls} missing"'
    return f"<td{c}>{e(t)}</td>"


def _kv_table(rows, cls="kv"):
    out = [f'<table class="{cls}"><tbody>']
    for k, v in rows:
        out.append(f"<tr><th>{e(k)}</th>{_cell(v, 'text')}</tr>")
    out.append("</tbody></table>")
    return "".join(out)


def _cautions_html(title_tag="h2", with_id=True, advice=None):
    idattr = ' id="cautions"' if with_id else ""
    extra = (advice or {}).get("caution") if isinstance(advice, dict) else None
    paras = "".join(f"<p>{e(p)}</p>" for p in CAUTION_PARAGRAPHS
                    + ((f"About the advice: {extra}",) if isinstance(extra, str) else ()))
    return (f'<div class="cautions"{idattr}><{title_tag}>{e(CAUTIONS_TITLE)}</{title_tag}>'
            f"{paras}</div>")


def _advice_value(value, depth=0):
    """Generic, escaped rendering of an advice value (dict, list, number, text)."""
    if depth and is_long_scalar_dict(value):
        return f'<p class="compact">{e(compact_dict_text(value))}</p>'
    if isinstance(value, dict):
        rows = "".join(f"<tr><th>{e(k)}</th><td>{_advice_value(v, depth + 1)}</td></tr>"
                       for k, v in value.items())
        return f'<table class="kv"><tbody>{rows}</tbody></table>'
    if isinstance(value, (list, tuple)):
        if not value:
            return '<span class="missing">(none)</span>'
        return "<ul>" + "".join(f"<li>{_advice_value(v, depth + 1)}</li>" for v in value) + "</ul>"
    text = scalar_text(value)
    return f'<span class="missing">{e(text)}</span>' if text == MISSING else e(text)


def _decision_html(view, advice):
    """The decision block (disposition, rule, key numbers, next-run action, short caution)."""
    dec = decision(view, advice)
    d = dec.disposition
    klass = {IN_SPEC: "release", OUT_OF_SPEC: "hold"}.get(d.status, "review")
    reasons = ("<ul>" + "".join(f"<li>{e(r)}</li>" for r in d.reasons) + "</ul>"
               if d.reasons else "")
    caution = e(dec.caution).replace("see the cautions",
                                     'see the <a href="#cautions">cautions</a>')
    action = (f'{e(dec.action)} <a href="#advice">Details of the advice</a>' if dec.action
              else e(dec.no_action_reason))
    return (f'<section id="decision" class="decision {klass}" aria-label="decision">'
            f'<h2>Decision: <span class="status">{e(d.action.upper())}</span> '
            f'lot {e(d.status)}</h2>{reasons}'
            f'<p class="rule">{e(d.rule)}</p>'
            + _kv_table(dec.key_numbers)
            + f'<p class="action" id="next-run"><strong>Next run:</strong> {action}</p>'
            f'<p class="short-caution">{caution}</p></section>')


def _table(header, rows, text_cols=(0,)):
    out = ["<table><thead><tr>"]
    out += [f'<th class="text">{e(h)}</th>' if i in text_cols else f"<th>{e(h)}</th>"
            for i, h in enumerate(header)]
    out.append("</tr></thead><tbody>")
    for r in rows:
        out.append("<tr>" + "".join(_cell(c, "text" if i in text_cols else None)
                                    for i, c in enumerate(r)) + "</tr>")
    out.append("</tbody></table>")
    return "".join(out)


def _advice_html(view, advice, images):
    """The advice section: action, causes, tables by zone and step, the predicted profile."""
    p = ['<section id="advice"><h2>Advice for the next run (advisory only)</h2>']
    if not has_standard_advice(advice):
        # an advice dict without the standard keys: shown as it is, escaped
        p.append(_advice_value(dict(advice)) + "</section>")
        return "".join(p)
    dec = decision(view, advice)
    p.append(f'<p class="action"><strong>{e(dec.action)}</strong></p>')
    p.append(f'<p class="meta">{e(UNITS_NOTE)} The cautions at the top of the report apply '
             "to every number here.</p>")
    causes = advice_causes(advice, view)
    if causes:
        p.append("<h3>What each recommendation answers</h3>"
                 + _table(("recommendation", "cause it answers"), causes, (0, 1)))
    p.append("<h3>Step time</h3>" + _table(
        ("step", "now (min)", "next (min)", "change (%)", "bound (%)"), [time_row(advice)]))
    zrows = zone_rows(advice, view)
    if zrows:
        p.append("<h3>Heater zones</h3>" + _table(ZONE_HEADER, zrows))
        common = advice.get("common_offset_C")
        resid = advice.get("zone_fit_residual_C")
        expl = advice.get("zone_fit_explained")
        bits = []
        if isinstance(common, (int, float)):
            bits.append(f"common offset of the boat {signed(common, 2, 'K')} (answered by the "
                        "time, "
                        "not by the trims)")
        if isinstance(resid, (int, float)):
            bits.append(f"slot-to-slot part the zones leave unexplained {resid:.2f} K rms")
        if isinstance(expl, (int, float)):
            bits.append(f"zones explain {100 * expl:.0f} % of the slot-to-slot variance")
        if bits:
            p.append(f"<p>{e('; '.join(bits))}.</p>")
    png = images.advice_profile(advice)
    if png is not None:
        p.append("<figure>" + _img(png, "Slot profile now and predicted after the advice",
                                   "advice-profile")
                 + "<figcaption>Model of this lot per slot (now) and the model's prediction "
                   "for the next run with the advised time and trims, against the tolerance "
                   "band. A slot deviation the zones do not explain stays in the prediction."
                   "</figcaption></figure>")
    warns = advice.get("warnings") or []
    p.append("<h3>Warnings about the advice</h3>"
             + ("<ul>" + "".join(f"<li>{e(w)}</li>" for w in warns) + "</ul>" if warns
                else "<p>None.</p>"))
    srows = slot_rows(advice, view)
    if srows:
        p.append(f"<details><summary>Per-slot numbers ({len(srows)} slots)</summary>"
                 + _table(SLOT_HEADER, srows) + "</details>")
    model = advice.get("model")
    if isinstance(model, dict):
        p.append("<details><summary>Growth-model settings</summary>"
                 + _kv_table([(k, scalar_text(v)) for k, v in model.items()]) + "</details>")
    p.append("</section>")
    return "".join(p)


def _evidence_html(view, images):
    """Measured vs model spectra of failed, suspect and worst-fitting sites."""
    from filmmap.report.evidence import MAX_ON_PAGE, evidence_pdf_sites

    png, sites, hints, n_bad = images.evidence()
    p = ['<section id="evidence"><h2>Evidence: measured against model spectra</h2>']
    if not sites:
        p.append("<p>No failed or suspect site, and no fit quality to rank the accepted "
                 "ones.</p></section>")
        return "".join(p)
    p.append(f"<p>{n_bad} failed or suspect site(s) in the lot. Shown: the worst site of "
             "each cause in turn, then the worst-fitting accepted sites, at most "
             f"{MAX_ON_PAGE}. Each panel: measured points and the model at the site's best "
             "fit (above), the residual measured - model (below).</p>")
    if png is not None:
        p.append("<figure>" + _img(png, "Measured and model spectra of failed and suspect "
                                        "sites", "evidence-spectra")
                 + "</figure>")
        in_pdf, words = evidence_pdf_sites(view, images.ds, images.spectra())
        if in_pdf:
            p.append(f"<p>{e(words)}</p>")
    else:
        p.append('<p class="missing">The spectra were not kept, so no overlay is drawn: '
                 "run reduce again with --keep-spectra (writes spectra.nc) to see the measured "
                 "and model spectra of these sites.</p>")
    rows = [(s.wafer, str(s.slot), str(s.site), s.verdict, s.kind,
             fmt(s.fit_quality, 3, reason="no value"), h or MISSING, s.note)
            for s, h in zip(sites, hints)]
    p.append(_table(("wafer", "slot", "site", "verdict", "cause", "fit quality",
                     "what the overlay shows", "fit note"), rows, (0, 3, 4, 6, 7)))
    p.append("</section>")
    return "".join(p)


WIW_HEADER = ("wafer", "slot", "role", "mean (nm)", "sigma (nm)", "NU (%)", "range (nm)",
              "half-range (%)", "sites used", "in spec", "slot flag")


def _wiw_cells(view, w):
    return [w.wafer, str(w.slot), w.role, fmt_wafer(w, "mean_nm", 2), fmt_wafer(w, "sigma_nm", 3),
            fmt_wafer(w, "nu_pct", 3), fmt_wafer(w, "range_nm", 2),
            fmt_wafer(w, "halfrange_pct", 3), f"{w.sites_used} of {w.sites_measured}",
            fmt_in_spec(w.in_spec, w, view.target_nm is not None), flag_text(w)]


def _wiw_table(view):
    out = ["<table><thead><tr>"]
    out += [f'<th class="text">{e(h)}</th>' if i in (0, 2, 10) else f"<th>{e(h)}</th>"
            for i, h in enumerate(WIW_HEADER)]
    out.append("</tr></thead><tbody>")
    for w in view.wafers:
        cls = "excluded" if w.excluded else "edge" if w.edge else ""
        out.append(f'<tr class="{cls}">' if cls else "<tr>")
        for i, c in enumerate(_wiw_cells(view, w)):
            klass = ("text" if i in (0, 2, 10)
                     else "out" if i == 9 and w.in_spec is False else None)
            out.append(_cell(c, klass))
        out.append("</tr>")
    out.append("</tbody></table>")
    return "".join(out)


def _failed_table(sites):
    out = ['<table><thead><tr><th class="text">wafer</th><th>slot</th><th>site</th>'
           '<th>x (mm)</th><th>y (mm)</th><th>fit quality</th><th class="text">fit note</th>'
           "</tr></thead><tbody>"]
    for f in sites:
        out.append("<tr>" + _cell(f.wafer, "text") + _cell(f.slot) + _cell(f.site)
                   + _cell(fmt(f.x_mm, 1)) + _cell(fmt(f.y_mm, 1))
                   + _cell(fmt(f.fit_quality, 3, reason="no value")) + _cell(f.note, "text")
                   + "</tr>")
    out.append("</tbody></table>")
    return "".join(out)


#: Lots of up to this many wafers have every wafer map embedded; larger lots embed the maps
#: of the wafers that need a look (`maps_to_embed`) and point to figures/ for the rest, so
#: that report.html stays a few MB (the contact sheet shows every wafer).
MAX_EMBEDDED_MAPS = 50


def maps_to_embed(view):
    """Ids of the wafers whose map report.html embeds (see `MAX_EMBEDDED_MAPS`)."""
    if len(view.wafers) <= MAX_EMBEDDED_MAPS:
        return {w.wafer for w in view.wafers}
    bad = {f.wafer for f in view.failed_sites} | {f.wafer for f in view.suspect_sites}
    need = [w.wafer for w in view.wafers
            if w.in_spec is False or w.flagged or w.excluded or w.wafer in bad]
    return set(need[:MAX_EMBEDDED_MAPS])


def _wafer_section(view, images, index, w, embed=True):
    from filmmap.wafermap.figures import safe_filename

    if not embed:
        png, why = None, (f"not embedded in a lot of {len(view.wafers)} wafers (only those "
                          "that need a look are); the map is figures/"
                          f"{safe_filename(w.wafer)}.png and the wafer is on the contact sheet")
    else:
        png, why = images.wafer_map(w.wafer)
    fig = (f"<figure>{_img(png, f'Thickness map of wafer {w.wafer}', width=560)}"
           f"<figcaption>Thickness map, wafer {e(w.wafer)}, slot {w.slot}</figcaption></figure>"
           if png is not None else f'<p class="missing">No map: {e(why)}</p>')
    rows = [("slot", str(w.slot)), ("role", w.role),
            ("mean", fmt_wafer(w, "mean_nm", 2, "nm")),
            ("sigma", fmt_wafer(w, "sigma_nm", 3, "nm")),
            ("NU (100 sigma / mean)", fmt_wafer(w, "nu_pct", 3, "%")),
            ("min / max", f"{fmt_wafer(w, 'min_nm', 2)} / {fmt_wafer(w, 'max_nm', 2)} nm"),
            ("range", fmt_wafer(w, "range_nm", 2, "nm")),
            ("half-range", fmt_wafer(w, "halfrange_pct", 3, "%")),
            ("sites measured / fit ok / used",
             f"{w.sites_measured} / {w.sites_fit_ok} / {w.sites_used}"),
            ("in spec", fmt_in_spec(w.in_spec, w, view.target_nm is not None)),
            ("in lot figures", "yes" if w.in_lot_stats else "no")]
    if w.flag_reason:
        rows.append(("slot flag", ("edge slot: " if w.edge else "flagged: ") + w.flag_reason))
    if w.note:
        rows.append(("left out", w.note))
    failed = [f for f in view.failed_sites if f.wafer == w.wafer]
    fail_html = (f"<h4>Failed sites ({len(failed)})</h4>" + _failed_table(failed)) if failed else ""
    return (f'<article class="wafer" id="wafer-{index}"><h3>Wafer {e(w.wafer)} '
            f'<span class="meta">slot {w.slot}, {e(w.role)}</span></h3>'
            f'<div class="wafer-body">{fig}<div>{_kv_table(rows)}{fail_html}</div></div></article>')


def render_html(view, ds, *, images=None, outdir=None, advice=None, dpi=100):
    """The report as one HTML string (see the module docstring).

    Parameters
    ----------
    view : LotView
    ds : xarray.Dataset
        The lot dataset (fit quality, provenance attributes, maps).
    images : ReportImages, optional
        Shared image cache (default: a new one on ``outdir`` at ``dpi``).
    outdir : path-like, optional
        Folder with the reduce step's PNGs (contact sheet, wafer maps).
    advice : dict, optional
        Next-run advice; shown with the cautions beside it.
    dpi : float
        Resolution of images rendered here.

    Returns
    -------
    str
    """
    parts = []
    _render(parts.append, view, ds, images, outdir, advice, dpi)
    return "".join(parts)


class _Sink:
    """Where `_render` puts the parts: a list (`render_html`) or straight into the file."""

    def __init__(self, write):
        self.append = write

    def extend(self, parts):
        for part in parts:
            self.append(part)


def _render(emit, view, ds, images, outdir, advice, dpi):
    """The parts of the report, in order, each handed to ``emit`` (str -> None) when made.

    Streaming the parts keeps the memory of writing report.html to one wafer's section,
    instead of the whole page (about 0.1 MB a wafer) held as parts and joined once more.
    """
    images = images or ReportImages(view, ds, outdir, dpi=dpi)
    prov = provenance(ds, advice)
    lot = view.lot_id
    meta = [f"furnace: {view.furnace}" if view.furnace else "furnace: not given",
            f"run date: {view.run_date}" if view.run_date else "run date: not given",
            f"{len(view.wafers)} wafers measured, {view.n_sites_measured} sites",
            (f"target {view.target_nm:g} nm ± {view.tolerance_pct:g} %"
             if view.target_nm is not None else "no target")]
    nav = [("decision", "Decision")] + ([("advice", "Advice")] if advice else []) + [
           ("cautions", "Cautions"), ("profile", "Slot profile"), ("wtw", "WTW"),
           ("wiw", "WIW table"), ("contact", "Contact sheet"), ("wafers", "Wafers"),
           ("fit", "Fit quality"), ("evidence", "Evidence"), ("warnings", "Warnings")]
    nav.append(("provenance", "Provenance"))
    p = _Sink(emit)
    p.append("<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
             "<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">"
             f"<title>filmmap report: lot {e(lot)}</title><style>{_CSS}</style></head><body>")
    p.append(f'<header id="top"><h1>Lot {e(lot)}</h1>')
    p.append(f'<p class="meta">{e(" · ".join(meta))}</p>')
    p.append(_decision_html(view, advice))
    p.append(f'<p class="verdict" id="verdict">{e(view.verdict)}</p>')
    p.append(_cautions_html(advice=advice))
    p.append("<nav><ul>" + "".join(f'<li><a href="#{a}">{e(t)}</a></li>' for a, t in nav)
             + "</ul></nav></header>")

    # advice: right after the decision it details
    if advice:
        p.append(_advice_html(view, advice, images).replace('<section id="advice">',
                                                            '<section id="advice" class="first">'))

    # slot profile
    p.append('<section id="profile"' + ('' if advice else ' class="first"') + '><h2>Slot profile</h2><figure>'
             + _img(images.slot_profile(), SLOT_PROFILE_ALT, SLOT_PROFILE_IMG_ID)
             + "<figcaption>Wafer mean thickness against boat slot, error bars ± 1 within-wafer "
             "sigma. Slot 1 is the load (door) end. " + e(EDGE_RULE_BOAT_MODEL if advice
                                                          and "boat_model" in advice
                                                          else EDGE_RULE_STATISTICAL)
             + "</figcaption></figure>")
    if view.profile.reasons:
        p.append("<h3>Flagged slots</h3><ul>" + "".join(
            f"<li>slot {s}{' (edge)' if s in view.profile.edge_slots else ''}: {e(r)}</li>"
            for s, r in view.profile.reasons.items()) + "</ul>")
    p.append("</section>")

    # WTW and WIW
    p.append('<section id="wtw"><h2>Wafer to wafer (WTW)</h2>'
             "<p>Over the product wafers with a usable mean; monitors and dummies are not "
             "counted.</p>" + _kv_table(wtw_rows(view)) + "</section>")
    p.append('<section id="wiw"><h2>Within wafer (WIW), per wafer</h2>'
             "<p>Over the usable sites of each wafer (accepted fit, inside the edge exclusion); "
             "sigma is the sample standard deviation, NU = 100 sigma / mean, half-range = "
             "100 (max - min) / (2 mean). Wafers with fewer than "
             f"{view.min_sites} usable sites are left out of the lot figures.</p>"
             + _wiw_table(view) + "</section>")

    # contact sheet
    png, why = images.contact_sheet()
    p.append('<section id="contact"><h2>Lot contact sheet</h2>')
    p.append(f"<figure>{_img(png, f'Contact sheet of lot {lot}', 'contact-sheet')}<figcaption>"
             "Every wafer on one common thickness scale.</figcaption></figure>" if png is not None
             else f'<p class="missing">No contact sheet: {e(why)}</p>')
    p.append("</section>")

    # wafers
    p.append('<section id="wafers"><h2>Wafers</h2>')
    embed = maps_to_embed(view)
    p.extend(_wafer_section(view, images, i + 1, w, w.wafer in embed)
             for i, w in enumerate(view.wafers))
    p.append("</section>")

    # fit quality
    fq = images.fit_quality()
    n_fail = len(view.failed_sites)
    p.append('<section id="fit"><h2>Fit quality</h2><figure>'
             + _img(fq, "Histogram of fit quality (reduced chi-square) of every measured site",
                    "fit-quality")
             + "<figcaption>Reduced chi-square of every measured site, log scale; about 1 when "
             "the model explains the data down to the noise.</figcaption></figure>")
    p.append(f"<h3>Failed sites ({n_fail} of {view.n_sites_measured} measured)</h3>")
    if n_fail:
        counts = ", ".join(f"{r}: {c}" for r, c in view.failure_counts.items())
        p.append(f"<p>By reason: {e(counts)}</p>" + _failed_table(view.failed_sites))
    else:
        p.append("<p>None: every measured site has an accepted fit.</p>")
    p.append("</section>")

    p.append(_evidence_html(view, images))

    # warnings and notes
    p.append('<section id="warnings"><h2>Warnings and notes</h2>')
    p.append("<h3>Warnings</h3>" + ("<ul>" + "".join(f"<li>{e(x)}</li>" for x in view.warnings)
                                    + "</ul>" if view.warnings else "<p>None.</p>"))
    if view.notes:
        p.append("<h3>Notes on the slot profile</h3><ul>"
                 + "".join(f"<li>{e(x)}</li>" for x in view.notes) + "</ul>")
    p.append("</section>")

    # provenance
    p.append('<section id="provenance"><h2>Provenance</h2>')
    p.append(_kv_table(provenance_rows(prov)))
    p.append(f"<h3>Input files ({len(prov['inputs'])})</h3>")
    if prov["inputs_problem"]:
        p.append(f'<p class="missing">{e(prov["inputs_problem"])}</p>')
    if prov["inputs"]:
        p.append('<table><thead><tr><th class="text">file</th><th class="text">SHA-256</th>'
                 "</tr></thead><tbody>" + "".join(
                     f'<tr>{_cell(i["file"], "text")}<td class="text"><code>{e(i["sha256"])}'
                     "</code></td></tr>" for i in prov["inputs"]) + "</tbody></table>")
    p.append(f"<h3>Film stack and material sources</h3><pre>{e(prov['stack'])}</pre>")
    p.append('<h3>Models and their published sources</h3><table><thead><tr>'
             '<th class="text">model</th><th class="text">source</th></tr></thead><tbody>'
             + "".join(f"<tr>{_cell(m, 'text')}{_cell(s, 'text')}</tr>" for m, s in prov["models"])
             + "</tbody></table>")
    p.append("</section>")
    p.append(f"<footer>filmmap report of lot {e(lot)}; {e(prov['report_software'])}. "
             "Advisory only: see the cautions at the top.</footer></body></html>\n")


def write_html_report(view, ds, outdir, *, images=None, advice=None, dpi=100):
    """Write ``OUTDIR/report.html`` atomically; return its path.

    Parameters
    ----------
    view : LotView
    ds : xarray.Dataset
    outdir : str or path-like
        Output folder (must exist); its ``contact_sheet.png`` and
        ``figures/<wafer>.png`` are embedded when present, rendered otherwise.
    images : ReportImages, optional
        Shared image cache (pass the same one to `write_pdf_report`).
    advice : dict, optional
        Next-run advice.
    dpi : float
        Resolution of images rendered here.
    """
    path = Path(outdir) / "report.html"
    # the file is closed before atomic_path fsyncs and renames it (with-items exit in reverse)
    with atomic_path(path) as tmp, open(tmp, "w", encoding="utf-8", newline="") as fh:
        _render(fh.write, view, ds, images, outdir, advice, dpi)
    return path


__all__ = ["render_html", "write_html_report", "SLOT_PROFILE_IMG_ID", "SLOT_PROFILE_ALT", "e"]
