"""Reduce a lot into its output folder, and record it: the whole job behind ``filmmap reduce``.

    from filmmap.pipeline import reduce_to_folder
    reduction, written, seconds = reduce_to_folder("lot.toml", "results/")

`reduce_to_folder` fits a lot (`filmmap.pipeline.reducing`), stages every output and
publishes the folder whole (`filmmap.pipeline.publishing`); `reduce_many` does that for
several lots in processes or on a Dask cluster; `record_reduced_lot` then records a
published lot in the run history (`filmmap.history`).
"""

from __future__ import annotations

import contextlib
import json
import os
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from filmmap import __version__
from filmmap.bridge import site_grid, wafer_values
from filmmap.errors import FilmmapInputError, FilmmapOutputError
from filmmap.growth.advice import advise_from_config
from filmmap.atomic import write_text_atomic
from filmmap.io.lotfile import LotConfig, read_lot_file
from filmmap.pipeline.guard import (check_history_writable, check_output_location,
                                    check_outputs_spare_inputs, estimate_from_inputs,
                                    estimate_output_bytes, history_inputs, lot_inputs,
                                    output_target)
from filmmap.pipeline.lot_files import write_lot
from filmmap.pipeline.publishing import (check_outdir, fault_point, late_write_errors,
                                         staged_output)
from filmmap.pipeline.reducing import reduce_lot
from filmmap.lotstats.exclusion import DEFAULT_MIN_SITES as MIN_SITES_FOR_LOT
from filmmap.lotstats.exclusion import lot_means, usable_wafers
from filmmap.lotstats.view import lot_view, with_boat_model
from filmmap.report.summary_json import write_summary_csv, write_summary_json

# a wafer with fewer usable sites than MIN_SITES_FOR_LOT is left out of lot statistics and advice

ADVICE_FORMAT = 1
"""Version of the advice.json layout (key ``advice_format``; schema filmmap/schemas/advice.schema.json)."""

PENDING_RECORD = ".filmmap-history-pending"
"""File in a published output folder whose lot is still to be recorded in the run history.

Order of publish and record (a crash between them must not leave them disagreeing
unnoticed): the folder is published first, with this marker inside it (JSON: the history
path and the applied trims), then the lot is recorded from the published folder, then the
marker is removed.  Recording is idempotent (the same lot and furnace replace their
record).  A crash between publishing and recording leaves the marker, and the next
``reduce`` into that folder records the folder's lot before anything else
(`complete_pending_record`), so the history catches up with what was published; a crash
before publishing changes neither.  The other order (record, then publish) could leave a
recorded lot whose results were never published, with nothing in the folder to tell.
"""

def reduce_to_folder(lotfile, outdir, workers=None, figures=True, keep_spectra=False,
                     figure_workers=None, progress=None, protect=(), follow_output_link=False,
                     preflight=None, pending_record=None, rate_factors=None, report=True,
                     pdf_wafer_pages=False, advice_options=None, config=None):
    """Reduce a lot and publish every output in ``outdir`` at once.

    Parameters
    ----------
    lotfile : path-like
        Lot file (TOML).
    outdir : path-like
        Output folder; replaced whole once the new results are complete.
    workers : int, optional
        Fitting processes (default: 2 with 2+ cores and 16+ files, else 1).
    figures : bool
        Wafer maps (figures/) and the contact sheet (PNG); without them the reports say
        that the maps were not drawn.
    report : bool
        report.html and report.pdf.
    pdf_wafer_pages : bool
        One page per wafer in report.pdf (default: an index of the wafers).
    keep_spectra : bool
        Also spectra.nc (measured, model, residual).
    figure_workers : int, optional
        Processes rendering maps.
    progress : callable(total, what) -> object with update(n) and close(), optional
        Progress display factory (``what``: "fitting", "maps", "report.pdf"); a factory
        of one argument is called for the fitting only.
    protect : iterable of (str, path-like)
        Further (role, path) inputs the output folder must not equal, contain or lie
        inside, e.g. `filmmap.pipeline.guard.history_inputs` (the lot's own inputs are always
        protected).
    follow_output_link : bool
        ``outdir`` may be a symbolic link: its target is replaced, the link kept.
    preflight : callable(LotConfig), optional
        Further checks of the caller (command-line values against the lot file), run
        with the environment checks before any fit.
    pending_record : dict, optional
        ``{"db_path": str or None, "applied_trims_C": dict or None}``: the lot will be
        recorded in the run history after publishing; written as `PENDING_RECORD` into
        the published folder until `record_history` has recorded it.
    rate_factors : dict {ambient: factor}, optional
        The furnace's growth rate learned from its history, for the advice
        (`filmmap.pipeline.furnace.learn_from_history`).
    advice_options : dict, optional
        Further keywords of `filmmap.growth.advice.advise_from_config` (a learned
        coupling width: ``width_slots``, ``width_source``).
    config : LotConfig, optional
        ``lotfile`` already read (`filmmap.io.lotfile.read_lot_file`); read here if None.

    Returns
    -------
    (LotReduction, WrittenLot, seconds)

    Raises
    ------
    FilmmapInputError
        Before any fit or write: a foreign or linked output folder, or one that equals,
        contains or lies inside an input; a parent that cannot take it (a file, read-only,
        a mount point, a name too long, too little free space) (`filmmap.pipeline.guard`).
    FilmmapOutputError
        When writing fails all the same (a disk filling up meanwhile): the previous
        results in ``outdir`` are intact.
    """

    t0 = time.perf_counter()
    outdir = output_target(outdir, follow_output_link)
    check_outdir(outdir)  # refuse a foreign folder before spending time on fits
    if config is None:
        config = read_lot_file(lotfile)
    # replacing OUTDIR deletes what is in it: never when an input is there (nothing staged yet)
    check_outputs_spare_inputs([outdir], lot_inputs(config) + list(protect))
    check_output_location(outdir, estimate_from_inputs(config, figures, keep_spectra))
    if preflight is not None:
        preflight(config)
    complete_pending_record(outdir)
    n_files = len(config.measurement.files)
    if workers is None:
        workers = 2 if (os.cpu_count() or 1) >= 2 and n_files >= 16 else 1
    if workers < 1:
        raise FilmmapInputError(f"--workers must be >= 1, got {workers}", field="--workers")
    bar = _bar(progress, n_files, "fitting")

    def batch_fitted(n):
        if bar is not None:
            bar.update(n)
        if (figures or report) and workers > 1:
            # the figure and report modules (matplotlib, about 0.4 s) are imported, and the
            # map figure made, while the fitting workers still work, not after them
            _prepare_figures(config, figures)

    try:
        reduction = reduce_lot(lotfile, workers=workers, keep_spectra=keep_spectra, config=config,
                               progress=batch_fitted)
    finally:
        if bar is not None:
            bar.close()
    # the real counts are known now: check the space again before anything is staged
    sites = reduction.sites
    n_values = 0 if sites.measured_spectra is None else int(np.size(sites.measured_spectra))
    check_output_location(outdir, estimate_output_bytes(len(np.unique(sites.wafer)),
                                                        len(sites.wafer), n_values, figures,
                                                        keep_spectra))
    fault_point("before-staging")
    # every output goes to a staging folder that replaces OUTDIR only once complete
    with late_write_errors(outdir), staged_output(outdir) as stage, \
            contextlib.ExitStack() as figure_work:
        maps, figure_notes, views = [], [], []

        def start_maps(ds):
            # the workers start drawing the contact sheet and the maps as soon as the lot
            # dataset exists, while lot.nc, the summaries and the reports are written
            from filmmap.pipeline.figures import FigureWork

            views.append(lot_view(ds, reduction.config, min_sites=MIN_SITES_FOR_LOT))
            maps.append(figure_work.enter_context(FigureWork(
                ds, reduction.config, stage, workers=figure_workers or max(2, workers),
                out_of_spec=views[0].wtw.out_of_spec_ids if views[0].target_nm is not None
                else (), progress=lambda n: _bar(progress, n, "maps"), notes=figure_notes)))

        written = write_lot(reduction, stage, keep_spectra=keep_spectra,
                            dataset_ready=start_maps if figures else None)
        fault_point("mid-staging")
        for work in maps:
            work.pump()
        advice = write_advice(reduction.config, written, stage, rate_factors,
                              **(advice_options or {}))
        if advice is not None:
            written.files["advice.json"] = stage / "advice.json"
        # the boat-end verdicts follow the advice's one model of the boat when there is one
        view = with_boat_model(views[0] if views else lot_view(
            written.dataset, reduction.config, min_sites=MIN_SITES_FOR_LOT), advice)
        written.files["summary.csv"] = write_summary_csv(view, stage / "summary.csv")
        written.files["summary.json"] = write_summary_json(
            view, stage, created=written.dataset.attrs.get("created"))
        written.advice = advice
        written.view = view
        if report:
            from filmmap.report import ReportImages, write_html_report, write_pdf_report

            # the contact sheet comes from the worker drawing it when a report needs it
            images = ReportImages(view, written.dataset, stage, render_missing=False,
                                  no_map_reason=None if figures else
                                  "maps not drawn (reduce --no-figures)",
                                  spectra=_kept_spectra(reduction),
                                  contact_sheet=maps[0].contact_sheet if maps else None)

            def write_pdf(between_pages=None):
                written.files["report.pdf"] = write_pdf_report(
                    view, written.dataset, stage, images=images, advice=advice,
                    wafer_pages=pdf_wafer_pages, between_pages=between_pages,
                    progress=lambda n: _bar(progress, n, "report.pdf"))
                # and report.html's plots, while the workers still draw
                images.render_figures(advice, between=between_pages)
        if figures:
            written.figure_notes = figure_notes
            # report.pdf needs the contact sheet and no map (unless it has a page per
            # wafer): it is written while the worker processes draw the maps
            written.files.update(maps[0].finish(
                while_maps=write_pdf if report and not pdf_wafer_pages else None))
        if report:
            if "report.pdf" not in written.files:
                write_pdf()
            written.files["report.html"] = write_html_report(view, written.dataset, stage,
                                                             images=images, advice=advice)
            written.files.update(_write_evidence_pdf(view, written.dataset, images, stage))
            images.close()
        if pending_record is not None:
            # lot.nc records its inputs relative to the lot folder; the marker keeps
            # where the lot file is on this machine, to recover its recipe and target
            plan = {**pending_record, "lot_file": str(reduction.config.path),
                    "lot_file_sha256": reduction.config.sha256}
            write_text_atomic(stage / PENDING_RECORD, json.dumps(plan) + "\n")
        fault_point("after-staging")
    fault_point("after-publish")
    written.outdir = Path(outdir)
    # the files were written into the staging folder, which is OUTDIR now
    written.files = {name: written.outdir / name for name in written.files}
    return reduction, written, time.perf_counter() - t0




def _prepare_figures(config, figures):
    """Import what the maps and the reports need, and make this process's map figure (the
    map workers inherit it); cheap when done already."""
    from importlib import import_module

    for name in ("filmmap.pipeline.figures", "filmmap.report.html", "filmmap.report.pdf",
                 "filmmap.report.images", "filmmap.report.evidence", "PIL.PngImagePlugin"):
        import_module(name)
    if figures:
        from filmmap.wafermap.figures import map_canvas

        map_canvas(config.measurement.wafer_diameter_mm, config.measurement.edge_exclusion_mm)


def _kept_spectra(reduction):
    """The evidence spectra the reduction kept, for the report (None without any)."""
    from filmmap.report.evidence import kept_spectra

    ev, sites = reduction.evidence, reduction.sites
    if ev is None or not len(ev.rows):
        return None
    return kept_spectra(sites.wafer[ev.rows], sites.site[ev.rows], reduction.wavelength_nm,
                        ev.measured, ev.model)


def _write_evidence_pdf(view, ds, images, folder):
    """evidence.pdf with the failed and suspect sites when the report page shows only some."""
    from filmmap.report.evidence import evidence_pdf_sites, write_evidence_pdf

    spectra = images.spectra()
    sites, _ = evidence_pdf_sites(view, ds, spectra)
    if not sites:
        return {}
    return {"evidence.pdf": write_evidence_pdf(sites, spectra, folder / "evidence.pdf",
                                               lot_id=view.lot_id)}


def _bar(progress, total, what):
    """A progress display from the factory (None without one); old one-argument factories
    are used for the fitting only."""
    if progress is None:
        return None
    try:
        return progress(total, what)
    except TypeError:
        return progress(total) if what == "fitting" else None


def write_advice(config, written, folder, rate_factors=None, **options):
    """advice.json when the lot file has a recipe and a target; returns the advice or None.

    ``rate_factors`` ({ambient: factor}) is a furnace's growth rate learned from its
    history (`filmmap.history.rate`), applied on top of the lot file's ``[growth]``.
    """
    if not config.recipe or config.target is None:
        return None
    ds = written.dataset
    grid = site_grid(ds)
    sites_used = wafer_values(ds, "sites_used")
    usable = usable_wafers(sites_used, MIN_SITES_FOR_LOT)
    mean = lot_means(wafer_values(ds, "mean_nm"), sites_used, MIN_SITES_FOR_LOT)
    advice = advise_from_config(config, grid.slot, mean, grid.role,
                                n_failed_sites=written.n_failed, n_sites=written.n_sites,
                                rate_factors=rate_factors, **options)
    for w in grid.wafer[~usable]:
        advice["warnings"].append(f"wafer {w} has fewer than {MIN_SITES_FOR_LOT} usable sites "
                                  "and was left out of the calibration")
    # identification after the pinned keys (which keep their order): which layout, which
    # software, which lot, when (the same time as lot.nc's ``created``)
    advice["advice_format"] = ADVICE_FORMAT
    advice["software"] = f"filmmap {__version__}"
    advice["lot_id"] = str(config.lot.id)
    advice["created"] = str(ds.attrs.get("created", ""))
    write_text_atomic(folder / "advice.json", json.dumps(advice, indent=1, allow_nan=False) + "\n")
    return advice


@dataclass(frozen=True)
class LotTask:
    """One lot of a many-lot run: what a worker process or a Dask task needs (picklable)."""

    lotfile: Path
    config: LotConfig
    outdir: Path
    figures: bool
    keep_spectra: bool
    protect: tuple
    pending_record: dict | None


def _reduce_one(task):
    """One lot of a many-lot run (a worker process, a Dask task or inline)."""
    reduction, written, seconds = reduce_to_folder(task.lotfile, task.outdir, workers=1,
                                                   figures=task.figures,
                                                   keep_spectra=task.keep_spectra,
                                                   figure_workers=1, protect=task.protect,
                                                   pending_record=task.pending_record,
                                                   config=task.config)
    # the history record is made here, from the lot view in memory: the caller records it
    record = (history_record(written, reduction.config,
                             task.pending_record.get("applied_trims_C"))
              if task.pending_record is not None else None)
    return dict(lotfile=str(task.lotfile), outdir=str(task.outdir),
                lot_id=reduction.config.lot.id, n_wafers=written.n_wafers,
                n_sites=written.n_sites, n_failed=written.n_failed, mean_nm=written.mean_nm,
                seconds=seconds, record=record)


def read_lots(lotfiles):
    """Read each lot file once, by its absolute path, for `reduce_many`.

    Parameters
    ----------
    lotfiles : sequence of path-like or LotConfig
        Lot files (TOML), or lot files already read (kept as they are).

    Returns
    -------
    list of LotConfig
        In the order given. The paths are made absolute before reading: a Dask worker has
        its own working directory, where a relative path names another file or none.
    """
    return [lf if isinstance(lf, LotConfig) else read_lot_file(Path(lf).absolute())
            for lf in lotfiles]


def lot_folders(configs, outroot):
    """Output folder of each lot under OUTROOT: OUTROOT/<lot id> (file-system-safe).

    Parameters
    ----------
    configs : sequence of LotConfig
        The lots (`read_lots`).
    outroot : path-like

    Returns
    -------
    list of pathlib.Path

    Raises
    ------
    FilmmapInputError
        Two lots with one id (their folders would collide).
    """
    from filmmap.wafermap.figures import safe_filename

    outroot = Path(outroot)
    seen = {}
    folders = []
    for config in configs:
        lot_id = config.lot.id
        if lot_id in seen:
            raise FilmmapInputError(f"lot id {lot_id!r} is also the id of {seen[lot_id]}; expected "
                                    "each lot once in a many-lot run", file=config.path,
                                    field="lot.id")
        seen[lot_id] = config.path
        folders.append(outroot / safe_filename(lot_id))
    return folders


def reduce_many(lotfiles, outroot, workers=None, scheduler=None, figures=True,
                keep_spectra=False, progress=None, protect=(), follow_output_link=False,
                preflight=None, pending_record=None):
    """Reduce several lots, each into its own folder OUTROOT/<lot id>, in parallel.

    Parameters
    ----------
    lotfiles : sequence of path-like or LotConfig
        Lot files, or lot files already read (`read_lots`): each is parsed once.
    outroot : path-like
        Parent folder of the lots' output folders.
    workers : int, optional
        Local processes (default: the core count, at most the number of lots).
    scheduler : str, optional
        Address of a Dask distributed scheduler (``tcp://host:port``): the lots run as
        tasks on its cluster instead of local processes (needs ``filmmap[cluster]``).
    figures, keep_spectra : bool
        As for `reduce_to_folder`.
    progress : callable, optional
        Called with one result dict as each lot finishes.
    protect, follow_output_link, preflight, pending_record
        As for `reduce_to_folder`; every lot's folder is checked against every lot's
        inputs (and ``protect``), and the space for all lots together, before any lot
        starts.

    Returns
    -------
    list of dict
        Per lot, in the order given: lot id, output folder, wafers, sites, failures,
        mean thickness, seconds. The numbers do not depend on how the lots ran: each lot
        is the same deterministic computation in a process of its own.
    """
    # absolute on the client before anything is submitted: a Dask worker has its own
    # working directory, where a relative path names another file or none (the cluster
    # must share the file system at these absolute paths; docs/formats.md)
    configs = read_lots(lotfiles)
    lotfiles = [Path(lf if not isinstance(lf, LotConfig) else lf.path).absolute()
                for lf in lotfiles]
    outroot = Path(outroot).absolute()
    protect = tuple((role, Path(p).absolute()) for role, p in protect)
    folders = [output_target(f, follow_output_link) for f in lot_folders(configs, outroot)]
    for f in folders:
        check_outdir(f)
    # one lot's folder must not swallow another lot's inputs either
    everyone = [item for config in configs for item in lot_inputs(config)]
    check_outputs_spare_inputs(folders, everyone + list(protect))
    need = sum(estimate_from_inputs(config, figures, keep_spectra) for config in configs)
    check_output_location(folders[0], need)
    for config in configs:
        if preflight is not None:
            preflight(config)
    tasks = [LotTask(lf, config, out, figures, keep_spectra, protect, pending_record)
             for lf, config, out in zip(lotfiles, configs, folders)]
    results = [None] * len(tasks)
    if scheduler is not None:
        try:
            from distributed import Client
        except ImportError:
            raise FilmmapInputError("--scheduler needs the optional Dask extra: "
                                    "pip install 'filmmap[cluster]'", field="--scheduler") from None
        with Client(scheduler) as client:
            futures = client.map(_reduce_one, tasks, pure=False)
            for i, fut in enumerate(futures):
                results[i] = fut.result()
                if progress:
                    progress(results[i])
        return results
    if workers is None:
        workers = min(os.cpu_count() or 1, len(tasks))
    if workers > 1 and len(tasks) > 1:
        from concurrent.futures import ProcessPoolExecutor

        from filmmap.workers import end_with_parent

        with ProcessPoolExecutor(max_workers=workers, initializer=end_with_parent) as pool:
            for i, res in enumerate(pool.map(_reduce_one, tasks)):
                results[i] = res
                if progress:
                    progress(res)
    else:
        for i, task in enumerate(tasks):
            results[i] = _reduce_one(task)
            if progress:
                progress(results[i])
    return results


def history_record(written, config, applied_trims_C=None):
    """The run-history record of a lot reduced in this process, from its result in memory.

    Parameters
    ----------
    written : WrittenLot
        As `reduce_to_folder` returns it, published: its lot view (``view``) and advice
        (``advice``) give every figure (`filmmap.history.records.record_from_view`); only
        the SHA-256 of the published ``lot.nc`` is read from disk.
    config : LotConfig
        The lot file as read: its recipe is recorded.
    applied_trims_C : mapping, optional
        Zone name -> trim in force during the run, K.

    Returns
    -------
    filmmap.history.records.LotRecord
    """
    from filmmap.history.records import file_sha256, recipe_steps, record_from_view

    nc = Path(written.outdir).absolute() / "lot.nc"
    return record_from_view(written.view, written.advice, recipe_steps(config), lot_nc_path=nc,
                            lot_nc_sha256=file_sha256(nc), applied_trims_C=applied_trims_C)


def record_history(outdir, config=None, db_path=None, applied_trims_C=None, *, record=None):
    """Record a reduced lot (its published OUTDIR) in the run history; True if it replaced one.

    ``record`` is the lot's record made in memory (`history_record`); without it (results
    published by an earlier run) the record is rebuilt from OUTDIR
    (`filmmap.history.importing.record_from_outputs`, with ``config`` and
    ``applied_trims_C``).  Recording is idempotent: the same lot and furnace replace their
    earlier record.  Once the record is committed, the folder's `PENDING_RECORD` marker is
    removed.

    Raises
    ------
    FilmmapOutputError
        The history could not be written (a full disk, say); the published results stay,
        with the marker that makes the next ``reduce`` into OUTDIR record them.
    """
    import sqlite3

    from filmmap.history.importing import record_from_outputs
    from filmmap.history.store import record_lot

    if record is None:
        record = record_from_outputs(outdir, config, applied_trims_C=applied_trims_C)
    try:
        replaced = record_lot(db_path, record)
    except sqlite3.Error as exc:
        from filmmap.history.store import default_history_path

        db = db_path or default_history_path()
        raise FilmmapOutputError(
            f"could not record lot {record.lot_id} in the history {db} ({exc}; is its disk "
            f"full?); the results are published in {outdir} and the history is as before; the "
            f"next reduce into {outdir} records them first", file=db, field="--history") from None
    fault_point("after-record")
    with contextlib.suppress(FileNotFoundError):
        (Path(outdir) / PENDING_RECORD).unlink()
    return replaced, record


def discard_pending_record(outdir):
    """Remove OUTDIR's `PENDING_RECORD` marker: its lot is deliberately not recorded."""
    with contextlib.suppress(FileNotFoundError):
        (Path(outdir) / PENDING_RECORD).unlink()


def complete_pending_record(outdir):
    """Record the lot of OUTDIR if an earlier run published it but stopped before recording.

    Parameters
    ----------
    outdir : path-like
        An output folder; nothing happens unless it holds `PENDING_RECORD`.

    Raises
    ------
    FilmmapInputError
        The marker is unreadable or the record fails; naming the marker, which the user
        may delete to give up that record.
    """
    marker = Path(outdir) / PENDING_RECORD
    if not marker.is_file():
        return None
    try:
        plan = json.loads(marker.read_text(encoding="utf-8"))
        db_path, trims = plan["db_path"], plan.get("applied_trims_C")
    except (OSError, ValueError, KeyError, TypeError) as exc:
        raise FilmmapInputError(f"unreadable record marker ({exc}); delete it to give up "
                                "recording the earlier results", file=marker) from None
    config = None
    lot_file = plan.get("lot_file") if isinstance(plan, dict) else None
    if lot_file and Path(lot_file).is_file():
        with contextlib.suppress(FilmmapInputError):
            candidate = read_lot_file(lot_file)
            if candidate.sha256 == plan.get("lot_file_sha256"):
                config = candidate  # unchanged since the reduce: its recipe and target hold
    try:
        return record_history(outdir, config, db_path, trims)
    except FilmmapInputError as exc:
        raise FilmmapInputError(f"the results in {outdir} were published by an earlier run that "
                                f"stopped before recording them, and recording them now failed: "
                                f"{exc}. Fix that, or delete {marker} to give up that record",
                                file=marker) from None


@dataclass(frozen=True)
class HistoryOptions:
    """Where and whether a reduce records its lot in the run history.

    Attributes
    ----------
    db_path : path-like or None
        History database (None: the per-user default,
        `filmmap.history.store.default_history_path`).
    record : bool
        Record the lot (False: ``--no-history``; the database is still protected from
        the output folder, which would delete it).
    applied_trims_C : dict {zone: K} or None
        Zone trims in force during the run, recorded for run-to-run control; checked
        against the lot file's zones and limits before any fit.
    """

    db_path: object = None
    record: bool = True
    applied_trims_C: dict | None = None

    def protect(self):
        """(role, path) of the database and its companion files, for ``protect``."""
        return history_inputs(self.db_path)

    def pending_record(self):
        """The ``pending_record`` of `reduce_to_folder`, or None when not recording."""
        if not self.record:
            return None
        from filmmap.history.store import default_history_path

        db = Path(self.db_path) if self.db_path else default_history_path()
        return {"db_path": str(db.absolute()), "applied_trims_C": self.applied_trims_C}

    def preflight(self, config):
        """Checks against the lot file, after the output-folder guards and before any fit."""
        from filmmap.bounds import check_zone_trims

        check_zone_trims(self.applied_trims_C, config, "--applied-trims")
        if self.record:
            check_history_writable(self.db_path)


@dataclass(frozen=True)
class RecordOutcome:
    """What `record_reduced_lot` did.

    Attributes
    ----------
    recorded : bool
        The lot is in the history now.
    replaced : bool
        It replaced an earlier record of the same lot and furnace.
    record : object or None
        The history record (`filmmap.history.store.LotRecord`) when recorded.
    reason : str
        Why the lot was not recorded ("" when it was).
    """

    recorded: bool
    replaced: bool = False
    record: object = None
    reason: str = ""


def record_reduced_lot(outdir, config, db_path=None, applied_trims_C=None, n_ok=None, *,
                       record=None):
    """Record a published lot in the run history, unless it has no thickness at all.

    Parameters
    ----------
    outdir : path-like
        The lot's published output folder.
    config : LotConfig
        Its lot file (recipe, target, furnace).
    db_path : path-like, optional
        History database (None: the per-user default).
    applied_trims_C : dict {zone: K}, optional
        Zone trims in force during the run.
    n_ok : int, optional
        Accepted sites of the lot; with none the lot is not recorded (a lot without one
        thickness has no statistics: recording it would poison the trends) and its
        pending-record marker is removed.
    record : LotRecord, optional
        The lot's record made in memory (`history_record`); None rebuilds it from OUTDIR.

    Returns
    -------
    RecordOutcome
    """
    if n_ok is not None and n_ok <= 0:
        discard_pending_record(outdir)
        return RecordOutcome(False, reason="every fit failed (see fit_note in lot.nc)")
    replaced, record = record_history(outdir, config, db_path, applied_trims_C, record=record)
    return RecordOutcome(True, bool(replaced), record)


RUN_TO_RUN_WEIGHT = 0.3
"""EWMA weight of the newest lot in the run-to-run estimate printed after a reduce."""


@dataclass(frozen=True)
class RunToRun:
    """The run-to-run estimate a reduce reports once a furnace has two recorded lots.

    Attributes
    ----------
    estimate : object or None
        `filmmap.history.r2r.NextRun` (``adjust_step``, ``minutes_next``,
        ``zone_trims_C``), None when the history gives none.
    n_lots : int
        Recorded lots of the furnace the estimate is made from.
    weight : float
        EWMA weight of the newest lot.
    reason : str
        Why there is no estimate although there are enough lots ("" otherwise).
    """

    estimate: object
    n_lots: int
    weight: float
    reason: str = ""


def run_to_run_estimate(config, db_path=None, weight=RUN_TO_RUN_WEIGHT):
    """The EWMA run-to-run estimate for the next run of ``config``'s recipe, or None.

    None when the lot file has no recipe, target or furnace name, or the furnace has
    fewer than two recorded lots; a `RunToRun` without an estimate (with its reason)
    when the history cannot give one.
    """
    from filmmap.history import lots, next_run_from_history

    if not config.recipe or config.target is None or not config.lot.furnace:
        return None
    rows = lots(db_path, furnace=config.lot.furnace)
    if len(rows) < 2:
        return None
    try:
        nxt = next_run_from_history(rows, config, weight=weight)
    except FilmmapInputError as exc:
        return RunToRun(None, len(rows), weight, exc.reason)
    return RunToRun(nxt, len(rows), weight)

