"""Run history storage: an embedded SQLite database of lot records, one row per lot and furnace.

This module opens, migrates, writes and reads the database; what a record holds and how
it is made from the lot view is `filmmap.history.records`, rebuilding one from an old
output folder `filmmap.history.importing`.

Location.  By default one database per user:

* ``$XDG_DATA_HOME/filmmap/history.sqlite`` when ``XDG_DATA_HOME`` is set (an absolute
  path, as the XDG Base Directory specification requires);
* otherwise ``%LOCALAPPDATA%\\filmmap\\history.sqlite`` on Windows;
* otherwise ``~/.local/share/filmmap/history.sqlite``.

Every function takes a ``db_path`` that overrides it (see `default_history_path`).

Concurrency and durability.  The database runs in write-ahead-log mode (``PRAGMA
journal_mode=WAL``): readers never block the writer.  Every write is one transaction
opened with ``BEGIN IMMEDIATE``, which takes the write lock at the start, and each
connection waits up to ``busy_timeout_s`` (default 60 s) for a lock held by another
process instead of failing.  A plain (deferred) ``BEGIN`` that first reads and later
writes can fail with ``SQLITE_BUSY`` at once, without waiting, when another process
commits in between; ``BEGIN IMMEDIATE`` avoids that.  So two processes recording at the
same time both succeed, one after the other, and nothing is lost; a write that fails for
any reason (a bad record, a full disk) is rolled back whole.  ``synchronous=FULL`` makes a
committed lot survive a power cut.

Schema and migrations.  Table ``schema_version`` holds one row, the schema version.
`MIGRATIONS` lists one function per step: ``MIGRATIONS[k]`` takes a database from
version k to k + 1 (version 0 is an empty file).  On every open the missing steps run in
order, all in one transaction, so a database is either migrated fully or left as it was.
A database newer than this code is refused rather than guessed at.

Version 1 (the first released schema)
    ``lots``: one row per (lot_id, furnace) with run_date, recorded_at (UTC, ISO 8601),
    recipe_json, recipe_sha256, advice_json, lot_nc_path, lot_nc_sha256, lot_mean_nm,
    wtw_pct, wiw_mean_pct.  ``wafers``: (lot_ref, wafer, slot, role, mean_nm, sigma_nm,
    nu_pct, sites_used).
Version 2 (current)
    ``lots`` gains target_nm, tolerance_pct and applied_trims_json (the zone trims in
    force during the run, K; needed to separate the furnace's own zone errors from the
    trims in run-to-run control).  New table ``slots``: (lot_ref, slot, mean_nm,
    offset_C), back-filled from the wafers and the stored advice's
    ``effective_offset_C_by_slot``.

Numbers that are missing or not finite are stored as NULL and read back as None.

Units: thickness nm, non-uniformity percent, temperature offsets and trims K.

References
----------
.. [1] SQLite documentation, "Write-Ahead Logging" (https://www.sqlite.org/wal.html)
   and "BEGIN TRANSACTION" (https://www.sqlite.org/lang_transaction.html).
.. [2] Python documentation, ``sqlite3`` module (timeout, isolation_level=None for
   explicit transaction control).
.. [3] XDG Base Directory Specification, version 0.8 (``XDG_DATA_HOME``).
"""

from __future__ import annotations

import contextlib
import datetime as _dt
import json
import os
import shutil
import sqlite3
import stat
import urllib.parse
from pathlib import Path

from filmmap.errors import FilmmapInputError
from filmmap.history.records import (LotRecord, SlotSummary, WaferSummary, canonical_json,
                                     finite_or_none, make_record)

__all__ = ["CURRENT_VERSION", "MIGRATIONS", "HISTORY_FILENAME", "check_sqlite_file",
           "default_history_path", "lots", "open_history", "open_history_readonly",
           "record_lot", "schema_version"]

#: File name of the default history database.
HISTORY_FILENAME = "history.sqlite"

#: Default wait for a lock held by another process, seconds.
DEFAULT_BUSY_TIMEOUT_S = 60.0


# --------------------------------------------------------------------------- location

def default_history_path(environ=None):
    """The per-user history database path.

    Parameters
    ----------
    environ : mapping, optional
        Environment to read (default `os.environ`).

    Returns
    -------
    pathlib.Path
        ``$XDG_DATA_HOME/filmmap/history.sqlite`` when ``XDG_DATA_HOME`` is an absolute
        path; else ``%LOCALAPPDATA%/filmmap/history.sqlite`` on Windows; else
        ``~/.local/share/filmmap/history.sqlite``.  The folder is not created here.

    References
    ----------
    .. [1] XDG Base Directory Specification, version 0.8: a relative ``XDG_DATA_HOME``
       is invalid and ignored; the default is ``$HOME/.local/share``.
    """
    env = os.environ if environ is None else environ
    xdg = env.get("XDG_DATA_HOME", "")
    if xdg and os.path.isabs(xdg):
        return Path(xdg) / "filmmap" / HISTORY_FILENAME
    if os.name == "nt" and env.get("LOCALAPPDATA"):
        return Path(env["LOCALAPPDATA"]) / "filmmap" / HISTORY_FILENAME
    home = env.get("HOME") or os.path.expanduser("~")
    return Path(home) / ".local" / "share" / "filmmap" / HISTORY_FILENAME


def _resolve(db_path):
    return default_history_path() if db_path is None else Path(db_path)


# --------------------------------------------------------------------------- schema

def _migrate_0_to_1(con):
    """Version 1: lots and wafers."""
    con.execute("""CREATE TABLE lots (
        id INTEGER PRIMARY KEY,
        lot_id TEXT NOT NULL,
        furnace TEXT NOT NULL DEFAULT '',
        run_date TEXT,
        recorded_at TEXT NOT NULL,
        recipe_json TEXT,
        recipe_sha256 TEXT,
        advice_json TEXT,
        lot_nc_path TEXT,
        lot_nc_sha256 TEXT,
        lot_mean_nm REAL,
        wtw_pct REAL,
        wiw_mean_pct REAL,
        UNIQUE (lot_id, furnace))""")
    con.execute("""CREATE TABLE wafers (
        lot_ref INTEGER NOT NULL REFERENCES lots(id) ON DELETE CASCADE,
        wafer TEXT NOT NULL,
        slot INTEGER NOT NULL,
        role TEXT NOT NULL,
        mean_nm REAL,
        sigma_nm REAL,
        nu_pct REAL,
        sites_used INTEGER,
        PRIMARY KEY (lot_ref, wafer))""")
    con.execute("CREATE INDEX lots_by_furnace_date ON lots (furnace, run_date)")


def _migrate_1_to_2(con):
    """Version 2: target, tolerance and applied trims on lots; a slots table, back-filled."""
    con.execute("ALTER TABLE lots ADD COLUMN target_nm REAL")
    con.execute("ALTER TABLE lots ADD COLUMN tolerance_pct REAL")
    con.execute("ALTER TABLE lots ADD COLUMN applied_trims_json TEXT")
    con.execute("""CREATE TABLE slots (
        lot_ref INTEGER NOT NULL REFERENCES lots(id) ON DELETE CASCADE,
        slot INTEGER NOT NULL,
        mean_nm REAL,
        offset_C REAL,
        PRIMARY KEY (lot_ref, slot))""")
    # back-fill: one slot row per wafer, offsets from the stored advice
    for ref, advice_json in con.execute("SELECT id, advice_json FROM lots").fetchall():
        by_slot = {}
        advice = None
        if advice_json:
            with contextlib.suppress(ValueError):
                advice = json.loads(advice_json)
        if isinstance(advice, dict):
            by_slot = advice.get("effective_offset_C_by_slot") or {}
            tgt = _num_or_none(advice.get("target_nm"))
            if tgt is not None:
                con.execute("UPDATE lots SET target_nm = ? WHERE id = ?", (tgt, ref))
        for slot, mean in con.execute("SELECT slot, mean_nm FROM wafers WHERE lot_ref = ? "
                                      "ORDER BY slot", (ref,)).fetchall():
            con.execute("INSERT OR IGNORE INTO slots (lot_ref, slot, mean_nm, offset_C) "
                        "VALUES (?, ?, ?, ?)",
                        (ref, slot, mean, _num_or_none(by_slot.get(str(slot)))))


def _num_or_none(v):
    try:
        return finite_or_none(v, "value")
    except FilmmapInputError:
        return None


#: Migration steps: ``MIGRATIONS[k]`` takes the schema from version k to k + 1.
MIGRATIONS = (_migrate_0_to_1, _migrate_1_to_2)

#: Schema version this code writes.
CURRENT_VERSION = len(MIGRATIONS)


def _read_version(con):
    has = con.execute("SELECT 1 FROM sqlite_master WHERE type = 'table' AND "
                      "name = 'schema_version'").fetchone()
    if not has:
        tables = con.execute("SELECT count(*) FROM sqlite_master WHERE type = 'table'").fetchone()
        if tables[0]:
            raise FilmmapInputError("this SQLite file is not a filmmap history (it has tables "
                                    "but no schema_version)", field="db_path")
        return 0
    rows = con.execute("SELECT version FROM schema_version").fetchall()
    if len(rows) != 1:
        raise FilmmapInputError(f"schema_version has {len(rows)} rows; expected 1",
                                field="db_path")
    return int(rows[0][0])


@contextlib.contextmanager
def _transaction(con):
    """BEGIN IMMEDIATE ... COMMIT, rolled back on any exception."""
    con.execute("BEGIN IMMEDIATE")
    try:
        yield con
    except BaseException:
        con.execute("ROLLBACK")
        raise
    con.execute("COMMIT")


def _migrate(con, path):
    version = _read_version(con)  # outside a transaction: a cheap check first
    if version == CURRENT_VERSION:
        return version
    with _transaction(con):
        version = _read_version(con)  # again under the write lock: another process may have won
        if version > CURRENT_VERSION:
            raise FilmmapInputError(f"history database schema version {version} is newer than "
                                    f"this filmmap understands ({CURRENT_VERSION}); upgrade "
                                    "filmmap", file=path)
        start = version
        for k in range(start, CURRENT_VERSION):
            MIGRATIONS[k](con)
        if start == 0:
            con.execute("CREATE TABLE schema_version (version INTEGER NOT NULL)")
            con.execute("INSERT INTO schema_version (version) VALUES (?)", (CURRENT_VERSION,))
        else:
            con.execute("UPDATE schema_version SET version = ?", (CURRENT_VERSION,))
    return CURRENT_VERSION


@contextlib.contextmanager
def open_history(db_path=None, *, busy_timeout_s=DEFAULT_BUSY_TIMEOUT_S, create=True):
    """Open (creating and migrating as needed) a history database.

    Parameters
    ----------
    db_path : str or path-like, optional
        Database file; default `default_history_path`.  Its folder is created.
    busy_timeout_s : float
        How long to wait for a lock held by another process, seconds.
    create : bool
        Create the file when missing (else `FileNotFoundError`).

    Yields
    ------
    sqlite3.Connection
        In autocommit mode (``isolation_level=None``): transactions are explicit.

    Raises
    ------
    FilmmapInputError
        For a file that is not a filmmap history, or whose schema is newer than this
        code.

    References
    ----------
    .. [1] SQLite documentation, "Write-Ahead Logging" and "PRAGMA busy_timeout".
    """
    path = _resolve(db_path)
    created = not path.exists()
    if created:
        if not create:
            raise FileNotFoundError(f"no history database at {path}")
        path.parent.mkdir(parents=True, exist_ok=True)
    con = sqlite3.connect(str(path), timeout=float(busy_timeout_s), isolation_level=None)
    ready = False
    try:
        con.execute(f"PRAGMA busy_timeout = {int(1000 * float(busy_timeout_s))}")
        try:
            mode = con.execute("PRAGMA journal_mode = WAL").fetchone()[0]
        except sqlite3.DatabaseError as exc:
            # a full disk shows as "disk I/O error" here, which reads like corruption
            free = shutil.disk_usage(path.parent).free
            if isinstance(exc, sqlite3.OperationalError) and free < 2**20:
                raise FilmmapInputError(f"cannot write the history database: the disk holding "
                                        f"it is full ({free} bytes free in {path.parent}; "
                                        f"SQLite says: {exc}); the database is unchanged",
                                        file=path) from None
            raise FilmmapInputError(f"not a usable SQLite database: {exc}", file=path) from None
        if str(mode).lower() != "wal":
            raise FilmmapInputError(f"could not switch the history to WAL mode (got {mode!r})",
                                    file=path)
        con.execute("PRAGMA synchronous = FULL")
        con.execute("PRAGMA foreign_keys = ON")
        _migrate(con, path)
        ready = True
        yield con
    finally:
        con.close()
        # a database this call created but could not set up (a full disk) is not left behind
        # as an empty file, which a later reader would refuse as "not a filmmap history"
        if created and not ready:
            with contextlib.suppress(OSError):
                if path.stat().st_size == 0:
                    path.unlink()


SQLITE_HEADER = b"SQLite format 3\x00"
"""First 16 bytes of every SQLite 3 database file (SQLite file format docs, "The Database
Header")."""


def check_sqlite_file(path):
    """Refuse, without opening it for writing, a path that is not an SQLite database file.

    Parameters
    ----------
    path : pathlib.Path

    Raises
    ------
    FileNotFoundError
        No file at ``path`` (the caller decides whether that is an empty history).
    FilmmapInputError
        A folder, a path under a file, an unreadable file, an empty (0-byte) file or one
        that does not start with `SQLITE_HEADER`.  The file is only read (16 bytes).
    """
    try:
        st = os.stat(path)
    except FileNotFoundError:
        if os.path.islink(path):
            raise FilmmapInputError("the history path is a symbolic link to a missing file; "
                                    "expected an SQLite history file", file=path) from None
        raise
    except NotADirectoryError:
        raise FilmmapInputError("a parent of the history path is a file, not a folder; "
                                "expected an SQLite history file", file=path) from None
    if stat.S_ISDIR(st.st_mode):
        raise FilmmapInputError("the history path is a folder; expected an SQLite history file",
                                file=path)
    if st.st_size == 0:
        raise FilmmapInputError("the history file is empty (0 bytes), not a filmmap history; "
                                "expected an SQLite database (it was left untouched)", file=path)
    try:
        with open(path, "rb") as fh:
            head = fh.read(len(SQLITE_HEADER))
    except OSError as exc:
        raise FilmmapInputError(f"cannot read the history file: {exc.strerror or exc}",
                                file=path) from None
    if head != SQLITE_HEADER:
        raise FilmmapInputError("not an SQLite database (the file does not start with "
                                "'SQLite format 3'); expected a filmmap history database "
                                "(it was left untouched)", file=path)


@contextlib.contextmanager
def open_history_readonly(db_path=None):
    """Open an existing history for reading only: nothing is ever written to it.

    Parameters
    ----------
    db_path : str or path-like, optional
        Database file (default `default_history_path`).

    Yields
    ------
    sqlite3.Connection
        A read-only connection, or, for a database of an older schema, an in-memory
        copy migrated to `CURRENT_VERSION` (the file itself is not migrated).

    Raises
    ------
    FileNotFoundError
        No file at the path.
    FilmmapInputError
        Not an SQLite file (`check_sqlite_file`), not a filmmap history, a schema newer
        than this code, or an unreadable database.

    Notes
    -----
    The file is opened with the URI ``file:PATH?mode=ro``.  A database in WAL mode
    needs its ``-shm`` file even to read; on read-only media, where that file cannot be
    created, the database is opened again with ``immutable=1``, which reads the file as
    it stands without locks.  That is safe there because nothing can write to a
    read-only medium; it is used only when the folder is not writable.

    References
    ----------
    .. [1] SQLite documentation, "Uniform Resource Identifiers" (``mode=ro``,
       ``immutable=1``) and "Write-Ahead Logging", section "Read-Only Databases".
    """
    path = _resolve(db_path)
    check_sqlite_file(path)
    uri = "file:" + urllib.parse.quote(str(Path(path).absolute())) + "?mode=ro"
    con = None
    try:
        try:
            con = sqlite3.connect(uri, uri=True, isolation_level=None)
            version = _read_version(con)
        except sqlite3.OperationalError:
            if con is not None:
                con.close()
                con = None
            if os.access(Path(path).absolute().parent, os.W_OK):
                raise
            con = sqlite3.connect(uri + "&immutable=1", uri=True, isolation_level=None)
            version = _read_version(con)
        if version > CURRENT_VERSION:
            raise FilmmapInputError(f"history database schema version {version} is newer than "
                                    f"this filmmap understands ({CURRENT_VERSION}); upgrade "
                                    "filmmap", file=path)
        if version < CURRENT_VERSION:
            # an older schema is read through a migrated copy in memory: reading never writes
            mem = sqlite3.connect(":memory:", isolation_level=None)
            con.backup(mem)
            con.close()
            con = mem
            _migrate(con, path)
        yield con
    except FilmmapInputError as exc:
        if exc.file is None:
            raise FilmmapInputError(exc.reason, file=path) from None
        raise
    except sqlite3.DatabaseError as exc:
        raise FilmmapInputError(f"cannot read the history database: {exc}; expected a filmmap "
                                "history (the file was left untouched)", file=path) from None
    finally:
        if con is not None:
            con.close()


def schema_version(db_path=None):
    """Schema version of an existing history database (after migration on open).

    Parameters
    ----------
    db_path : str or path-like, optional
        Database file (default `default_history_path`).

    Returns
    -------
    int
        Equal to `CURRENT_VERSION` once opened by this code.

    References
    ----------
    .. [1] SQLite documentation, "BEGIN TRANSACTION".
    """
    with open_history(db_path, create=False) as con:
        return _read_version(con)


# --------------------------------------------------------------------------- write / read

def _recorded_now():
    return _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="microseconds")


def record_lot(db_path, record, *, busy_timeout_s=DEFAULT_BUSY_TIMEOUT_S):
    """Record one lot; a lot already recorded for the same furnace is replaced.

    Parameters
    ----------
    db_path : str or path-like or None
        History database (None: `default_history_path`); created if missing.
    record : LotRecord or mapping
        See `make_record`.
    busy_timeout_s : float
        Wait for another process's write lock, seconds.

    Returns
    -------
    bool
        True when a lot with the same ``lot_id`` and ``furnace`` was there and has been
        replaced (wafers and slots included), False for a new lot.

    Raises
    ------
    FilmmapInputError
        For an invalid record (nothing is written).

    Notes
    -----
    The delete of the old lot and the inserts of the new one are one ``BEGIN
    IMMEDIATE`` transaction: a reader sees the old lot or the new one, never a mix, and
    a failure leaves the old one in place.

    References
    ----------
    .. [1] SQLite documentation, "BEGIN TRANSACTION" (IMMEDIATE) and "Write-Ahead
       Logging".
    """
    rec = make_record(record)
    recorded_at = _recorded_now()
    with open_history(db_path, busy_timeout_s=busy_timeout_s) as con, _transaction(con):
        old = con.execute("SELECT id FROM lots WHERE lot_id = ? AND furnace = ?",
                          (rec.lot_id, rec.furnace)).fetchone()
        if old is not None:
            con.execute("DELETE FROM wafers WHERE lot_ref = ?", (old[0],))
            con.execute("DELETE FROM slots WHERE lot_ref = ?", (old[0],))
            con.execute("DELETE FROM lots WHERE id = ?", (old[0],))
        cur = con.execute(
            "INSERT INTO lots (lot_id, furnace, run_date, recorded_at, recipe_json, "
            "recipe_sha256, advice_json, lot_nc_path, lot_nc_sha256, lot_mean_nm, wtw_pct, "
            "wiw_mean_pct, target_nm, tolerance_pct, applied_trims_json) "
            "VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
            (rec.lot_id, rec.furnace, rec.run_date, recorded_at, rec.recipe_json,
             rec.recipe_sha256, canonical_json(rec.advice), rec.lot_nc_path, rec.lot_nc_sha256,
             rec.lot_mean_nm, rec.wtw_pct, rec.wiw_mean_pct, rec.target_nm, rec.tolerance_pct,
             canonical_json(rec.applied_trims_C)))
        ref = cur.lastrowid
        con.executemany(
            "INSERT INTO wafers (lot_ref, wafer, slot, role, mean_nm, sigma_nm, nu_pct, "
            "sites_used) VALUES (?, ?, ?, ?, ?, ?, ?, ?)",
            [(ref, w.wafer, w.slot, w.role, w.mean_nm, w.sigma_nm, w.nu_pct, w.sites_used)
             for w in rec.wafers])
        con.executemany("INSERT INTO slots (lot_ref, slot, mean_nm, offset_C) VALUES (?, ?, ?, ?)",
                        [(ref, s.slot, s.mean_nm, s.offset_C) for s in rec.slots])
    return old is not None


_LOT_COLUMNS = ("id", "lot_id", "furnace", "run_date", "recorded_at", "recipe_json",
                "advice_json", "lot_nc_path", "lot_nc_sha256", "lot_mean_nm", "wtw_pct",
                "wiw_mean_pct", "target_nm", "tolerance_pct", "applied_trims_json")


def _loads(text):
    return None if text is None else json.loads(text)


def lots(db_path=None, furnace=None):
    """The recorded lots, oldest run first.

    Parameters
    ----------
    db_path : str or path-like, optional
        History database (default `default_history_path`).  A missing file is an empty
        history (nothing is created); the file is opened read-only
        (`open_history_readonly`) and never written, not even migrated.
    furnace : str, optional
        Only lots of this furnace (``""`` selects lots without a furnace name).

    Returns
    -------
    list of LotRecord
        Ordered by run date (lots without a run date last), then by the time they were
        recorded, then by lot id; with wafers and slots, and ``recorded_at`` set.

    References
    ----------
    .. [1] SQLite documentation, "SELECT" (ORDER BY).
    """
    path = _resolve(db_path)
    try:
        os.lstat(path)
    except FileNotFoundError:
        return []
    except NotADirectoryError:
        pass   # a file where a folder should be: open_history_readonly names it
    where, args = "", ()
    if furnace is not None:
        where, args = "WHERE furnace = ?", (str(furnace),)
    with open_history_readonly(path) as con:
        con.execute("BEGIN")  # one read snapshot for lots, wafers and slots
        try:
            rows = con.execute(f"SELECT {', '.join(_LOT_COLUMNS)} FROM lots {where} "
                               "ORDER BY run_date IS NULL, run_date, recorded_at, lot_id",
                               args).fetchall()
            wafers, slots = {}, {}
            sub = f"WHERE lot_ref IN (SELECT id FROM lots {where})"
            for r in con.execute("SELECT lot_ref, wafer, slot, role, mean_nm, sigma_nm, nu_pct, "
                                 f"sites_used FROM wafers {sub} ORDER BY slot, wafer", args):
                wafers.setdefault(r[0], []).append(WaferSummary(*r[1:]))
            for r in con.execute(f"SELECT lot_ref, slot, mean_nm, offset_C FROM slots {sub} "
                                 "ORDER BY slot", args):
                slots.setdefault(r[0], []).append(SlotSummary(*r[1:]))
        finally:
            con.execute("COMMIT")
    out = []
    for r in rows:
        d = dict(zip(_LOT_COLUMNS, r))
        out.append(LotRecord(
            lot_id=d["lot_id"], furnace=d["furnace"], run_date=d["run_date"],
            recipe=_loads(d["recipe_json"]), advice=_loads(d["advice_json"]),
            lot_nc_path=d["lot_nc_path"], lot_nc_sha256=d["lot_nc_sha256"],
            lot_mean_nm=d["lot_mean_nm"], wtw_pct=d["wtw_pct"], wiw_mean_pct=d["wiw_mean_pct"],
            target_nm=d["target_nm"], tolerance_pct=d["tolerance_pct"],
            applied_trims_C=_loads(d["applied_trims_json"]),
            wafers=tuple(wafers.get(d["id"], ())), slots=tuple(slots.get(d["id"], ())),
            recorded_at=d["recorded_at"]))
    return out
