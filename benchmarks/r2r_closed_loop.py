"""Run-to-run control on an invented drifting furnace: open loop against EWMA weights.

The furnace is INVENTED (the demo tube's temperature profile, `filmmap.pipeline.demo`): a 50-slot
boat with dummies at both ends and three heater zones.  Over the runs its wet-oxidation
rate factor (steam partial pressure, scaling B and B/A) drifts down 0.3 % per run with
run-to-run noise, and the source zone's real temperature drifts down 0.2 K per run (a
thermocouple drifting).  Every run: grow -> measure the wafer means (with noise) ->
advice (`filmmap.growth.advise`, as ``reduce`` writes it) -> EWMA of the furnace state
(`filmmap.history.r2r`) -> next recipe time and zone trims; the loop is the test fixture
``tests/furnace_sim.py``.  Open loop runs the starting recipe unchanged.  The same noise
is used for every strategy (common random numbers), and the table averages several seeds.

    python benchmarks/r2r_closed_loop.py [--runs 30] [--seeds 4] [--tolerance 2]

A second scenario, "stationary-noisy", has no drift but a noisier rate factor (1.5 %
run to run): there a small weight pays, as it averages the noise out.

Prints, per scenario and strategy: mean |error| %, max |error| %, runs out of tolerance (of all
seeds' runs), and the mean WTW % of the last ten runs.

References: E. Sachs, A. Hu and A. Ingolfsson, IEEE Trans. Semicond. Manuf. 8, 26
(1995) (run-to-run EWMA control; from memory); B. E. Deal and A. S. Grove, J. Appl. Phys.
36, 3770 (1965) (growth model).
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np

from filmmap.pipeline.demo import DUMMY_SLOTS, RECIPE, TARGET_NM, ZONES, demo_temperature_offset_C

# the invented furnace is a test fixture (tests/furnace_sim.py), not part of the package
sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))
from furnace_sim import SyntheticFurnace, simulate  # noqa: E402

WEIGHTS = (0.1, 0.3, 0.5, 0.7, 1.0)


def make_furnace(rate_drift_pct=-0.3, source_drift_C=-0.2, rate_noise_pct=0.4,
                 wafer_noise_pct=0.15):
    """The invented tube (see the module notes)."""
    slots = tuple(s for s in range(1, 51) if s not in DUMMY_SLOTS)
    profile = tuple(float(v) for v in demo_temperature_offset_C(np.array(slots)))
    return SyntheticFurnace(zones=ZONES, product_slots=slots, profile_C=profile,
                            rate_drift_pct_per_run=rate_drift_pct,
                            zone_drift_C_per_run={"source": source_drift_C},
                            rate_noise_pct=rate_noise_pct, wafer_noise_pct=wafer_noise_pct,
                            width_slots=3.0)


SCENARIOS = {
    "drifting": dict(rate_drift_pct=-0.3, source_drift_C=-0.2, rate_noise_pct=0.4),
    "stationary-noisy": dict(rate_drift_pct=0.0, source_drift_C=0.0, rate_noise_pct=1.5),
}


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--runs", type=int, default=30)
    ap.add_argument("--seeds", type=int, default=4)
    ap.add_argument("--tolerance", type=float, default=2.0, help="spec half-width, percent")
    ap.add_argument("--scenario", choices=list(SCENARIOS) + ["both"], default="both")
    args = ap.parse_args(argv)
    t0 = time.perf_counter()
    names = list(SCENARIOS) if args.scenario == "both" else [args.scenario]
    for name in names:
        table(make_furnace(**SCENARIOS[name]), name, args)
    print(f"done in {time.perf_counter() - t0:.1f} s")


def table(furnace, name, args):
    """Print one comparison table."""
    print()
    print(f"[{name}] invented furnace: {len(furnace.product_slots)} product slots, 3 zones; "
          f"rate factor "
          f"{furnace.rate_drift_pct_per_run:+g} %/run (noise {furnace.rate_noise_pct:g} %), "
          f"source zone {furnace.zone_drift_C_per_run['source']:+g} K/run; wafer noise "
          f"{furnace.wafer_noise_pct:g} %; target {TARGET_NM:g} nm +/- {args.tolerance:g} %; "
          f"{args.runs} runs x {args.seeds} seeds")
    print(f"{'strategy':<16} {'mean |err| %':>13} {'max |err| %':>12} {'runs out':>9} "
          f"{'WTW % (last 10)':>16}")
    for weight in (None,) + WEIGHTS:
        res = [simulate(furnace, RECIPE, "wet", TARGET_NM, weight=weight, n_runs=args.runs,
                        tolerance_pct=args.tolerance, seed=s, controller_width_slots=0.0)
               for s in range(args.seeds)]
        err = np.concatenate([r.error_pct for r in res])
        out = sum(r.runs_out_of_tolerance for r in res)
        wtw = np.mean([r.wtw_pct[-10:].mean() for r in res])
        label = "open loop" if weight is None else f"EWMA w = {weight:g}"
        print(f"{label:<16} {np.mean(np.abs(err)):>13.3f} {np.max(np.abs(err)):>12.3f} "
              f"{out:>5d}/{err.size:<3d} {wtw:>16.3f}")


if __name__ == "__main__":
    main()
