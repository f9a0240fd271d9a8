"""report.pdf: a valid PDF, the documented lot pages then one page per wafer, written atomically.

Sources beside each check: a standard or paper, or "common practice, no source".
"""

import re

import pytest

import filmmap.report.pdf as pdfmod
from filmmap.report import (BASE_LOT_PAGES, ReportImages, lot_page_count, lot_view,
                            pdf_page_plan, write_pdf_report)
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


def test_pdf_pages_lot_then_one_per_wafer(lot, written):
    # Documented layout: BASE_LOT_PAGES = 6 lot pages (cover, slot profile, tables, contact
    # sheet, fit quality, provenance) for a small lot, then one page per wafer (filmmap's own).
    ds, view, _ = lot
    data = written[0].read_bytes()
    assert BASE_LOT_PAGES == 6
    assert lot_page_count(view, ds) == BASE_LOT_PAGES
    assert pages_in(data) == BASE_LOT_PAGES + len(view.wafers) == 14
    plan = pdf_page_plan(view, ds)
    assert [p.kind for p in plan] == ["cover", "profile", "tables", "contact", "fitq",
                                      "provenance"] + ["wafer"] * 8
    assert [p.wafer.wafer for p in plan if p.kind == "wafer"] == [w.wafer for w in view.wafers]
    cover = [t for _, t in plan[0].lines]
    assert "Cautions" in cover and view.verdict.startswith(cover[cover.index("Verdict") + 1][:40])


def test_advice_and_long_sections_continue_with_exact_count(tmp_path):
    # Advice adds one page (with the cautions); many failed sites overflow the fit-quality
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
    assert any("Cautions" in text for _, text in advice_page.lines)
    cont = [p for p in plan if p.title == "Fit quality (continued)"]
    assert cont and all(p.lines[0][0] == "mh" for p in cont)        # header repeated
    rows = sum(1 for p in plan if p.title.startswith("Fit quality")
               for s, t in p.lines if s == "m" and t[:1] == "W")
    assert rows == 92                                                # every failed site listed
    images = ReportImages(view, ds, None, dpi=30, render_missing=False)
    data = write_pdf_report(view, ds, tmp_path, images=images, advice=advice).read_bytes()
    assert is_pdf(data) and pages_in(data) == n_lot + len(view.wafers)
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
        for c in colours:
            fig = Figure(figsize=(2, 2))
            ax = fig.add_axes((0, 0, 1, 1))
            ax.imshow(np.full((20, 20, 3), c, dtype=np.uint8), interpolation="none")
            ax.set_axis_off()
            pdf.savefig(fig)
            _write_page_images_now(pdf)
            assert all(isinstance(k, tuple) for k in pdf._file._images)   # none held back
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


def test_big_images_are_reduced_to_the_page_resolution():
    # a 4000 x 3000 px sheet drawn 7 in wide is kept at PAGE_IMAGE_DPI (8-bit RGBA), and the
    # size it is drawn at still comes from the stored PNG
    import io

    import numpy as np
    from PIL import Image

    from filmmap.figures_out import CONTACT_SHEET_MAX_IN, contact_panel_in
    from filmmap.report.pdf import PAGE_IMAGE_DPI, _page_image

    buf = io.BytesIO()
    Image.fromarray(np.full((3000, 4000, 3), 200, dtype=np.uint8)).save(buf, format="PNG")
    img, size = _page_image(buf.getvalue(), 7.0, 9.0)
    assert size == (4000, 3000)
    assert img.dtype == np.uint8 and img.shape[2] == 4
    assert img.shape[1] <= 7.0 * PAGE_IMAGE_DPI and img.shape[0] <= 5.25 * PAGE_IMAGE_DPI + 1
    assert img.shape[1] >= 7.0 * PAGE_IMAGE_DPI - 2          # not reduced further than needed
    small = io.BytesIO()
    Image.fromarray(np.zeros((50, 80, 3), dtype=np.uint8)).save(small, format="PNG")
    assert _page_image(small.getvalue(), 7.0, 9.0)[0].shape[:2] == (50, 80)   # kept as is
    # the contact sheet of a big lot stays within its largest side
    for n in (1, 44, 300, 1200):
        cols = int(np.ceil(np.sqrt(n)))
        assert cols * contact_panel_in(n) <= CONTACT_SHEET_MAX_IN + 1e-9
    assert contact_panel_in(44) == 2.0
