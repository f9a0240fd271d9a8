"""The report: summary.json, summary.csv rows, report.html and report.pdf.

Typical use after a reduce (``ds`` = the lot dataset, ``config`` = the lot
configuration, ``outdir`` = the output folder holding the PNG figures)::

    from filmmap.report import write_reports
    paths = write_reports(ds, config, outdir)             # advice=... when available

or step by step::

    view = lot_view(ds, config)    # filmmap.lotstats.lot_view -> LotView
    write_summary_json(view, outdir)
    images = ReportImages(view, ds, outdir)               # shared PNG cache
    write_html_report(view, ds, outdir, images=images)
    write_pdf_report(view, ds, outdir, images=images)
"""

from importlib import import_module
from pathlib import Path

# Exports load on first use (PEP 562), so that `reduce --no-figures` and the summary
# files never pay for importing matplotlib.
_EXPORTS = {
    "CAUTION_PARAGRAPHS": "cautions", "CAUTIONS": "cautions", "CAUTIONS_TITLE": "cautions",
    "draw_fit_quality": "fitquality", "fit_quality_figure": "fitquality",
    "history_html": "history_page", "write_history_html": "history_page",
    "render_html": "html", "write_html_report": "html",
    "ReportImages": "images",
    "BASE_LOT_PAGES": "pdf", "lot_page_count": "pdf", "pdf_page_plan": "pdf",
    "write_pdf_report": "pdf",
    "draw_slot_profile": "slotplot", "slot_profile_figure": "slotplot",
    "SUMMARY_CSV_COLUMNS": "summary_json", "summary_csv_rows": "summary_json",
    "summary_dict": "summary_json", "wafer_rows": "summary_json",
    "write_summary_csv": "summary_json", "write_summary_json": "summary_json",
}


def __getattr__(name):
    if name in _EXPORTS:
        value = getattr(import_module(f"filmmap.report.{_EXPORTS[name]}"), name)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'filmmap.report' has no attribute {name!r}")


def write_reports(ds, config, outdir, *, advice=None, min_sites=5, dpi=100,
                  pdf=True, html=True):
    """Write summary.json, report.html and report.pdf for a reduced lot.

    Parameters
    ----------
    ds : xarray.Dataset
        The lot dataset (as written to lot.nc).
    config : LotConfig
        The lot configuration.
    outdir : str or path-like
        Output folder (must exist); PNGs already there are embedded.
    advice : dict, optional
        Next-run advice to show (with the cautions).
    min_sites : int
        Fewest usable sites for a wafer to enter the lot statistics.
    dpi : float
        Resolution of images rendered for the report.
    pdf, html : bool
        Write report.pdf / report.html.

    Returns
    -------
    dict
        ``{"summary.json": path, "report.html": path, "report.pdf": path}``
        (the written ones) and ``"view"``: the `LotView`.
    """
    from filmmap.report.html import write_html_report
    from filmmap.report.images import ReportImages
    from filmmap.lotstats.view import lot_view
    from filmmap.report.pdf import write_pdf_report
    from filmmap.report.summary_json import write_summary_json

    outdir = Path(outdir)
    view = lot_view(ds, config, min_sites=min_sites)
    out = {"summary.json": write_summary_json(view, outdir)}
    images = ReportImages(view, ds, outdir, dpi=dpi)
    if html:
        out["report.html"] = write_html_report(view, ds, outdir, images=images, advice=advice)
    if pdf:
        out["report.pdf"] = write_pdf_report(view, ds, outdir, images=images, advice=advice)
    out["view"] = view
    return out


__all__ = [
    "summary_dict", "wafer_rows", "summary_csv_rows", "write_summary_json", "write_summary_csv",
    "SUMMARY_CSV_COLUMNS", "slot_profile_figure", "draw_slot_profile", "fit_quality_figure",
    "draw_fit_quality", "render_html", "write_html_report", "write_pdf_report", "pdf_page_plan",
    "lot_page_count", "BASE_LOT_PAGES", "ReportImages", "CAUTIONS", "CAUTION_PARAGRAPHS",
    "CAUTIONS_TITLE", "write_reports", "history_html", "write_history_html",
]
