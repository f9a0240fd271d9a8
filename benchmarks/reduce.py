"""Reduce throughput and memory, measured side by side in one run.

1. Speed: a 150-wafer x 49-site x 601-wavelength lot (made here, reflectance,
   SiO2 ~1 um on Si), CSV in, lot.nc out, no figures, on this machine's cores.
   Prints the wall time of reading + fitting + writing (the Python API, in this
   process) and its ratio to parsing the same CSV files alone; and the whole
   `filmmap reduce` command's wall time in a subprocess (interpreter start and
   imports included). Goals (project issue): total <= 3 s and <= 2x the parse time.
2. Memory: peak resident memory of `filmmap reduce` on a lot the size of the
   demo (44 wafers) and on one 8 times larger; goal: ratio <= 1.5.

Run: python benchmarks/reduce.py
"""

from __future__ import annotations

import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

from filmmap.io import check_tables, read_spectra
from filmmap.optics import Layer, Stack
from filmmap.pipeline.lot_files import write_lot
from filmmap.pipeline.reducing import reduce_lot
from filmmap.wafermap.sites import polar_sites

WL = np.arange(400.0, 1000.5, 1.0)


def make_lot(folder, n_wafers, seed=7):
    """Benchmark lot: one CSV per wafer, filmmap-made spectra with 0.3 % noise."""
    folder.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(seed)
    stack = Stack("Si", [Layer("SiO2", 1000.0)])
    pat = polar_sites(49, 150.0, 4.0)
    header = ",".join(["wafer", "slot", "site", "x_mm", "y_mm"] + [f"R@{w:g}" for w in WL])
    for i in range(n_wafers):
        d = rng.uniform(950, 1050, 49)
        R = stack.reflectance(WL, thickness_nm=[d[:, None]]) * (1 + 0.003 * rng.standard_normal((49, WL.size)))
        rows = [f"B{i:03d},{i + 1},{pat.site[k]},{pat.x_mm[k]:.2f},{pat.y_mm[k]:.2f},"
                + ",".join(f"{v:.5f}" for v in R[k]) for k in range(49)]
        (folder / f"B{i:03d}.csv").write_text(header + "\n" + "\n".join(rows) + "\n")
    (folder / "lot.toml").write_text(f'''[lot]
id = "BENCH-{n_wafers}"
[measurement]
technique = "reflectance"
files = ["*.csv"]
[stack]
substrate = "Si"
[[stack.layer]]
material = "SiO2"
search_nm = [5, 5000]
[boat]
slots = {max(n_wafers, 1)}
''')
    return folder / "lot.toml"


def measure_rss(lot, out):
    code = ("import resource,subprocess,sys;"
            "subprocess.run([sys.executable,'-m','filmmap.cli.main','reduce',sys.argv[1],'-o',"
            "sys.argv[2],'--no-figures','--quiet'],check=True);"
            "print(resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss)")
    r = subprocess.run([sys.executable, "-c", code, str(lot), str(out)], capture_output=True,
                       text=True, check=True)
    return int(r.stdout.strip().splitlines()[-1]) / 1024


def main(repeats=3):
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        lot = make_lot(tmp / "lot150", 150)
        files = sorted((tmp / "lot150").glob("*.csv"))
        print(f"lot: 150 wafers x 49 sites x {WL.size} wavelengths, "
              f"{sum(f.stat().st_size for f in files) / 1e6:.1f} MB of CSV")
        t_parse = t_api1 = t_api2 = np.inf
        for _ in range(repeats):
            t0 = time.perf_counter()
            tables = [read_spectra(f, "reflectance") for f in files]
            check_tables(tables, 150.0, 150)
            t_parse = min(t_parse, time.perf_counter() - t0)
            del tables
            for workers in (1, 2):
                t0 = time.perf_counter()
                red = reduce_lot(lot, workers=workers)
                write_lot(red, tmp / f"out{workers}")
                dt = time.perf_counter() - t0
                if workers == 1:
                    t_api1 = min(t_api1, dt)
                else:
                    t_api2 = min(t_api2, dt)
        n_ok = int(red.sites.ok.sum())
        print(f"parse CSV alone (read + cross-file checks): {t_parse:6.2f} s")
        print(f"reduce, 1 process (fitter on 2 threads):    {t_api1:6.2f} s   "
              f"ratio to parse {t_api1 / t_parse:5.2f}")
        print(f"reduce, --workers 2 (2 processes):          {t_api2:6.2f} s   "
              f"ratio to parse {t_api2 / t_parse:5.2f}   (goals: <= 3 s, <= 2x parse)")
        print(f"sites fitted ok: {n_ok} of {red.sites.ok.size}")
        t0 = time.perf_counter()
        subprocess.run([sys.executable, "-m", "filmmap.cli.main", "reduce", str(lot), "-o",
                        str(tmp / "cli"), "--no-figures", "--quiet", "--workers", "2"], check=True)
        print(f"whole command `filmmap reduce --no-figures --workers 2` incl. interpreter start "
              f"and imports: {time.perf_counter() - t0:.2f} s")

        small = make_lot(tmp / "lot44", 44, seed=1)
        big = make_lot(tmp / "lot352", 352, seed=2)
        rss_small = measure_rss(small, tmp / "o44")
        rss_big = measure_rss(big, tmp / "o352")
        print(f"peak memory: demo-sized lot (44 wafers) {rss_small:.0f} MB, 8x larger (352 wafers) "
              f"{rss_big:.0f} MB, ratio {rss_big / rss_small:.2f} (goal <= 1.5)")


if __name__ == "__main__":
    main()
