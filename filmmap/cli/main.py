"""Command-line entry point: a thin layer over the Python API.

Exit codes: 0 success, 2 bad input (a message naming the file and the line or
field; no traceback unless --debug), 1 an unexpected internal error.
"""

from __future__ import annotations

import argparse
import os
import sys
import time
import traceback
from pathlib import Path

from filmmap import __version__
from filmmap.errors import FilmmapInputError

CAUTION = ("filmmap advises; it never drives equipment. Any recipe or zone change is for the "
           "process owner to approve, within the furnace's qualified limits and local safety rules.")


def build_parser():
    parser = argparse.ArgumentParser(
        prog="filmmap",
        description="Oxide thickness maps, lot uniformity and next-run advice from optical spectra.")
    parser.add_argument("--version", action="version", version=f"filmmap {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")

    red = sub.add_parser("reduce", help="fit every spectrum of a lot and write the results")
    red.add_argument("lotfile", help="lot file (TOML)")
    red.add_argument("-o", "--output", required=True, metavar="OUTDIR",
                     help="output folder (created if missing)")
    red.add_argument("--no-figures", action="store_true", help="skip the PNG figures")
    red.add_argument("--workers", type=int, default=None, metavar="N",
                     help="fit wafers in N processes (default: 2 on a machine with 2 or more "
                          "cores and a lot of 16 or more files, else 1)")
    red.add_argument("--quiet", action="store_true", help="no progress bar or summary")
    red.add_argument("--keep-spectra", action="store_true",
                     help="also write spectra.nc with measured and model spectra and residuals")
    red.add_argument("--debug", action="store_true", help="show tracebacks")

    demo = sub.add_parser("demo", help="generate the invented demo lot and reduce it")
    demo.add_argument("-o", "--output", default="filmmap-demo", metavar="DIR",
                      help="folder for the demo lot (DIR/lot) and its results (DIR/results)")
    demo.add_argument("--no-figures", action="store_true", help="skip the PNG figures")
    demo.add_argument("--quiet", action="store_true")
    demo.add_argument("--debug", action="store_true", help="show tracebacks")
    return parser


def _progress_bar(total, quiet, desc):
    if quiet:
        return None
    from tqdm import tqdm
    return tqdm(total=total, desc=desc, unit="wafer", leave=False, disable=None)


def run_reduce(lotfile, outdir, workers=1, figures=True, quiet=False, keep_spectra=False,
               figure_workers=None):
    """Reduce a lot and write its outputs; returns (WrittenLot, seconds)."""
    from filmmap.io.lotfile import read_lot_file
    from filmmap.io.publish import check_outdir, staged_output
    from filmmap.outputs import write_lot
    from filmmap.reduce import reduce_lot

    t0 = time.perf_counter()
    check_outdir(outdir)  # refuse a foreign folder before spending time on fits
    n_files = len(read_lot_file(lotfile).measurement.files)
    if workers is None:
        workers = 2 if (os.cpu_count() or 1) >= 2 and n_files >= 16 else 1
    if workers < 1:
        raise FilmmapInputError(f"--workers must be >= 1, got {workers}", field="--workers")
    bar = _progress_bar(n_files, quiet, "fitting")
    try:
        reduction = reduce_lot(lotfile, workers=workers, keep_spectra=keep_spectra,
                               progress=(bar.update if bar is not None else None))
    finally:
        if bar is not None:
            bar.close()
    # every output goes to a staging folder that replaces OUTDIR only once complete
    with staged_output(outdir) as stage:
        written = write_lot(reduction, stage, keep_spectra=keep_spectra)
        if figures:
            from filmmap.figures_out import write_figures
            written.files.update(write_figures(written.dataset, reduction.config, stage,
                                               workers=figure_workers or max(2, workers)))
    written.outdir = Path(outdir)
    return reduction, written, time.perf_counter() - t0


def print_summary(reduction, written, seconds, stream=sys.stdout):
    """The one-screen summary after a reduce."""
    c = reduction.config
    ds = written.dataset
    p = stream.write
    p(f"lot {c.lot.id}" + (f"  furnace {c.lot.furnace}" if c.lot.furnace else "") + "\n")
    p(f"  wafers: {written.n_wafers}   sites fitted: {written.n_sites}   "
      f"failed fits: {written.n_failed}\n")
    if written.failures:
        p("  failures by reason: " + ", ".join(f"{k} x{v}" for k, v in written.failures.items()) + "\n")
    p(f"  mean thickness (all ok sites): {written.mean_nm:.2f} nm\n")
    if "role" in ds.coords:
        prod = ds["mean_nm"].where(ds["role"] == "product")
        if prod.notnull().any():
            p(f"  product wafers: {int(prod.notnull().sum())}, wafer means "
              f"{float(prod.min()):.2f} - {float(prod.max()):.2f} nm\n")
    p(f"  outputs in {written.outdir}:\n")
    n_maps = sum(1 for name in written.files if name.startswith("figures/"))
    for name in sorted(n for n in written.files if not n.startswith("figures/")):
        p(f"    {name}\n")
    if n_maps:
        p(f"    figures/  ({n_maps} wafer maps, PNG)\n")
    p(f"  done in {seconds:.1f} s\n")


def _fail(exc, debug):
    if debug:
        traceback.print_exc()
    sys.stderr.write(f"filmmap: error: {exc}\n")


def cmd_reduce(args):
    reduction, written, seconds = run_reduce(args.lotfile, args.output, args.workers,
                                             not args.no_figures, args.quiet, args.keep_spectra)
    if not args.quiet:
        print_summary(reduction, written, seconds)
    return 0


def cmd_demo(args):
    from filmmap.demo import generate_demo_lot

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


def main(argv=None):
    parser = build_parser()
    args = parser.parse_args(argv)
    if args.command is None:
        parser.print_help()
        return 0
    handler = {"reduce": cmd_reduce, "demo": cmd_demo}[args.command]
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
