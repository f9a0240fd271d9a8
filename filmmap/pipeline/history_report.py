"""The run-history report behind ``filmmap history``: control charts, their figures and history.html.

`write_history_report` reads the recorded lots (`filmmap.history.store.lots`, read-only),
computes the control charts (`filmmap.history.control`), draws them
(`filmmap.history.chart_figures`), optionally estimates the next run
(`filmmap.history.r2r.next_run_from_history`), and publishes the charts (PNG, named by
what they show) and the page (`filmmap.report.history_page`) into one output folder at once
(`filmmap.pipeline.publishing.staged_output`).  The command line only parses its options and prints
the returned `HistoryReport`.

References
----------
.. [1] Western Electric Company, Statistical Quality Control Handbook (1956).
.. [2] S. W. Roberts, Technometrics 1, 239-250 (1959).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

from filmmap.errors import FilmmapInputError

__all__ = ["HistoryReport", "write_history_report"]


@dataclass(frozen=True)
class HistoryReport:
    """What ``filmmap history`` wrote, for the console.

    Attributes
    ----------
    rows : list of filmmap.history.records.LotRecord
        The recorded lots charted, in run order.
    charts : dict
        metric -> ``(IndividualsChart, EwmaChart)`` (`filmmap.history.control.control_charts`).
    warnings : list of str
        Limits set from too few lots (`filmmap.history.control.baseline_warnings`).
    next_run : dict or None
        The run-to-run estimate (``NextRun.as_dict()``) when a lot file was given.
    config : LotConfig or None
        That lot file, as read.
    outdir : pathlib.Path
        The output folder.
    files : dict
        Output name -> path: ``history.html`` and one PNG per chart caption.
    """

    rows: list
    charts: dict
    warnings: list
    next_run: dict | None
    config: object | None
    outdir: Path
    files: dict = field(default_factory=dict)


def write_history_report(output, db_path=None, *, furnace=None, baseline=20, ewma_lambda=0.2,
                         weight=0.3, next_run_lotfile=None, follow_output_link=False):
    """Chart the recorded lots and publish the charts and history.html into ``output``.

    Parameters
    ----------
    output : path-like
        Output folder (new, empty or an earlier filmmap output folder; replaced whole).
    db_path : path-like, optional
        History database (default the per-user one); only read, never written.
    furnace : str, optional
        Only this furnace's lots.
    baseline : int
        Lots in the baseline window of the control limits (2 to
        `filmmap.bounds.MAX_BASELINE_LOTS`; all lots when fewer are recorded).
    ewma_lambda : float
        EWMA chart weight, 0 < lambda <= 1 (dimensionless).
    weight : float
        Run-to-run EWMA weight of the newest lot, 0 < w <= 1 (dimensionless).
    next_run_lotfile : path-like, optional
        Lot file whose recipe the run-to-run estimate is for (lots of its furnace, or
        all lots when it has none recorded).
    follow_output_link : bool
        ``output`` may be a symbolic link: its target is replaced, the link kept.

    Returns
    -------
    HistoryReport

    Raises
    ------
    FilmmapInputError
        Before anything is written: a value out of range (naming its option), an output
        folder that cannot take the results or would swallow an input, an unreadable
        history, no recorded lots, a bad lot file.

    References
    ----------
    .. [1] Western Electric Company, Statistical Quality Control Handbook (1956).
    .. [2] S. W. Roberts, Technometrics 1, 239-250 (1959).
    """
    from filmmap.bounds import MAX_BASELINE_LOTS, check_in_range
    from filmmap.history.chart_figures import history_figures, save_chart
    from filmmap.history.control import baseline_warnings, control_charts
    from filmmap.history.r2r import next_run_from_history
    from filmmap.history.store import default_history_path, lots
    from filmmap.pipeline.guard import (check_name_lengths, check_output_location,
                                        check_outputs_spare_inputs, estimate_output_bytes,
                                        history_inputs, output_target)
    from filmmap.pipeline.publishing import check_outdir, staged_output
    from filmmap.report.history_page import HISTORY_HTML, chart_filename, write_history_html

    # every value before any work (the control-chart code would clip a bad baseline silently)
    check_in_range(baseline, "--baseline", 2, MAX_BASELINE_LOTS, "--baseline (lots)")
    check_in_range(ewma_lambda, "--ewma-lambda", 0.0, 1.0, "--ewma-lambda", lo_open=True)
    check_in_range(weight, "--weight", 0.0, 1.0, "--weight", lo_open=True)
    outdir = output_target(output, follow_output_link)
    check_outdir(outdir)
    check_output_location(outdir, estimate_output_bytes(0, 0, figures=False))
    if db_path:
        check_name_lengths(db_path, "--history")
    inputs = history_inputs(db_path)
    if next_run_lotfile:
        inputs.append(("lot file", Path(next_run_lotfile)))
    check_outputs_spare_inputs([outdir], inputs)
    rows = lots(db_path, furnace=furnace)
    if not rows:
        where = db_path or default_history_path()
        raise FilmmapInputError(f"no lots recorded in {where}" + (
            f" for furnace {furnace!r}" if furnace else "")
            + "; run filmmap reduce first", field="--history")
    charts = control_charts(rows, baseline=baseline, lam=ewma_lambda)
    figs = history_figures(rows, charts)
    nxt = config = None
    if next_run_lotfile:
        from filmmap.io.lotfile import read_lot_file

        config = read_lot_file(next_run_lotfile)
        mine = [r for r in rows if r.furnace == config.lot.furnace] or rows
        nxt = next_run_from_history(mine, config, weight=weight).as_dict()
    files = {}
    with staged_output(outdir) as stage:
        for caption, fig in figs.items():
            files[caption] = save_chart(fig, stage / chart_filename(caption))  # by what it shows
        files[HISTORY_HTML] = write_history_html(stage / HISTORY_HTML, rows, figs, signals=charts,
                                                 next_run=nxt)
    files = {name: Path(outdir) / Path(path).name for name, path in files.items()}
    return HistoryReport(rows=rows, charts=charts, warnings=baseline_warnings(charts),
                         next_run=nxt, config=config, outdir=Path(outdir), files=files)
