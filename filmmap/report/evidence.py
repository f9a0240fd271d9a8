"""Evidence for failed and suspect sites: measured against model spectra, with residuals.

A measured-vs-model overlay explains at a glance why a site failed: a particle gives the
right fringes scaled down, a probe off the wafer a flat spectrum near zero, a scale
error the right shape at the wrong level. `evidence_sites` picks the sites to show - the
worst of each cause (the text of ``fit_note`` before its first ':'), the suspect sites
and the worst-fitting accepted sites - taking them in turn from each cause so that every
kind of failure is seen, at most `MAX_ON_PAGE` on the report page. `evidence_figure`
draws them as small multiples (spectrum above, residual below); `shape_hint` puts the
overlay into words.

The spectra come from spectra.nc (``reduce --keep-spectra``: every site's measured and
model spectra, model at the unchecked best fit) or, without it, from the few a reduction
keeps for the evidence (`kept_spectra`; `filmmap.lotstats.evidence.evidence_rows`: the
failed, suspect and worst-fitting sites). Without either the report lists the sites and
says how to get the overlays.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure

from filmmap.bridge import site_grid
from filmmap.lotstats.evidence import take_in_turn
from filmmap.lotstats.causes import failure_cause
from filmmap.report.slotplot import COLOURS

#: Most evidence panels on the report page (the rest go to evidence.pdf).
MAX_ON_PAGE = 12

#: Panels per page of evidence.pdf.
PER_PAGE = 12

#: Kind of the worst-fitting accepted sites (shown when there is room).
WORST_ACCEPTED = "worst accepted fit"


@dataclass(frozen=True)
class EvidenceSite:
    """A site shown with its spectra.

    Attributes
    ----------
    wafer : str
    slot, site : int
    kind : str
        The cause (text of the fit note before its first ':'), ``"suspect"`` or
        `WORST_ACCEPTED`.
    verdict : str
        ``"failed"``, ``"suspect"`` or ``"accepted"``.
    note : str
        The fitter's full note.
    fit_quality : float
        Reduced chi-square of the unchecked best fit.
    thickness_nm : float
        Best thickness even for a rejected site (``thickness_unchecked``), nm; NaN when none.
    """

    wafer: str
    slot: int
    site: int
    kind: str
    verdict: str
    note: str
    fit_quality: float
    thickness_nm: float


_cause = failure_cause


def candidate_sites(view, ds, n_worst_accepted=4):
    """Every failed and suspect site, and the worst-fitting accepted ones, grouped by kind.

    Parameters
    ----------
    view : LotView
    ds : xarray.Dataset
        The lot dataset (``thickness_unchecked`` and ``fit_quality`` when present).
    n_worst_accepted : int
        Accepted, not suspect sites with the highest fit quality to add.

    Returns
    -------
    dict {kind: list of EvidenceSite}, each list worst (highest fit quality) first.
    """
    grid = site_grid(ds)
    wafer_index, site_index = grid.wafer_index(), grid.site_index()
    unchecked = grid.thickness_unchecked_nm

    def thick(f):
        if unchecked is None:
            return math.nan
        return float(unchecked[wafer_index[f.wafer], site_index[f.site]])

    groups = {}
    for f in view.failed_sites:
        groups.setdefault(_cause(f.note), []).append(EvidenceSite(
            f.wafer, f.slot, f.site, _cause(f.note), "failed", f.note, f.fit_quality, thick(f)))
    for f in view.suspect_sites:
        groups.setdefault("suspect", []).append(EvidenceSite(
            f.wafer, f.slot, f.site, "suspect", "suspect", f.note, f.fit_quality, thick(f)))
    if n_worst_accepted:
        q = grid.fit_quality            # NaN throughout when the dataset has none
        cand = np.where(grid.fit_ok & ~grid.suspect & np.isfinite(q), q, -np.inf)
        flat = np.argsort(cand, axis=None)[::-1][:n_worst_accepted]
        for k in flat:
            i, j = np.unravel_index(k, cand.shape)
            if not np.isfinite(cand[i, j]):
                break
            groups.setdefault(WORST_ACCEPTED, []).append(EvidenceSite(
                str(grid.wafer[i]), int(grid.slot[i]), int(grid.site[j]),
                WORST_ACCEPTED, "accepted", str(grid.fit_note[i, j]), float(q[i, j]),
                float(unchecked[i, j]) if unchecked is not None else math.nan))
    for kind in groups:
        groups[kind].sort(key=lambda s: -s.fit_quality if math.isfinite(s.fit_quality)
                          else -math.inf)
    return groups


def evidence_sites(view, ds, max_sites=MAX_ON_PAGE):
    """The sites of the report page: in turn the worst of each kind, at most ``max_sites``.

    Failure causes (most sites first) and suspect sites are taken in turn, so that each
    kind of failure is shown before a second site of any kind; the worst accepted fits
    fill the room left.

    Returns
    -------
    (list of EvidenceSite, int)
        The chosen sites and the number of failed plus suspect sites in all.
    """
    groups = candidate_sites(view, ds)
    kinds = sorted((k for k in groups if k not in ("suspect", WORST_ACCEPTED)),
                   key=lambda k: -len(groups[k]))
    kinds += ["suspect"] if "suspect" in groups else []
    chosen = take_in_turn([groups[k] for k in kinds], max_sites)
    # the worst-fitting accepted sites fill what room is left: what a good fit looks like
    chosen += groups.get(WORST_ACCEPTED, [])[:max(0, max_sites - len(chosen))]
    n_bad = sum(len(v) for k, v in groups.items() if k != WORST_ACCEPTED)
    return chosen, n_bad


def all_bad_sites(view, ds):
    """Every failed and suspect site (for evidence.pdf), kind by kind, worst first."""
    groups = candidate_sites(view, ds, n_worst_accepted=0)
    return [s for k in groups for s in groups[k]]


def evidence_pdf_sites(view, ds, spectra):
    """The sites of evidence.pdf and a sentence on them for the report, or ([], "").

    evidence.pdf is written when the lot has more failed and suspect sites than the report
    page shows: all of them with spectra.nc, the ones whose spectra the reduction kept
    otherwise (`kept_spectra`).
    """
    sites = all_bad_sites(view, ds)
    if spectra is None or len(sites) <= MAX_ON_PAGE:
        return [], ""
    if "evidence" not in spectra.dims:
        return sites, "All failed and suspect sites are drawn in evidence.pdf."
    kept = [s for s in sites if site_spectra(spectra, s.wafer, s.site) is not None]
    if len(kept) == len(sites):
        return kept, "All failed and suspect sites are drawn in evidence.pdf."
    return kept, (f"evidence.pdf draws {len(kept)} of the {len(sites)} failed and suspect "
                  "sites (the worst of each cause in turn); reduce --keep-spectra keeps the "
                  "spectra of every site (spectra.nc) and draws them all.")


def kept_spectra(wafer, site, wavelength_nm, measured, model):
    """The spectra of a few sites as a dataset `site_spectra` reads (dimension ``evidence``).

    What a reduction keeps without --keep-spectra (`filmmap.pipeline.reducing.EvidenceSpectra`):
    measured and model spectra of the failed, suspect and worst-fitting sites only.

    Parameters
    ----------
    wafer, site : array_like, shape (k,)
        Wafer id and site number of each row.
    wavelength_nm : array_like, shape (n_wavelengths,)
        Wavelengths, nm.
    measured, model : array_like, shape (k, n_points)
        Reflectance (fraction), or psi then delta (degree): n_points is n_wavelengths or
        twice that.

    Returns
    -------
    xarray.Dataset
        ``measured`` and ``model`` (evidence, point), coordinates ``wafer`` and ``site``
        (evidence), ``wavelength_nm`` and ``quantity`` (point), as in spectra.nc.
    """
    import xarray as xr

    wl = np.asarray(wavelength_nm, dtype=float)
    measured = np.asarray(measured, dtype=float).reshape(len(wafer), -1)
    n = measured.shape[1]
    quantity = ["R"] * wl.size if n == wl.size else ["psi"] * wl.size + ["delta"] * wl.size
    return xr.Dataset(
        {"measured": (("evidence", "point"), measured),
         "model": (("evidence", "point"), np.asarray(model, dtype=float).reshape(measured.shape))},
        coords={"wafer": ("evidence", np.asarray(wafer).astype(str)),
                "site": ("evidence", np.asarray(site)),
                "wavelength_nm": ("point", np.tile(wl, n // max(wl.size, 1))),
                "quantity": ("point", np.array(quantity))})


def site_spectra(spectra, wafer, site):
    """(wavelength nm, quantity, measured, model) of one site, or None.

    ``spectra``: spectra.nc (dimensions wafer, site, point) or `kept_spectra`.
    """
    if "evidence" in spectra.dims:
        hit = np.flatnonzero((spectra["wafer"].values == str(wafer))
                             & (spectra["site"].values == site))
        if not hit.size:
            return None
        sel = spectra.isel(evidence=int(hit[0]))
    else:
        try:
            sel = spectra.sel(wafer=wafer, site=site)
        except (KeyError, ValueError):
            return None
    meas = np.asarray(sel["measured"].values, dtype=float)
    model = np.asarray(sel["model"].values, dtype=float)
    if not np.any(np.isfinite(meas)):
        return None
    return (np.asarray(spectra["wavelength_nm"].values, dtype=float),
            np.asarray(spectra["quantity"].values).astype(str), meas, model)


def shape_hint(measured, model):
    """The overlay in words: flat, right shape at another level, or a shape the model lacks.

    Parameters
    ----------
    measured, model : numpy.ndarray
        One quantity of one site (same points).

    Returns
    -------
    str
        E.g. ``"flat measured spectrum (no fringes): probe off the wafer or no light?"``.
        The thresholds (fringe amplitude below 10 % of the model's; correlation above 0.9
        for "right shape") are common practice, no source.
    """
    m = np.isfinite(measured) & np.isfinite(model)
    if m.sum() < 5:
        return "too few points to compare"
    a, b = measured[m], model[m]
    sa, sb = float(np.std(a)), float(np.std(b))
    if sb > 0 and sa < 0.1 * sb:
        return (f"flat measured spectrum (fringes {sa / sb:.0%} of the model's): "
                "probe off the wafer, no light or no film?")
    if sa == 0 or sb == 0:
        return "no variation to compare"
    r = float(np.corrcoef(a, b)[0, 1])
    ratio = sa / sb
    level = float(np.mean(a) / np.mean(b)) if np.mean(b) else math.nan
    if r > 0.9:
        if abs(ratio - 1) > 0.15:
            return (f"right fringes, amplitude {ratio:.2f} x the model's (particle, haze or "
                    "a scale error?)")
        if math.isfinite(level) and abs(level - 1) > 0.05:
            return f"right shape at {level:.2f} x the model's level (scale or reference error?)"
        return "shape and level follow the model; the misfit is in detail"
    return f"shape differs from the model (correlation {r:.2f}): wrong stack or mixed signal?"


def _panel(ax, rax, site, spectra, fontsize):
    data = site_spectra(spectra, site.wafer, site.site) if spectra is not None else None
    q = f"fit quality {site.fit_quality:.3g}" if math.isfinite(site.fit_quality) else ""
    t = f"best {site.thickness_nm:.1f} nm" if math.isfinite(site.thickness_nm) else ""
    head = (f"{site.wafer} · site {site.site} · slot {site.slot}\n"
            f"{site.verdict}: {site.kind}\n" + ", ".join(x for x in (q, t) if x))
    ax.set_title(head, fontsize=fontsize, loc="left", parse_math=False)
    if data is None:
        ax.text(0.5, 0.5, "no spectrum kept for this site", transform=ax.transAxes,
                ha="center", va="center", fontsize=fontsize, color="0.3")
        ax.set_axis_off()
        rax.set_axis_off()
        return ""
    wl, quantity, meas, model = data
    first = quantity[0]
    sel = quantity == first
    ax.plot(wl[sel], meas[sel], ls="none", marker=".", ms=2.0, color="0.25", label="measured")
    ax.plot(wl[sel], model[sel], lw=1.1, color=COLOURS["product"], label="model")
    ylabel = {"R": "R", "psi": "Ψ (deg)"}.get(first, first)
    ax.set_ylabel(ylabel, fontsize=fontsize - 1)
    ax.tick_params(labelsize=fontsize - 1.5, labelbottom=False)
    for q in dict.fromkeys(quantity):
        s = quantity == q
        rax.plot(wl[s], meas[s] - model[s], lw=0.7,
                 color="0.2" if q == first else COLOURS["edge"], label=q)
    rax.axhline(0.0, color="0.6", lw=0.6)
    rax.set_ylabel("resid.", fontsize=fontsize - 1)
    rax.set_xlabel("wavelength (nm)", fontsize=fontsize - 1)
    rax.tick_params(labelsize=fontsize - 1.5)
    return shape_hint(meas[sel], model[sel])


def evidence_figure(sites, spectra, *, ncols=3, panel_in=(3.3, 2.8), dpi=100, title=None,
                    fontsize=7.5):
    """Small multiples of measured vs model spectra (above) and residuals (below).

    Parameters
    ----------
    sites : sequence of EvidenceSite
    spectra : xarray.Dataset or None
        spectra.nc; None draws the panels' titles with "no spectrum kept".
    ncols : int
        Panels per row.
    panel_in : (float, float)
        Size of one panel in inches.
    dpi : float
    title : str, optional
    fontsize : float

    Returns
    -------
    (matplotlib.figure.Figure, list of str)
        The figure and the `shape_hint` of each site ('' when it has no spectrum).
    """
    n = max(1, len(sites))
    ncols = max(1, min(ncols, n))
    nrows = int(math.ceil(n / ncols))
    head = 0.4 if title else 0.0
    pw, ph = panel_in
    width, height = pw * ncols, ph * nrows + head
    fig = Figure(figsize=(width, height), dpi=dpi)
    FigureCanvasAgg(fig)
    # fixed margins (inches, for the font size): room for the tick labels, the axis labels
    # and the three-line title; a layout engine finding them costs more than the drawing
    em = fontsize / 72.0
    left, right, top, bottom = 6.2 * em, 1.2 * em, 5.2 * em, 4.0 * em
    hints = []
    for k, site in enumerate(sites):
        row, col = divmod(k, ncols)
        x0 = col * pw + left
        w = max(pw - left - right, 0.1)
        y0 = height - head - (row + 1) * ph + bottom
        h = max(ph - top - bottom, 0.1)
        h_resid = h / 3.2                               # spectrum : residual = 2.2 : 1
        ax = fig.add_axes((x0 / width, (y0 + h_resid) / height, w / width,
                           (h - h_resid) / height))
        rax = fig.add_axes((x0 / width, y0 / height, w / width, h_resid / height), sharex=ax)
        hints.append(_panel(ax, rax, site, spectra, fontsize))
    if title:
        fig.suptitle(title, fontsize=fontsize + 2.5, y=1 - 0.08 / height, va="top",
                     parse_math=False)
    return fig, hints


def write_evidence_pdf(sites, spectra, path, *, lot_id=""):
    """All ``sites`` in evidence.pdf, `PER_PAGE` panels a page (written atomically).

    Returns
    -------
    pathlib.Path
    """
    from matplotlib.backends.backend_pdf import PdfPages

    from filmmap.atomic import atomic_path

    pages = [sites[i:i + PER_PAGE] for i in range(0, len(sites), PER_PAGE)]
    with atomic_path(path) as tmp:
        with PdfPages(tmp) as pdf:
            for n, chunk in enumerate(pages, start=1):
                fig, _ = evidence_figure(chunk, spectra, ncols=3, panel_in=(2.7, 2.5),
                                         title=f"Lot {lot_id}: failed and suspect sites, "
                                               f"page {n} of {len(pages)}")
                pdf.savefig(fig)
                fig.clear()
    return path


__all__ = ["EvidenceSite", "MAX_ON_PAGE", "PER_PAGE", "WORST_ACCEPTED", "all_bad_sites",
           "candidate_sites", "evidence_figure", "evidence_pdf_sites", "evidence_sites",
           "kept_spectra",
           "shape_hint", "site_spectra", "write_evidence_pdf"]
