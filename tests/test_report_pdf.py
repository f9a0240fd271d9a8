"""report.pdf: a valid PDF, the documented lot pages then one page per wafer, written atomically.

Sources beside each check: a standard or paper, or "common practice, no source".
"""

import re

import pytest

import filmmap.report.pdf as pdfmod
from filmmap.lotstats import lot_view
from filmmap.report import (BASE_LOT_PAGES, ReportImages, lot_page_count, pdf_page_plan,
                            write_pdf_report)
from test_report_lotview import make_config, make_lot, shared_lot

PAGE_OBJ = re.compile(rb"/Type\s*/Page(?!s)")


def pages_in(data):
    """Page objects in a PDF file: '/Type /Page' not followed by 's' (ISO 32000-1, 7.7.3.3)."""
    return len(PAGE_OBJ.findall(data))


def is_pdf(data):
    # A PDF file starts with the %PDF-n.m header and ends with %%EOF (ISO 32000-1, 7.5.2 / 7.5.5).
    return data.startswith(b"%PDF-") and data.rstrip().endswith(b"%%EOF")


@pytest.fixture(scope="module")
def lot():
    ds, _, view, images = shared_lot()
    return ds, view, images


@pytest.fixture(scope="module")
def written(lot, tmp_path_factory):
    ds, view, images = lot
    out = tmp_path_factory.mktemp("pdf")
    return write_pdf_report(view, ds, out, images=images), out


def test_pdf_opens(written):
    path, out = written
    data = path.read_bytes()
    assert is_pdf(data)
    assert b"/Title" in data                            # document information dictionary
    assert sorted(x.name for x in out.iterdir()) == ["report.pdf"]   # no temp file left


def test_pdf_pages_lot_pages_and_index_by_default(lot, written):
    # Documented layout: BASE_LOT_PAGES = 7 lot pages (cover, slot profile, tables, contact
    # sheet, fit quality, index of wafers, provenance) and no per-wafer page by default
    # (filmmap's own); wafer_pages=True swaps the index for one page per wafer.
    ds, view, _ = lot
    data = written[0].read_bytes()
    assert BASE_LOT_PAGES == 7
    # this lot has failed sites: + 1 evidence page
    assert lot_page_count(view, ds) == BASE_LOT_PAGES + 1
    assert pages_in(data) == BASE_LOT_PAGES + 1
    plan = pdf_page_plan(view, ds)
    assert [p.kind for p in plan] == ["cover", "profile", "tables", "contact", "fitq",
                                      "evidence", "index", "provenance"]
    index_rows = [t for _, t in plan[6].lines if t.startswith(("W0", "W1", "EV"))]
    assert len(index_rows) == len(view.wafers)                   # every wafer in the index
    plan = pdf_page_plan(view, ds, wafer_pages=True)
    assert [p.kind for p in plan] == ["cover", "profile", "tables", "contact", "fitq",
                                      "evidence", "provenance"] + ["wafer"] * 8
    assert [p.wafer.wafer for p in plan if p.kind == "wafer"] == [w.wafer for w in view.wafers]
    cover = [t for _, t in plan[0].lines]
    # the decision heads page 1; the cautions follow (the only copy in the PDF)
    assert cover[0].startswith("Decision: ")
    assert "Cautions" in cover and view.verdict.startswith(cover[cover.index("Verdict") + 1][:40])


def test_wafer_pages_on_request(lot, tmp_path):
    ds, view, images = lot
    data = write_pdf_report(view, ds, tmp_path, images=images, wafer_pages=True).read_bytes()
    assert pages_in(data) == BASE_LOT_PAGES + len(view.wafers)   # - index + evidence


def test_advice_and_long_sections_continue_with_exact_count(tmp_path):
    # Advice adds one page (the cautions stay on page 1 only); many failed sites overflow the fit-quality
    # page onto continuation pages with the table header repeated, and lot_page_count still
    # equals the pages written (filmmap's own layout). Maps are not rendered here
    # (render_missing=False): the wafer pages then say why there is no map.
    ds = make_lot(9, slots=range(4, 10), n_sites=25, failed={0: 24, 1: 24, 2: 24, 3: 20})
    view = lot_view(ds, make_config())
    assert len(view.failed_sites) == 92
    advice = {"wet step": {"minutes": 117.5}, "zone trims": [{"zone": "load", "offset_C": 1.0}]}
    plan = pdf_page_plan(view, ds, advice)
    n_lot = lot_page_count(view, ds, advice)
    assert lot_page_count(view, ds) == n_lot - 1
    assert n_lot > BASE_LOT_PAGES + 1
    advice_page = next(p for p in plan if p.kind == "advice")
    assert not any("Cautions" in text for _, text in advice_page.lines)   # once, on page 1
    assert any("117.5" in text for _, text in advice_page.lines)
    cont = [p for p in plan if p.title == "Fit quality (continued)"]
    assert cont and all(p.lines[0][0] == "mh" for p in cont)        # header repeated
    rows = sum(1 for p in plan if p.title.startswith("Fit quality")
               for s, t in p.lines if s == "m" and t[:1] == "W")
    assert rows == 92                                                # every failed site listed
    images = ReportImages(view, ds, None, dpi=30, render_missing=False)
    data = write_pdf_report(view, ds, tmp_path, images=images, advice=advice).read_bytes()
    assert is_pdf(data) and pages_in(data) == n_lot
    assert images.wafer_map(view.wafers[0].wafer) == (
        None, "the reduce step wrote no map for this wafer")


def test_pdf_write_is_atomic(lot, tmp_path, monkeypatch):
    # A failed write leaves the previous report.pdf untouched and no temporary file
    # (Python documentation, os.replace: atomic rename within one file system).
    ds, view, images = lot
    (tmp_path / "report.pdf").write_bytes(b"%PDF-old")

    def boom(*args, **kwargs):
        raise RuntimeError("disk full")

    monkeypatch.setattr(pdfmod, "_render_page", boom)
    with pytest.raises(RuntimeError):
        write_pdf_report(view, ds, tmp_path, images=images)
    assert (tmp_path / "report.pdf").read_bytes() == b"%PDF-old"
    assert sorted(x.name for x in tmp_path.iterdir()) == ["report.pdf"]


def test_page_one_text_holds_the_decision(lot, tmp_path):
    # Text extracted from page 1 with pdftotext (poppler-utils, installed by .ci/run):
    # the decision block with its rule and the next-run sentence head the first page.
    import shutil
    import subprocess

    from test_report_html import standard_advice

    if shutil.which("pdftotext") is None:
        pytest.skip("pdftotext (Debian package poppler-utils) is not installed; "
                    ".ci/run installs it")
    ds, view, images = lot
    path = write_pdf_report(view, ds, tmp_path, images=images, advice=standard_advice())
    page1 = subprocess.run(["pdftotext", "-f", "1", "-l", "1", "-layout", str(path), "-"],
                           check=True, capture_output=True, text=True).stdout
    head = page1.strip().splitlines()
    assert head[0].strip().startswith("Lot ") and head[1].strip().startswith("Decision: ")
    flat = " ".join(page1.split())
    assert "Rule: out of spec (hold)" in flat
    assert "Next run: Set wet to 116.5 min (now 115.0 min, +1.3 %" in flat
    assert flat.index("Decision: ") < flat.index("Cautions") < flat.index("Warnings")


def test_page_images_are_written_as_pages_complete(tmp_path):
    # report.pdf memory: each page's images go to the file when the page is done (not all
    # at close), and every page still shows its own image (poppler's pdftoppm reads it back)
    import shutil
    import subprocess

    import numpy as np
    from matplotlib.backends.backend_pdf import PdfPages
    from matplotlib.figure import Figure

    from filmmap.report.pdf import _write_page_images_now

    colours = [(255, 0, 0), (0, 160, 0), (0, 0, 255)]
    path = tmp_path / "pages.pdf"
    with PdfPages(path) as pdf:
        for page, c in enumerate(colours, start=1):
            fig = Figure(figsize=(2, 2))
            ax = fig.add_axes((0, 0, 1, 1))
            ax.imshow(np.full((20, 20, 3), c, dtype=np.uint8), interpolation="none")
            ax.set_axis_off()
            pdf.savefig(fig)
            _write_page_images_now(pdf)
            # one written entry per page so far, none held back as a live image
            keys = list(pdf._file._images)
            assert len(keys) == page and all(isinstance(k, tuple) for k in keys), keys
    data = path.read_bytes()
    assert data.count(b"/Subtype /Image") == len(colours)
    if shutil.which("pdftoppm") is None:
        pytest.skip("pdftoppm (poppler) not installed: pages not rasterised")
    subprocess.run(["pdftoppm", "-r", "20", str(path), str(tmp_path / "p")], check=True)
    pages = sorted(tmp_path.glob("p*.ppm"))
    assert len(pages) == len(colours)
    for page, c in zip(pages, colours):
        raw = page.read_bytes()
        # binary PPM: "P6\nW H\n255\n" then RGB bytes; the centre pixel
        parts = raw.split(b"\n", 3)
        w, h = map(int, parts[1].split())
        pix = np.frombuffer(parts[3], dtype=np.uint8).reshape(h, w, 3)
        assert tuple(int(v) for v in pix[h // 2, w // 2]) == c
