"""Outputs are published whole: a crash leaves the old complete set or the new one, never a mix."""

import contextlib
import hashlib
import os
import signal
import subprocess
import sys
import time

import numpy as np
import psutil
import pytest

from filmmap.errors import FilmmapInputError
from filmmap.io.publish import MARKER, staged_output
from filmmap.pipeline import PENDING_RECORD

from test_reduce import write_lot


def test_foreign_folder_is_refused(tmp_path):
    (tmp_path / "mine.txt").write_text("precious")
    with pytest.raises(FilmmapInputError, match="not written by filmmap"):
        with staged_output(tmp_path):
            pass
    assert (tmp_path / "mine.txt").read_text() == "precious"


def test_previous_results_replaced_only_when_complete(tmp_path):
    out = tmp_path / "out"
    with staged_output(out) as stage:
        (stage / "a.txt").write_text("old")
    assert (out / "a.txt").read_text() == "old" and (out / MARKER).is_file()
    with pytest.raises(RuntimeError):
        with staged_output(out) as stage:
            (stage / "a.txt").write_text("new, half done")
            raise RuntimeError("crash while writing")
    assert (out / "a.txt").read_text() == "old"
    assert [p.name for p in tmp_path.iterdir()] == ["out"]   # staging removed
    with staged_output(out) as stage:
        (stage / "b.txt").write_text("new")
    assert sorted(p.name for p in out.iterdir()) == sorted([MARKER, "b.txt"])


def _digest(folder):
    # the history-pending marker is not a result: a kill between publishing and recording
    # leaves it beside complete new results (filmmap.pipeline.PENDING_RECORD)
    files = sorted(p for p in folder.rglob("*") if p.is_file() and p.name != PENDING_RECORD)
    return {str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest() for p in files}


def test_kill_9_at_random_moments_leaves_old_or_new_complete_set(tmp_path):
    # fault injection: >= 20 seeded trials of SIGKILL during `filmmap reduce` into an OUTDIR
    # that already holds complete results of an earlier run (common practice, no source)
    lot_old, _ = write_lot(tmp_path / "old", {"K1": (4, np.full(9, 500.0))})
    lot_new, _ = write_lot(tmp_path / "new", {"K1": (4, np.full(9, 800.0)),
                                              "K2": (5, np.full(9, 820.0))})
    base = [sys.executable, "-m", "filmmap.cli.main", "reduce"]
    ref_old, ref_new = tmp_path / "ref_old", tmp_path / "ref_new"
    t0 = time.perf_counter()
    subprocess.run(base + [str(lot_new), "-o", str(ref_new), "--quiet"], check=True)
    full = time.perf_counter() - t0
    subprocess.run(base + [str(lot_old), "-o", str(ref_old), "--quiet"], check=True)
    names_old, names_new = set(_digest(ref_old)), set(_digest(ref_new))
    assert names_old != names_new   # two wafers' maps vs one: the sets are told apart
    rng = np.random.default_rng(2026)
    outs = [tmp_path / "outA", tmp_path / "outB"]
    for out in outs:
        subprocess.run(base + [str(lot_old), "-o", str(out), "--quiet"], check=True)
    outcomes = {"unchanged": 0, "new": 0}
    killed = 0          # trials whose process was still running when SIGKILL came
    orphans = []        # worker processes still alive 5 s after their parent was killed
    # 10 rounds x 2 folders = 20 trials; two kills run side by side to keep the test short
    for trial in range(10):
        before = [_digest(out) for out in outs]
        procs = [subprocess.Popen(base + [str(lot_new), "-o", str(out), "--quiet"],
                                  stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
                 for out in outs]
        delays = sorted(rng.uniform(0.2, 1.2, 2) * full)
        start = time.perf_counter()
        children = []
        for proc, delay in zip(procs, delays):
            time.sleep(max(0.0, delay - (time.perf_counter() - start)))
            if proc.poll() is None:
                with contextlib.suppress(psutil.NoSuchProcess):
                    children += psutil.Process(proc.pid).children(recursive=True)
                os.kill(proc.pid, signal.SIGKILL)
                killed += 1
        for proc in procs:
            proc.wait()
        _, alive = psutil.wait_procs(children, timeout=5)
        orphans += [p.pid for p in alive]
        for p in alive:
            with contextlib.suppress(psutil.NoSuchProcess):
                p.kill()        # leave nothing behind even when the test fails
        for proc, out, prev in zip(procs, outs, before):
            after = _digest(out)
            if after == prev:
                outcomes["unchanged"] += 1
            else:
                # a complete new set: the same files as a clean new run, each one readable
                assert set(after) == names_new, (trial, sorted(after))
                import xarray as xr
                with xr.open_dataset(out / "lot.nc") as ds:
                    assert ds.sizes["wafer"] == 2
                outcomes["new"] += 1
            assert set(after) in (names_old, names_new)
            leftovers = [p.name for p in out.parent.iterdir() if p.name.startswith(f".{out.name}.")]
            assert all(".filmmap-" in name for name in leftovers)   # only staging, swept next run
    print(f"kill -9 trials: {outcomes}, {killed} killed while running")
    assert orphans == [], f"workers outlived their killed parent: {orphans}"
    # the trials must have tested something: most kills land while reduce runs (delays of
    # 0.2-1.2 x a clean run), and some of those before publishing (old set kept)
    assert killed >= 10, killed
    assert outcomes["unchanged"] >= 1, outcomes
