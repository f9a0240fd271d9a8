"""The SQLite run history: records, replacement, ordering, migrations, concurrency.

The expected values are computed here independently (hashlib, numpy) from the inputs the
tests build; the v1 database of the migration test is written by hand with its own SQL,
not with the module's code.  Behaviour of SQLite (WAL, BEGIN IMMEDIATE, busy timeout) per
the SQLite documentation.
"""

import hashlib
import json
import multiprocessing as mp
import sqlite3

import numpy as np
import pytest
import xarray as xr

from filmmap.errors import FilmmapInputError
from filmmap.history.importing import record_from_outputs
from filmmap.history.records import LotRecord, SlotSummary, WaferSummary, make_record
from filmmap.history.store import (
    CURRENT_VERSION,
    default_history_path,
    lots,
    record_lot,
    schema_version,
)

RECIPE = [{"name": "dry-cap", "ambient": "O2", "minutes": 5.0, "at_C": 1000.0},
          {"name": "wet", "ambient": "H2O", "minutes": 115.0, "at_C": 1000.0}]


def _record(lot_id, run_date="2026-11-30", furnace="tube-2", mean=600.0, n=3, **extra):
    wafers = [WaferSummary(f"{lot_id}-W{i}", slot=i + 4, role="product", mean_nm=mean + i,
                           sigma_nm=1.0 + i / 10, nu_pct=0.2 + i / 100, sites_used=49)
              for i in range(n)]
    slots = [SlotSummary(i + 4, mean + i, -0.5 * i) for i in range(n)]
    data = dict(lot_id=lot_id, furnace=furnace, run_date=run_date, recipe=RECIPE,
                advice={"adjust_step": "wet", "common_offset_C": -1.0}, lot_mean_nm=mean + 1,
                wtw_pct=0.17, wiw_mean_pct=0.21, target_nm=600.0, tolerance_pct=2.0,
                wafers=wafers, slots=slots)
    data.update(extra)
    return make_record(LotRecord(**data))


# --------------------------------------------------------------------------- location

def test_default_path_follows_xdg_and_home(tmp_path):
    env = {"XDG_DATA_HOME": str(tmp_path / "xdg"), "HOME": str(tmp_path / "home")}
    assert default_history_path(env) == tmp_path / "xdg" / "filmmap" / "history.sqlite"
    # a relative XDG_DATA_HOME is invalid per the XDG specification and is ignored
    env = {"XDG_DATA_HOME": "relative/dir", "HOME": str(tmp_path / "home")}
    assert default_history_path(env) == (tmp_path / "home" / ".local" / "share" / "filmmap"
                                         / "history.sqlite")


# --------------------------------------------------------------------------- write / read

def test_round_trip_and_wal_mode(tmp_path):
    db = tmp_path / "sub" / "h.sqlite"
    rec = _record("L1")
    assert record_lot(db, rec) is False
    (row,) = lots(db)
    assert row.recorded_at is not None
    for name in ("lot_id", "furnace", "run_date", "recipe", "advice", "lot_mean_nm", "wtw_pct",
                 "wiw_mean_pct", "target_nm", "tolerance_pct", "wafers", "slots"):
        assert getattr(row, name) == getattr(rec, name), name
    canonical = json.dumps(RECIPE, sort_keys=True, separators=(",", ":"))
    assert row.recipe_sha256 == hashlib.sha256(canonical.encode()).hexdigest()
    con = sqlite3.connect(db)
    try:
        assert con.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
        assert con.execute("SELECT version FROM schema_version").fetchone()[0] == CURRENT_VERSION
        stored_hash = con.execute("SELECT recipe_sha256 FROM lots").fetchone()[0]
    finally:
        con.close()
    assert stored_hash == row.recipe_sha256


def test_recipe_hash_ignores_key_order():
    reordered = [dict(reversed(list(s.items()))) for s in RECIPE]
    assert _record("A", recipe=reordered).recipe_sha256 == _record("B").recipe_sha256
    longer = [dict(RECIPE[0]), dict(RECIPE[1], minutes=116.0)]
    assert _record("C", recipe=longer).recipe_sha256 != _record("B").recipe_sha256


def test_lots_are_ordered_by_run_date_and_filtered_by_furnace(tmp_path):
    db = tmp_path / "h.sqlite"
    record_lot(db, _record("L3", "2026-12-03"))
    record_lot(db, _record("L1", "2026-12-01"))
    record_lot(db, _record("X9", "2026-12-02", furnace="tube-7"))
    record_lot(db, _record("L0", None))
    record_lot(db, _record("L2", "2026-12-02"))
    assert [r.lot_id for r in lots(db)] == ["L1", "X9", "L2", "L3", "L0"]
    assert [r.lot_id for r in lots(db, furnace="tube-2")] == ["L1", "L2", "L3", "L0"]
    assert [w.wafer for w in lots(db, furnace="tube-7")[0].wafers] == ["X9-W0", "X9-W1", "X9-W2"]
    assert lots(tmp_path / "missing.sqlite") == []
    assert not (tmp_path / "missing.sqlite").exists()


def test_same_lot_and_furnace_replaces(tmp_path):
    db = tmp_path / "h.sqlite"
    assert record_lot(db, _record("L1", mean=600.0, n=3)) is False
    assert record_lot(db, _record("L1", furnace="tube-9")) is False  # other furnace: new lot
    assert record_lot(db, _record("L1", mean=610.0, n=2)) is True
    rows = lots(db, furnace="tube-2")
    assert len(rows) == 1
    assert rows[0].lot_mean_nm == 611.0
    assert [w.mean_nm for w in rows[0].wafers] == [610.0, 611.0]  # no wafer left from before
    assert [s.slot for s in rows[0].slots] == [4, 5]
    con = sqlite3.connect(db)
    try:
        assert con.execute("SELECT count(*) FROM wafers").fetchone()[0] == 2 + 3
    finally:
        con.close()


def test_a_failed_write_leaves_the_old_lot(tmp_path):
    db = tmp_path / "h.sqlite"
    record_lot(db, _record("L1", mean=600.0))
    con = sqlite3.connect(db)
    con.execute("CREATE TRIGGER refuse BEFORE INSERT ON wafers WHEN NEW.wafer = 'BAD' "
                "BEGIN SELECT RAISE(ABORT, 'refused by test trigger'); END")
    con.commit()
    con.close()
    bad = _record("L1", mean=700.0)
    bad = LotRecord(**{**bad.__dict__, "wafers": bad.wafers + (WaferSummary("BAD", 9),)})
    with pytest.raises(sqlite3.IntegrityError, match="refused"):
        record_lot(db, bad)
    (row,) = lots(db)
    assert row.lot_mean_nm == 601.0 and len(row.wafers) == 3


def test_bad_records_are_refused_before_writing(tmp_path):
    db = tmp_path / "h.sqlite"
    with pytest.raises(FilmmapInputError, match="lot id"):
        record_lot(db, _record(""))
    with pytest.raises(FilmmapInputError, match="ISO 8601"):
        record_lot(db, _record("L1", run_date="30/11/2026"))
    dup = _record("L1")
    with pytest.raises(FilmmapInputError, match="listed twice"):
        make_record({**dup.__dict__, "wafers": dup.wafers + dup.wafers[:1]})
    with pytest.raises(FilmmapInputError, match="unknown key"):
        make_record({"lot_id": "L1", "colour": "red"})
    assert lots(db) == []
    # NaN is missing: stored as NULL, read as None
    record_lot(db, _record("L2", lot_mean_nm=float("nan")))
    assert lots(db)[0].lot_mean_nm is None


# --------------------------------------------------------------------------- migrations

V1_SQL = """
CREATE TABLE schema_version (version INTEGER NOT NULL);
INSERT INTO schema_version VALUES (1);
CREATE TABLE lots (id INTEGER PRIMARY KEY, lot_id TEXT NOT NULL, furnace TEXT NOT NULL DEFAULT '',
  run_date TEXT, recorded_at TEXT NOT NULL, recipe_json TEXT, recipe_sha256 TEXT,
  advice_json TEXT, lot_nc_path TEXT, lot_nc_sha256 TEXT, lot_mean_nm REAL, wtw_pct REAL,
  wiw_mean_pct REAL, UNIQUE (lot_id, furnace));
CREATE TABLE wafers (lot_ref INTEGER NOT NULL REFERENCES lots(id) ON DELETE CASCADE,
  wafer TEXT NOT NULL, slot INTEGER NOT NULL, role TEXT NOT NULL, mean_nm REAL, sigma_nm REAL,
  nu_pct REAL, sites_used INTEGER, PRIMARY KEY (lot_ref, wafer));
CREATE INDEX lots_by_furnace_date ON lots (furnace, run_date);
"""


def test_a_version_1_database_is_migrated_on_open(tmp_path):
    db = tmp_path / "old.sqlite"
    con = sqlite3.connect(db)
    con.executescript(V1_SQL)
    advice = {"target_nm": 600.0, "effective_offset_C_by_slot": {"4": -1.25, "5": None}}
    con.execute("INSERT INTO lots (id, lot_id, furnace, run_date, recorded_at, advice_json, "
                "lot_mean_nm) VALUES (1, 'OLD-1', 'tube-2', '2025-01-05', "
                "'2025-01-05T10:00:00+00:00', ?, 598.5)", (json.dumps(advice),))
    con.executemany("INSERT INTO wafers VALUES (1, ?, ?, 'product', ?, 1.0, 0.2, 49)",
                    [("A", 4, 598.0), ("B", 5, 599.0)])
    con.commit()
    con.close()
    before = db.read_bytes()
    (row,) = lots(db)   # reading migrates a copy in memory, never the file
    assert db.read_bytes() == before
    assert schema_version(db) == CURRENT_VERSION   # opening for writing migrates
    assert row.lot_id == "OLD-1" and row.lot_mean_nm == 598.5 and row.target_nm == 600.0
    assert row.slots == (SlotSummary(4, 598.0, -1.25), SlotSummary(5, 599.0, None))
    assert row.applied_trims_C is None and row.tolerance_pct is None
    # and the migrated database takes new lots
    assert record_lot(db, _record("NEW-1", applied_trims_C={"load": 1.5})) is False
    assert lots(db, furnace="tube-2")[-1].applied_trims_C == {"load": 1.5}


#: The schema as documented in filmmap/history/store.py (versions 1 and 2), written out
#: here by hand: table -> columns in order.
PINNED_SCHEMA = {
    "lots": ["id", "lot_id", "furnace", "run_date", "recorded_at", "recipe_json",
             "recipe_sha256", "advice_json", "lot_nc_path", "lot_nc_sha256", "lot_mean_nm",
             "wtw_pct", "wiw_mean_pct", "target_nm", "tolerance_pct", "applied_trims_json"],
    "wafers": ["lot_ref", "wafer", "slot", "role", "mean_nm", "sigma_nm", "nu_pct",
               "sites_used"],
    "slots": ["lot_ref", "slot", "mean_nm", "offset_C"],
    "schema_version": ["version"],
}


def _schema(db):
    con = sqlite3.connect(db)
    try:
        tables = [r[0] for r in con.execute("SELECT name FROM sqlite_master WHERE type = 'table'")]
        return {name: [r[1] for r in con.execute(f"PRAGMA table_info({name})")]
                for name in tables}
    finally:
        con.close()


def test_new_and_migrated_databases_have_the_documented_schema(tmp_path):
    # a new database (version 0: no file) and a hand-written version-1 database both end
    # at the current version with the documented tables and columns, and the version-1
    # lot keeps its rows; a migration step that is missing or wrong fails here
    new = tmp_path / "new.sqlite"
    record_lot(new, _record("L1"))
    old = tmp_path / "old.sqlite"
    con = sqlite3.connect(old)
    con.executescript(V1_SQL)
    con.execute("INSERT INTO lots (id, lot_id, furnace, recorded_at, lot_mean_nm) "
                "VALUES (1, 'OLD-1', 'tube-2', '2025-01-05T10:00:00+00:00', 598.5)")
    con.executemany("INSERT INTO wafers VALUES (1, ?, ?, 'product', ?, 1.0, 0.2, 49)",
                    [("A", 4, 598.0), ("B", 5, 599.0)])
    con.commit()
    con.close()
    assert schema_version(old) == schema_version(new) == 2
    assert _schema(new) == _schema(old) == PINNED_SCHEMA
    (row,) = lots(old)
    assert [(w.wafer, w.slot, w.mean_nm) for w in row.wafers] == [("A", 4, 598.0),
                                                                  ("B", 5, 599.0)]
    assert [(s.slot, s.mean_nm) for s in row.slots] == [(4, 598.0), (5, 599.0)]


def test_newer_or_foreign_databases_are_refused(tmp_path):
    newer = tmp_path / "newer.sqlite"
    record_lot(newer, _record("L1"))
    con = sqlite3.connect(newer)
    con.execute("UPDATE schema_version SET version = 99")
    con.commit()
    con.close()
    with pytest.raises(FilmmapInputError, match="newer"):
        lots(newer)
    foreign = tmp_path / "foreign.sqlite"
    con = sqlite3.connect(foreign)
    con.execute("CREATE TABLE something (x)")
    con.commit()
    con.close()
    with pytest.raises(FilmmapInputError, match="not a filmmap history"):
        record_lot(foreign, _record("L1"))


# --------------------------------------------------------------------------- concurrency

def _writer(db, prefix, n, start):
    start.wait()
    replaced = [record_lot(db, _record(f"{prefix}-{i}", n=2)) for i in range(n)]
    replaced.append(record_lot(db, _record("SHARED", n=2)))
    return replaced


def _writer_context():
    """Processes started from a clean server (forkserver), not forked from the test process:
    a fork copies the locks other threads of the test session hold at that moment (a rare
    deadlock seen once on a loaded machine); spawn where forkserver is unavailable."""
    methods = mp.get_all_start_methods()
    return mp.get_context("forkserver" if "forkserver" in methods else "spawn")


def _writer_main(args):
    db, prefix, n, start, queue = args
    queue.put((prefix, _writer(db, prefix, n, start)))


def test_two_processes_recording_at_once_lose_nothing(tmp_path):
    db = tmp_path / "h.sqlite"       # fresh: both processes also race to create the schema
    ctx = _writer_context()
    start = ctx.Event()
    queue = ctx.Queue()
    n = 15
    procs = [ctx.Process(target=_writer_main, args=((db, p, n, start, queue),))
             for p in ("A", "B")]
    for p in procs:
        p.start()
    start.set()
    results = dict(queue.get(timeout=60) for _ in procs)
    for p in procs:
        p.join(timeout=60)
        assert p.exitcode == 0
    ids = [r.lot_id for r in lots(db)]
    assert sorted(ids) == sorted([f"{p}-{i}" for p in "AB" for i in range(n)] + ["SHARED"])
    assert not any(results["A"][:-1]) and not any(results["B"][:-1])
    # the shared lot was recorded by both: exactly one of them replaced the other's
    assert sorted([results["A"][-1], results["B"][-1]]) == [False, True]


def test_writers_wait_for_a_held_write_lock(tmp_path):
    """Two writers that find the database locked wait (busy timeout) and then both succeed."""
    import time

    db = tmp_path / "h.sqlite"
    record_lot(db, _record("SEED"))
    ctx = _writer_context()
    start, queue = ctx.Event(), ctx.Queue()
    procs = [ctx.Process(target=_writer_main, args=((db, p, 3, start, queue),)) for p in "AB"]
    for p in procs:
        p.start()
    # opened after the fork: a SQLite connection must never be carried across fork()
    holder = sqlite3.connect(db, isolation_level=None)
    holder.execute("BEGIN IMMEDIATE")                     # the write lock, held by this process
    start.set()
    time.sleep(0.8)                                       # both are now waiting for the lock
    assert queue.empty()
    holder.execute("COMMIT")
    holder.close()
    results = dict(queue.get(timeout=60) for _ in procs)
    for p in procs:
        p.join(timeout=60)
        assert p.exitcode == 0
    assert len(lots(db)) == 1 + 2 * 3 + 1
    assert sorted([results["A"][-1], results["B"][-1]]) == [False, True]


# --------------------------------------------------------------------------- from OUTDIR

def _write_outdir(folder, lot_toml_text):
    folder.mkdir()
    lot = folder / "lot.toml"
    lot.write_text(lot_toml_text, encoding="utf-8")
    sha = hashlib.sha256(lot.read_bytes()).hexdigest()
    wafers = np.array(["D-01", "W-04", "W-05", "M-06", "W-07", "W-08"])
    slot = np.array([1, 4, 5, 6, 7, 8])
    role = np.array(["dummy", "product", "product", "monitor", "product", "product"])
    mean = np.array([590.0, 598.0, 601.0, 603.0, 600.5, 640.0])
    sigma = np.array([2.0, 1.0, 1.2, 1.1, 0.9, 3.0])
    nu = 100 * sigma / mean
    used = np.array([49, 49, 49, 49, 49, 3])          # W-08 has too few usable sites
    # the per-wafer and per-site variables every lot.nc has (docs/formats.md), so that
    # the lot view can be built from the folder as from a real reduce
    fit_ok = np.arange(49)[None, :] < used[:, None]
    ds = xr.Dataset(
        {"mean_nm": ("wafer", mean), "sigma_nm": ("wafer", sigma), "nu_pct": ("wafer", nu),
         "sites_used": ("wafer", used), "range_nm": ("wafer", 4 * sigma),
         "halfrange_pct": ("wafer", 200 * sigma / mean),
         "fit_ok": (("wafer", "site"), fit_ok.astype("int8")),
         "fit_note": (("wafer", "site"), np.where(fit_ok, "", "no film fits"))},
        coords={"wafer": wafers, "slot": ("wafer", slot), "role": ("wafer", role)},
        attrs={"lot_id": "T-0001", "furnace": "tube <2>", "run_date": "2026-12-01",
               "input_files_sha256": json.dumps([{"file": str(lot), "sha256": sha}])})
    ds.to_netcdf(folder / "lot.nc", engine="h5netcdf")
    advice = {"adjust_step": "wet", "target_nm": 600.0, "common_offset_C": -0.4,
              "effective_offset_C_by_slot": {"1": None, "4": -0.9, "5": -0.1, "6": 0.2,
                                             "7": -0.3, "8": None}}
    (folder / "advice.json").write_text(json.dumps(advice), encoding="utf-8")
    return lot, mean, nu, slot, role, used


LOT_TOML = """[lot]
id = "T-0001"
[target]
thickness_nm = 600.0
tolerance_pct = 1.5
[[recipe.step]]
name = "dry-cap"
ambient = "O2"
minutes = 5
at_C = 1000
[[recipe.step]]
name = "wet"
ambient = "H2O"
minutes = 115.5
at_C = 1000
"""


def test_record_from_outputs(tmp_path):
    out = tmp_path / "out"
    lot, mean, nu, slot, role, used = _write_outdir(out, LOT_TOML)
    rec = record_from_outputs(out, min_sites=5)
    assert (rec.lot_id, rec.furnace, rec.run_date) == ("T-0001", "tube <2>", "2026-12-01")
    use = (role == "product") & (used >= 5)
    assert rec.lot_mean_nm == pytest.approx(np.mean(mean[use]), rel=1e-12)
    assert rec.wtw_pct == pytest.approx(100 * np.std(mean[use], ddof=1) / np.mean(mean[use]),
                                        rel=1e-12)
    assert rec.wiw_mean_pct == pytest.approx(np.mean(nu[use]), rel=1e-12)
    assert rec.lot_nc_sha256 == hashlib.sha256((out / "lot.nc").read_bytes()).hexdigest()
    assert rec.lot_nc_path == str((out / "lot.nc").absolute())
    assert rec.recipe == [{"name": "dry-cap", "ambient": "O2", "minutes": 5.0, "at_C": 1000.0},
                          {"name": "wet", "ambient": "H2O", "minutes": 115.5, "at_C": 1000.0}]
    assert (rec.target_nm, rec.tolerance_pct) == (600.0, 1.5)
    assert rec.advice["common_offset_C"] == -0.4
    by_slot = {s.slot: s for s in rec.slots}
    assert by_slot[4].offset_C == -0.9 and by_slot[8].offset_C is None
    assert by_slot[8].mean_nm is None           # too few sites: no usable mean
    assert [w.role for w in rec.wafers] == list(role)
    db = tmp_path / "h.sqlite"
    assert record_lot(db, rec) is False and record_lot(db, rec) is True
    assert lots(db)[0].wafers == rec.wafers


def test_record_from_outputs_ignores_a_changed_lot_file(tmp_path):
    out = tmp_path / "out"
    lot, *_ = _write_outdir(out, LOT_TOML)
    lot.write_text(LOT_TOML.replace("115.5", "130"), encoding="utf-8")   # edited since reduce
    rec = record_from_outputs(out, min_sites=5)
    assert rec.recipe is None and rec.recipe_sha256 is None
    assert rec.target_nm == 600.0 and rec.tolerance_pct is None          # from the advice
    with pytest.raises(FilmmapInputError, match="no lot.nc"):
        record_from_outputs(tmp_path)


def test_the_record_made_in_memory_equals_the_record_imported_from_the_folder(tmp_path):
    # reduce records the lot view and advice it has in memory; importing the published
    # folder must give the same record, and its figures are those of lot.nc (numpy here)
    from filmmap.pipeline.demo import generate_demo_lot
    from filmmap.pipeline import history_record, reduce_to_folder

    lot = generate_demo_lot(tmp_path / "lot")
    out = tmp_path / "out"
    reduction, written, _ = reduce_to_folder(lot, out, figures=False, report=False)
    live = history_record(written, reduction.config, {"load": 1.0})
    assert live == record_from_outputs(out, reduction.config, applied_trims_C={"load": 1.0})
    assert live.advice == json.loads((out / "advice.json").read_text(encoding="utf-8"))
    with xr.open_dataset(out / "lot.nc") as ds:
        role, used = ds["role"].values.astype(str), ds["sites_used"].values
        mean, nu = ds["mean_nm"].values, ds["nu_pct"].values
    use = (role == "product") & (used >= 5) & np.isfinite(mean)
    assert use.sum() >= 30 and (role == "monitor").any()     # monitors are left out
    assert live.lot_mean_nm == pytest.approx(np.mean(mean[use]), rel=1e-12)   # float rounding
    assert live.wtw_pct == pytest.approx(100 * np.std(mean[use], ddof=1) / np.mean(mean[use]),
                                         rel=1e-12)
    assert live.wiw_mean_pct == pytest.approx(np.mean(nu[use]), rel=1e-12)
    assert written.view.wiw_mean_pct == live.wiw_mean_pct     # the view owns the figure
    assert (live.target_nm, live.tolerance_pct) == (reduction.config.target.thickness_nm,
                                                    reduction.config.target.tolerance_pct)
    assert [s["name"] for s in live.recipe] == [s.name for s in reduction.config.recipe]
