"""Many-lot throughput: 16 demo-sized lots, 1 worker process vs 2, measured in one run.

Each lot is the invented demo lot (44 wafers x 49 sites x 601 wavelengths) under a
different lot id. Prints lots per minute for `reduce_many` with 1 and 2 local worker
processes (figures off) and their ratio. Run: python benchmarks/many_lots.py
"""

from __future__ import annotations

import shutil
import tempfile
import time
from pathlib import Path

from filmmap.pipeline.demo import generate_demo_lot
from filmmap.pipeline import reduce_many

N_LOTS = 16


def main():
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        base = generate_demo_lot(tmp / "base").parent
        files = []
        for k in range(N_LOTS):
            folder = tmp / f"lot{k:02d}"
            shutil.copytree(base, folder)
            lot = folder / "lot.toml"
            lot.write_text(lot.read_text().replace('id = "DEMO-W2-0417"', f'id = "BENCH-{k:02d}"'))
            files.append(lot)
        times = {}
        for workers in (1, 2):
            t0 = time.perf_counter()
            reduce_many(files, tmp / f"out{workers}", workers=workers, figures=False)
            times[workers] = time.perf_counter() - t0
        for w, t in times.items():
            print(f"{N_LOTS} lots, {w} worker process(es): {t:6.1f} s  "
                  f"({N_LOTS / t * 60:5.1f} lots/min)")
        print(f"throughput ratio, 2 workers / 1 worker: {times[1] / times[2]:.2f}")


if __name__ == "__main__":
    main()
