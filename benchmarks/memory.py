"""Time and memory bounded by the input: a dense wafer and lots of up to 1,200 wafers.

1. Time: one wafer of 2,500 sites x 301 wavelengths (reflectance, SiO2 ~1 um on Si with
   a smooth bowl and 0.3 % noise), `filmmap reduce --no-figures` in a subprocess
   (interpreter start and imports included). Goal (project issue 17): <= 5 s.
2. Memory: peak resident memory of `filmmap reduce` with figures, the whole process tree
   summed (workers included, sampled every 50 ms), on lots of 44, 300 and 1,200 wafers
   x 49 sites. Goal (issue 17): <= 1.5 GB for every size, i.e. not growing with the lot.

Each line prints the measurement beside its goal and their ratio. Measurements, never
unit tests (no timed tests in the suite).

Run: python benchmarks/memory.py [--wafers 44,300,1200] [--skip-dense]
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

from filmmap.optics import Layer, Stack

WL = np.arange(400.0, 1000.5, 2.0)
GOAL_DENSE_S = 5.0
GOAL_PEAK_GB = 1.5


def _lot_toml(folder, lot_id, slots):
    (folder / "lot.toml").write_text(f'''[lot]
id = "{lot_id}"
[measurement]
technique = "reflectance"
files = ["*.csv"]
[stack]
substrate = "Si"
[[stack.layer]]
material = "SiO2"
search_nm = [5, 5000]
[boat]
slots = {slots}
''')
    return folder / "lot.toml"


def _write_wafer(path, wafer, slot, x, y, d, rng):
    stack = Stack("Si", [Layer("SiO2", 1000.0)])
    R = stack.reflectance(WL, thickness_nm=[d[:, None]])
    R = R * (1 + 0.003 * rng.standard_normal(R.shape))
    header = ",".join(["wafer", "slot", "site", "x_mm", "y_mm"] + [f"R@{w:g}" for w in WL])
    rows = [f"{wafer},{slot},{k + 1},{x[k]:.3f},{y[k]:.3f}," + ",".join(f"{v:.5f}" for v in R[k])
            for k in range(d.size)]
    path.write_text(header + "\n" + "\n".join(rows) + "\n")


def make_dense_lot(folder, n_sites=2500, seed=3):
    """One wafer, n_sites on a square grid inside 150 mm minus 4 mm edge exclusion."""
    folder.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(seed)
    r_max = 71.0
    pitch = r_max * np.sqrt(np.pi / n_sites)
    while True:
        g = np.arange(-r_max, r_max + pitch / 2, pitch)
        gx, gy = np.meshgrid(g, g)
        inside = np.hypot(gx, gy) <= r_max
        if inside.sum() >= n_sites:
            break
        pitch *= 0.99
    x, y = gx[inside][:n_sites], gy[inside][:n_sites]
    d = 1000 + 3e-3 * (x**2 + y**2) + 0.02 * x
    _write_wafer(folder / "D01.csv", "D01", 1, x, y, d, rng)
    return _lot_toml(folder, "DENSE", 25)


def make_lot(folder, n_wafers, seed=7):
    """n_wafers x 49 sites (the polar 49-site pattern), one CSV per wafer."""
    from filmmap.wafermap.sites import polar_sites

    folder.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(seed)
    pat = polar_sites(49, 150.0, 4.0)
    for i in range(n_wafers):
        d = rng.uniform(950, 1050) + rng.uniform(-5, 5, 49)
        _write_wafer(folder / f"B{i:04d}.csv", f"B{i:04d}", i + 1, pat.x_mm, pat.y_mm, d, rng)
    return _lot_toml(folder, f"LOT-{n_wafers}", max(n_wafers, 1))


def run_measured(argv):
    """Wall time (s) and peak RSS of the process tree (bytes, summed) of a command."""
    try:
        import psutil
    except ImportError:   # only the largest single process, from the kernel's accounting
        psutil = None
    t0 = time.perf_counter()
    proc = subprocess.Popen(argv, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    peak = 0
    if psutil is not None:
        root = psutil.Process(proc.pid)
        while proc.poll() is None:
            try:
                tree = [root] + root.children(recursive=True)
                peak = max(peak, sum(p.memory_info().rss for p in tree if p.is_running()))
            except psutil.Error:
                pass
            time.sleep(0.05)
    _, err = proc.communicate()
    wall = time.perf_counter() - t0
    if proc.returncode != 0:
        raise SystemExit(f"failed ({proc.returncode}): {' '.join(argv)}\n{err.decode()}")
    if psutil is None:
        import resource
        peak = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss * 1024
    return wall, peak


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--wafers", default="44,300,1200",
                    help="lot sizes for the memory part, comma separated")
    ap.add_argument("--skip-dense", action="store_true")
    args = ap.parse_args()
    cli = [sys.executable, "-m", "filmmap.cli.main", "reduce"]
    print(f"machine: {os.cpu_count()} cores; spectra of {WL.size} wavelengths")
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        if not args.skip_dense:
            lot = make_dense_lot(tmp / "dense")
            wall, peak = run_measured(cli + [str(lot), "-o", str(tmp / "dense-out"),
                                             "--no-figures", "--quiet", "--no-history"])
            print(f"2,500-site wafer, --no-figures: {wall:.1f} s (goal {GOAL_DENSE_S:g} s, "
                  f"ratio {wall / GOAL_DENSE_S:.2f}); peak {peak / 1e9:.2f} GB")
        for n in [int(v) for v in args.wafers.split(",") if v]:
            lot = make_lot(tmp / f"lot{n}", n)
            out = tmp / f"out{n}"
            wall, peak = run_measured(cli + [str(lot), "-o", str(out), "--quiet",
                                             "--no-history"])
            html = (out / "report.html").stat().st_size / 1e6
            print(f"{n:5d} wafers with figures: peak {peak / 1e9:.2f} GB (goal {GOAL_PEAK_GB:g} GB, "
                  f"ratio {peak / 1e9 / GOAL_PEAK_GB:.2f}); {wall:.0f} s; report.html "
                  f"{html:.0f} MB")


if __name__ == "__main__":
    main()
