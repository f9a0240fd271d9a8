"""Wafer-map benchmark: statistics, Zernike terms, TPS maps (with LOO) and map PNGs for a lot.

Workload: 150 wafers x 49 sites on a 300 mm wafer with 3 mm edge exclusion,
synthetic oxide of about 100 nm with a tilt, a bowl, some astigmatism and
0.3 nm site noise (seeded); 2 % of the sites are missing (NaN) and 1 % are
flagged not ok, so the per-wafer NaN handling is exercised.

Timed:
1. analysis (goal <= 2 s): within_wafer_stats + zernike_fit + radial_profile +
   tps_surface (101 x 101 grid) + tps_polar_surface + tps_loo for the whole lot;
2. figures (goal <= 0.3 s per wafer): render_wafer_pngs with 2 worker
   processes, wall time divided by the number of wafers, plus one in-process
   (serial) render for comparison.

Timings are printed only; nothing is asserted.

Run:  python benchmarks/wafermap.py [--figures N] [--workers W]
"""

from __future__ import annotations

import argparse
import os
import platform
import resource
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

try:
    import filmmap  # noqa: F401
except ModuleNotFoundError:  # running from a checkout without installing
    sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from filmmap.wafermap import (polar_sites, radial_profile, tps_loo, tps_polar_surface,  # noqa: E402
                              tps_surface, within_wafer_stats, zernike_fit)
from filmmap.wafermap.figures import render_wafer_png, render_wafer_pngs  # noqa: E402

D_MM, EE_MM, N_WAFERS, N_SITES = 300.0, 3.0, 150, 49


def synthetic_lot(seed=2024):
    """Invented lot: thickness (150, 49) in nm, ok mask, and the 49-site pattern."""
    rng = np.random.default_rng(seed)
    s = polar_sites(N_SITES, D_MM, EE_MM)
    rho2 = (s.x_mm**2 + s.y_mm**2) / (D_MM / 2 - EE_MM) ** 2
    theta = np.arctan2(s.y_mm, s.x_mm)
    slot = np.arange(N_WAFERS)[:, None]
    t = (100.0 + 0.004 * slot
         + 0.006 * s.x_mm - 0.003 * s.y_mm
         + (1.5 - 0.01 * slot) * rho2
         + 0.4 * rho2 * np.cos(2 * theta)
         + rng.normal(0.0, 0.3, (N_WAFERS, N_SITES)))
    t[rng.random(t.shape) < 0.02] = np.nan
    ok = rng.random(t.shape) > 0.01
    return t, ok, s


def time_analysis(t, ok, s, repeats=3):
    best = np.inf
    for _ in range(repeats):
        t0 = time.perf_counter()
        st = within_wafer_stats(t, ok, s.x_mm, s.y_mm, D_MM, EE_MM)
        zf = zernike_fit(t, ok, s.x_mm, s.y_mm, D_MM, EE_MM)
        radial_profile(t, ok, s.x_mm, s.y_mm, D_MM, EE_MM)
        tps_surface(t, ok, s.x_mm, s.y_mm, D_MM, EE_MM, n_grid=101)
        polar = tps_polar_surface(t, ok, s.x_mm, s.y_mm, D_MM, EE_MM)
        loo = tps_loo(t, ok, s.x_mm, s.y_mm, D_MM, EE_MM)
        best = min(best, time.perf_counter() - t0)
    return best, st, zf, loo, polar


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--figures", type=int, default=N_WAFERS,
                        help="wafers to render as PNG (default all 150)")
    parser.add_argument("--workers", type=int, default=2)
    args = parser.parse_args(argv)

    print(f"python {platform.python_version()}, numpy {np.__version__}, "
          f"{os.cpu_count()} CPU(s) visible, load average {os.getloadavg()[0]:.2f}")
    t, ok, s = synthetic_lot()
    # warm-up (imports, caches) outside the timing
    time_analysis(t[:2], ok[:2], s, repeats=1)
    c0 = time.process_time()
    wall, st, zf, loo, polar = time_analysis(t, ok, s)
    cpu = (time.process_time() - c0) / 3
    print(f"analysis, {N_WAFERS} wafers x {N_SITES} sites: {wall:.3f} s wall "
          f"(best of 3; mean CPU {cpu:.3f} s; goal <= 2 s)")
    print(f"  mean NU% {np.nanmean(st.nu_pct):.3f}, Zernike terms {zf.n_terms.min()}-"
          f"{zf.n_terms.max()}, median LOO RMS {np.nanmedian(loo.rms_nm):.3f} nm, "
          f"median residual sigma {np.nanmedian(zf.residual_sigma_nm):.3f} nm")

    n = max(1, min(args.figures, N_WAFERS))
    ids = [f"BENCH{i + 1:03d}" for i in range(n)]
    with tempfile.TemporaryDirectory(prefix="filmmap-bench-") as tmp:
        kw = dict(wafer_id="warmup", slot=1, surface=polar.mesh(0))
        render_wafer_png(Path(tmp) / "warmup.png", t[0], ok[0], s.x_mm, s.y_mm, D_MM, EE_MM, **kw)
        m = min(n, 10)
        t0, c0 = time.perf_counter(), time.process_time()
        for i in range(m):
            render_wafer_png(Path(tmp) / f"serial{i}.png", t[i], ok[i], s.x_mm, s.y_mm, D_MM,
                             EE_MM, wafer_id=ids[i], slot=i + 1, surface=polar.mesh(i))
        serial = (time.perf_counter() - t0) / m
        serial_cpu = (time.process_time() - c0) / m
        r0 = resource.getrusage(resource.RUSAGE_CHILDREN)
        t0 = time.perf_counter()
        paths = render_wafer_pngs(Path(tmp) / "maps", t[:n], ok[:n], s.x_mm, s.y_mm, D_MM, EE_MM,
                                  wafer_ids=ids, slots=list(range(1, n + 1)),
                                  workers=args.workers)
        par = time.perf_counter() - t0
        r1 = resource.getrusage(resource.RUSAGE_CHILDREN)
        child_cpu = (r1.ru_utime - r0.ru_utime + r1.ru_stime - r0.ru_stime) / n
        size = np.mean([p.stat().st_size for p in paths]) / 1024
    print(f"figures, serial in-process: {serial:.3f} s wall, {serial_cpu:.3f} s CPU per wafer")
    print(f"figures, {n} wafers on {args.workers} worker processes: {par:.2f} s wall = "
          f"{par / n:.3f} s per wafer (goal <= 0.3 s; includes pool start-up and the lot's "
          f"TPS maps), worker CPU {child_cpu:.3f} s per wafer, mean PNG {size:.0f} KiB")
    return 0


if __name__ == "__main__":
    sys.exit(main())
