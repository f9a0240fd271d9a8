"""Many lots at once: local processes or a Dask cluster on loopback give the same results;
lots are recorded in the run history and `filmmap history` charts them."""

import json
import sqlite3

import numpy as np
import pytest
import xarray as xr

from filmmap.cli.main import main
from filmmap.history import lots

from test_reduce import write_lot


def _make_lots(root, n=3):
    rng = np.random.default_rng(12)
    files = []
    for k in range(n):
        lot, _ = write_lot(root / f"lot{k}", {f"L{k}W1": (4, rng.uniform(300, 1200, 9)),
                                              f"L{k}W2": (5, rng.uniform(300, 1200, 9))})
        lot.write_text(lot.read_text().replace('id = "T-0001"', f'id = "T-{k:04d}"')
                       .replace('[lot]\n', f'[lot]\nrun_date = "2026-11-{k + 10:02d}"\n'))
        files.append(lot)
    return files


def _thickness(root, n):
    return [xr.open_dataset(root / f"T-{k:04d}" / "lot.nc")["thickness"].values for k in range(n)]


def test_many_lots_same_results_sequential_processes_and_dask(tmp_path, capsys):
    files = _make_lots(tmp_path / "in")
    db = tmp_path / "history.sqlite"
    runs = {}
    for name, extra in (("seq", ["--workers", "1"]), ("proc", ["--workers", "2"])):
        out = tmp_path / name
        assert main(["reduce", *map(str, files), "-o", str(out), "--no-figures", "--quiet",
                     "--history", str(db), *extra]) == 0, capsys.readouterr().err
        runs[name] = _thickness(out, len(files))
    distributed = pytest.importorskip("distributed")
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, host="127.0.0.1",
                                  dashboard_address=None, processes=True) as cluster:
        out = tmp_path / "dask"
        assert main(["reduce", *map(str, files), "-o", str(out), "--no-figures", "--quiet",
                     "--history", str(db), "--scheduler", cluster.scheduler_address]) == 0, \
            capsys.readouterr().err
        runs["dask"] = _thickness(out, len(files))
    for name in ("proc", "dask"):
        for a, b in zip(runs["seq"], runs[name]):
            np.testing.assert_array_equal(a, b)   # identical, not merely close
    # each lot recorded once: re-recording the same lot replaces it
    rows = lots(db)
    assert [r.lot_id for r in rows] == ["T-0000", "T-0001", "T-0002"]
    with sqlite3.connect(db) as con:
        assert con.execute("pragma journal_mode").fetchone()[0] == "wal"


def test_dask_with_relative_paths_gives_the_local_results(tmp_path, capsys, monkeypatch):
    # The workers start in the test's working directory; the client then moves into the
    # lots' folder and names every path relative to it. Without making the paths absolute
    # on the client, the workers would look for the lot files in their own directory.
    distributed = pytest.importorskip("distributed")
    files = _make_lots(tmp_path / "in", n=2)
    rel = [str(f.relative_to(tmp_path)) for f in files]
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, host="127.0.0.1",
                                  dashboard_address=None, processes=True) as cluster:
        monkeypatch.chdir(tmp_path)
        assert main(["reduce", *rel, "-o", "dask", "--no-figures", "--quiet", "--no-history",
                     "--scheduler", cluster.scheduler_address]) == 0, capsys.readouterr().err
    assert main(["reduce", *rel, "-o", "local", "--no-figures", "--quiet", "--no-history",
                 "--workers", "1"]) == 0, capsys.readouterr().err
    for k in range(2):
        a, b = tmp_path / "dask" / f"T-{k:04d}", tmp_path / "local" / f"T-{k:04d}"
        for name in ("sites.csv", "summary.csv"):
            assert (a / name).read_bytes() == (b / name).read_bytes(), name
        ja, jb = (json.loads((d / "summary.json").read_text()) for d in (a, b))
        assert ja.pop("created") and jb.pop("created")      # the one field that differs
        assert ja == jb
        da, db_ = xr.open_dataset(a / "lot.nc"), xr.open_dataset(b / "lot.nc")
        for var in list(da.data_vars) + list(da.coords):
            np.testing.assert_array_equal(da[var].values, db_[var].values)   # bitwise
        skip = {"created"}
        assert {k_: v for k_, v in da.attrs.items() if k_ not in skip} == \
            {k_: v for k_, v in db_.attrs.items() if k_ not in skip}


def test_history_command_charts_recorded_lots(tmp_path, capsys):
    files = _make_lots(tmp_path / "in", 4)
    db = tmp_path / "h.sqlite"
    for f in files:
        assert main(["reduce", str(f), "-o", str(tmp_path / f.parent.name), "--no-figures",
                     "--quiet", "--history", str(db)]) == 0
    capsys.readouterr()
    out = tmp_path / "hist"
    assert main(["history", "--history", str(db), "-o", str(out), "--baseline", "3"]) == 0
    text = capsys.readouterr().out
    assert "T-0003" in text and "never drives equipment" in text
    html = (out / "history.html").read_text()
    assert "data:image/png;base64," in html and "http" not in html.replace("http-equiv", "")
    # charts named by what they show (issue 14), one trend and one EWMA chart per metric
    names = sorted(p.name for p in out.glob("*.png"))
    assert "lot_mean_thickness_individuals.png" in names and len(names) == 6
    assert "provisional" in text                      # limits from 3 lots, said on the console
    assert main(["history", "--history", str(tmp_path / "empty.sqlite"), "-o",
                 str(tmp_path / "h2")]) == 2


def test_reduce_prints_run_to_run_estimate_after_two_lots(tmp_path, capsys):
    # the EWMA run-to-run estimate (Sachs, Hu & Ingolfsson 1995, from memory) joins the
    # advice once the furnace has two recorded lots; the invented demo lot, run twice
    from filmmap.pipeline.demo import generate_demo_lot
    lot = generate_demo_lot(tmp_path / "lot")
    db = tmp_path / "h.sqlite"
    assert main(["reduce", str(lot), "-o", str(tmp_path / "a"), "--no-figures",
                 "--history", str(db)]) == 0
    assert "run-to-run" not in capsys.readouterr().out
    lot.write_text(lot.read_text().replace('id = "DEMO-W2-0417"', 'id = "DEMO-W2-0418"')
                   .replace('run_date = "2026-11-30"', 'run_date = "2026-12-01"'))
    assert main(["reduce", str(lot), "-o", str(tmp_path / "b"), "--no-figures",
                 "--history", str(db)]) == 0
    out = capsys.readouterr().out
    assert "run-to-run (EWMA w = 0.3 over 2 lots" in out and "advisory only" in out


def test_a_many_lot_run_reads_each_lot_file_once(tmp_path, capsys, monkeypatch):
    # the lot files are read once for the output folders, the guards, the fits and the
    # history records (issue 16: a many-lot run used to parse each lot file three times)
    import filmmap.pipeline.reducing as reducing
    import filmmap.pipeline.run as run

    files = _make_lots(tmp_path / "in", n=2)
    reads = []
    real = run.read_lot_file

    def counting(path, *args, **kwargs):
        reads.append(str(path))
        return real(path, *args, **kwargs)

    monkeypatch.setattr(run, "read_lot_file", counting)
    monkeypatch.setattr(reducing, "read_lot_file", counting)
    assert main(["reduce", *map(str, files), "-o", str(tmp_path / "out"), "--no-figures",
                 "--no-report", "--quiet", "--workers", "1", "--history",
                 str(tmp_path / "h.sqlite")]) == 0, capsys.readouterr().err
    assert sorted(reads) == sorted(str(f.absolute()) for f in files)
    assert [r.lot_id for r in lots(tmp_path / "h.sqlite")] == ["T-0000", "T-0001"]
