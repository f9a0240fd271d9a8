"""Forward-model benchmark: normal-incidence reflectance of a whole lot in one call.

Workload: 7,350 spectra x 601 wavelengths (400-1000 nm, 1 nm steps), one SiO2 layer
with thickness drawn uniformly in 900-1100 nm (seeded) on Si, unpolarised R at normal
incidence, through the public Stack API (material indices included in the timing).

Reference timing: the `tmm` package (S. J. Byrnes, arXiv:1603.02720), tmm.coh_tmm
called per spectrum per wavelength on a small sample, extrapolated per spectrum.
Both are measured in the same run. Timings are printed only; nothing is asserted.

Run:  python benchmarks/forward.py
"""

from __future__ import annotations

import os
import platform
import sys
import time
from pathlib import Path

import numpy as np

try:
    import filmmap  # noqa: F401
except ModuleNotFoundError:  # running from a checkout without installing
    sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from filmmap.materials import get_material  # noqa: E402
from filmmap.optics import Layer, Stack, transfer  # noqa: E402

N_SPECTRA = 7350
WL = np.linspace(400.0, 1000.0, 601)
REPEATS = 5
TMM_SAMPLE = 5
GOAL_SPECTRA_PER_S = 20_000
GOAL_RATIO = 1_000


def _thicknesses(n, seed=2024):
    return np.random.default_rng(seed).uniform(900.0, 1100.0, size=n)


def time_filmmap(d, repeats=REPEATS):
    stack = Stack("Si", [Layer("SiO2", 1000.0)])
    thickness = [d[:, None]]
    R = stack.reflectance(WL, 0.0, "u", thickness_nm=thickness)  # warm-up (caches, tables)
    best = np.inf
    for _ in range(repeats):
        t0 = time.perf_counter()
        R = stack.reflectance(WL, 0.0, "u", thickness_nm=thickness)
        best = min(best, time.perf_counter() - t0)
    return best, R


def time_general_recursion(d, repeats=REPEATS):
    """The same lot through transfer.stack_r (the general multilayer recursion), for contrast
    with whatever path Stack.reflectance picks for a single transparent film."""
    N_ox, N_si = get_material("SiO2")(WL), get_material("Si")(WL)
    thickness = [d[:, None]]
    best = np.inf
    for _ in range(repeats):
        t0 = time.perf_counter()
        R = np.abs(transfer.stack_r(WL, 1.0, [N_ox], thickness, N_si, 0.0, "s")) ** 2
        best = min(best, time.perf_counter() - t0)
    return best, R


def time_tmm(d, repeats=3):
    import tmm

    N_ox = np.conj(get_material("SiO2")(WL))  # tmm uses n + ik (exp(-i w t))
    N_si = np.conj(get_material("Si")(WL))
    best = np.inf
    R = np.empty((d.size, WL.size))
    for _ in range(repeats):
        t0 = time.perf_counter()
        for a, t in enumerate(d):
            for b, lam in enumerate(WL):
                R[a, b] = tmm.coh_tmm("s", [1.0, N_ox[b], N_si[b]], [np.inf, t, np.inf],
                                      0.0, lam)["R"]
        best = min(best, time.perf_counter() - t0)
    return best, R


def _thread_note():
    env = {k: os.environ[k] for k in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS",
                                      "MKL_NUM_THREADS") if k in os.environ}
    try:
        from threadpoolctl import threadpool_info
        pools = ", ".join(f"{p.get('internal_api')}:{p.get('num_threads')}"
                          for p in threadpool_info()) or "none loaded"
    except ImportError:
        pools = "threadpoolctl not installed"
    return (f"BLAS/threads: not used here -- the forward model is elementwise numpy ufuncs "
            f"(exp, divide), which run single-threaded; BLAS thread settings do not matter "
            f"(pools: {pools}; env: {env or 'unset'})")


def main():
    d = _thicknesses(N_SPECTRA)
    print(f"filmmap forward benchmark  python {platform.python_version()}  numpy {np.__version__}"
          f"  cpus {os.cpu_count()}")
    print(f"workload: {N_SPECTRA} spectra x {WL.size} wavelengths ({WL[0]:g}-{WL[-1]:g} nm), "
          f"SiO2 900-1100 nm on Si, normal incidence, unpolarised R")

    t_ours, R = time_filmmap(d)
    rate = N_SPECTRA / t_ours
    print(f"filmmap: best of {REPEATS}: {t_ours * 1e3:.1f} ms per lot "
          f"-> {rate:,.0f} spectra/s   (goal >= {GOAL_SPECTRA_PER_S:,} spectra/s)")

    t_gen, R_gen = time_general_recursion(d)
    print(f"  (general recursion transfer.stack_r on the same lot: {t_gen * 1e3:.1f} ms "
          f"-> {N_SPECTRA / t_gen:,.0f} spectra/s; max |dR| vs above {np.max(np.abs(R_gen - R)):.1e})")

    t_tmm, R_tmm = time_tmm(d[:TMM_SAMPLE])
    per_spec_tmm = t_tmm / TMM_SAMPLE
    per_spec_ours = t_ours / N_SPECTRA
    print(f"tmm.coh_tmm: {TMM_SAMPLE} spectra x {WL.size} wavelengths in {t_tmm:.2f} s (best of 3) "
          f"-> {1.0 / per_spec_tmm:,.1f} spectra/s")
    print(f"speed-up vs tmm: {per_spec_tmm / per_spec_ours:,.0f}x   (goal >= {GOAL_RATIO:,}x)")
    print(f"check: max |R_filmmap - R_tmm| on the sample = "
          f"{np.max(np.abs(R[:TMM_SAMPLE] - R_tmm)):.1e}")
    print(_thread_note())


if __name__ == "__main__":
    main()
