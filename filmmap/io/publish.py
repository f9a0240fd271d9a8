"""Publish a complete output folder at once, so a crash never leaves a mix.

Outputs are first written into a staging folder beside OUTDIR. When the set
is complete, the staging folder and OUTDIR are swapped in one atomic step
(Linux ``renameat2(RENAME_EXCHANGE)``), and the old results are removed. A
reader of OUTDIR sees either the complete previous results or the complete
new ones, never a mix or a half-written file. Where the atomic exchange is not
available, two renames are used, which leaves a window of a few microseconds
in which OUTDIR is absent (never mixed).

OUTDIR is replaced only when it is new, empty, or an earlier filmmap output
folder (it holds the marker file `MARKER`). Any other folder is refused, so
that a mistyped ``-o`` cannot delete unrelated files.
"""

from __future__ import annotations

import contextlib
import ctypes
import ctypes.util
import os
import shutil
import uuid
from pathlib import Path

from filmmap.errors import FilmmapInputError

MARKER = ".filmmap-output"
_AT_FDCWD = -100
_RENAME_EXCHANGE = 2


def _libc():
    try:
        lib = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6", use_errno=True)
        return lib if hasattr(lib, "renameat2") else None
    except OSError:
        return None


def _exchange(a, b):
    """Atomically swap two paths; False when the platform cannot."""
    lib = _libc()
    if lib is None:
        return False
    rc = lib.renameat2(_AT_FDCWD, os.fsencode(a), _AT_FDCWD, os.fsencode(b), _RENAME_EXCHANGE)
    if rc != 0:
        err = ctypes.get_errno()
        if err in (22, 38, 95):  # EINVAL, ENOSYS, EOPNOTSUPP: file system or kernel says no
            return False
        raise OSError(err, os.strerror(err), str(a))
    return True


def check_outdir(outdir):
    """Refuse an OUTDIR that exists and is neither empty nor a filmmap output folder."""
    outdir = Path(outdir)
    if outdir.exists() and not outdir.is_dir():
        raise FilmmapInputError("output path exists and is not a folder; expected a folder",
                                file=outdir, field="-o")
    if outdir.is_dir() and any(outdir.iterdir()) and not (outdir / MARKER).is_file():
        raise FilmmapInputError(
            "output folder exists, is not empty and was not written by filmmap; choose a new "
            "or empty folder (filmmap replaces only its own output folders)", file=outdir,
            field="-o")


PID_MAX_DIGITS = 7
"""Digits of the largest Linux process id (pid_max <= 2**22 = 4194304, proc(5))."""


def staging_name(name, pid=None, tag=None):
    """Name of the staging folder of output folder NAME (its old-results folder is shorter)."""
    pid = "9" * PID_MAX_DIGITS if pid is None else pid
    tag = "0" * 8 if tag is None else tag
    return f".{name}.filmmap-{pid}-{tag}"


def _sweep_leftovers(outdir):
    """Remove staging/old folders a killed earlier run left beside OUTDIR."""
    for p in outdir.parent.glob(f".{outdir.name}.filmmap-*"):
        if not (p.is_dir() and (p / MARKER).is_file()):
            continue
        tag = p.name.rsplit(".filmmap-", 1)[-1].split("-")[0]
        if tag.isdigit() and _alive(int(tag)):
            continue  # another reduce is writing there right now
        with contextlib.suppress(OSError):
            shutil.rmtree(p)


def _alive(pid):
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


@contextlib.contextmanager
def staged_output(outdir):
    """Yield a staging folder; on success it becomes OUTDIR in one step.

    Parameters
    ----------
    outdir : path-like
        Final output folder.

    Yields
    ------
    pathlib.Path
        The staging folder to write every output into.
    """
    outdir = Path(outdir).absolute()
    check_outdir(outdir)
    outdir.parent.mkdir(parents=True, exist_ok=True)
    _sweep_leftovers(outdir)
    stage = outdir.parent / staging_name(outdir.name, os.getpid(), uuid.uuid4().hex[:8])
    stage.mkdir()
    (stage / MARKER).write_text("written by filmmap; this folder may be replaced by filmmap\n")
    try:
        yield stage
    except BaseException:
        shutil.rmtree(stage, ignore_errors=True)
        raise
    if outdir.exists():
        if _exchange(stage, outdir):
            shutil.rmtree(stage, ignore_errors=True)  # now holds the previous results
            return
        old = outdir.parent / f".{outdir.name}.filmmap-old-{uuid.uuid4().hex[:8]}"
        os.rename(outdir, old)
        os.rename(stage, outdir)
        shutil.rmtree(old, ignore_errors=True)
    else:
        os.rename(stage, outdir)
