"""Evidence for failed and suspect sites: which sites, their overlays, and the words for them.

The failure shapes (a particle scales the fringes down, a probe off the wafer gives a flat
spectrum, a scale error the right shape at another level) are thin-film reflectometry
common practice, no source; the spectra here are synthetic two-beam fringes.
"""

import numpy as np
import pytest
import xarray as xr

from filmmap.lotstats import lot_view
from filmmap.report import ReportImages, render_html
from filmmap.report.evidence import (MAX_ON_PAGE, WORST_ACCEPTED, evidence_figure,
                                     evidence_sites, shape_hint, write_evidence_pdf)
from test_report_lotview import make_config, make_lot

WL = np.linspace(400.0, 1000.0, 301)
KINDS = ("no film signal", "wrong stack", "ambiguous", "at search bound", "did not converge")


def fringes(thickness_nm=600.0):
    """Two-beam reflectance of a 600 nm oxide on Si (n 1.46 on 3.9), a fraction."""
    r1, r2 = (1 - 1.46) / (1 + 1.46), (1.46 - 3.9) / (1.46 + 3.9)
    phase = 4 * np.pi * 1.46 * thickness_nm / WL
    return (r1 ** 2 + r2 ** 2 + 2 * r1 * r2 * np.cos(phase)) / (
        1 + r1 ** 2 * r2 ** 2 + 2 * r1 * r2 * np.cos(phase))


def lot_with_kinds(n_per_kind=3):
    """A lot whose failed sites carry each failure kind, two suspect sites, and spectra."""
    ds = make_lot(11, failed={i: n_per_kind for i in range(len(KINDS))})
    notes = ds["fit_note"].values.astype(object)
    q = ds["fit_quality"].values.copy()
    for i, kind in enumerate(KINDS):
        cols = np.flatnonzero(~ds["fit_ok"].values[i])
        for r, j in enumerate(cols):
            notes[i, j] = f"{kind}: invented reason {r}"
            q[i, j] = 50.0 + 10 * r + i
    suspect = np.zeros(notes.shape, np.int8)
    suspect[6, 0] = suspect[7, 1] = 1
    notes[6, 0] = notes[7, 1] = "suspect: fit quality 9 is 9 x the lot's median"
    ds["fit_note"] = (("wafer", "site"), notes.astype(str))
    ds["fit_quality"] = (("wafer", "site"), q)
    ds["suspect"] = (("wafer", "site"), suspect)
    ds["thickness_unchecked"] = (("wafer", "site"), np.full(notes.shape, 600.0))
    W, S = notes.shape
    model = np.broadcast_to(fringes(), (W, S, WL.size)).copy()
    meas = model + 0.001 * np.random.default_rng(0).standard_normal(model.shape)
    meas[0] = 0.002                                    # no film signal: flat near zero
    meas[1] = 0.5 * model[1]                           # a particle: fringes scaled down
    meas[2] = model[2] + 0.08                          # a scale error: right shape, higher
    spectra = xr.Dataset(
        {"measured": (("wafer", "site", "point"), meas),
         "model": (("wafer", "site", "point"), model),
         "residual": (("wafer", "site", "point"), meas - model)},
        coords={"wafer": ds["wafer"].values, "site": ds["site"].values,
                "wavelength_nm": ("point", WL), "quantity": ("point", np.array(["R"] * WL.size))})
    return ds, spectra


@pytest.fixture(scope="module")
def lot():
    ds, spectra = lot_with_kinds()
    return ds, spectra, lot_view(ds, make_config())


def test_every_failure_kind_is_shown_before_a_second_of_any(lot):
    ds, _, view = lot
    sites, n_bad = evidence_sites(view, ds)
    assert n_bad == 3 * len(KINDS) + 2
    assert len(sites) == MAX_ON_PAGE
    first = [s.kind for s in sites[:len(KINDS) + 1]]
    assert sorted(first) == sorted(KINDS + ("suspect",))
    # within a kind the worst fit comes first (highest fit quality)
    for kind in KINDS:
        q = [s.fit_quality for s in sites if s.kind == kind]
        assert q == sorted(q, reverse=True)
    assert all(s.verdict == "failed" for s in sites if s.kind in KINDS)


def test_worst_accepted_sites_fill_the_room_left():
    ds, _ = lot_with_kinds(n_per_kind=1)
    view = lot_view(ds, make_config())
    sites, n_bad = evidence_sites(view, ds)
    assert n_bad == len(KINDS) + 2
    tail = sites[n_bad:]
    assert tail and all(s.kind == WORST_ACCEPTED and s.verdict == "accepted" for s in tail)
    q = np.where(ds["fit_ok"].values & (ds["suspect"].values == 0), ds["fit_quality"].values,
                 -np.inf)
    assert tail[0].fit_quality == pytest.approx(q.max())


@pytest.mark.parametrize("make, words", [
    (lambda m: np.full_like(m, 0.002), "flat measured spectrum"),
    (lambda m: 0.5 * m, "amplitude 0.50 x"),
    (lambda m: m + 0.08, "level"),
    (lambda m: m[::-1], "shape differs"),
    (lambda m: m + 1e-4 * np.sin(WL), "follow the model"),
])
def test_shape_hint_names_each_failure_shape(make, words):
    model = fringes()
    assert words in shape_hint(make(model), model)


def test_evidence_figure_draws_each_kind_with_its_verdict(lot):
    ds, spectra, view = lot
    sites, _ = evidence_sites(view, ds)
    fig, hints = evidence_figure(sites, spectra, dpi=40)
    titles = [ax.get_title(loc="left") for ax in fig.axes if ax.get_title(loc="left")]
    assert len(titles) == len(sites)
    for kind in KINDS:
        assert any(f"failed: {kind}" in t for t in titles)
    assert any("suspect: suspect" in t for t in titles)
    by_wafer = {s.wafer: h for s, h in zip(sites, hints)}
    assert "flat" in by_wafer["W04"] and "amplitude 0.50" in by_wafer["W05"]
    assert "level" in by_wafer["W06"]
    # each panel has a spectrum (2 lines: measured, model) over a residual axis
    spectrum_axes = [ax for ax in fig.axes if ax.get_title(loc="left")]
    assert all(len(ax.lines) == 2 for ax in spectrum_axes)


def test_without_spectra_the_report_says_how_to_get_them(lot):
    ds, _, view = lot
    text = render_html(view, ds, images=ReportImages(view, ds, None, dpi=30))
    section = text[text.index('id="evidence"'):]
    section = section[:section.index("</section>")]
    assert "--keep-spectra" in section and "evidence-spectra" not in section
    for kind in KINDS:
        assert kind in section                         # the sites are still listed


def test_evidence_pdf_holds_every_bad_site(lot, tmp_path):
    from filmmap.report.evidence import PER_PAGE, all_bad_sites

    ds, spectra, view = lot
    sites = all_bad_sites(view, ds)
    assert len(sites) == 3 * len(KINDS) + 2
    data = write_evidence_pdf(sites, spectra, tmp_path / "evidence.pdf").read_bytes()
    import re
    pages = len(re.findall(rb"/Type\s*/Page(?!s)", data))    # ISO 32000-1, 7.7.3.3
    assert pages == -(-len(sites) // PER_PAGE)
