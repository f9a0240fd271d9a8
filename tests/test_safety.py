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
import subprocess
import sys

import numpy as np
import pytest

from filmmap.io.publish import MARKER, staged_output

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
    from filmmap.io.guard import check_outputs_spare_inputs

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
