"""Reduce a lot: lot file + spectra files -> every site's thickness, on disk.

The Python API behind ``filmmap reduce``. Spectra files stream through in
batches of whole files (wafers): each batch is read, converted to
reflectance if it holds raw intensities, and fitted; only the small per-site
results are kept, so memory stays bounded by the batch, not the lot. With
``workers > 1`` batches are read and fitted in separate processes.
"""

from __future__ import annotations

from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass, field, replace


import numpy as np

from filmmap.errors import FilmmapInputError
from filmmap.fitting import fit_spectra, free_parameters
from filmmap.fitting.convention import REVERSED_DELTA_HINT, ConventionCheck, \
    check_delta_convention
from filmmap.lotstats.evidence import batch_evidence_rows, evidence_rows
from filmmap.fitting.suspect import flag_suspects
from filmmap.fitting.systematics import SPECTROSCOPIC_MIN_WAVELENGTHS, Systematics, lot_tension
from filmmap.materials import ScaledIndex
from filmmap.io.lotfile import read_lot_file
from filmmap.io.layouts import DEFAULT_LAYOUT, PARTIAL_WAFER_LAYOUTS, Maps, read_spectra
from filmmap.io.layouts.maps import lot_maps
from filmmap.io.intensity import intensity_to_reflectance, read_dark_and_reference
from filmmap.io.lotchecks import check_tables
from filmmap.optics import Layer, Stack
from filmmap.workers import end_with_parent

BATCH_SPECTRA = 2500
"""Spectra per fitting batch: large enough for the batched fitter's speed, small
enough that memory does not grow with the lot."""


@dataclass
class SiteResults:
    """Per-site fit results of a lot, one row per measured site (all files)."""

    wafer: np.ndarray
    slot: np.ndarray
    site: np.ndarray
    x_mm: np.ndarray
    y_mm: np.ndarray
    values: np.ndarray
    sigma: np.ndarray
    reduced_chi2: np.ndarray
    rms_residual: np.ndarray
    iterations: np.ndarray
    ok: np.ndarray
    note: np.ndarray
    file: np.ndarray
    line: np.ndarray
    names: list
    model_spectra: np.ndarray | None = None
    measured_spectra: np.ndarray | None = None
    sigma_stat: np.ndarray | None = None
    correlation: np.ndarray | None = None
    unchecked: np.ndarray | None = None
    suspect: np.ndarray | None = None


@dataclass
class EvidenceSpectra:
    """Measured and model spectra of the few sites a report shows as evidence (kept with or
    without ``keep_spectra``; `filmmap.lotstats.evidence.evidence_rows`).

    Attributes
    ----------
    rows : numpy.ndarray of int, shape (k,)
        Rows of `SiteResults`.
    measured, model : numpy.ndarray, shape (k, n_points)
        As `SiteResults.measured_spectra` and ``model_spectra`` (model at the unchecked
        best fit).
    """

    rows: np.ndarray
    measured: np.ndarray
    model: np.ndarray


@dataclass
class LotReduction:
    """What `reduce_lot` produced."""

    config: object
    stack: Stack
    sites: SiteResults
    inputs: list = field(default_factory=list)
    outputs: dict = field(default_factory=dict)
    wavelength_nm: np.ndarray | None = None
    warnings: list = field(default_factory=list)
    free: list = field(default_factory=list)
    evidence: EvidenceSpectra | None = None


def build_stack(config):
    """Optical stack and free parameters from a lot file's [stack] (and [measurement]).

    Returns
    -------
    stack : Stack
    free : list of FreeParameter
    layer_names : list of str
        Unique names of the layers, top first.
    """
    names, layers = [], []
    for i, lc in enumerate(config.stack.layers):
        base = lc.model.name
        name = base if base not in names else f"{base}_{i + 1}"
        names.append(name)
        model = lc.model if lc.index_scale == 1.0 else ScaledIndex(lc.model, lc.index_scale)
        layers.append(Layer(model, lc.thickness_nm or 0.0, name))
    stack = Stack(config.stack.substrate, layers)
    fit_layers = [i for i, lc in enumerate(config.stack.layers) if lc.fit]
    nominal = {i: lc.thickness_nm for i, lc in enumerate(config.stack.layers)
               if lc.fit and lc.thickness_nm is not None and lc.search_nm is None}
    search = {i: lc.search_nm for i, lc in enumerate(config.stack.layers)
              if lc.fit and lc.search_nm is not None}
    # a layer with both a nominal and search_nm: search_nm bounds, the nominal breaks ties
    free = free_parameters(stack, layers=fit_layers, nominal=nominal or None,
                           search_nm=search or None, systematics=lot_systematics(config),
                           technique=config.measurement.technique,
                           index_scale=[i for i, lc in enumerate(config.stack.layers)
                                        if lc.fit_index_scale])
    free = [replace(f, start=config.stack.layers[f.layer].thickness_nm)
            if f.kind == "thickness" and f.start is None else f for f in free]
    return stack, free, names


def lot_systematics(config, n_wavelengths=None):
    """The instrument systematics of a lot: the technique's defaults, overridden by [measurement].

    Parameters
    ----------
    config : LotConfig
    n_wavelengths : int, optional
        Wavelengths per spectrum (decides whether an ellipsometer is spectroscopic);
        when None, taken as spectroscopic (the wavelength-shift prior then applies
        only if the files hold enough wavelengths, see `fit_lot_batch`).

    Returns
    -------
    Systematics
    """
    m = config.measurement
    base = Systematics.defaults(m.technique, SPECTROSCOPIC_MIN_WAVELENGTHS
                                if n_wavelengths is None else n_wavelengths, m.angle_deg)
    over = {k: v for k, v in (("offset_sigma", m.offset_sigma), ("scale_sigma", m.scale_sigma),
                              ("wavelength_shift_nm", m.wavelength_shift_sigma_nm),
                              ("angle_offset_deg", m.angle_offset_sigma_deg)) if v is not None}
    return replace(base, **over)


@dataclass(frozen=True)
class BatchTask:
    """What one batch of files needs to be read and fitted (picklable for worker processes)."""

    paths: tuple
    technique: str
    unit: str
    angle: float
    stack: Stack
    free: tuple
    dark: np.ndarray | None
    ref: object
    keep_spectra: bool
    threads: int | None
    diameter_mm: float
    shift_explicit: bool = False
    delta_reversed: bool = False
    layout: str = DEFAULT_LAYOUT
    maps: Maps = field(default_factory=Maps)


@dataclass(frozen=True)
class BatchFit:
    """The fits of one batch of files, as `_fit_batch` sends them back (picklable).

    Per-site arrays (one row per spectrum of the batch, in file order) are those of
    `filmmap.fitting.FitResult`; ``model`` and ``measured`` hold the spectra of the rows ``spectra_rows``: all
    rows with ``keep_spectra``, else the candidate evidence sites.
    """

    values: np.ndarray
    sigma: np.ndarray
    sigma_stat: np.ndarray
    correlation: np.ndarray
    unchecked: np.ndarray
    reduced_chi2: np.ndarray
    rms_residual: np.ndarray
    iterations: np.ndarray
    ok: np.ndarray
    note: np.ndarray
    names: list
    wavelength_nm: np.ndarray
    convention: object = None
    model: np.ndarray | None = None
    measured: np.ndarray | None = None
    spectra_rows: np.ndarray | None = None


def _batch_spectra(stack, wl, angle, technique, free, res, data, keep_spectra):
    """Measured and model spectra a batch sends back: all of them with ``keep_spectra``,
    else only those of the sites that may be the lot's evidence."""
    from filmmap.fitting import SpectralModel

    rows = slice(None) if keep_spectra else batch_evidence_rows(res.ok, res.reason,
                                                                res.reduced_chi2)
    model = SpectralModel(stack, wl, angle, technique, free)
    P = np.where(np.isfinite(res.unchecked_values), res.unchecked_values, 0.0)[rows]
    measured = data if technique == "reflectance" else np.concatenate(data, axis=1)
    return dict(model=model.evaluate(P), measured=measured[rows],
                spectra_rows=np.arange(len(res.ok))[rows])


def _free_for(free, technique, n_wavelengths, shift_explicit):
    """Drop the default wavelength-shift prior for laser-line data (too few wavelengths)."""
    if shift_explicit or n_wavelengths >= SPECTROSCOPIC_MIN_WAVELENGTHS:
        return list(free)
    return [f for f in free if f.kind != "wavelength_shift"]


def _fit_batch(task):
    """Read, convert and fit a batch of files (runs in a worker process or inline)."""
    paths, technique, unit, angle, stack = (task.paths, task.technique, task.unit, task.angle,
                                            task.stack)
    dark, ref, keep_spectra = task.dark, task.ref, task.keep_spectra
    tables = [read_spectra(p, "intensity" if ref is not None else technique,
                           unit if ref is None else "fraction", task.layout, task.maps)
              for p in paths]
    wl = tables[0].wavelength_nm
    if any(t.wavelength_nm.size != wl.size or not np.allclose(t.wavelength_nm, wl, rtol=1e-9, atol=0)
           for t in tables[1:]):
        check_tables(tables, task.diameter_mm,  # names the file and the first differing column
                     wafer_per_file=task.layout not in PARTIAL_WAFER_LAYOUTS)
    for medium in [stack.ambient, *[layer.material for layer in stack.layers], stack.substrate]:
        try:
            medium.check_range(wl)
        except FilmmapInputError as exc:
            raise FilmmapInputError(exc.reason, file=tables[0].path, field="wavelength") from None
    free = _free_for(task.free, technique, wl.size, task.shift_explicit)
    convention = None
    if technique == "reflectance":
        if ref is not None:
            if ref.wavelength_nm.size != wl.size or not np.allclose(ref.wavelength_nm, wl,
                                                                     rtol=1e-9, atol=0):
                raise FilmmapInputError(f"wavelengths differ from the reference spectrum "
                                        f"{ref.path}; expected the same I@<nm> columns",
                                        file=tables[0].path)
            counts = np.concatenate([t.data["I"] for t in tables])
            bare = Stack(stack.substrate, [], stack.ambient)
            R_si = bare.reflectance(wl, angle)
            data = intensity_to_reflectance(counts, dark, ref.counts, R_si)
        else:
            data = np.concatenate([t.data["R"] for t in tables])
    else:
        delta = np.concatenate([t.data["delta"] for t in tables])
        if task.delta_reversed:
            delta = np.mod(360.0 - delta, 360.0)
        data = (np.concatenate([t.data["psi"] for t in tables]), delta)
    res = fit_spectra(stack, wl, data, technique, angle, free=free, workers=task.threads)
    if technique == "ellipsometry":
        convention = check_delta_convention(
            lambda ps, de: fit_spectra(stack, wl, (ps, de), technique, angle, free=free,
                                       workers=1), data[0], data[1])
    names = res.names
    out = BatchFit(values=res.values, sigma=res.sigma, sigma_stat=res.sigma_stat,
                   correlation=res.correlation, unchecked=res.unchecked_values,
                   reduced_chi2=res.reduced_chi2, rms_residual=res.rms_residual,
                   iterations=res.iterations, ok=res.ok, note=res.reason, names=names,
                   wavelength_nm=wl, convention=convention, **_batch_spectra(
                       stack, wl, angle, technique, free, res, data, keep_spectra))
    # the tables travel back without their spectra: only the row metadata is needed
    return out, [replace(t, data={}) for t in tables]


def _batches(files, rows_hint=49):
    per = max(1, BATCH_SPECTRA // rows_hint)
    return [files[i:i + per] for i in range(0, len(files), per)]


def reduce_lot(lot_file, workers=1, keep_spectra=False, progress=None, config=None):
    """Fit every spectrum of a lot.

    Parameters
    ----------
    lot_file : str or path-like
        The lot file (TOML).
    workers : int
        Processes fitting batches of wafers (1 = in this process, with threads).
    keep_spectra : bool
        Keep measured and model spectra for inspection (memory grows with the lot).
    progress : callable, optional
        Called with the number of wafers (files) finished after each batch.
    config : LotConfig, optional
        The lot file already read (`filmmap.io.lotfile.read_lot_file`); read here if None.

    Returns
    -------
    LotReduction
    """
    if config is None:
        config = read_lot_file(lot_file)
    stack, free, _names = build_stack(config)
    m = config.measurement
    dark, ref, extra_inputs = read_dark_and_reference(config.measurement)
    maps, map_inputs = lot_maps(m)   # site and slot maps, read (and hashed) once
    angle = float(m.angle_deg)
    files = list(m.files)
    batches = _batches(files)
    threads = 1 if workers > 1 else None
    tasks = [BatchTask(tuple(b), m.technique, m.reflectance_unit, angle, stack, tuple(free), dark,
                       ref, keep_spectra, threads, m.wafer_diameter_mm,
                       shift_explicit=m.wavelength_shift_sigma_nm is not None,
                       delta_reversed=getattr(m, "delta_convention", "handbook") == "reversed",
                       layout=m.layout, maps=maps)
             for b in batches]
    results, metas = [], []
    if workers > 1 and len(tasks) > 1:
        with ProcessPoolExecutor(max_workers=workers, initializer=end_with_parent) as pool:
            for out, meta in pool.map(_fit_batch, tasks):
                results.append(out)
                metas.extend(meta)
                if progress:
                    progress(len(meta))
    else:
        for task in tasks:
            out, meta = _fit_batch(task)
            results.append(out)
            metas.extend(meta)
            if progress:
                progress(len(meta))
    boat = config.boat.slots if config.boat is not None else None
    check_tables(metas, m.wafer_diameter_mm, boat,
                 wafer_per_file=m.layout not in PARTIAL_WAFER_LAYOUTS)

    def cat(key):
        return np.concatenate([getattr(r, key) for r in results])

    def mcat(key):
        return np.concatenate([getattr(t, key) for t in metas])

    ok = cat("ok")
    note = cat("note").astype(object)
    suspect, suspect_reason = flag_suspects(cat("reduced_chi2"), ok)
    for k in np.nonzero(suspect)[0]:
        note[k] = suspect_reason[k] + (f"; {note[k]}" if note[k] else "")
    lot_free = _free_for(free, m.technique, results[0].wavelength_nm.size,
                         m.wavelength_shift_sigma_nm is not None)
    warnings = lot_tension(lot_free, cat("values"), ok)
    convention = ConventionCheck.combine([r.convention for r in results])
    if convention.reversed_fits_better:
        warnings.append(f"{REVERSED_DELTA_HINT} ({convention.accepted_reversed} of "
                        f"{convention.n_sampled} sampled sites fit that way, "
                        f"{convention.accepted_as_given} as given)")
        for k in np.nonzero(~ok)[0]:
            note[k] = f"{REVERSED_DELTA_HINT}; as given: {note[k]}"
    evidence = _lot_evidence(results, ok, suspect, note, cat("reduced_chi2"))
    sites = SiteResults(
        wafer=mcat("wafer").astype(str), slot=mcat("slot"), site=mcat("site"),
        x_mm=mcat("x_mm"), y_mm=mcat("y_mm"), values=cat("values"), sigma=cat("sigma"),
        reduced_chi2=cat("reduced_chi2"), rms_residual=cat("rms_residual"),
        iterations=cat("iterations"), ok=ok, note=note.astype(str),
        file=np.concatenate([np.full(t.n_rows, str(t.path)) for t in metas]),
        line=mcat("line"), names=results[0].names,
        model_spectra=cat("model") if keep_spectra else None,
        measured_spectra=cat("measured") if keep_spectra else None,
        sigma_stat=cat("sigma_stat"), correlation=cat("correlation"),
        unchecked=cat("unchecked"), suspect=suspect)
    inputs = [(str(config.path), config.sha256)] + [(str(t.path), t.sha256) for t in metas] + [
        (str(s.path), s.sha256) for s in extra_inputs] + map_inputs
    return LotReduction(config=config, stack=stack, sites=sites, inputs=inputs,
                        wavelength_nm=results[0].wavelength_nm, warnings=warnings,
                        free=lot_free, evidence=evidence)


def _lot_evidence(results, ok, suspect, note, quality):
    """The lot's evidence spectra from those its batches kept (`EvidenceSpectra`)."""
    offsets = np.cumsum([0] + [len(r.ok) for r in results[:-1]])
    where = {int(k) + int(o): (b, i) for b, (r, o) in enumerate(zip(results, offsets))
             for i, k in enumerate(r.spectra_rows)}
    rows = np.array([k for k in evidence_rows(ok, suspect, note, quality) if k in where],
                    dtype=np.intp)
    width = results[0].measured.shape[1]

    def gather(key):    # a few rows, never a copy of every kept spectrum
        return np.array([getattr(results[b], key)[i] for b, i in map(where.get, rows.tolist())],
                        dtype=float).reshape(len(rows), width)

    return EvidenceSpectra(rows, gather("measured"), gather("model"))
