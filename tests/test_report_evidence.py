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


# ------------------------------------------------- evidence without --keep-spectra

def test_evidence_rows_take_each_cause_in_turn_then_suspects_then_worst_accepted():
    from filmmap.lotstats.evidence import evidence_rows

    rng = np.random.default_rng(3)
    n = 400
    ok = np.ones(n, bool)
    note = np.full(n, "", dtype=object)
    quality = rng.uniform(0.5, 1.5, n)
    causes = {"wrong stack": np.arange(0, 30), "no film signal": np.arange(30, 50),
              "ambiguous": np.arange(50, 53)}
    for cause, rows in causes.items():
        ok[rows] = False
        note[rows] = [f"{cause}: invented {k}" for k in rows]
        quality[rows] = rng.uniform(20, 90, rows.size)
    suspect = np.zeros(n, bool)
    suspect[[100, 101]] = True
    quality[[100, 101]] = [15.0, 12.0]
    rows = evidence_rows(ok, suspect, note, quality, limit=12, n_worst_accepted=3)
    assert len(rows) == len(set(rows.tolist())) == 15
    # causes with more sites first, each worst first, then the suspect sites, in turn
    first_round = rows[:4]
    assert [note[k].split(":")[0] for k in first_round[:3]] == list(causes)
    assert first_round[3] == 100                      # the worse suspect site
    for cause, members in causes.items():
        taken = [k for k in rows if k in members]
        assert taken == sorted(members, key=lambda k: -quality[k])[:len(taken)]
    good = np.flatnonzero(ok & ~suspect)
    assert list(rows[-3:]) == list(good[np.argsort(-quality[good])][:3])


def test_batches_keep_the_spectra_the_lot_chooses():
    # the lot's evidence is chosen after its batches are fitted (suspect flags need the
    # lot's median): what each batch keeps must hold the lot's choice
    from filmmap.lotstats.evidence import batch_evidence_rows, evidence_rows
    from filmmap.fitting.suspect import flag_suspects

    rng = np.random.default_rng(11)
    n = 3 * 49 * 50
    ok = rng.uniform(size=n) > 0.02
    causes = np.array(["wrong stack", "no film signal", "ambiguous", "did not converge"])
    note = np.where(ok, "", np.char.add(rng.choice(causes, n), ": invented"))
    quality = np.where(ok, rng.lognormal(0.0, 0.4, n), rng.uniform(5, 500, n))
    quality[rng.choice(np.flatnonzero(ok), 30, replace=False)] = 40.0 + np.arange(30)
    suspect, _ = flag_suspects(quality, ok)
    assert suspect.sum() == 30
    batches = np.array_split(np.arange(n), 3)
    kept = np.concatenate([b[batch_evidence_rows(ok[b], note[b], quality[b])] for b in batches])
    chosen = evidence_rows(ok, suspect, note, quality)
    assert set(chosen.tolist()) <= set(kept.tolist())
    assert len(kept) < n / 10                          # a few, never every spectrum


def _lot_on_disk(folder, n_wafers=3):
    """An invented lot (CSV spectra of 1 um oxide on Si): wafer 0 site 5 flat near zero
    (the probe off the wafer), wafer 1 site 9 with its fringes halved (a particle)."""
    from filmmap.optics import Layer, Stack
    from filmmap.wafermap.sites import polar_sites

    wl = np.arange(400.0, 1000.5, 2.0)
    stack = Stack("Si", [Layer("SiO2", 1000.0)])
    pat = polar_sites(49, 150.0, 4.0)
    rng = np.random.default_rng(5)
    header = ",".join(["wafer", "slot", "site", "x_mm", "y_mm"] + [f"R@{w:g}" for w in wl])
    folder.mkdir(parents=True)
    for i in range(n_wafers):
        d = rng.uniform(980, 1020, 49)
        R = stack.reflectance(wl, thickness_nm=[d[:, None]])
        R = R * (1 + 0.003 * rng.standard_normal(R.shape))
        if i == 0:
            R[5] = 0.002 + 0.0005 * rng.standard_normal(wl.size)
        if i == 1:
            R[9] = R[9].mean() + 0.5 * (R[9] - R[9].mean())
        rows = [f"W{i},{i + 1},{pat.site[k]},{pat.x_mm[k]:.2f},{pat.y_mm[k]:.2f},"
                + ",".join(f"{v:.5f}" for v in R[k]) for k in range(49)]
        (folder / f"W{i}.csv").write_text(header + "\n" + "\n".join(rows) + "\n")
    (folder / "lot.toml").write_text('[lot]\nid = "EVID-1"\n[measurement]\n'
                                     'technique = "reflectance"\nfiles = ["*.csv"]\n'
                                     '[stack]\nsubstrate = "Si"\n[[stack.layer]]\n'
                                     'material = "SiO2"\nsearch_nm = [5, 3000]\n'
                                     f'[boat]\nslots = {n_wafers}\n')
    return folder / "lot.toml"


def test_overlays_are_drawn_without_keep_spectra(tmp_path):
    # issue 14 item 3: the evidence works without --keep-spectra; only the evidence
    # sites' spectra are kept, not the lot's
    from filmmap.lotstats.evidence import EVIDENCE_SITES, N_WORST_ACCEPTED
    from filmmap.pipeline import reduce_to_folder
    from filmmap.wafermap.sites import polar_sites

    lot = _lot_on_disk(tmp_path / "lot")
    reduction, _, _ = reduce_to_folder(lot, tmp_path / "out", workers=1, figures=False,
                                       keep_spectra=False)
    out = tmp_path / "out"
    assert not (out / "spectra.nc").exists()
    assert reduction.sites.measured_spectra is None
    ev = reduction.evidence
    assert 0 < len(ev.rows) <= EVIDENCE_SITES + N_WORST_ACCEPTED
    s = reduction.sites
    bad = np.flatnonzero(~s.ok | s.suspect)
    flat_site = int(polar_sites(49, 150.0, 4.0).site[5])
    flat = int(np.flatnonzero((s.wafer == "W0") & (s.site == flat_site))[0])
    assert flat in bad                                 # the probe-off site did not fit
    assert set(bad.tolist()) <= set(ev.rows.tolist())  # every bad site's spectra kept
    # the kept measured spectrum is the file's flat one
    assert np.all(ev.measured[list(ev.rows).index(flat)] < 0.01)
    html = (out / "report.html").read_text(encoding="utf-8")
    section = html[html.index('id="evidence"'):]
    section = section[:section.index("</section>")]
    assert "evidence-spectra" in section and "--keep-spectra" not in section
    assert "flat measured spectrum" in section
