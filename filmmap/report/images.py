"""PNG images of a report, made once and shared by the HTML and PDF writers.

Wafer maps and the lot contact sheet are taken from the files the reduce step
wrote (``OUTDIR/figures/<wafer>.png``, ``OUTDIR/contact_sheet.png``) when they
exist, and rendered here otherwise (``render_missing=True``). The slot profile
and the fit-quality histogram are always rendered from the `LotView`. An image
that cannot be made is None with a plain-text reason: the report then says
why, it never shows a placeholder picture.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from filmmap.bridge import site_grid

from filmmap.report.fitquality import fit_quality_figure
from filmmap.report.slotplot import slot_profile_figure


def figure_png(fig, dpi=None):
    """PNG bytes (palette PNG, see `filmmap.wafermap.figures.png_bytes`) of a Figure."""
    from filmmap.wafermap.figures import png_bytes

    return png_bytes(fig, dpi)


class ReportImages:
    """Lazily made, cached PNG images of one lot report.

    Parameters
    ----------
    view : LotView
    ds : xarray.Dataset
        The lot dataset (thickness, fit_ok, x_mm, y_mm for rendered maps).
    outdir : str or path-like, optional
        Output folder where the reduce step wrote its PNGs.
    dpi : float
        Resolution of the images rendered here.
    render_missing : bool
        Render wafer maps and the contact sheet that are not on disk.
    no_map_reason : str, optional
        Why there are no maps (e.g. "maps not drawn (reduce --no-figures)"): then no map
        and no contact sheet is looked for or drawn, and the reports say this reason.
    spectra : xarray.Dataset, optional
        The evidence spectra a reduction kept (`filmmap.report.evidence.kept_spectra`),
        used when the output folder has no spectra.nc.
    contact_sheet : callable() -> bytes, optional
        Gives the contact sheet's PNG when it is first needed (another process may still
        be drawing it); default: contact_sheet.png of the output folder.
    """

    def __init__(self, view, ds, outdir=None, *, dpi=100, render_missing=True,
                 no_map_reason=None, spectra=None, contact_sheet=None):
        self.view, self.ds, self.dpi = view, ds, float(dpi)
        self.kept_spectra = spectra
        self.sheet_source = contact_sheet
        self.outdir = None if outdir is None else Path(outdir)
        self.render_missing = bool(render_missing)
        self.no_map_reason = no_map_reason
        self._cache = {}

    def _cached(self, key, make):
        if key not in self._cache:
            self._cache[key] = make()
        return self._cache[key]

    def slot_profile(self):
        """PNG bytes of the slot-profile plot."""
        return self._cached("slot", lambda: figure_png(slot_profile_figure(self.view,
                                                                           dpi=self.dpi)))

    def fit_quality(self):
        """PNG bytes of the fit-quality histogram."""
        return self._cached("fitq", lambda: figure_png(fit_quality_figure(self.ds, dpi=self.dpi)))

    def advice_profile(self, advice):
        """PNG bytes of the slot profile now and predicted after ``advice`` (None without one)."""
        from filmmap.report.advicefig import advice_profile_figure
        from filmmap.report.decision import has_standard_advice

        if not has_standard_advice(advice) or not advice.get("predicted_nm_by_slot_next"):
            return None
        return self._cached("advice", lambda: figure_png(
            advice_profile_figure(self.view, advice, dpi=self.dpi)))

    def spectra(self):
        """spectra.nc of the output folder as a dataset, else the kept evidence spectra
        (None when neither is there)."""
        def load():
            path = None if self.outdir is None else self.outdir / "spectra.nc"
            if path is None or not path.is_file():
                return self.kept_spectra
            import xarray as xr

            return xr.open_dataset(path, engine="h5netcdf")
        return self._cached("spectra", load)

    def evidence(self):
        """``(png or None, sites, hints, n_bad)``: measured-vs-model panels of the report.

        ``sites`` are the chosen `filmmap.report.evidence.EvidenceSite`, ``hints`` their
        overlays in words, ``n_bad`` the failed plus suspect sites in all; the PNG is None
        when no spectra are there (or no site needs evidence).
        """
        def make():
            from filmmap.report.evidence import evidence_figure, evidence_sites

            sites, n_bad = evidence_sites(self.view, self.ds)
            spectra = self.spectra()
            if not sites or spectra is None:
                return None, sites, [""] * len(sites), n_bad
            fig, hints = evidence_figure(sites, spectra, dpi=self.dpi)
            return figure_png(fig), sites, hints, n_bad
        return self._cached("evidence", make)

    def render_figures(self, advice=None, between=None):
        """Render now the figures report.html embeds (not the maps, read from disk).

        Lets them be drawn while other processes work (the map workers), not after.
        ``between``: called after each figure.
        """
        for make in (self.slot_profile, self.fit_quality, lambda: self.advice_profile(advice),
                     self.evidence):
            make()
            if between is not None:
                between()

    def close(self):
        """Close spectra.nc if it was opened."""
        sp = self._cache.pop("spectra", None)
        if sp is not None and sp is not self.kept_spectra:
            sp.close()

    def _on_disk(self, relpath):
        if self.outdir is None:
            return None
        path = self.outdir / relpath
        return path.read_bytes() if path.is_file() else None

    def contact_sheet(self):
        """``(png bytes or None, reason)`` of the lot contact sheet."""
        return self._cached("sheet", self._make_contact_sheet)

    def _make_contact_sheet(self):
        if self.no_map_reason:
            return None, self.no_map_reason
        if self.sheet_source is not None:
            return self.sheet_source(), ""
        data = self._on_disk("contact_sheet.png")
        if data is not None:
            return data, ""
        if not self.render_missing:
            return None, "contact_sheet.png was not written by the reduce step"
        from filmmap.wafermap.figures import contact_sheet_png

        grid = site_grid(self.ds)
        oos = set(self.view.wtw.out_of_spec_ids) if self.view.target_nm is not None else set()
        try:
            # per-wafer coordinates: wafers with another layout (a missing site) keep their own
            png = contact_sheet_png(grid.thickness_nm, grid.fit_ok, grid.x_mm, grid.y_mm,
                                    self.view.diameter_mm, self.view.edge_exclusion_mm,
                                    wafer_ids=list(grid.wafer), slots=grid.slot.tolist(),
                                    dpi=self.dpi, panel_in=1.6, lot_id=self.view.lot_id,
                                    out_of_spec=[w in oos for w in grid.wafer])
            return png, ""
        except Exception as exc:  # noqa: BLE001 - the report says why, it does not abort
            return None, f"the contact sheet could not be drawn ({type(exc).__name__}: {exc})"

    def wafer_map(self, wafer):
        """``(png bytes or None, reason)`` of one wafer's thickness map."""
        return self._cached(("map", str(wafer)), lambda: self._make_wafer_map(str(wafer)))

    def _make_wafer_map(self, wafer):
        from filmmap.wafermap.figures import safe_filename, wafer_map_figure

        if self.no_map_reason:
            return None, self.no_map_reason
        data = self._on_disk(Path("figures") / (safe_filename(wafer) + ".png"))
        if data is not None:
            return data, ""
        if not self.render_missing:
            return None, "the reduce step wrote no map for this wafer"
        grid = site_grid(self.ds)
        i = grid.wafer_index()[wafer]
        x, y = grid.x_mm[i], grid.y_mm[i]
        present = np.isfinite(x) & np.isfinite(y)
        t = np.where(present, grid.thickness_nm[i], np.nan)
        ok = grid.fit_ok[i] & present
        if not np.any(ok & np.isfinite(t)):
            return None, "no site with an accepted fit: nothing to map"
        try:
            fig = wafer_map_figure(t, ok, x, y, self.view.diameter_mm,
                                   self.view.edge_exclusion_mm, wafer_id=wafer,
                                   slot=int(grid.slot[i]), dpi=self.dpi,
                                   present=present, lot_id=self.view.lot_id)
            return figure_png(fig), ""
        except Exception as exc:  # noqa: BLE001 - the report says why, it does not abort
            return None, f"the map could not be drawn ({type(exc).__name__}: {exc})"
