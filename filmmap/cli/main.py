"""Command-line entry point: argument parsing and printing over the Python API.

Every job is a function of `filmmap.pipeline` (reduce, record, predict, plan, export,
demo) or of the layers below it; this module only turns options into their arguments
and their results into lines on the console.

Exit codes: 0 success, 2 bad input (a message naming the file and the line or
field; no traceback unless --debug), 1 an unexpected internal error.
"""

from __future__ import annotations

import argparse
import sys
import traceback
from pathlib import Path

from filmmap import __version__
from filmmap.cautions import CONSOLE_CAUTION as CAUTION
from filmmap.errors import FilmmapInputError
from filmmap.report.formatting import signed


def _furnace_model_options(parser, trim_help):
    """The furnace-model options predict and plan share: trims, a calibrated profile, history."""
    parser.add_argument("--trim", action="append", default=[], metavar="ZONE=KELVIN",
                        help=trim_help)
    parser.add_argument("--advice", metavar="ADVICE_JSON",
                        help="use the calibrated furnace profile of an advice.json")
    parser.add_argument("--furnace-history", action="store_true",
                        help="use the furnace's growth rate (and zone coupling width) learned "
                             "from its recorded lots")
    parser.add_argument("--history", metavar="PATH", help="run-history database")


def build_parser():
    parser = argparse.ArgumentParser(
        prog="filmmap",
        description="Oxide thickness maps, lot uniformity and next-run advice from optical spectra.")
    parser.add_argument("--version", action="version", version=f"filmmap {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")

    red = sub.add_parser("reduce", help="fit every spectrum of a lot and write the results")
    red.add_argument("lotfile", nargs="+", help="lot file(s) (TOML)")
    red.add_argument("-o", "--output", required=True, metavar="OUTDIR",
                     help="output folder (created if missing); with several lot files, the "
                          "parent folder OUTROOT of one folder per lot (OUTROOT/<lot id>)")
    red.add_argument("--scheduler", metavar="ADDRESS",
                     help="run the lots on a Dask distributed cluster (needs filmmap[cluster])")
    red.add_argument("--history", metavar="PATH",
                     help="run-history database (default: the per-user location, see README)")
    red.add_argument("--no-history", action="store_true", help="do not record the lot(s)")
    red.add_argument("--furnace-history", action="store_true",
                     help="advise with the furnace's growth rate learned from its recorded lots")
    red.add_argument("--applied-trims", action="append", default=[], metavar="ZONE=KELVIN",
                     help="zone trims that were in force during this run (for run-to-run "
                          "control), e.g. --applied-trims load=+2.2 (repeatable)")
    red.add_argument("--no-figures", action="store_true",
                     help="skip the PNG wafer maps and contact sheet (report.html and report.pdf "
                          "are still written, without maps; see --no-report)")
    red.add_argument("--no-report", action="store_true",
                     help="skip report.html and report.pdf")
    red.add_argument("--pdf-wafer-pages", action="store_true",
                     help="one page per wafer in report.pdf (default: an index of the wafers)")
    red.add_argument("--follow-output-link", action="store_true",
                     help="OUTDIR may be a symbolic link: replace the folder it points to and "
                          "keep the link (without this option a link is refused)")
    red.add_argument("--workers", type=int, default=None, metavar="N",
                     help="fit wafers in N processes (default: 2 on a machine with 2 or more "
                          "cores and a lot of 16 or more files, else 1)")
    red.add_argument("--quiet", action="store_true", help="no progress bar or summary")
    red.add_argument("--keep-spectra", action="store_true",
                     help="also write spectra.nc with measured and model spectra and residuals")
    red.add_argument("--debug", action="store_true", help="show tracebacks")

    hist = sub.add_parser("history", help="trend table and control charts of recorded lots")
    hist.add_argument("--furnace", metavar="NAME", help="only this furnace's lots")
    hist.add_argument("--history", metavar="PATH", help="run-history database")
    hist.add_argument("-o", "--output", default="filmmap-history", metavar="DIR",
                      help="folder for the charts (PNG) and history.html")
    hist.add_argument("--follow-output-link", action="store_true",
                      help="DIR may be a symbolic link: replace the folder it points to")
    hist.add_argument("--baseline", type=int, default=20, metavar="N",
                      help="lots in the baseline window of the control limits (default 20)")
    hist.add_argument("--ewma-lambda", type=float, default=0.2, metavar="L",
                      help="EWMA chart weight (default 0.2)")
    hist.add_argument("--next-run", metavar="LOTFILE",
                      help="run-to-run estimate for the next run of this lot file's recipe")
    hist.add_argument("--weight", type=float, default=0.3, metavar="W",
                      help="run-to-run EWMA weight of the newest lot (default 0.3)")
    hist.add_argument("--debug", action="store_true", help="show tracebacks")

    pred = sub.add_parser("predict", help="predicted thickness by zone for the lot file's recipe")
    pred.add_argument("lotfile", help="lot file (TOML) with [[recipe.step]]")
    pred.add_argument("--set", action="append", default=[], metavar="STEP.FIELD=VALUE",
                      help="what-if change of a step, e.g. --set wet.minutes=170 or "
                           "--set wet.at_C=1005 (repeatable)")
    _furnace_model_options(pred, "what-if zone trim, e.g. --trim load=+2 (repeatable)")
    pred.add_argument("--debug", action="store_true", help="show tracebacks")

    plan = sub.add_parser("plan", help="plan a run before it happens: the step time that hits "
                                       "the target, thickness by zone and slot (no spectra needed)")
    plan.add_argument("lotfile", help="lot file (TOML) with [[recipe.step]] and [target]")
    _furnace_model_options(plan, "zone trim to plan with, e.g. --trim load=+2 (repeatable)")
    plan.add_argument("--slots", action="store_true", help="also print the thickness per slot")
    plan.add_argument("--debug", action="store_true", help="show tracebacks")

    exp = sub.add_parser("export", help="write sites.csv and summary.csv (and spectra.csv from "
                                        "spectra.nc) of an existing lot.nc")
    exp.add_argument("lotnc", metavar="LOTNC", help="lot.nc written by filmmap reduce")
    exp.add_argument("-o", "--output", required=True, metavar="DIR",
                     help="output folder (new, empty or an earlier filmmap output folder; "
                          "replaced whole)")
    exp.add_argument("--debug", action="store_true", help="show tracebacks")

    init = sub.add_parser("init", help="write a commented lot-file template")
    init.add_argument("path", nargs="?", default="lot.toml", metavar="LOTFILE",
                      help="file to write (default lot.toml; never overwritten)")
    init.add_argument("--debug", action="store_true", help="show tracebacks")

    chk = sub.add_parser("check", help="validate a lot file and its data without fitting")
    chk.add_argument("lotfile", metavar="LOTFILE", help="lot file (TOML)")
    chk.add_argument("--debug", action="store_true", help="show tracebacks")

    fmt = sub.add_parser("formats", help="print the file formats document (docs/formats.md)")
    fmt.add_argument("--debug", action="store_true", help="show tracebacks")

    demo = sub.add_parser("demo", help="generate the invented demo lot and reduce it")
    demo.add_argument("-o", "--output", default="filmmap-demo", metavar="DIR",
                      help="folder for the demo lot (DIR/lot) and its results (DIR/results)")
    demo.add_argument("--no-figures", action="store_true",
                      help="skip the PNG wafer maps and contact sheet (the reports are still "
                           "written, without maps)")
    demo.add_argument("--quiet", action="store_true")
    demo.add_argument("--debug", action="store_true", help="show tracebacks")
    return parser


def _progress_bar(total, desc):
    from tqdm import tqdm
    unit = "page" if desc.endswith(".pdf") else "wafer"
    return tqdm(total=total, desc=desc, unit=unit, leave=False, disable=None)


def run_reduce(lotfile, outdir, workers=None, figures=True, quiet=False, keep_spectra=False,
               figure_workers=None, protect=(), follow_output_link=False, preflight=None,
               pending_record=None, rate_factors=None, report=True, pdf_wafer_pages=False,
               advice_options=None, config=None):
    """`filmmap.pipeline.run.reduce_to_folder` with progress bars (fitting, maps, report.pdf)."""
    from filmmap.pipeline.run import reduce_to_folder

    return reduce_to_folder(lotfile, outdir, workers, figures, keep_spectra, figure_workers,
                            progress=None if quiet else _progress_bar,
                            protect=protect, follow_output_link=follow_output_link,
                            preflight=preflight, pending_record=pending_record,
                            rate_factors=rate_factors, report=report,
                            pdf_wafer_pages=pdf_wafer_pages, advice_options=advice_options,
                            config=config)


def print_advice(advice, stream=sys.stdout):
    """A few lines of advice with its caution (the full record is advice.json)."""
    p = stream.write
    p(f"  advice (advisory only): {advice['adjust_step']} {advice['minutes_now']:.1f} -> "
      f"{advice['minutes_next']:.1f} min")
    if advice["zone_offsets_C"]:
        p("; zone trims " + ", ".join(f"{k} {signed(v, 2, 'K')}"
                                      for k, v in advice["zone_offsets_C"].items()))
    p("\n")
    now, nxt = advice["predicted_wtw_pct_now"], advice["predicted_wtw_pct_next"]
    if now is not None and nxt is not None:
        p(f"  predicted WTW: {now:.2f} % now -> {nxt:.2f} % next\n")
    for w in advice["warnings"]:
        p(f"  warning: {w}\n")


def print_summary(reduction, written, seconds, stream=sys.stdout):
    """The one-screen summary after a reduce."""
    import numpy as np

    from filmmap.bridge import site_grid, wafer_values

    c = reduction.config
    ds = written.dataset
    p = stream.write
    p(f"lot {c.lot.id}" + (f"  furnace {c.lot.furnace}" if c.lot.furnace else "") + "\n")
    p(f"  wafers: {written.n_wafers}   sites fitted: {written.n_sites}   "
      f"failed fits: {written.n_failed}\n")
    if written.failures:
        p("  failures by reason: " + ", ".join(f"{k} x{v}" for k, v in written.failures.items()) + "\n")
    p(f"  mean thickness (all ok sites): {written.mean_nm:.2f} nm\n")
    for w in getattr(reduction, "warnings", ()):
        p(f"  warning: {w}\n")
    view = written.view
    said_action = False
    if view is not None:
        from filmmap.report.decision import decision

        block = decision(view, written.advice)
        said_action = bool(block.action)
        for line in block.lines():   # same block as report page 1
            p(f"  {line}\n")
        p(f"  verdict: {view.verdict}\n")
        for w in view.warnings[:5]:
            p(f"  warning: {w}\n")
    for note in getattr(written, "figure_notes", None) or ():
        p(f"  figures: {note}\n")
    roles = site_grid(ds).role
    if roles is not None:
        means = wafer_values(ds, "mean_nm")[roles == "product"]
        means = means[~np.isnan(means)]
        if means.size:
            p(f"  product wafers: {means.size}, wafer means "
              f"{float(means.min()):.2f} - {float(means.max()):.2f} nm\n")
    p(f"  outputs in {written.outdir}:\n")
    n_maps = sum(1 for name in written.files if name.startswith("figures/"))
    for name in sorted(n for n in written.files if not n.startswith("figures/")):
        p(f"    {name}\n")
    if n_maps:
        p(f"    figures/  ({n_maps} wafer maps, PNG)\n")
    if written.advice:
        if said_action:
            # the decision block already said the next run in one sentence: only the
            # advice's own warnings remain to be shown
            for w in written.advice["warnings"]:
                p(f"  advice warning: {w}\n")
        else:
            print_advice(written.advice, stream)
    p(f"  done in {seconds:.1f} s\n")


def _fail(exc, debug):
    if debug:
        traceback.print_exc()
    sys.stderr.write(f"filmmap: error: {exc}\n")


def cmd_reduce(args):
    from filmmap.bounds import MAX_WORKERS, check_in_range
    from filmmap.pipeline.run import HistoryOptions

    # every command-line value and the history are checked before any fit
    trims = _parse_assignments(args.applied_trims, "--applied-trims", "ZONE") or None
    if args.workers is not None and args.workers > MAX_WORKERS:   # >= 1: reduce_to_folder
        check_in_range(args.workers, "--workers", 1, MAX_WORKERS, "--workers")
    history = HistoryOptions(args.history, not args.no_history, trims)
    # the history file is protected even with --no-history: replacing OUTDIR would delete it
    protect = history.protect()
    if len(args.lotfile) > 1 or args.scheduler:
        if args.furnace_history:
            raise FilmmapInputError("--furnace-history takes one lot file (each furnace learns "
                                    "its own rate)", field="--furnace-history")
        return _reduce_many(args, history, protect)
    config, learning = None, None
    if args.furnace_history:
        from filmmap.io.lotfile import read_lot_file
        from filmmap.pipeline.furnace import learn_from_history

        config = read_lot_file(args.lotfile[0])
        learning = learn_from_history(config, args.history)
        _print_lines(learning.lines)
    reduction, written, seconds = run_reduce(
        args.lotfile[0], args.output, args.workers, not args.no_figures, args.quiet,
        args.keep_spectra, protect=protect, follow_output_link=args.follow_output_link,
        preflight=history.preflight, pending_record=history.pending_record(),
        rate_factors=learning.rate_factors if learning else None,
        advice_options=learning.coupling if learning else {}, report=not args.no_report,
        pdf_wafer_pages=args.pdf_wafer_pages, config=config)
    if not args.quiet:
        print_summary(reduction, written, seconds)
    if not args.no_history:
        from filmmap.pipeline.run import history_record

        _record(written.outdir, reduction.config, args.history, trims, args.quiet,
                n_ok=int(written.n_sites) - int(written.n_failed),
                record=history_record(written, reduction.config, trims))
    return 0


def _print_lines(lines):
    for line in lines:
        print(line)


def _record(outdir, config, db_path, trims, quiet, n_ok=None, record=None):
    """Record a published lot in the history and say so (with the run-to-run estimate)."""
    from filmmap.pipeline.run import record_reduced_lot, run_to_run_estimate

    outcome = record_reduced_lot(outdir, config, db_path, trims, n_ok=n_ok, record=record)
    if not outcome.recorded:
        sys.stderr.write(f"filmmap: lot {config.lot.id} is not recorded in the history: "
                         f"{outcome.reason}\n")
        return
    if quiet:
        return
    what = "replaced its earlier record" if outcome.replaced else "recorded"
    print(f"  history: lot {outcome.record.lot_id} {what} in "
          f"{db_path or 'the default history'}")
    r2r = run_to_run_estimate(config, db_path)
    if r2r is None:
        return
    if r2r.estimate is None:
        print(f"  run-to-run: no estimate ({r2r.reason})")
        return
    nxt = r2r.estimate
    trims_now = ", ".join(f"{k} {signed(v, 2, 'K')}" for k, v in nxt.zone_trims_C.items())
    print(f"  run-to-run (EWMA w = {r2r.weight:g} over {r2r.n_lots} lots of "
          f"{config.lot.furnace}): {nxt.adjust_step} {nxt.minutes_next:.1f} min"
          + (f"; trims in force {trims_now}" if trims_now else "") + " (advisory only)")


def _reduce_many(args, history, protect):
    from filmmap.pipeline.run import read_lots, reduce_many

    def report(res):
        if not args.quiet:
            print(f"  lot {res['lot_id']}: {res['n_wafers']} wafers, {res['n_sites']} sites, "
                  f"{res['n_failed']} failed, mean {res['mean_nm']:.2f} nm -> {res['outdir']}")

    configs = read_lots(args.lotfile)      # each lot file parsed once for the whole run
    results = reduce_many(configs, args.output, workers=args.workers,
                          scheduler=args.scheduler, figures=not args.no_figures,
                          keep_spectra=args.keep_spectra, progress=report, protect=protect,
                          follow_output_link=args.follow_output_link,
                          preflight=history.preflight, pending_record=history.pending_record())
    if not args.no_history:
        for config, res in zip(configs, results):
            _record(res["outdir"], config, args.history, history.applied_trims_C, args.quiet,
                    n_ok=res["n_sites"] - res["n_failed"], record=res.get("record"))
    if not args.quiet:
        print(f"{len(results)} lots reduced into {args.output}")
    return 0


def cmd_history(args):
    from filmmap.pipeline.history_report import write_history_report

    rep = write_history_report(args.output, args.history, furnace=args.furnace,
                               baseline=args.baseline, ewma_lambda=args.ewma_lambda,
                               weight=args.weight, next_run_lotfile=args.next_run,
                               follow_output_link=args.follow_output_link)
    rows = rep.rows
    print(f"{'run date':<11} {'lot':<18} {'furnace':<24} {'mean nm':>9} {'WTW %':>7} {'WIW %':>7}")
    for r in rows:
        def f(v, d=2):
            return "-" if v is None else f"{v:.{d}f}"
        print(f"{str(r.run_date or '-'):<11} {r.lot_id:<18} {str(r.furnace or '-'):<24} "
              f"{f(r.lot_mean_nm):>9} {f(r.wtw_pct, 3):>7} {f(r.wiw_mean_pct, 3):>7}")
    if args.baseline > len(rows):
        print(f"  baseline: all {len(rows)} lots (fewer recorded than --baseline {args.baseline})")
    print(f"charts and history.html in {args.output}")
    for w in rep.warnings:
        print(f"  warning: {w}")
    for metric, (ind, ewma) in rep.charts.items():
        flagged = [rows[i].lot_id for i, fl in enumerate(ind.flags) if fl]
        if flagged:
            print(f"  {metric}: Western Electric signals at lots " + ", ".join(flagged))
    if rep.next_run is not None:
        from filmmap.report.history_page import next_run_lines

        print(f"run-to-run estimate (EWMA weight {args.weight:g}) for {rep.config.lot.id}'s recipe "
              "(also on history.html):")
        for line in next_run_lines(rep.next_run):
            print(f"  {line}")
        print(rep.next_run.get("caution", CAUTION))
    print(CAUTION)
    return 0


def cmd_export(args):
    from filmmap.pipeline.export import export_lot

    for name, path in export_lot(args.lotnc, args.output).items():
        print(f"  {name}: {path}")
    return 0


def cmd_init(args):
    from filmmap.io.template import write_template

    path = write_template(args.path)
    print(f"lot-file template written to {path}; edit it, then: filmmap check {path}")
    return 0


def cmd_check(args):
    from filmmap.io.check import check_lot

    r = check_lot(args.lotfile)
    print(f"lot {r.lot_id}: OK ({r.layout} layout) - {r.n_files} file(s), {r.n_wafers} wafer(s) "
          f"in slots {', '.join(map(str, r.slots))}, {r.n_sites} site(s), {r.n_wavelengths} "
          f"wavelengths {r.wavelength_range_nm[0]:g}-{r.wavelength_range_nm[1]:g} nm; "
          "nothing fitted, nothing written")
    return 0


def cmd_formats(args):
    from filmmap.io.template import formats_text

    sys.stdout.write(formats_text())
    return 0


def cmd_demo(args):
    from filmmap.pipeline.demo import generate_demo_lot

    root = Path(args.output)
    lot = generate_demo_lot(root / "lot")
    if not args.quiet:
        print(f"invented demo lot written to {lot.parent} (fictional data, not measurements)")
    reduction, written, seconds = run_reduce(lot, root / "results", None, not args.no_figures,
                                             args.quiet, figure_workers=2)
    if not args.quiet:
        print_summary(reduction, written, seconds)
        print(CAUTION)
    return 0


def _parse_assignments(items, option, kind, finite=True):
    """KEY=NUMBER items of a repeatable option: numbers (finite unless told), each key once."""
    from filmmap.bounds import finite_number

    out = {}
    for item in items:
        key, sep, value = item.partition("=")
        key = key.strip()
        if not sep or not key:
            raise FilmmapInputError(f"expected {kind}=NUMBER, got {item!r}", field=option)
        if finite:
            number = finite_number(value, option, f"{kind}=NUMBER", shown=item)
        else:
            try:
                number = float(value)
            except ValueError:
                raise FilmmapInputError(f"expected {kind}=NUMBER, got {item!r}",
                                        field=option) from None
        if key in out:
            raise FilmmapInputError(f"{key} is given twice ({out[key]:g} and {number:g}); "
                                    "expected each once", field=option)
        out[key] = number
    return out


def _print_zone_table(zones):
    """Thickness by zone of a prediction or a plan."""
    print(f"  {'zone':<10} {'slots':>7} {'trim K':>7} {'mean nm':>9} {'min':>8} {'max':>8} "
          f"{'vs target':>9}")
    for z in zones:
        dev = "" if z["deviation_pct"] is None else f"{z['deviation_pct']:+.2f} %"
        print(f"  {z['zone']:<10} {z['first_slot']:>3}-{z['last_slot']:<3} {z['trim_C']:>7.2f} "
              f"{z['mean_nm']:>9.2f} {z['min_nm']:>8.2f} {z['max_nm']:>8.2f} {dev:>9}")


def cmd_predict(args):
    from filmmap.pipeline.furnace import predict_recipe

    changes = _parse_assignments(args.set, "--set", "STEP.FIELD", finite=False)
    trims = _parse_assignments(args.trim, "--trim", "ZONE")
    outlook = predict_recipe(args.lotfile, changes, trims, advice=args.advice,
                             furnace_history=args.furnace_history, history=args.history)
    _print_lines(outlook.learning.lines)
    config, table = outlook.config, outlook.result
    print(f"lot {config.lot.id}: predicted oxide by zone for the recipe"
          + (" with changes" if changes or trims else " as written"))
    for st in table["recipe"]:
        temp = (f"{st['at_C']:g} C" if st.get("at_C") is not None
                else f"{st.get('from_C')}->{st.get('to_C')} C")
        print(f"  step {st['name']:<14} {st['ambient']:<4} {st['minutes']:8.1f} min  {temp}"
              + ("   (changed)" if st.get("changed") else ""))
    _print_zone_table(table["zones"])
    if table["product_mean_nm"] is not None:
        wtw = table["product_wtw_pct"]
        print(f"  product mean {table['product_mean_nm']:.2f} nm"
              + (f", WTW {wtw:.2f} %" if wtw is not None else ""))
    for note in table["notes"]:
        print(f"  note: {note}")
    print(CAUTION)
    return 0


def cmd_plan(args):
    from filmmap.pipeline.furnace import plan_recipe

    trims = _parse_assignments(args.trim, "--trim", "ZONE")
    outlook = plan_recipe(args.lotfile, trims, advice=args.advice,
                          furnace_history=args.furnace_history, history=args.history)
    config, out = outlook.config, outlook.result
    print(f"lot {config.lot.id}: plan for the recipe as written"
          + (" with trims" if trims else ""))
    _print_lines(outlook.learning.lines)
    table = out["prediction"]
    change = 100.0 * (out["minutes_planned"] / out["minutes_written"] - 1.0)
    print(f"  step {out['adjust_step']}: {out['minutes_planned']:.1f} min for the target "
          f"{table['target_nm']:g} nm (written: {out['minutes_written']:.1f} min, {change:+.1f} %)")
    _print_zone_table(table["zones"])
    if args.slots:
        print(f"  {'slot':>4} {'role':<8} {'offset K':>8} {'nm':>9}")
        for r in table["slots"]:
            print(f"  {r['slot']:>4} {r['role']:<8} {r['offset_C']:>8.2f} {r['thickness_nm']:>9.2f}")
    for note in table["notes"]:
        print(f"  note: {note}")
    print(CAUTION)
    return 0


def main(argv=None):
    parser = build_parser()
    args = parser.parse_args(argv)
    if args.command is None:
        parser.print_help()
        return 0
    handler = {"reduce": cmd_reduce, "demo": cmd_demo, "predict": cmd_predict,
               "history": cmd_history, "plan": cmd_plan, "export": cmd_export, "init": cmd_init,
               "check": cmd_check, "formats": cmd_formats}[args.command]
    try:
        return handler(args)
    except FilmmapInputError as exc:
        _fail(exc, args.debug)
        return 2
    except KeyboardInterrupt:
        sys.stderr.write("filmmap: interrupted\n")
        return 130
    except Exception as exc:  # an internal error: say so plainly, keep the trace on request
        _fail(f"internal error ({type(exc).__name__}): {exc}; rerun with --debug for details",
              args.debug)
        return 1


if __name__ == "__main__":
    sys.exit(main())
