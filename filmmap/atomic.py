"""Atomic file writes: a reader sees the old file or the complete new one, never half.

In the foundation layer, so that every layer that writes files (the map figures as much
as the lot file outputs and the reports) writes them the one way.  Every output writer
goes through `atomic_path` (or the two helpers built on it): the data go to a temporary file in the destination folder, which is
flushed to disk (``fsync``) and then renamed over the destination with
`os.replace` (atomic on POSIX and Windows within one file system).  On
failure the temporary file is removed and the destination is untouched.
"""

from __future__ import annotations

import contextlib
import os
import secrets
from pathlib import Path

__all__ = ["atomic_path", "write_bytes_atomic", "write_text_atomic"]


def _fsync_file(path):
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def _fsync_dir(folder):
    """Flush the directory entry (POSIX); silently skipped where unsupported."""
    if os.name != "posix":
        return
    try:
        fd = os.open(folder, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


def _new_temp(path):
    """Create an empty temp file next to ``path``; the umask applies as for a normal file."""
    folder = path.parent
    for _ in range(100):
        tmp = folder / f".{path.name}.{secrets.token_hex(6)}.tmp"
        try:
            fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o666)
        except FileExistsError:
            continue
        os.close(fd)
        return tmp
    raise FileExistsError(f"could not create a temporary file next to {path}")


@contextlib.contextmanager
def atomic_path(path, durable=True):
    """Yield a temporary path that replaces ``path`` when the block succeeds.

    Parameters
    ----------
    path : str or path-like
        Destination file.  Its folder must exist.
    durable : bool
        Flush the file and its folder to disk (``fsync``) around the rename.  False
        keeps the rename atomic for readers but leaves the flush to the operating
        system: for the many small, re-creatable map PNGs of a lot, whose fsync (about
        1 ms each on ext4) would cost the report's speed goal (measured: ratio 1.93 ->
        2.00-2.02 with it; benchmarks/report.py).

    Yields
    ------
    pathlib.Path
        An (empty, already created) temporary file in the same folder; write
        the output there, by any means (``open(tmp, "wb")``, a library's
        ``save(tmp)``, ...).

    Notes
    -----
    On normal exit the temporary file is fsync'ed, renamed over ``path`` with
    `os.replace`, and the folder is fsync'ed.  If the block raises, the
    temporary file is removed, ``path`` is left as it was, and the exception
    propagates.

    Examples
    --------
    >>> with atomic_path("report.json") as tmp:          # doctest: +SKIP
    ...     tmp.write_text(json.dumps(result))
    """
    path = Path(path)
    if path.is_dir():
        raise IsADirectoryError(f"cannot write {path}: it is a directory")
    tmp = _new_temp(path)
    try:
        yield tmp
        if not tmp.is_file():
            raise FileNotFoundError(f"the temporary file {tmp} for {path} vanished before it "
                                    "could be renamed into place")
        if durable:
            _fsync_file(tmp)
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        raise
    if durable:
        _fsync_dir(path.parent)


def write_bytes_atomic(path, data, durable=True):
    """Write ``data`` to ``path`` atomically.

    Parameters
    ----------
    path : str or path-like
        Destination file (its folder must exist).
    data : bytes-like
        The complete new contents.
    durable : bool
        As for `atomic_path`.

    Returns
    -------
    pathlib.Path
        ``path``.
    """
    view = memoryview(data)
    with atomic_path(path, durable) as tmp:
        with open(tmp, "wb") as fh:
            fh.write(view)
    return Path(path)


def write_text_atomic(path, text, encoding="utf-8"):
    """Write ``text`` to ``path`` atomically, without newline translation.

    Parameters
    ----------
    path : str or path-like
        Destination file (its folder must exist).
    text : str
        The complete new contents.
    encoding : str
        Text encoding (default UTF-8).

    Returns
    -------
    pathlib.Path
        ``path``.
    """
    if not isinstance(text, str):
        raise TypeError(f"write_text_atomic() takes str, got {type(text).__name__}")
    return write_bytes_atomic(path, text.encode(encoding))
