"""Hostile catalogue: never lose a user's data, check the environment before the work.

Each case runs the command line in a subprocess and asserts the exit code, a message that
names the path or option concerned, that every input is byte-identical afterwards and that
no staging folder is left behind.  The cases come from a hostile review of reduce,
history and predict (common practice, no source).
"""

import contextlib
import hashlib
import os
import shutil
import signal
import subprocess
import sys
import time

import numpy as np
import pytest

from filmmap.pipeline.publishing import MARKER, staged_output

from test_reduce import write_lot


def run_cli(*args, env=None, cwd=None):
    full_env = dict(os.environ, **(env or {}))
    return subprocess.run([sys.executable, "-m", "filmmap.cli.main", *map(str, args)],
                          capture_output=True, text=True, env=full_env, cwd=cwd, timeout=600)


def tree_digest(root):
    """SHA-256, size and mtime of every file under ROOT (links not followed), by relative path."""
    out = {}
    for p in sorted(root.rglob("*")):
        if p.is_symlink():
            out[str(p.relative_to(root))] = ("link", os.readlink(p))
        elif p.is_file():
            st = p.stat()
            out[str(p.relative_to(root))] = (hashlib.sha256(p.read_bytes()).hexdigest(),
                                             st.st_size, st.st_mtime_ns)
    return out


def staging_leftovers(folder):
    return [p.name for p in folder.iterdir() if ".filmmap-" in p.name]


def earlier_output(out):
    """An output folder as an earlier run publishes it (marker file and a result)."""
    with staged_output(out) as stage:
        (stage / "summary.csv").write_text("wafer,slot\nOLD,1\n")
    return out


def one_wafer_lot(folder, lot_id="T-0001"):
    lot, _ = write_lot(folder, {"K1": (4, np.full(9, 600.0))})
    if lot_id != "T-0001":
        lot.write_text(lot.read_text().replace('id = "T-0001"', f'id = "{lot_id}"'))
    return lot


def assert_refused(r, *names):
    assert r.returncode == 2, (r.returncode, r.stderr)
    assert "Traceback" not in r.stderr
    for name in names:
        assert str(name) in r.stderr, (name, r.stderr)


# ------------------------------------------------------------------ 1. inputs are sacred

def test_lot_and_spectra_copied_into_earlier_output_are_kept(tmp_path):
    # the first data-loss case: `reduce out/lot.toml -o out` deleted lot.toml and spectra
    out = earlier_output(tmp_path / "out")
    one_wafer_lot(tmp_path / "src")
    for p in (tmp_path / "src").iterdir():
        shutil.copy(p, out / p.name)
    before = tree_digest(tmp_path)
    r = run_cli("reduce", out / "lot.toml", "-o", out, "--no-figures", "--quiet")
    assert_refused(r, out, out / "lot.toml")
    assert "-o" in r.stderr and "lot file" in r.stderr
    assert tree_digest(tmp_path) == before
    assert staging_leftovers(tmp_path) == []


def test_lot_folder_under_earlier_output_is_kept(tmp_path):
    # the second case: the lot kept in out/lot/ under an earlier output out/
    out = earlier_output(tmp_path / "out")
    lot = one_wafer_lot(out / "lot")
    before = tree_digest(tmp_path)
    r = run_cli("reduce", lot, "-o", out, "--no-figures", "--quiet")
    assert_refused(r, out, lot)
    assert tree_digest(tmp_path) == before
    assert staging_leftovers(tmp_path) == []


def test_output_folder_equal_to_the_lot_folder_is_refused(tmp_path):
    # the lot folder made an output folder by a marker copied along with results
    lot = one_wafer_lot(tmp_path / "lot")
    (tmp_path / "lot" / MARKER).write_text("copied\n")
    before = tree_digest(tmp_path)
    r = run_cli("reduce", lot, "-o", tmp_path / "lot", "--no-figures", "--quiet")
    assert_refused(r, tmp_path / "lot", lot)
    assert tree_digest(tmp_path) == before


def test_links_are_resolved_both_ways(tmp_path):
    # (the lot reader already refuses data links leaving the lot folder, so this is checked
    # on the guard itself) an input that is a link to a file inside the output folder, and an
    # input that is a link lying inside the output folder (the link itself would be deleted)
    from filmmap.errors import FilmmapInputError
    from filmmap.pipeline.guard import check_outputs_spare_inputs

    out = earlier_output(tmp_path / "out")
    (out / "K1.csv").write_text("data")
    (tmp_path / "elsewhere.csv").write_text("data")
    (tmp_path / "link.csv").symlink_to(out / "K1.csv")
    (out / "link2.csv").symlink_to(tmp_path / "elsewhere.csv")
    for given in (tmp_path / "link.csv", out / "link2.csv"):
        with pytest.raises(FilmmapInputError, match="would delete it") as err:
            check_outputs_spare_inputs([out], [("spectra file", given)])
        assert str(given) in str(err.value) and str(out) in str(err.value)
    check_outputs_spare_inputs([out], [("spectra file", tmp_path / "elsewhere.csv")])
    # an input inside a leftover staging folder of a killed run (swept before staging)
    leftover = tmp_path / ".out.filmmap-999999-deadbeef"
    leftover.mkdir()
    (leftover / "lot.toml").write_text("x")
    with pytest.raises(FilmmapInputError, match="would delete it"):
        check_outputs_spare_inputs([out], [("lot file", leftover / "lot.toml")])


def test_reference_and_dark_inside_the_output_are_kept(tmp_path):
    # raw-intensity mode: the reference spectrum lives in a subfolder that is an old output
    lot_dir = tmp_path / "lot"
    one_wafer_lot(lot_dir)
    out = earlier_output(lot_dir / "refs")
    (out / "bare_si.spec").write_text("I@400,I@500\n1,2\n")
    lot = lot_dir / "lot.toml"
    lot.write_text(lot.read_text().replace('files = ["*.csv"]', 'files = ["*.csv"]\n'
                                           'reference_file = "refs/bare_si.spec"')
                   .replace('reflectance_unit = "fraction"\n', ""))
    before = tree_digest(tmp_path)
    r = run_cli("reduce", lot, "-o", out, "--no-figures", "--quiet")
    assert_refused(r, out, out / "bare_si.spec")
    assert "reference file" in r.stderr
    assert tree_digest(tmp_path) == before


def test_output_link_to_earlier_output_is_refused_unless_followed(tmp_path):
    # the third case: `-o link` replaced the link by a real folder, leaving its target stale
    target = earlier_output(tmp_path / "results-v1")
    link = tmp_path / "latest"
    link.symlink_to(target, target_is_directory=True)
    lot = one_wafer_lot(tmp_path / "lot")
    before = tree_digest(tmp_path)
    r = run_cli("reduce", lot, "-o", link, "--no-figures", "--quiet")
    assert_refused(r, link, target, "--follow-output-link")
    assert tree_digest(tmp_path) == before
    assert staging_leftovers(tmp_path) == []
    # with the documented option the target is replaced and the link kept
    r = run_cli("reduce", lot, "-o", link, "--no-figures", "--quiet", "--no-history",
                "--follow-output-link")
    assert r.returncode == 0, r.stderr
    assert link.is_symlink() and link.resolve() == target.resolve()
    assert (target / "lot.nc").is_file() and not (target / "summary.csv").read_text().count("OLD")
    assert staging_leftovers(tmp_path) == []


def test_history_database_inside_the_output_is_kept(tmp_path):
    # the history database (and its WAL files) lie inside the folder to be replaced
    out = earlier_output(tmp_path / "out")
    lot = one_wafer_lot(tmp_path / "lot")
    db = out / "history.sqlite"
    r = run_cli("reduce", lot, "-o", tmp_path / "first", "--no-figures", "--quiet",
                "--history", db)
    assert r.returncode == 0, r.stderr
    before = tree_digest(tmp_path)
    for extra in ((), ("--no-history",)):   # protected even when not recording
        r = run_cli("reduce", lot, "-o", out, "--no-figures", "--quiet", "--history", db, *extra)
        assert_refused(r, out, db)
        assert "history database" in r.stderr
        assert tree_digest(tmp_path) == before
    assert staging_leftovers(tmp_path) == []


def test_default_history_inside_the_output_is_kept(tmp_path):
    out = earlier_output(tmp_path / "out")
    data_home = out / "data"
    (data_home / "filmmap").mkdir(parents=True)
    (data_home / "filmmap" / "history.sqlite").write_bytes(b"")
    lot = one_wafer_lot(tmp_path / "lot")
    before = tree_digest(tmp_path)
    r = run_cli("reduce", lot, "-o", out, "--no-figures", "--quiet",
                env={"XDG_DATA_HOME": str(data_home)})
    assert_refused(r, out, data_home / "filmmap" / "history.sqlite")
    assert tree_digest(tmp_path) == before


def test_many_lots_each_folder_spares_every_lots_inputs(tmp_path):
    # lot B lies inside the folder where lot A's results go (OUTROOT/<lot A id>)
    root = tmp_path / "root"
    out_a = earlier_output(root / "LOT-A")
    lot_a = one_wafer_lot(tmp_path / "a", "LOT-A")
    lot_b = one_wafer_lot(out_a / "b", "LOT-B")
    before = tree_digest(tmp_path)
    r = run_cli("reduce", lot_a, lot_b, "-o", root, "--no-figures", "--quiet", "--workers", "1")
    assert_refused(r, out_a, lot_b)
    assert tree_digest(tmp_path) == before
    assert staging_leftovers(root) == []


def test_history_charts_folder_spares_the_history(tmp_path):
    lot = one_wafer_lot(tmp_path / "lot")
    charts = earlier_output(tmp_path / "charts")
    db = charts / "h.sqlite"
    assert run_cli("reduce", lot, "-o", tmp_path / "out", "--no-figures", "--quiet",
                   "--history", db).returncode == 0
    before = tree_digest(tmp_path)
    r = run_cli("history", "--history", db, "-o", charts)
    assert_refused(r, charts, db)
    assert tree_digest(tmp_path) == before


# ------------------------------------------------------------------ 2. reading never writes

@contextlib.contextmanager
def tmpfs(folder, size="1m"):
    """A small tmpfs mounted at FOLDER (root only; the test is skipped where mounting fails)."""
    folder.mkdir(parents=True, exist_ok=True)
    r = subprocess.run(["mount", "-t", "tmpfs", "-o", f"size={size}", "tmpfs", str(folder)],
                       capture_output=True, text=True)
    if r.returncode != 0:
        pytest.skip(f"cannot mount a tmpfs here: {r.stderr.strip()}")
    try:
        yield folder
    finally:
        subprocess.run(["umount", "-l", str(folder)], capture_output=True)


def remount(folder, mode):
    subprocess.run(["mount", "-o", f"remount,{mode}", str(folder)], check=True)


def file_state(path):
    st = path.stat()
    return hashlib.sha256(path.read_bytes()).hexdigest(), st.st_size, st.st_mtime_ns


@pytest.mark.parametrize("content", [b"", b"lot_id,mean\nL1,600\n", b"SQLite format 2\x00" + b"x" * 100],
                         ids=["zero-bytes", "text-file", "not-sqlite-3"])
def test_history_refuses_a_non_database_without_touching_it(tmp_path, content):
    # the issue: `history` on a 0-byte file wrote a schema into it (0 -> 36 KB)
    db = tmp_path / "h.sqlite"
    db.write_bytes(content)
    before = file_state(db)
    r = run_cli("history", "--history", db, "-o", tmp_path / "charts")
    assert_refused(r, db)
    assert "expected" in r.stderr
    assert file_state(db) == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["h.sqlite"]   # no -wal/-shm, no charts


def test_history_refuses_a_folder_or_a_path_under_a_file(tmp_path):
    (tmp_path / "dir.sqlite").mkdir()
    (tmp_path / "plain").write_text("x")
    for db, words in ((tmp_path / "dir.sqlite", "folder"), (tmp_path / "plain" / "h.sqlite", "parent")):
        r = run_cli("history", "--history", db, "-o", tmp_path / "charts")
        assert_refused(r, db, words)


def test_reading_a_database_does_not_change_it(tmp_path):
    lot = one_wafer_lot(tmp_path / "lot")
    db = tmp_path / "h.sqlite"
    assert run_cli("reduce", lot, "-o", tmp_path / "out", "--no-figures", "--quiet",
                   "--history", db).returncode == 0
    before = file_state(db)
    r = run_cli("history", "--history", db, "-o", tmp_path / "charts")
    assert r.returncode == 0, r.stderr
    assert "T-0001" in r.stdout
    assert file_state(db) == before


def test_history_reads_a_database_on_a_read_only_mount(tmp_path):
    # the issue: a valid database on a read-only mount could not be read (WAL needs -shm)
    lot = one_wafer_lot(tmp_path / "lot")
    with tmpfs(tmp_path / "media", "4m") as media:
        db = media / "h.sqlite"
        r = run_cli("reduce", lot, "-o", tmp_path / "out", "--no-figures", "--quiet",
                    "--history", db)
        assert r.returncode == 0, r.stderr
        before = file_state(db)
        remount(media, "ro")
        r = run_cli("history", "--history", db, "-o", tmp_path / "charts")
        assert r.returncode == 0, r.stderr
        assert "T-0001" in r.stdout
        assert file_state(db) == before
        assert sorted(p.name for p in media.iterdir()) == ["h.sqlite"]


# ------------------------------------------------------------------ 3. environment first

RECIPE_TOML = '''
[boat]
slots = 10

[furnace]
zones = [ { name = "load", slots = [1, 5] }, { name = "source", slots = [6, 10] } ]
max_offset_C = 5.0

[[recipe.step]]
name = "wet"
ambient = "H2O"
minutes = 60
at_C = 1000
'''


def recipe_lot(folder):
    lot = one_wafer_lot(folder)
    lot.write_text(lot.read_text() + RECIPE_TOML)
    return lot


def assert_nothing_written(tmp_path, before):
    """Inputs and the earlier output byte-identical, no staging folder anywhere."""
    assert tree_digest(tmp_path) == before
    assert not [p for p in tmp_path.rglob("*") if ".filmmap-" in p.name
                and p.name != MARKER]


@pytest.fixture
def lot_and_output(tmp_path):
    lot = recipe_lot(tmp_path / "lot")
    out = earlier_output(tmp_path / "out")
    return lot, out


def test_output_under_a_file_is_refused_before_the_fit(tmp_path, lot_and_output):
    lot, _ = lot_and_output
    (tmp_path / "plain").write_text("not a folder")
    before = tree_digest(tmp_path)
    r = run_cli("reduce", lot, "-o", tmp_path / "plain" / "out", "--no-figures", "--quiet")
    assert_refused(r, tmp_path / "plain", "-o", "not a folder")
    assert_nothing_written(tmp_path, before)


@pytest.mark.parametrize("length", [300, 240])
def test_output_name_too_long_is_refused_before_the_fit(tmp_path, lot_and_output, length):
    # 300 bytes is beyond NAME_MAX (255, POSIX); 240 fits but its staging name does not
    lot, _ = lot_and_output
    before = tree_digest(tmp_path)
    out = tmp_path / ("r" * length)
    r = run_cli("reduce", lot, "-o", out, "--no-figures", "--quiet")
    assert_refused(r, "-o", "NAME_MAX")
    assert_nothing_written(tmp_path, before)


def test_output_mount_point_is_refused_and_leaves_no_staging(tmp_path, lot_and_output):
    lot, _ = lot_and_output
    with tmpfs(tmp_path / "mnt", "8m") as mnt:
        before = tree_digest(tmp_path)
        r = run_cli("reduce", lot, "-o", mnt, "--no-figures", "--quiet")
        assert_refused(r, mnt, "mount point")
        assert_nothing_written(tmp_path, before)


def test_output_on_a_read_only_mount_is_refused(tmp_path, lot_and_output):
    lot, _ = lot_and_output
    with tmpfs(tmp_path / "media", "8m") as media:
        remount(media, "ro")
        r = run_cli("reduce", lot, "-o", media / "out", "--no-figures", "--quiet")
        assert_refused(r, media, "read-only")
        assert list(media.iterdir()) == []


def test_output_without_space_is_refused_before_the_fit(tmp_path, lot_and_output):
    lot, _ = lot_and_output
    with tmpfs(tmp_path / "small", "1m") as small:
        r = run_cli("reduce", lot, "-o", small / "out", "--quiet")
        assert_refused(r, small, "MiB free")
        assert list(small.iterdir()) == []


def _no_xfsz_and_limit(max_bytes):
    def preexec():
        import resource
        import signal
        signal.signal(signal.SIGXFSZ, signal.SIG_IGN)   # write() then fails with EFBIG
        resource.setrlimit(resource.RLIMIT_FSIZE, (max_bytes, max_bytes))
    return preexec


def test_disk_filling_during_the_write_keeps_the_previous_results(tmp_path, lot_and_output):
    # the late case no check can foresee, made with `ulimit -f` (RLIMIT_FSIZE): the first
    # file larger than 60 kB (a figure or the report) cannot be written
    lot, out = lot_and_output
    before = tree_digest(tmp_path)
    r = subprocess.run([sys.executable, "-m", "filmmap.cli.main", "reduce", str(lot), "-o",
                        str(out), "--quiet", "--no-history"], capture_output=True, text=True,
                       preexec_fn=_no_xfsz_and_limit(60_000), timeout=600)
    assert r.returncode == 2, r.stderr
    assert "Traceback" not in r.stderr and "internal error" not in r.stderr
    assert str(out) in r.stderr and "previous results" in r.stderr and "intact" in r.stderr
    assert_nothing_written(tmp_path, before)


@pytest.mark.parametrize("kind", ["folder", "text", "under-file", "corrupt"])
def test_unusable_history_is_refused_before_the_fit(tmp_path, lot_and_output, kind):
    lot, out = lot_and_output
    db = tmp_path / "h.sqlite"
    if kind == "folder":
        db.mkdir()
    elif kind == "text":
        db.write_text("lot,mean\nL1,600\n")
    elif kind == "under-file":
        (tmp_path / "plain").write_text("x")
        db = tmp_path / "plain" / "h.sqlite"
    else:
        good = tmp_path / "good.sqlite"
        assert run_cli("reduce", lot, "-o", tmp_path / "first", "--no-figures", "--quiet",
                       "--history", good).returncode == 0
        data = bytearray(good.read_bytes())
        data[100:4096] = b"\xff" * (4096 - 100)    # the schema page, header kept
        db.write_bytes(bytes(data))
    before = tree_digest(tmp_path)
    r = run_cli("reduce", lot, "-o", out, "--no-figures", "--quiet", "--history", db)
    assert_refused(r, db)
    assert "expected" in r.stderr
    assert_nothing_written(tmp_path, before)


def test_read_only_history_is_refused_before_the_fit(tmp_path, lot_and_output):
    lot, out = lot_and_output
    with tmpfs(tmp_path / "media", "8m") as media:
        db = media / "h.sqlite"
        assert run_cli("reduce", lot, "-o", tmp_path / "first", "--no-figures", "--quiet",
                       "--history", db).returncode == 0
        remount(media, "ro")
        before = tree_digest(tmp_path)
        r = run_cli("reduce", lot, "-o", out, "--no-figures", "--quiet", "--history", db)
        assert_refused(r, db, "read-only")
        assert_nothing_written(tmp_path, before)


def test_history_without_space_is_refused_before_the_fit(tmp_path, lot_and_output):
    lot, out = lot_and_output
    with tmpfs(tmp_path / "small", "1m") as small:
        before = tree_digest(tmp_path)
        r = run_cli("reduce", lot, "-o", out, "--no-figures", "--quiet", "--history",
                    small / "h.sqlite")
        assert_refused(r, small / "h.sqlite", "MiB free")
        assert_nothing_written(tmp_path, before)


@pytest.mark.parametrize("trim, words", [("load=nan", "finite"), ("load=inf", "finite"),
                                         ("nozone=2", "not a zone"), ("load=1e308", "max_offset_C"),
                                         ("load=5.5", "max_offset_C"), ("load", "ZONE=NUMBER")])
def test_applied_trims_are_checked_before_the_fit(tmp_path, lot_and_output, trim, words):
    lot, out = lot_and_output
    db = tmp_path / "h.sqlite"
    before = tree_digest(tmp_path)
    r = run_cli("reduce", lot, "-o", out, "--no-figures", "--quiet", "--history", db,
                "--applied-trims", trim)
    assert_refused(r, "--applied-trims", words)
    assert_nothing_written(tmp_path, before)
    assert not db.exists()


def test_applied_trims_within_limits_are_recorded(tmp_path, lot_and_output):
    from filmmap.history import lots
    lot, out = lot_and_output
    db = tmp_path / "h.sqlite"
    r = run_cli("reduce", lot, "-o", out, "--no-figures", "--quiet", "--history", db,
                "--applied-trims", "load=-5", "--applied-trims", "source=+2.5")
    assert r.returncode == 0, r.stderr
    assert lots(db)[0].applied_trims_C == {"load": -5.0, "source": 2.5}


@pytest.mark.parametrize("option, value", [("--baseline", "0"), ("--baseline", "-3"),
                                           ("--baseline", "1"), ("--weight", "0"),
                                           ("--weight", "1.5"), ("--ewma-lambda", "0"),
                                           ("--ewma-lambda", "nan")])
def test_history_values_are_bounded(tmp_path, option, value):
    r = run_cli("history", "--history", tmp_path / "none.sqlite", "-o", tmp_path / "charts",
                option, value)
    assert_refused(r, option)
    assert list(tmp_path.iterdir()) == []


@pytest.mark.parametrize("args, option", [
    (["--set", "wet.minutes=1e308"], "--set"), (["--set", "wet.minutes=0"], "'wet'"),
    (["--set", "wet.at_C=5000"], "--set"), (["--set", "wet.minutes=nan"], "'wet'"),
    (["--trim", "nozone=1"], "--trim"), (["--trim", "load=50"], "--trim")])
def test_predict_values_are_bounded(tmp_path, args, option):
    lot = recipe_lot(tmp_path / "lot")
    r = run_cli("predict", lot, *args)
    assert_refused(r, option)
    assert len(r.stdout) < 2000   # no 300-digit numbers printed


@pytest.mark.parametrize("content", ["[1, 2]", '{"effective_offset_C_by_slot": [1]}',
                                     '{"effective_offset_C_by_slot": {"99": 1.0}}',
                                     '{"effective_offset_C_by_slot": {"4": 1e308}}', "{nope"])
def test_predict_advice_of_the_wrong_shape_names_the_advice(tmp_path, content):
    lot = recipe_lot(tmp_path / "lot")
    advice = tmp_path / "advice.json"
    advice.write_text(content)
    r = run_cli("predict", lot, "--advice", advice)
    assert_refused(r, advice)
    assert "internal error" not in r.stderr and f"{lot}:" not in r.stderr


# ------------------------------------------------------------------ fault injection

def _recorded_sha(db, lot_id):
    from filmmap.history import lots
    return {r.lot_id: r.lot_nc_sha256 for r in lots(db)}.get(lot_id)


def _sha(path):
    return hashlib.sha256(path.read_bytes()).hexdigest()


def test_crash_after_staging_changes_neither_folder_nor_history(tmp_path):
    lot = one_wafer_lot(tmp_path / "a")
    out, db = tmp_path / "out", tmp_path / "h.sqlite"
    assert run_cli("reduce", lot, "-o", out, "--no-figures", "--quiet",
                   "--history", db).returncode == 0
    lot_b = one_wafer_lot(tmp_path / "b", "T-0002")
    before = tree_digest(out)
    r = run_cli("reduce", lot_b, "-o", out, "--no-figures", "--quiet", "--history", db,
                env={"FILMMAP_FAULT_AT": "after-staging"})
    assert r.returncode == 86, r.stderr
    assert tree_digest(out) == before
    assert _recorded_sha(db, "T-0001") == _sha(out / "lot.nc")   # they agree
    assert _recorded_sha(db, "T-0002") is None


def test_crash_between_publish_and_record_is_caught_up_by_the_next_run(tmp_path):
    from filmmap.pipeline import PENDING_RECORD
    lot_a = one_wafer_lot(tmp_path / "a")
    lot_b = one_wafer_lot(tmp_path / "b", "T-0002")
    out, db = tmp_path / "out", tmp_path / "h.sqlite"
    assert run_cli("reduce", lot_a, "-o", out, "--no-figures", "--quiet",
                   "--history", db).returncode == 0
    r = run_cli("reduce", lot_b, "-o", out, "--no-figures", "--quiet", "--history", db,
                env={"FILMMAP_FAULT_AT": "after-publish"})
    assert r.returncode == 86, r.stderr
    # published, not yet recorded: the folder says so
    assert (out / PENDING_RECORD).is_file()
    published_b = _sha(out / "lot.nc")
    assert _recorded_sha(db, "T-0002") is None
    # the next reduce into the folder records what was published before replacing it
    r = run_cli("reduce", lot_a, "-o", out, "--no-figures", "--quiet", "--history", db)
    assert r.returncode == 0, r.stderr
    assert _recorded_sha(db, "T-0002") == published_b
    assert _recorded_sha(db, "T-0001") == _sha(out / "lot.nc")
    assert not (out / PENDING_RECORD).exists()


# ------------------------------------------------------------------ 4. physical bounds

def _spectra_file(path, n_sites=9, n_wl=5, wafer="K1", slot=4, value="0.3"):
    header = "wafer,slot,site,x_mm,y_mm," + ",".join(f"R@{400 + 10 * k}" for k in range(n_wl))
    row_tail = "," + ",".join([value] * n_wl)
    lines = [header] + [f"{wafer},{slot},{s + 1},0,0{row_tail}" for s in range(n_sites)]
    path.write_text("\n".join(lines) + "\n")


def _reduce_refused(tmp_path, lot, *names):
    before = tree_digest(tmp_path)
    r = run_cli("reduce", lot, "-o", tmp_path / "out", "--no-figures", "--quiet",
                "--history", tmp_path / "h.sqlite")
    assert_refused(r, *names)
    assert tree_digest(tmp_path) == before     # inputs unchanged, no output, no history
    return r


@pytest.mark.parametrize("old, new, field", [
    ("search_nm = [5, 3000]\n", "thickness_nm = 0\n", "stack.layer[1].thickness_nm"),
    ('id = "T-0001"', 'id = "' + "L" * 65 + '"', "lot.id"),
    ('[stack]', '[boat]\nslots = 100000000\n\n[stack]', "boat.slots"),
    ('[stack]', '[[recipe.step]]\nname = "wet"\nambient = "H2O"\nminutes = 1e9\nat_C = 1000\n'
                '\n[stack]', "recipe.step[1].minutes"),
])
def test_lot_file_numbers_beyond_bounds_are_refused(tmp_path, old, new, field):
    lot = one_wafer_lot(tmp_path / "lot")
    text = lot.read_text()
    assert old in text
    lot.write_text(text.replace(old, new, 1))   # new tables go before [stack]
    _reduce_refused(tmp_path, lot, lot, field)


@pytest.mark.parametrize("case", ["long-id", "huge-id", "sites", "wavelengths", "slot"])
def test_spectra_numbers_beyond_bounds_are_refused(tmp_path, case):
    lot = one_wafer_lot(tmp_path / "lot")
    data = tmp_path / "lot" / "K1.csv"
    if case == "long-id":
        _spectra_file(data, wafer="W" * 65)
        field = "wafer"
    elif case == "huge-id":
        _spectra_file(data, wafer="W" * (2 * 2**20))   # the 2 MiB id
        field = "wafer"
    elif case == "sites":
        _spectra_file(data, n_sites=10001)
        field = "site"
    elif case == "wavelengths":
        _spectra_file(data, n_sites=1, n_wl=20001)
        field = "R@"
    else:
        _spectra_file(data, slot=5000)
        field = "slot"
    r = _reduce_refused(tmp_path, lot, data, f"field '{field}'")
    assert "expected" in r.stderr
    assert len(r.stderr) < 2000          # the 2 MiB id is not echoed back


@pytest.mark.parametrize("reference", ["equal", "zero", "below"])
def test_degenerate_reference_names_the_reference_file(tmp_path, reference):
    folder = tmp_path / "lot"
    lot = one_wafer_lot(folder)
    wl = list(range(400, 1001, 10))
    dark = np.full(len(wl), 120.0)
    ref = {"equal": dark, "zero": np.zeros(len(wl)), "below": dark - 50}[reference]
    for name, counts in (("dark", dark), ("bare_si", ref)):
        (folder / f"{name}.spec").write_text(",".join(f"I@{w}" for w in wl) + "\n"
                                             + ",".join(f"{v:g}" for v in counts) + "\n")
    # the data files as raw counts (any positive numbers: the reference is refused first)
    text = (folder / "K1.csv").read_text().splitlines()
    header = text[0].replace("R@", "I@")
    rows = [",".join(r.split(",")[:5] + ["1000"] * len(wl)) for r in text[1:]]
    (folder / "K1.csv").write_text("\n".join([header] + rows) + "\n")
    lot.write_text(lot.read_text().replace('reflectance_unit = "fraction"\n',
                                           'dark_file = "dark.spec"\n'
                                           'reference_file = "bare_si.spec"\n'))
    r = _reduce_refused(tmp_path, lot, folder / "bare_si.spec", "reference_file")
    assert "dark" in r.stderr


def test_lot_whose_fits_all_failed_is_not_recorded(tmp_path):
    # flat spectra: no film fits them (tests/test_bad_inputs.py, flat spectrum case)
    lot = one_wafer_lot(tmp_path / "lot")
    _spectra_file(tmp_path / "lot" / "K1.csv", n_wl=61, value="0.30")   # 400-1000 nm
    db = tmp_path / "h.sqlite"
    r = run_cli("reduce", lot, "-o", tmp_path / "out", "--no-figures", "--history", db)
    assert r.returncode == 0, r.stderr
    assert "failed fits: 9" in r.stdout
    assert "not recorded in the history" in r.stderr and "T-0001" in r.stderr
    from filmmap.history import lots
    assert lots(db) == []
    from filmmap.pipeline import PENDING_RECORD
    assert not (tmp_path / "out" / PENDING_RECORD).exists()


def test_full_disk_under_the_history_says_so(tmp_path):
    # the issue: a full disk under the history read "not a usable SQLite database: disk I/O
    # error", which sounds like corruption
    from filmmap.errors import FilmmapInputError
    from filmmap.history import lots
    from filmmap.pipeline import PENDING_RECORD, record_history

    lot = one_wafer_lot(tmp_path / "lot")
    out = tmp_path / "out"
    assert run_cli("reduce", lot, "-o", out, "--no-figures", "--quiet",
                   "--no-history").returncode == 0
    (out / PENDING_RECORD).write_text("{}")
    with tmpfs(tmp_path / "small", "1m") as small:
        db = small / "h.sqlite"
        fd = os.open(small / "filler", os.O_WRONLY | os.O_CREAT)   # fill the disk up
        try:
            with contextlib.suppress(OSError):
                while True:
                    os.write(fd, b"\0" * 4096)
        finally:
            os.close(fd)
        with pytest.raises(FilmmapInputError) as err:
            record_history(out, None, db)
        message = str(err.value)
        assert str(db) in message and "full" in message
        assert "not a usable SQLite database" not in message
        assert (out / PENDING_RECORD).exists()      # the next reduce into OUT records it
        (small / "filler").unlink()
        assert not db.exists()      # no empty database file left behind
        assert lots(db) == []


# ------------------------------------------------------------------ 5. no orphans

def _children_once_drawing(proc, stage_glob, psutil, min_children=2, timeout_s=300):
    """The process tree under PROC once its first wafer map is in the staging folder."""
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline and proc.poll() is None:
        try:
            kids = psutil.Process(proc.pid).children(recursive=True)
        except psutil.NoSuchProcess:
            return []
        if len(kids) >= min_children and list(stage_glob()):
            return kids
        time.sleep(0.02)
    return []


def test_killing_reduce_while_drawing_leaves_no_worker(tmp_path):
    # the issue: kill -9 of reduce during the figures left its 2 figure workers alive
    import psutil
    lot, _ = write_lot(tmp_path / "lot", {f"W{i:02d}": (i + 1, np.full(9, 600.0 + i))
                                          for i in range(40)})
    out = tmp_path / "out"
    proc = subprocess.Popen([sys.executable, "-m", "filmmap.cli.main", "reduce", str(lot), "-o",
                             str(out), "--quiet", "--no-history"],
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    try:
        children = _children_once_drawing(
            proc, lambda: tmp_path.glob(".out.filmmap-*/figures/*.png"), psutil)
        assert children, "reduce ended before its figure workers could be seen"
        os.kill(proc.pid, signal.SIGKILL)
        proc.wait()
        gone, alive = psutil.wait_procs(children, timeout=5)
        for p in alive:
            p.kill()            # leave nothing behind, even when the test fails
        assert not alive, [p.pid for p in alive]
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
