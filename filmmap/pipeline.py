"""Reduce a lot into its output folder: the whole job behind ``filmmap reduce``, as an API.

    from filmmap.pipeline import reduce_to_folder
    reduction, written, seconds = reduce_to_folder("lot.toml", "results/")
"""

from __future__ import annotations

import json
import os
import time
from pathlib import Path

import numpy as np

from filmmap.errors import FilmmapInputError
from filmmap.growth.advice import advise_from_config
from filmmap.io.atomic import write_text_atomic
from filmmap.io.guard import check_outputs_spare_inputs, lot_inputs, output_target
from filmmap.io.lotfile import read_lot_file
from filmmap.io.publish import check_outdir, staged_output
from filmmap.outputs import write_lot
from filmmap.reduce import reduce_lot
from filmmap.report.lotview import DEFAULT_MIN_SITES as MIN_SITES_FOR_LOT
from filmmap.report.lotview import lot_view
from filmmap.report.summary_json import write_summary_csv, write_summary_json

# a wafer with fewer usable sites than MIN_SITES_FOR_LOT is left out of lot statistics and advice

def reduce_to_folder(lotfile, outdir, workers=None, figures=True, keep_spectra=False,
                     figure_workers=None, progress=None, protect=(), follow_output_link=False,
                     report=True, pdf_wafer_pages=False):
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
        inside, e.g. `filmmap.io.guard.history_inputs` (the lot's own inputs are always
        protected).
    follow_output_link : bool
        ``outdir`` may be a symbolic link: its target is replaced, the link kept.

    Returns
    -------
    (LotReduction, WrittenLot, seconds)

    Raises
    ------
    FilmmapInputError
        Before any fit or write: a foreign or linked output folder, or one that equals,
        contains or lies inside an input (`filmmap.io.guard`).
    """

    t0 = time.perf_counter()
    outdir = output_target(outdir, follow_output_link)
    check_outdir(outdir)  # refuse a foreign folder before spending time on fits
    config = read_lot_file(lotfile)
    # replacing OUTDIR deletes what is in it: never when an input is there (nothing staged yet)
    check_outputs_spare_inputs([outdir], lot_inputs(config) + list(protect))
    n_files = len(config.measurement.files)
    if workers is None:
        workers = 2 if (os.cpu_count() or 1) >= 2 and n_files >= 16 else 1
    if workers < 1:
        raise FilmmapInputError(f"--workers must be >= 1, got {workers}", field="--workers")
    bar = _bar(progress, n_files, "fitting")
    try:
        reduction = reduce_lot(lotfile, workers=workers, keep_spectra=keep_spectra, config=config,
                               progress=(bar.update if bar is not None else None))
    finally:
        if bar is not None:
            bar.close()
    # every output goes to a staging folder that replaces OUTDIR only once complete
    with staged_output(outdir) as stage:
        written = write_lot(reduction, stage, keep_spectra=keep_spectra)
        view = lot_view(written.dataset, reduction.config, min_sites=MIN_SITES_FOR_LOT)
        written.files["summary.csv"] = write_summary_csv(view, stage / "summary.csv")
        written.files["summary.json"] = write_summary_json(view, stage)
        advice = write_advice(reduction.config, written, stage)
        if advice is not None:
            written.files["advice.json"] = stage / "advice.json"
        written.advice = advice
        written.view = view
        if figures:
            from filmmap.figures_out import write_figures

            written.figure_notes = []
            written.files.update(write_figures(
                written.dataset, reduction.config, stage,
                workers=figure_workers or max(2, workers),
                out_of_spec=view.wtw.out_of_spec_ids if view.target_nm is not None else (),
                progress=lambda n: _bar(progress, n, "maps"), notes=written.figure_notes))
        if report:
            from filmmap.report import ReportImages, write_html_report, write_pdf_report

            images = ReportImages(view, written.dataset, stage, render_missing=False,
                                  no_map_reason=None if figures else
                                  "maps not drawn (reduce --no-figures)")
            written.files["report.pdf"] = write_pdf_report(
                view, written.dataset, stage, images=images, advice=advice,
                wafer_pages=pdf_wafer_pages, progress=lambda n: _bar(progress, n, "report.pdf"))
            written.files["report.html"] = write_html_report(view, written.dataset, stage,
                                                             images=images, advice=advice)
            written.files.update(_write_evidence_pdf(view, written.dataset, images, stage))
            images.close()
    written.outdir = Path(outdir)
    return reduction, written, time.perf_counter() - t0




def _write_evidence_pdf(view, ds, images, folder):
    """evidence.pdf with every failed and suspect site when the report page shows only some."""
    from filmmap.report.evidence import MAX_ON_PAGE, all_bad_sites, write_evidence_pdf

    spectra = images.spectra()
    if spectra is None:
        return {}
    sites = all_bad_sites(view, ds)
    if len(sites) <= MAX_ON_PAGE:
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


def write_advice(config, written, folder):
    """advice.json when the lot file has a recipe and a target; returns the advice or None."""
    if not config.recipe or config.target is None:
        return None
    ds = written.dataset
    usable = ds["sites_used"].values >= MIN_SITES_FOR_LOT
    mean = np.where(usable, ds["mean_nm"].values, np.nan)
    advice = advise_from_config(config, ds["slot"].values, mean, ds["role"].values,
                                n_failed_sites=written.n_failed, n_sites=written.n_sites)
    for w in ds.wafer.values[~usable]:
        advice["warnings"].append(f"wafer {w} has fewer than {MIN_SITES_FOR_LOT} usable sites "
                                  "and was left out of the calibration")
    write_text_atomic(folder / "advice.json", json.dumps(advice, indent=1, allow_nan=False) + "\n")
    return advice




def _reduce_one(task):
    """One lot of a many-lot run (a worker process, a Dask task or inline)."""
    lotfile, outdir, figures, keep_spectra, protect = task
    reduction, written, seconds = reduce_to_folder(lotfile, outdir, workers=1, figures=figures,
                                                   keep_spectra=keep_spectra, figure_workers=1,
                                                   protect=protect)
    return dict(lotfile=str(lotfile), outdir=str(outdir), lot_id=reduction.config.lot.id,
                n_wafers=written.n_wafers, n_sites=written.n_sites, n_failed=written.n_failed,
                mean_nm=written.mean_nm, seconds=seconds)


def lot_folders(lotfiles, outroot):
    """Output folder of each lot under OUTROOT: OUTROOT/<lot id> (file-system-safe)."""
    from filmmap.wafermap.figures import safe_filename

    outroot = Path(outroot)
    seen = {}
    folders = []
    for lf in lotfiles:
        lot_id = read_lot_file(lf).lot.id
        if lot_id in seen:
            raise FilmmapInputError(f"lot id {lot_id!r} is also the id of {seen[lot_id]}; expected "
                                    "each lot once in a many-lot run", file=lf, field="lot.id")
        seen[lot_id] = lf
        folders.append(outroot / safe_filename(lot_id))
    return folders


def reduce_many(lotfiles, outroot, workers=None, scheduler=None, figures=True,
                keep_spectra=False, progress=None, protect=(), follow_output_link=False):
    """Reduce several lots, each into its own folder OUTROOT/<lot id>, in parallel.

    Parameters
    ----------
    lotfiles : sequence of path-like
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
    protect, follow_output_link
        As for `reduce_to_folder`; every lot's folder is checked against every lot's
        inputs (and ``protect``) before any lot starts.

    Returns
    -------
    list of dict
        Per lot, in the order given: lot id, output folder, wafers, sites, failures,
        mean thickness, seconds. The numbers do not depend on how the lots ran: each lot
        is the same deterministic computation in a process of its own.
    """
    lotfiles = [Path(p) for p in lotfiles]
    folders = [output_target(f, follow_output_link) for f in lot_folders(lotfiles, outroot)]
    for f in folders:
        check_outdir(f)
    # one lot's folder must not swallow another lot's inputs either
    everyone = [item for lf in lotfiles for item in lot_inputs(read_lot_file(lf))]
    protect = list(protect)
    check_outputs_spare_inputs(folders, everyone + protect)
    tasks = [(lf, out, figures, keep_spectra, protect) for lf, out in zip(lotfiles, folders)]
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

        with ProcessPoolExecutor(max_workers=workers) as pool:
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


def record_history(outdir, config=None, db_path=None, applied_trims_C=None):
    """Record a reduced lot (its published OUTDIR) in the run history; True if it replaced one."""
    from filmmap.history import record_from_outputs, record_lot

    record = record_from_outputs(outdir, config, applied_trims_C=applied_trims_C)
    return record_lot(db_path, record), record
