"""Atomic writes: readers see the old file or the whole new one; failures leave no debris."""

import os

import pytest

from filmmap.io import atomic_path, write_bytes_atomic, write_text_atomic


def listing(folder):
    return sorted(p.name for p in folder.iterdir())


def test_write_bytes_creates_and_replaces(tmp_path):
    path = tmp_path / "out.bin"
    assert write_bytes_atomic(path, b"first") == path
    assert path.read_bytes() == b"first"
    write_bytes_atomic(path, bytearray(b"second, longer"))
    assert path.read_bytes() == b"second, longer"
    assert listing(tmp_path) == ["out.bin"]


def test_write_text_keeps_newlines_and_encodes_utf8(tmp_path):
    path = tmp_path / "out.txt"
    write_text_atomic(str(path), "a\r\nb\nµm\n")
    assert path.read_bytes() == "a\r\nb\nµm\n".encode("utf-8")
    write_text_atomic(path, "é", encoding="latin-1")
    assert path.read_bytes() == b"\xe9"
    with pytest.raises(TypeError, match="str"):
        write_text_atomic(path, b"bytes")
    assert path.read_bytes() == b"\xe9"


def test_atomic_path_yields_temp_in_same_folder(tmp_path):
    path = tmp_path / "report.json"
    path.write_text("old")
    with atomic_path(path) as tmp:
        assert tmp.parent == tmp_path and tmp != path and tmp.is_file()
        tmp.write_text("new")
        assert path.read_text() == "old"  # not replaced before the block ends
    assert path.read_text() == "new"
    assert listing(tmp_path) == ["report.json"]


def test_failure_keeps_old_file_and_removes_temp(tmp_path):
    path = tmp_path / "report.json"
    path.write_text("old")
    with pytest.raises(RuntimeError, match="boom"):
        with atomic_path(path) as tmp:
            tmp.write_text("half")
            raise RuntimeError("boom")
    assert path.read_text() == "old"
    assert listing(tmp_path) == ["report.json"]


def test_failure_without_existing_file_leaves_nothing(tmp_path):
    with pytest.raises(KeyboardInterrupt):
        with atomic_path(tmp_path / "new.txt") as tmp:
            tmp.write_text("x")
            raise KeyboardInterrupt
    assert listing(tmp_path) == []


def test_fsync_before_rename(tmp_path, monkeypatch):
    events = []
    real_fsync, real_replace = os.fsync, os.replace

    def fsync(fd):
        events.append(("fsync", os.fstat(fd).st_ino))
        return real_fsync(fd)

    def replace(src, dst):
        events.append(("replace", os.stat(src).st_ino))
        return real_replace(src, dst)

    monkeypatch.setattr(os, "fsync", fsync)
    monkeypatch.setattr(os, "replace", replace)
    path = tmp_path / "out.bin"
    write_bytes_atomic(path, b"data")
    kinds = [kind for kind, _ in events]
    assert kinds.count("replace") == 1
    at = kinds.index("replace")
    temp_inode = events[at][1]
    assert temp_inode == path.stat().st_ino          # the renamed file is the one written
    assert ("fsync", temp_inode) in events[:at]      # and it was flushed before the rename
    assert path.read_bytes() == b"data"
    # the maps' writes (durable=False) keep the rename, leave the flush to the system
    events.clear()
    write_bytes_atomic(path, b"map", durable=False)
    assert [kind for kind, _ in events] == ["replace"] and path.read_bytes() == b"map"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out.bin"]   # no temporary left


def test_permissions_follow_umask(tmp_path):
    old = os.umask(0o022)
    try:
        path = tmp_path / "out.txt"
        write_text_atomic(path, "x")
    finally:
        os.umask(old)
    assert path.stat().st_mode & 0o777 == 0o644


def test_missing_folder_and_directory_target(tmp_path):
    with pytest.raises(FileNotFoundError):
        write_bytes_atomic(tmp_path / "no" / "such.bin", b"x")
    (tmp_path / "d").mkdir()
    with pytest.raises(IsADirectoryError):
        write_bytes_atomic(tmp_path / "d", b"x")
    assert listing(tmp_path) == ["d"] and listing(tmp_path / "d") == []


def test_temp_removed_by_the_block_is_reported(tmp_path):
    path = tmp_path / "out.txt"
    with pytest.raises(FileNotFoundError, match="vanished"):
        with atomic_path(path) as tmp:
            tmp.unlink()
    assert listing(tmp_path) == []
