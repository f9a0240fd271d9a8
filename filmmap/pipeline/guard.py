"""Guards that run before any work: outputs never replace inputs.

Publishing an output folder replaces it whole (`filmmap.pipeline.publishing.staged_output`): the
previous folder and everything in it is deleted.  So before anything is staged or fitted,
the output folder is compared with every file the run reads, and refused when

* it *is* an input, *contains* an input, or *lies inside* an input (an input folder);
* an input lies in a staging or old-results folder that a killed earlier run left beside
  it (those are swept before staging);
* it is a symbolic link: replacing it would put a real folder in place of the link and
  leave the link's target stale.  With ``follow_link=True`` (``--follow-output-link``) the
  link's target is replaced instead and the link is kept.

Paths are compared after resolving symbolic links (`pathlib.Path.resolve`), and also with
only their folder resolved, so that an input that is itself a link lying inside the output
folder (the link would be deleted) is caught as well.
"""

from __future__ import annotations

import os
import shutil
import urllib.parse
from pathlib import Path

from filmmap.errors import FilmmapInputError


def lot_inputs(config):
    """Every file a reduce of ``config`` reads, with what it is.

    Parameters
    ----------
    config : filmmap.io.lotfile.LotConfig

    Returns
    -------
    list of (str, pathlib.Path)
        (role, path): the lot file, each spectra file, the reference and dark spectra
        (raw-intensity mode) and each layer's n,k table.
    """
    m = config.measurement
    found = [("lot file", Path(config.path))]
    found += [("spectra file", Path(f)) for f in m.files]
    if m.reference_file is not None:
        found.append(("reference file", Path(m.reference_file)))
    if m.dark_file is not None:
        found.append(("dark file", Path(m.dark_file)))
    found += [("n,k table", Path(layer.nk_file)) for layer in config.stack.layers
              if layer.nk_file is not None]
    for role, key in (("site map", "site_map"), ("slot map", "slot_map")):
        value = getattr(m, key, None)
        if isinstance(value, Path):        # a built-in pattern name is not a file
            found.append((role, value))
    return found


def history_inputs(db_path):
    """The history database and the files SQLite keeps beside it (WAL, shared memory, journal).

    Parameters
    ----------
    db_path : path-like or None
        Database file; None means the per-user default
        (`filmmap.history.store.default_history_path`).

    Returns
    -------
    list of (str, pathlib.Path)

    References
    ----------
    .. [1] SQLite documentation, "Write-Ahead Logging" (the ``-wal`` and ``-shm`` files)
       and "Temporary Files Used By SQLite" (the rollback ``-journal``).
    """
    from filmmap.history.store import default_history_path

    path = Path(default_history_path() if db_path is None else db_path)
    return [("history database", path)] + [
        ("history database", path.with_name(path.name + suffix))
        for suffix in ("-wal", "-shm", "-journal")]


def _forms(path):
    """The path with every link resolved, and with only its folder resolved (the entry itself)."""
    path = Path(os.path.abspath(path))
    return {path.resolve(), path.parent.resolve() / path.name}


def _within(inner, outer):
    return inner == outer or outer in inner.parents


def output_target(outdir, follow_link=False, option="-o"):
    """The folder that publishing ``outdir`` will replace; refuses a symbolic link.

    Parameters
    ----------
    outdir : path-like
        The output folder as given.
    follow_link : bool
        Accept a symbolic link and replace its target (the link itself is kept).
    option : str
        Command-line option named in the error.

    Returns
    -------
    pathlib.Path
        Absolute path of the folder to replace (the link's target when following).

    Raises
    ------
    FilmmapInputError
        ``outdir`` is a symbolic link and ``follow_link`` is False.
    """
    outdir = Path(outdir)
    check_name_lengths(outdir, option)
    if os.path.islink(outdir):
        target = outdir.resolve()
        if not follow_link:
            raise FilmmapInputError(
                f"output folder is a symbolic link to {target}; publishing would replace the "
                "link with a real folder and leave its target stale. Give the target folder "
                f"itself, or --follow-output-link to replace the target", file=outdir,
                field=option)
        return target
    return Path(os.path.abspath(outdir))


def check_name_lengths(path, option="-o"):
    """Refuse a path with a component longer than the file system takes (POSIX NAME_MAX).

    Checked before any other use of the path, which would fail with "File name too long".
    """
    path = Path(os.path.abspath(path))
    base = path
    while not os.path.lexists(base) and base != base.parent:
        base = base.parent
    name_max = _name_max(base)
    for name in path.parts[1:]:
        size = len(os.fsencode(name))
        if size > name_max:
            raise FilmmapInputError(f"a folder name in the path is {size} bytes "
                                    f"({name[:24]}...); expected at most {name_max} bytes "
                                    "per name (NAME_MAX)", file=path, field=option)


def check_outputs_spare_inputs(outdirs, inputs, option="-o"):
    """Refuse output folders that equal, contain or lie inside any input.

    Parameters
    ----------
    outdirs : iterable of path-like
        Folders that will be replaced whole (after `output_target`).
    inputs : iterable of (str, path-like)
        (role, path) of every file or folder the run reads (`lot_inputs`,
        `history_inputs`).  Paths that do not exist are compared too: a history
        database that is about to be created inside an output folder would be lost.
    option : str
        Command-line option named in the error.

    Raises
    ------
    FilmmapInputError
        Naming the output folder and the input (with its role); nothing is touched.
    """
    inputs = [(role, Path(p), _forms(p)) for role, p in inputs]
    for outdir in outdirs:
        outdir = Path(outdir)
        out_forms = _forms(outdir)
        parent = Path(os.path.abspath(outdir)).parent.resolve()
        # leftovers of a killed run (.NAME.filmmap-*) are deleted before staging, too
        doomed = set(out_forms) | {p.resolve() for p in parent.glob(f".{outdir.name}.filmmap-*")}
        for role, given, forms in inputs:
            for out in doomed:
                for inp in forms:
                    if _within(inp, out):
                        how = "is" if inp == out else "contains"
                        shown = outdir if out in out_forms else out
                        raise FilmmapInputError(
                            f"output folder {shown} {how} the {role} {given}; publishing the "
                            "results would delete it. Choose an output folder outside every "
                            "input (nothing was written)", file=outdir, field=option)
                    if _within(out, inp):
                        raise FilmmapInputError(
                            f"output folder {outdir} lies inside the {role} {given}; expected "
                            "an output folder outside every input (nothing was written)",
                            file=outdir, field=option)


# --------------------------------------------------------------------------- environment

NAME_MAX_FALLBACK = 255
"""Longest file name in bytes where ``pathconf`` cannot tell (POSIX NAME_MAX; 255 on ext4,
xfs, btrfs and tmpfs)."""

MIN_FREE_BYTES = 1 * 2**20
"""Free space kept in hand beyond any estimate, bytes (common practice, no source)."""

# Conservative output sizes, bytes.  Measured on the demo lot (44 wafers x 49 sites x 61
# wavelengths, 10.6 MB of spectra): lot.nc + summaries 0.30 MB, figures + contact sheet
# 3.7 MB, report.html 5.0 MB, report.pdf 3.5 MB, i.e. about 0.28 MB per wafer with figures;
# the constants below are 3-4 times those (common practice, no source).
BYTES_BASE = 4 * 2**20                 # fixed files, NetCDF/HTML/PDF overheads
BYTES_PER_SITE = 2048                  # lot.nc variables and notes per site (~100 measured)
BYTES_PER_WAFER_FIGURES = 1 * 2**20    # map PNG + its share of contact sheet, html, pdf (0.28 MB)
BYTES_PER_SPECTRUM_VALUE = 3 * 8 * 2   # spectra.nc: measured, model, residual as float64, x2


def estimate_output_bytes(n_wafers, n_sites, n_values=0, figures=True, keep_spectra=False):
    """A conservative size of a lot's output folder, bytes.

    Parameters
    ----------
    n_wafers : int
        Wafers in the lot.
    n_sites : int
        Measured sites, all wafers together.
    n_values : int
        Spectral values, all sites together (sites x wavelengths x channels); used with
        ``keep_spectra`` only.
    figures, keep_spectra : bool
        As for `filmmap.pipeline.run.reduce_to_folder`.

    Returns
    -------
    int
        ``BYTES_BASE + BYTES_PER_SITE * n_sites`` + ``BYTES_PER_WAFER_FIGURES * n_wafers``
        with figures + ``BYTES_PER_SPECTRUM_VALUE * n_values`` with ``keep_spectra``.
    """
    total = BYTES_BASE + BYTES_PER_SITE * int(n_sites)
    if figures:
        total += BYTES_PER_WAFER_FIGURES * int(n_wafers)
    if keep_spectra:
        total += BYTES_PER_SPECTRUM_VALUE * int(n_values)
    return total


def estimate_from_inputs(config, figures=True, keep_spectra=False):
    """`estimate_output_bytes` before the spectra are read, from the lot file and file sizes.

    The wafer count is the boat's slot count when the lot file has a ``[boat]``, else one
    wafer per data file; sites and spectral values are bounded from the data files' size
    (a site row holds at least one value of >= 2 bytes, "0,"; a value at least 2 bytes).
    The real counts are checked again after the fit, before anything is staged.
    """
    sizes = 0
    for f in config.measurement.files:
        try:
            sizes += os.stat(f).st_size
        except OSError:
            pass   # the reader names an unreadable file
    n_files = len(config.measurement.files)
    wafers = config.boat.slots if config.boat is not None else n_files
    # sites: a typical row has >= 30 values of ~8 bytes; use 100 bytes per row, rounded up
    sites = sizes // 100 + 1
    return estimate_output_bytes(wafers, sites, sizes // 2, figures, keep_spectra)


def _name_max(folder):
    try:
        return os.pathconf(folder, "PC_NAME_MAX")
    except (OSError, ValueError):
        return NAME_MAX_FALLBACK


def _nearest_existing(path):
    """(nearest existing ancestor or path itself, names below it that do not exist yet)."""
    missing = []
    p = path
    while True:
        try:
            os.lstat(p)
            return p, missing[::-1]
        except FileNotFoundError:
            missing.append(p.name)
            p = p.parent
        except NotADirectoryError:
            missing.append(p.name)
            p = p.parent


def writable_folder(folder):
    """True when new entries can be made in FOLDER (permissions and read-only mounts)."""
    # os.access sees EROFS even for root; permission bits alone would not stop root
    return os.access(folder, os.W_OK | os.X_OK)


def check_output_location(outdir, need_bytes, option="-o"):
    """Refuse, before any work, an output folder that cannot be published.

    Parameters
    ----------
    outdir : path-like
        The folder to replace (after `output_target`).
    need_bytes : int
        Estimated size of the new outputs (`estimate_output_bytes`); the old folder is
        removed only after the new one is complete, so both must fit at once.
    option : str
        Command-line option named in the errors.

    Raises
    ------
    FilmmapInputError
        A parent that is a file; a folder name too long for the file system, staging name
        included (POSIX NAME_MAX); a mount point (it cannot be renamed away); a parent
        folder that cannot be written (read-only medium, permissions); less free space than
        ``need_bytes + MIN_FREE_BYTES``.  Each names the path and what was expected.
    """
    from filmmap.pipeline.publishing import staging_name

    outdir = Path(os.path.abspath(outdir))
    base, missing = _nearest_existing(outdir)
    if not base.is_dir():
        raise FilmmapInputError(f"{base} is a file, not a folder; expected the output folder's "
                                "parent to be a folder", file=outdir, field=option)
    name_max = _name_max(base)
    for name in missing:
        if len(os.fsencode(name)) > name_max:
            raise FilmmapInputError(f"folder name {name[:40]!r}... is {len(os.fsencode(name))} "
                                    f"bytes; expected at most {name_max} bytes (NAME_MAX)",
                                    file=outdir, field=option)
    # the staging folder's name is longer than the folder's own (POSIX NAME_MAX holds for both)
    own = len(os.fsencode(outdir.name))
    limit = name_max - (len(os.fsencode(staging_name(outdir.name))) - own)
    if own > limit:
        raise FilmmapInputError(f"output folder name is {own} bytes; expected at most {limit} "
                                f"bytes, so that its staging folder name fits the file system's "
                                f"{name_max}-byte limit (NAME_MAX)", file=outdir, field=option)
    if not missing and os.path.ismount(outdir):
        raise FilmmapInputError("output folder is a mount point, which cannot be replaced by "
                                "renaming; expected a folder inside the mounted file system",
                                file=outdir, field=option)
    if not writable_folder(base):
        raise FilmmapInputError(f"cannot create files in {base} (read-only medium or no "
                                "permission); expected a writable folder for the results",
                                file=outdir, field=option)
    free = shutil.disk_usage(base).free
    if free < need_bytes + MIN_FREE_BYTES:
        raise FilmmapInputError(
            f"{free / 2**20:.1f} MiB free in {base}; the results need about "
            f"{(need_bytes + MIN_FREE_BYTES) / 2**20:.1f} MiB (a conservative estimate, see "
            "docs/formats.md); free some space or choose another folder", file=outdir,
            field=option)


HISTORY_MIN_FREE_BYTES = 2 * 2**20
"""Free space required beside the history database, bytes: a lot record with its wafers is
some kilobytes, the WAL grows by a few pages per record (common practice, no source)."""


def check_history_writable(db_path, option="--history"):
    """Refuse, before any work, a history database that cannot take a record.

    Parameters
    ----------
    db_path : path-like or None
        Database file (None: the per-user default).
    option : str

    Raises
    ------
    FilmmapInputError
        A folder, a path under a file, a file that is not an SQLite database (an empty
        file is accepted: SQLite treats it as a new database), a filmmap history that is
        damaged (``PRAGMA quick_check``) or of a newer schema, a database or folder that
        cannot be written, or less than `HISTORY_MIN_FREE_BYTES` free.  Nothing is written.

    References
    ----------
    .. [1] SQLite documentation, "PRAGMA quick_check" and "Write-Ahead Logging" (the
       ``-wal`` and ``-shm`` files are created beside the database).
    """
    import sqlite3

    from filmmap.history.store import (CURRENT_VERSION, _read_version, check_sqlite_file,
                                       default_history_path)

    path = Path(os.path.abspath(default_history_path() if db_path is None else db_path))
    check_name_lengths(path, option)
    base, missing = _nearest_existing(path)
    if missing:
        if not base.is_dir():
            raise FilmmapInputError(f"{base} is a file, not a folder; expected a folder for the "
                                    "history database", file=path, field=option)
        for name in missing:
            if len(os.fsencode(name)) > _name_max(base):
                raise FilmmapInputError(f"name {name[:40]!r}... is longer than NAME_MAX",
                                        file=path, field=option)
    else:
        if not (os.path.isfile(path) and os.path.getsize(path) == 0):
            check_sqlite_file(path)
            try:
                # without a -wal file the database file is complete: read it as immutable, so
                # that checking creates no -wal/-shm files (SQLite URI docs, immutable=1)
                wal = os.path.exists(str(path) + "-wal")
                con = sqlite3.connect("file:" + urllib.parse.quote(str(path)) + "?mode=ro"
                                      + ("" if wal else "&immutable=1"),
                                      uri=True, isolation_level=None)
                try:
                    version = _read_version(con)
                    ok = con.execute("PRAGMA quick_check(1)").fetchone()[0]
                finally:
                    con.close()
            except FilmmapInputError as exc:
                raise FilmmapInputError(exc.reason, file=path, field=option) from None
            except sqlite3.DatabaseError as exc:
                raise FilmmapInputError(f"not a usable SQLite database ({exc}); expected a "
                                        "filmmap history (left untouched)", file=path,
                                        field=option) from None
            if ok != "ok":
                raise FilmmapInputError(f"the history database is damaged (quick_check: {ok}); "
                                        "expected an intact filmmap history (left untouched)",
                                        file=path, field=option)
            if version > CURRENT_VERSION:
                raise FilmmapInputError(f"history schema version {version} is newer than this "
                                        f"filmmap ({CURRENT_VERSION}); upgrade filmmap",
                                        file=path, field=option)
        if not os.access(path, os.R_OK | os.W_OK):
            raise FilmmapInputError("the history database cannot be written (read-only medium "
                                    "or no permission); expected a writable file", file=path,
                                    field=option)
    folder = path.parent if not missing else base
    if not writable_folder(folder):
        raise FilmmapInputError(f"cannot create files in {folder} (read-only medium or no "
                                "permission); the history needs its -wal and -shm files there",
                                file=path, field=option)
    free = shutil.disk_usage(folder).free
    if free < HISTORY_MIN_FREE_BYTES:
        raise FilmmapInputError(f"{free / 2**20:.2f} MiB free in {folder}; recording a lot needs "
                                f"at least {HISTORY_MIN_FREE_BYTES / 2**20:.0f} MiB", file=path,
                                field=option)
