"""Outputs are published whole: a crash leaves the old complete set or the new one, never a mix.

The publish-then-record sequence has named fault points (`FAULT_POINTS`); at each one a
`filmmap reduce` is ended like a kill (``FILMMAP_FAULT_AT``, ``os._exit``) over a folder
holding an earlier lot's complete results, and the test asserts the one outcome that point
must leave: the old set byte-identical, or the new set complete (every file readable),
never a mix, never a partial file; the history agreeing with the folder; and the next
reduce into the folder cleaning up and catching up. One true ``kill -9`` in the middle of
staging checks the same from outside. Fault injection at named points is common
practice, no source.
"""

import contextlib
import csv
import hashlib
import json
import os
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import psutil
import pytest
import xarray as xr

from filmmap.cli.main import main
from filmmap.errors import FilmmapInputError
from filmmap.history import lots
from filmmap.pipeline.publishing import FAULT_ENV, FAULT_POINTS, MARKER, staged_output
from filmmap.pipeline.run import PENDING_RECORD

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
    """SHA-256 of every file under FOLDER, by relative path."""
    files = sorted(p for p in folder.rglob("*") if p.is_file())
    return {str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest() for p in files}


def _assert_readable(path):
    """The file is whole: each kind parses to its end (a cut file fails here)."""
    data = path.read_bytes()
    assert data, path
    suffix = path.suffix
    if suffix == ".nc":
        with xr.open_dataset(path) as ds:
            ds.load()
    elif suffix == ".json" or path.name == PENDING_RECORD:
        json.loads(data)
    elif suffix == ".csv":
        rows = list(csv.reader(data.decode("utf-8").splitlines()))
        assert len(rows) >= 2 and len({len(r) for r in rows}) == 1, path
    elif suffix == ".png":
        assert data.startswith(b"\x89PNG\r\n\x1a\n") and data.endswith(b"IEND\xaeB`\x82"), path
    elif suffix == ".pdf":
        assert data.startswith(b"%PDF") and data.rstrip().endswith(b"%%EOF"), path
    elif suffix == ".html":
        assert data.rstrip().endswith(b"</html>"), path


def _settled_names(folder, quiet_s=1.0, limit_s=20.0):
    """The files under FOLDER once no process has changed them for ``quiet_s`` seconds.

    A killed reduce's map workers end within `filmmap.workers.PARENT_POLL_S` of their
    parent, finishing at most the map they were writing; the listing is read after that.
    """
    deadline = time.monotonic() + limit_s
    last, since = None, time.monotonic()
    while time.monotonic() < deadline:
        now = []
        for p in folder.rglob("*"):
            with contextlib.suppress(FileNotFoundError):    # renamed while listed
                if p.is_file():
                    now.append((str(p.relative_to(folder)), p.stat().st_size))
        now.sort()
        if now != last:
            last, since = now, time.monotonic()
        elif time.monotonic() - since >= quiet_s:
            break
        time.sleep(0.05)
    return {name for name, _ in last}


def _assert_new_set(folder, names_new, pending):
    """FOLDER holds the complete new results (two wafers), each file whole."""
    names = set(_digest(folder))
    assert names == names_new | ({PENDING_RECORD} if pending else set()), sorted(names ^ names_new)
    for name in names:
        _assert_readable(folder / name)
    with xr.open_dataset(folder / "lot.nc") as ds:
        assert ds.attrs["lot_id"] == "T-0002" and ds.sizes["wafer"] == 2


def _recorded_sha(db, lot_id):
    return {r.lot_id: r.lot_nc_sha256 for r in lots(db)}.get(lot_id)


def _sha(path):
    return hashlib.sha256(path.read_bytes()).hexdigest()


def _beside(out):
    """Folders a run left beside OUT (staging and old-results folders)."""
    return sorted(p for p in out.parent.iterdir() if p.name.startswith(f".{out.name}."))


# What each named point must leave. "old": OUT byte-identical; "new": the complete new set
# in OUT. `beside`: what lies beside OUT ("none"; "partial": a staging folder with lot.nc
# and sites.csv only; "staged": a staging folder with the complete new set; "old": the
# previous results, complete). `recorded`: the new lot is in the history.
EXPECTED = {
    "before-staging": dict(out="old", beside="none", recorded=False),
    "mid-staging": dict(out="old", beside="partial", recorded=False),
    "after-staging": dict(out="old", beside="staged", recorded=False),
    "after-exchange": dict(out="new", beside="old", recorded=False),
    "after-move-aside": dict(out="absent", beside="old+staged", recorded=False),
    "after-publish": dict(out="new", beside="none", recorded=False),
    "after-record": dict(out="new", beside="none", recorded=True),
}

# the two-rename fallback (no atomic exchange on this file system) is forced for its point
_DRIVER = """
import sys
import filmmap.pipeline.publishing as publishing
if sys.argv[1] == "no-exchange":
    publishing._exchange = lambda a, b: False
from filmmap.cli.main import main
sys.exit(main(sys.argv[2:]))
"""


def test_every_fault_point_has_its_expected_outcome():
    assert list(EXPECTED) == list(FAULT_POINTS)


@pytest.fixture(scope="module")
def fault_runs(tmp_path_factory):
    """An earlier lot's complete results (and history) per point, then a new lot's reduce
    ended at that point; the runs start together (each spends seconds importing)."""
    root = tmp_path_factory.mktemp("faults")
    lot_old, _ = write_lot(root / "old", {"K1": (4, np.full(9, 500.0))})
    lot_new, _ = write_lot(root / "new", {"K1": (4, np.full(9, 800.0)),
                                          "K2": (5, np.full(9, 820.0))})
    lot_new.write_text(lot_new.read_text().replace('id = "T-0001"', 'id = "T-0002"'))
    seed, seed_db = root / "seed" / "out", root / "seed" / "h.sqlite"
    assert main(["reduce", str(lot_old), "-o", str(seed), "--quiet", "--history",
                 str(seed_db)]) == 0
    ref_new = root / "ref_new"
    assert main(["reduce", str(lot_new), "-o", str(ref_new), "--quiet", "--no-history"]) == 0
    names_old, names_new = set(_digest(seed)), set(_digest(ref_new))
    assert names_old != names_new   # one wafer's map vs two: the sets are told apart
    runs = {}
    for point in FAULT_POINTS:
        case = root / point
        out, db = case / "out", case / "h.sqlite"
        shutil.copytree(seed, out)
        shutil.copy2(seed_db, db)
        mode = "no-exchange" if point == "after-move-aside" else "exchange"
        proc = subprocess.Popen([sys.executable, "-c", _DRIVER, mode, "reduce", str(lot_new),
                                 "-o", str(out), "--quiet", "--history", str(db)],
                                env={**os.environ, FAULT_ENV: point},
                                stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
        runs[point] = (proc, out, db, _digest(out))
    done = {}
    for point, (proc, out, db, before) in runs.items():
        stdout, stderr = proc.communicate(timeout=600)
        done[point] = dict(rc=proc.returncode, stderr=stderr, out=out, db=db, before=before)
    return dict(runs=done, lot_new=lot_new, names_old=names_old, names_new=names_new)


@pytest.mark.parametrize("point", FAULT_POINTS)
def test_fault_point_leaves_old_or_new_complete_set(point, fault_runs):
    run = fault_runs["runs"][point]
    names_new = fault_runs["names_new"]
    expect = EXPECTED[point]
    out, db, before = run["out"], run["db"], run["before"]
    assert run["rc"] == 86, run["stderr"]          # ended at the point, like a kill
    if expect["out"] == "old":
        assert _digest(out) == before               # byte-identical, marker included
    elif expect["out"] == "new":
        _assert_new_set(out, names_new, pending=True)   # recorded or not, the marker stays
    else:
        assert not out.exists()
    beside = _beside(out)
    staging = [p for p in beside if "-old-" not in p.name]
    if expect["beside"] == "none":
        assert beside == []
    elif expect["beside"] == "partial":
        (stage,) = beside
        names = _settled_names(stage)
        assert {MARKER, "lot.nc", "sites.csv"} <= names, sorted(names)
        # the map workers start as soon as the lot dataset exists, so some maps may be
        # staged too (never a report or a summary); a map being written at the kill stays a
        # hidden temporary file, every other one is whole
        maps = names - {MARKER, "lot.nc", "sites.csv"}
        assert all(n.startswith("figures/") for n in maps), sorted(maps)
        for name in maps:
            if not Path(name).name.startswith("."):
                _assert_readable(stage / name)
        _assert_readable(stage / "lot.nc")          # written atomically: whole, or absent
    elif expect["beside"] == "staged":
        (stage,) = beside
        _assert_new_set(stage, names_new, pending=True)
    elif expect["beside"] == "old":
        (stage,) = beside                           # the exchanged folder: the old results
        assert _digest(stage) == before
    else:
        (old,) = [p for p in beside if "-old-" in p.name]
        assert _digest(old) == before
        (stage,) = staging
        _assert_new_set(stage, names_new, pending=True)
    # the history agrees with what was published
    assert _recorded_sha(db, "T-0001") is not None
    if expect["recorded"]:
        assert _recorded_sha(db, "T-0002") == _sha(out / "lot.nc")
    else:
        assert _recorded_sha(db, "T-0002") is None
    # the next reduce into the folder sweeps the leftovers, catches up the record and
    # publishes the new set whole
    assert main(["reduce", str(fault_runs["lot_new"]), "-o", str(out), "--quiet",
                 "--history", str(db)]) == 0
    _assert_new_set(out, names_new, pending=False)
    assert _beside(out) == []
    assert _recorded_sha(db, "T-0002") == _sha(out / "lot.nc")


def test_kill_9_while_staging_keeps_the_previous_results(tmp_path):
    # a real SIGKILL from outside, once the staging folder holds lot.nc (the maps and the
    # reports are still to come): the previous results stay byte-identical, the workers
    # end with the killed parent, and the next run sweeps the staging folder
    lot_old, _ = write_lot(tmp_path / "old", {"K1": (4, np.full(9, 500.0))})
    lot_new, _ = write_lot(tmp_path / "new", {f"K{i}": (4 + i, np.full(9, 800.0 + i))
                                              for i in range(12)})
    out = tmp_path / "out"
    assert main(["reduce", str(lot_old), "-o", str(out), "--quiet", "--no-history"]) == 0
    before = _digest(out)
    proc = subprocess.Popen([sys.executable, "-m", "filmmap.cli.main", "reduce", str(lot_new),
                             "-o", str(out), "--quiet", "--no-history"],
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    children = []
    try:
        deadline = time.monotonic() + 300
        while proc.poll() is None and time.monotonic() < deadline:
            if list(tmp_path.glob(".out.filmmap-*/lot.nc")):
                with contextlib.suppress(psutil.NoSuchProcess):
                    children = psutil.Process(proc.pid).children(recursive=True)
                os.kill(proc.pid, signal.SIGKILL)
                break
            time.sleep(0.005)
        proc.wait(timeout=60)
    finally:
        if proc.poll() is None:
            proc.kill()
    assert proc.returncode == -signal.SIGKILL, "reduce ended before lot.nc was staged"
    _, alive = psutil.wait_procs(children, timeout=5)
    for p in alive:
        with contextlib.suppress(psutil.NoSuchProcess):
            p.kill()        # leave nothing behind even when the test fails
    assert alive == [], f"workers outlived their killed parent: {[p.pid for p in alive]}"
    assert _digest(out) == before
    assert [p.name for p in _beside(out)] and all(".filmmap-" in p.name for p in _beside(out))
    assert main(["reduce", str(lot_new), "-o", str(out), "--quiet", "--no-history"]) == 0
    assert _beside(out) == []
    with xr.open_dataset(out / "lot.nc") as ds:
        assert ds.sizes["wafer"] == 12
