"""report.html: well-formed, self-contained, escaped, with the slot profile and the cautions.

Sources beside each check: a standard or paper, or "common practice, no source".
"""

import base64
import html
import re
from html.parser import HTMLParser

import pytest

from filmmap.report import CAUTION_PARAGRAPHS, render_html, write_html_report
from filmmap.report.html import SLOT_PROFILE_IMG_ID
from test_report_lotview import EVIL_LOT, EVIL_WAFER, shared_lot
VOID = {"area", "base", "br", "col", "embed", "hr", "img", "input", "link", "meta", "source",
        "track", "wbr"}
DATA_URI = re.compile(r"data:image/png;base64,[A-Za-z0-9+/=]+")


class StrictChecker(HTMLParser):
    """Balanced-tag checker: every non-void element closed, in order (HTML Living Standard,
    section 13.1.2: void elements have no end tag)."""

    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.stack, self.errors, self.text = [], [], []
        self.tags, self.decl = [], []

    def handle_decl(self, decl):
        self.decl.append(decl)

    def handle_starttag(self, tag, attrs):
        self.tags.append((tag, dict(attrs)))
        if tag not in VOID:
            self.stack.append(tag)

    def handle_startendtag(self, tag, attrs):
        self.tags.append((tag, dict(attrs)))
        if tag not in VOID:
            self.errors.append(f"self-closed non-void <{tag}/>")

    def handle_endtag(self, tag):
        if tag in VOID:
            self.errors.append(f"end tag for void element </{tag}>")
        elif not self.stack or self.stack[-1] != tag:
            self.errors.append(f"</{tag}> closes {self.stack[-1] if self.stack else 'nothing'}")
        else:
            self.stack.pop()

    def handle_data(self, data):
        self.text.append(data)


def check(text):
    p = StrictChecker()
    p.feed(text)
    p.close()
    return p


@pytest.fixture(scope="module")
def report(tmp_path_factory):
    ds, _, view, images = shared_lot()
    out = tmp_path_factory.mktemp("html")
    advice = {"step <wet>": {"minutes": 117.5, "clipped": False}, "zone trims": [1.5, None]}
    path = write_html_report(view, ds, out, images=images, advice=advice)
    plain = render_html(view, ds, images=images)
    return path.read_text("utf-8"), plain, view, out


def test_html_is_well_formed(report):
    # Balanced tags for a strict parser; a doctype and one html root (HTML Living Standard).
    text, plain, _, _ = report
    for t in (text, plain):
        p = check(t)
        assert not p.errors, p.errors[:5]
        assert not p.stack
        assert p.decl and p.decl[0].lower() == "doctype html"
        assert [tag for tag, _ in p.tags].count("html") == 1


def test_html_has_no_external_references(report):
    # One self-contained file: images as data: URIs, CSS inline, nothing fetched from
    # anywhere (common practice, no source).
    text, _, _, out = report
    p = check(text)
    stripped = DATA_URI.sub("", text)
    assert "http" not in stripped.lower()
    assert "url(" not in stripped and "@import" not in stripped
    for tag, attrs in p.tags:
        assert tag not in ("script", "link", "iframe", "object", "embed", "base")
        if "src" in attrs:
            assert attrs["src"].startswith("data:image/png;base64,"), (tag, attrs["src"][:40])
        if "href" in attrs:
            assert attrs["href"].startswith("#")
    ids = {a["id"] for _, a in p.tags if "id" in a}
    assert {a["href"][1:] for _, a in p.tags if "href" in a} <= ids   # anchors resolve
    assert len(re.findall(r"\bsrc=", stripped)) == len(DATA_URI.findall(text))
    assert sorted(x.name for x in out.iterdir()) == ["report.html"]   # atomic, no temp left


def test_html_contains_slot_profile_image(report):
    # The slot-profile plot is embedded as a PNG (PNG signature, ISO/IEC 15948).
    text, _, _, _ = report
    imgs = [a for tag, a in check(text).tags if tag == "img"]
    prof = [a for a in imgs if a.get("id") == SLOT_PROFILE_IMG_ID]
    assert len(prof) == 1
    assert "slot profile" in prof[0]["alt"].lower()
    data = base64.b64decode(prof[0]["src"].split(",", 1)[1])
    # a blank canvas of that size is 1 kB as PNG, this plot 4.8 kB at 40 dpi
    assert data[:8] == b"\x89PNG\r\n\x1a\n" and len(data) > 2000
    # contact sheet, fit-quality histogram and 8 wafer maps are images too
    assert len(imgs) == 1 + 1 + 1 + 8
    assert all(a.get("alt") for a in imgs)


def test_html_contains_cautions_and_sections(report):
    # The cautions are shown in full (filmmap's safety text, one constant).
    text, plain, view, _ = report
    words = " ".join(check(text).text)
    assert len(CAUTION_PARAGRAPHS) >= 2                 # the loop below checks something
    for para in CAUTION_PARAGRAPHS:
        assert para in words
    for anchor in ("profile", "wtw", "wiw", "contact", "wafers", "fit", "warnings", "advice",
                   "provenance", "cautions", "verdict"):
        assert f'id="{anchor}"' in text
    assert 'id="advice"' not in plain                   # advice only when given
    assert view.verdict in words
    assert "edge slots at the load end: 4, 5" in words
    # models and their sources; the growth model only with advice (Deal & Grove 1965)
    for src in ("Born and E. Wolf", "Azzam", "Malitson", "Green", "Marquardt", "Noll", "Hampel"):
        assert src in words
    assert "Deal and A. S. Grove" in words and "Deal and A. S. Grove" not in plain
    # provenance: every input file with its hash
    assert "ab" * 32 in text and "lot.toml" in words
    # failed sites listed with their notes: 2 on the evil wafer, 9 on W10
    assert "Failed sites (11 of 104 measured)" in words


def test_input_texts_are_escaped(report):
    # Text from input files is data, never markup (OWASP XSS prevention: escape on output).
    text, _, _, _ = report
    p = check(text)
    assert "<script" not in text.lower()
    assert EVIL_WAFER not in text and EVIL_LOT not in text
    assert html.escape(EVIL_WAFER, quote=True) in text
    assert html.escape(EVIL_LOT, quote=True) in text
    assert "&lt;b&gt;bad&lt;/b&gt; &amp; &#x27;odd&#x27;" in text
    assert "step &lt;wet&gt;" in text
    words = "".join(p.text)
    assert EVIL_WAFER in words and EVIL_LOT in words      # shown as text, unchanged
    assert [t for t, _ in p.tags].count("b") == 0          # no tag smuggled in
    # attributes too: the alt text of the evil wafer's map
    alts = [a["alt"] for t, a in p.tags if t == "img"]
    assert any(EVIL_WAFER in a for a in alts)


def test_failed_numbers_shown_as_failed(report):
    # A wafer with 4 usable sites is left out and its missing verdict says why; a number that
    # cannot be computed is never invented (common practice, no source).
    text, _, view, _ = report
    w10 = next(w for w in view.wafers if w.wafer == "W10")
    assert w10.excluded and w10.sites_used == 4
    words = " ".join(check(text).text)
    assert "— (too few sites)" in words
    assert "only 4 usable sites, fewer than 5" in words


def test_streamed_file_equals_the_rendered_string(report):
    # report.html is written part by part (memory of one wafer section); the file must be
    # the same page as render_html's string, but for the report-creation time
    import re

    text, _, view, out = report
    ds, _, view, images = shared_lot()
    advice = {"step <wet>": {"minutes": 117.5, "clipped": False}, "zone trims": [1.5, None]}
    again = render_html(view, ds, images=images, advice=advice)

    def stamp(s):
        return re.sub(r"\d{4}-\d\d-\d\dT\d\d:\d\d:\d\d[+\-]\d\d:\d\d", "T", s)
    assert stamp(text) == stamp(again)
    # a whole page with its images (measured 130 kB), not a truncated head
    assert len(text) > 10000 and text.endswith("</html>\n")


def standard_advice():
    """An advice dict with the pinned keys of filmmap.growth.advice (values invented)."""
    from test_report_decision import ADVICE

    slots = range(4, 12)
    return dict(ADVICE, predicted_nm_by_slot_now={str(s): 990.0 + s for s in slots},
                predicted_nm_by_slot_next={str(s): 998.0 + 0.3 * s for s in slots},
                effective_offset_C_by_slot={str(s): -2.0 + 0.1 * s for s in slots},
                warnings=["the zones explain <50 %> of the profile"],
                caution="Advisory only: approve before use.")


def test_decision_block_heads_the_page_and_advice_is_readable(tmp_path):
    # The decision comes before any other section; the advice is tables and a plot, not a
    # dump of the advice keys; the cautions appear once (filmmap's own layout).
    ds, _, view, images = shared_lot()
    text = write_html_report(view, ds, tmp_path, images=images,
                             advice=standard_advice()).read_text("utf-8")
    p = check(text)
    assert not p.errors, p.errors[:5]
    ids = [a["id"] for _, a in p.tags if "id" in a]
    assert ids.index("decision") < ids.index("advice") < ids.index("profile")
    decision_html = text[text.index('id="decision"'):text.index("</section>",
                                                                 text.index('id="decision"'))]
    # the shared lot has slots 4 and 5 3 % thin against a 2 % spec: out of spec, held
    assert '<span class="status">HOLD</span> lot out of spec' in decision_html
    assert "Set wet to 116.5 min" in decision_html and "Rule:" in decision_html
    advice_html = text[text.index('id="advice"'):]
    advice_html = advice_html[:advice_html.index("</section>")]
    assert "zone_offsets_C" not in advice_html and "predicted_nm_by_slot" not in advice_html
    assert "<details><summary>Per-slot numbers (8 slots)</summary>" in advice_html
    assert 'id="advice-profile"' in advice_html                  # predicted-profile plot
    assert "&lt;50 %&gt;" in advice_html                          # warnings escaped
    words = " ".join(p.text)
    for para in CAUTION_PARAGRAPHS:
        assert words.count(para) == 1
    assert words.count("Advisory only: approve before use.") == 1
