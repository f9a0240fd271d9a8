"""Report time, growth and memory, measured side by side in one run.

1. Side by side (150 wafers x 49 sites, the lot of `benchmarks/reduce.py` with a target):
   the whole `filmmap reduce` command by default (wafer maps, contact sheet, report.html,
   report.pdf) against `--no-figures --no-report` (fit, lot.nc, summaries, advice only),
   alternated, ``repeats`` runs each, best wall time; ratio printed (issue goal <= 2).
   Also the sizes of report.html and report.pdf.
2. Growth: the report parts timed in this process (CPU seconds: maps on one process,
   the contact sheet as `filmmap reduce` draws it, report.html, report.pdf) for 75 / 150 / 300 / 600 wafers made by
   repeating the wafers of one reduced 75-wafer lot; the exponent of each part between
   successive sizes, log(t2 / t1) / log(n2 / n1) (1 = linear).
3. Memory: peak resident memory of the largest process of the default `filmmap reduce` at
   150 and at 600 wafers (getrusage of the children, ru_maxrss); ratio printed (goal
   <= 1.5).

Run: python benchmarks/report.py [--repeats N] [--skip-memory]
"""

from __future__ import annotations

import argparse
import math
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from types import SimpleNamespace

import numpy as np
import xarray as xr

sys.path.insert(0, str(Path(__file__).resolve().parent))
from reduce import make_lot  # noqa: E402  (benchmarks/reduce.py)

SIZES = (75, 150, 300, 600)


def lot_with_target(folder, n_wafers, seed=7):
    """The reduce benchmark's lot plus a target (so wafers are judged and marked)."""
    lot = make_lot(folder, n_wafers, seed)
    text = lot.read_text() + "[target]\nthickness_nm = 1000\ntolerance_pct = 3.0\n"
    lot.write_text(text)
    return lot


def run_cli(lot, out, *extra):
    t0 = time.perf_counter()
    subprocess.run([sys.executable, "-m", "filmmap.cli.main", "reduce", str(lot), "-o", str(out),
                    "--quiet", "--no-history", *extra], check=True)
    return time.perf_counter() - t0


def peak_rss_mb(lot, out):
    code = ("import resource,subprocess,sys;"
            "subprocess.run([sys.executable,'-m','filmmap.cli.main','reduce',sys.argv[1],'-o',"
            "sys.argv[2],'--quiet','--no-history'],check=True);"
            "print(resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss)")
    r = subprocess.run([sys.executable, "-c", code, str(lot), str(out)], capture_output=True,
                       text=True, check=True)
    return int(r.stdout.strip().splitlines()[-1]) / 1024


def repeated(ds, n):
    """``ds`` with its wafers repeated to ``n`` (new ids and slots 1..n)."""
    k = ds.sizes["wafer"]
    idx = np.arange(n) % k
    out = ds.isel(wafer=idx)
    return out.assign_coords(wafer=("wafer", [f"R{i:04d}" for i in range(n)]),
                             slot=("wafer", np.arange(1, n + 1)))


def config_for(n, lot_id):
    return SimpleNamespace(
        lot=SimpleNamespace(id=lot_id, furnace="benchmark tube", run_date=None),
        target=SimpleNamespace(thickness_nm=1000.0, tolerance_pct=3.0),
        boat=SimpleNamespace(slots=n, dummy_slots=(), monitor_slots=()), furnace=None,
        measurement=SimpleNamespace(wafer_diameter_mm=150.0, edge_exclusion_mm=4.0))


def cpu():
    r = resource.getrusage(resource.RUSAGE_SELF)
    return r.ru_utime + r.ru_stime


def time_parts(ds, n, folder):
    """CPU seconds of maps (1 process), contact sheet, report.html, report.pdf for n wafers."""
    from filmmap.lotstats import lot_view
    from filmmap.report import ReportImages, write_html_report, write_pdf_report
    from filmmap.atomic import write_bytes_atomic
    from filmmap.wafermap.figures import contact_sheet_png

    big = repeated(ds, n)
    cfg = config_for(n, f"BENCH-{n}")
    folder.mkdir(parents=True, exist_ok=True)
    view = lot_view(big, cfg)
    out = {}
    c0 = cpu()
    # maps alone, one process (the contact sheet is timed on its own below)
    from filmmap.wafermap.figures import render_wafer_pngs
    render_wafer_pngs(folder / "figures", big["thickness"].values, big["fit_ok"].values,
                      big["x_mm"].values[0], big["y_mm"].values[0], 150.0, 4.0,
                      wafer_ids=[str(w) for w in big["wafer"].values],
                      slots=[int(s) for s in big["slot"].values], workers=1, lot_id=cfg.lot.id)
    out["maps"] = cpu() - c0
    c0 = cpu()
    png = contact_sheet_png(big["thickness"].values, big["fit_ok"].values, big["x_mm"].values,
                            big["y_mm"].values, 150.0, 4.0,
                            wafer_ids=[str(w) for w in big["wafer"].values],
                            slots=[int(s) for s in big["slot"].values], lot_id=cfg.lot.id)
    write_bytes_atomic(folder / "contact_sheet.png", png, durable=False)
    del png
    out["contact sheet"] = cpu() - c0
    images = ReportImages(view, big, folder, render_missing=False)
    c0 = cpu()
    html = write_html_report(view, big, folder, images=images)
    out["report.html"] = cpu() - c0
    c0 = cpu()
    pdf = write_pdf_report(view, big, folder, images=images)
    out["report.pdf"] = cpu() - c0
    sizes = (html.stat().st_size / 1e6, pdf.stat().st_size / 1e6)
    return out, sizes


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--skip-memory", action="store_true")
    args = ap.parse_args(argv)
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        # 1. side by side at 150 wafers
        lot150 = lot_with_target(tmp / "lot150", 150)
        run_cli(lot150, tmp / "warm", "--no-figures", "--no-report")        # warm caches
        t_full = t_base = math.inf
        for _ in range(args.repeats):
            t_base = min(t_base, run_cli(lot150, tmp / "base", "--no-figures", "--no-report"))
            t_full = min(t_full, run_cli(lot150, tmp / "full"))
        html = (tmp / "full" / "report.html").stat().st_size / 1e6
        pdf = tmp / "full" / "report.pdf"
        pages = len(__import__("re").findall(rb"/Type\s*/Page(?!s)", pdf.read_bytes()))
        print(f"150 wafers x 49 sites, best of {args.repeats}, wall time of `filmmap reduce`:")
        print(f"  --no-figures --no-report {t_base:7.2f} s")
        print(f"  default (maps, sheet, html, pdf) {t_full:7.2f} s   ratio {t_full / t_base:5.2f}"
              "   (goal <= 2)")
        print(f"  report.html {html:.2f} MB (goal <= 3), report.pdf {pdf.stat().st_size / 1e6:.2f}"
              f" MB, {pages} pages")

        # 2. growth of each part
        ds = xr.load_dataset(tmp / "full" / "lot.nc")
        ds["fit_ok"] = ds["fit_ok"].astype(bool)   # int8 0/1 in lot.nc (CF flags)
        small = ds.isel(wafer=slice(0, 75))
        rows = {}
        for n in SIZES:
            rows[n], sizes = time_parts(small, n, tmp / f"parts{n}")
            print(f"  {n:4d} wafers: " + ", ".join(f"{k} {v:6.2f} s" for k, v in rows[n].items())
                  + f"; report.html {sizes[0]:.2f} MB, report.pdf {sizes[1]:.2f} MB")
        print("exponents log(t2/t1)/log(n2/n1) (1 = linear):")
        for a, b in zip(SIZES[:-1], SIZES[1:]):
            ex = {k: math.log(max(rows[b][k], 1e-3) / max(rows[a][k], 1e-3)) / math.log(b / a)
                  for k in rows[a]}
            print(f"  {a:4d} -> {b:4d}: " + ", ".join(f"{k} {v:4.2f}" for k, v in ex.items()))

        # 3. memory
        if not args.skip_memory:
            lot600 = lot_with_target(tmp / "lot600", 600, seed=3)
            m150 = peak_rss_mb(lot150, tmp / "m150")
            m600 = peak_rss_mb(lot600, tmp / "m600")
            print(f"peak memory of the default reduce (largest process): 150 wafers {m150:.0f} MB,"
                  f" 600 wafers {m600:.0f} MB, ratio {m600 / m150:.2f} (goal <= 1.5)")


if __name__ == "__main__":
    main()
