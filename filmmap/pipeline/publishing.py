"""Publish a complete output folder at once, so a crash never leaves a mix.

Outputs are first written into a staging folder beside OUTDIR
(`filmmap.pipeline.lot_files.write_lot` writes lot.nc, sites.csv and spectra.nc; the run
adds the summaries, advice, figures and reports). When the set is complete, the staging folder and OUTDIR are swapped in one atomic step
(Linux ``renameat2(RENAME_EXCHANGE)``), and the old results are removed. A
reader of OUTDIR sees either the complete previous results or the complete
new ones, never a mix or a half-written file. Where the atomic exchange is not
available, two renames are used, which leaves a window of a few microseconds
in which OUTDIR is absent (never mixed).

OUTDIR is replaced only when it is new, empty, or an earlier filmmap output
folder (it holds the marker file `MARKER`). Any other folder is refused, so
that a mistyped ``-o`` cannot delete unrelated files.

The sequence has named fault points (`FAULT_POINTS`): with the environment variable
`FAULT_ENV` set to one of them the process ends there at once, like a kill, so that the
tests can check what each moment leaves behind.
"""

from __future__ import annotations

import contextlib
import ctypes
import ctypes.util
import os
import shutil
import uuid
from pathlib import Path

from filmmap.errors import FilmmapInputError, FilmmapOutputError

MARKER = ".filmmap-output"

FAULT_ENV = "FILMMAP_FAULT_AT"
"""Test hook: the process ends at once (``os._exit(86)``, like a kill) at the named point of
`FAULT_POINTS`.  Fault injection at named points is common practice, no source."""

FAULT_POINTS = (
    "before-staging",    # every fit done, nothing written: OUTDIR untouched
    "mid-staging",       # lot.nc and sites.csv staged, the rest not: OUTDIR untouched
    "after-staging",     # every output staged, nothing published: OUTDIR untouched
    "after-exchange",    # staging and OUTDIR swapped, the old results not yet removed
    "after-move-aside",  # without the atomic exchange: OUTDIR renamed away, the new not in
    "after-publish",     # published, the lot not yet recorded in the history
    "after-record",      # recorded in the history, the pending-record marker not yet removed
)
"""The named points of the publish-then-record sequence, in order (values of `FAULT_ENV`)."""


def fault_point(name):
    """End the process here, like a kill, when `FAULT_ENV` names this point (tests only)."""
    if os.environ.get(FAULT_ENV) == name:
        os._exit(86)
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
            fault_point("after-exchange")
            shutil.rmtree(stage, ignore_errors=True)  # now holds the previous results
            return
        old = outdir.parent / f".{outdir.name}.filmmap-old-{uuid.uuid4().hex[:8]}"
        os.rename(outdir, old)
        fault_point("after-move-aside")
        os.rename(stage, outdir)
        shutil.rmtree(old, ignore_errors=True)
    else:
        os.rename(stage, outdir)


@contextlib.contextmanager
def late_write_errors(outdir):
    """An OSError while writing the results (a disk filling up meanwhile, which no check
    before the work can foresee) as an error naming the path; the staging folder is gone
    and the previous results are untouched by then."""
    try:
        yield
    except OSError as exc:
        where = exc.filename or Path(outdir).parent
        raise FilmmapOutputError(f"could not write the results ({exc.strerror or exc}: {where}); "
                                 f"the previous results in {outdir} are intact, nothing was "
                                 "replaced", file=outdir, field="-o") from None
