"""The path sandbox of the lot file: files and globs stay in the lot folder unless told.

``files`` globs, ``dark_file``, ``reference_file``, ``nk_file`` and the map files are
relative to the lot file's folder and may not leave it (no absolute paths, no ``..``, no
symbolic links pointing outside) unless ``read_lot_file(..., allow_outside=True)``.
``data_dir`` names another folder for the globs explicitly; they are then sandboxed in it.
"""

from __future__ import annotations

import glob
import os
from pathlib import Path, PurePosixPath, PureWindowsPath

from filmmap.io.lotfile.reader import found

__all__ = ["relative_file", "resolve_globs", "read_data_dir"]


def _escapes(pattern):
    """True for an absolute path or one with a '..' part (POSIX or Windows spelling)."""
    if (os.path.isabs(pattern) or PureWindowsPath(pattern).is_absolute()
            or pattern.startswith(("/", "\\"))):
        return True
    parts = PurePosixPath(pattern.replace("\\", "/")).parts
    return ".." in parts


def _inside(path, folder):
    """True when ``path``, symbolic links resolved, lies in ``folder``."""
    try:
        Path(path).resolve().relative_to(folder.resolve())
        return True
    except ValueError:
        return False


def relative_file(rd, value, field, folder, allow_outside, what):
    """A single file named by the lot file, relative to ``folder``, sandboxed in it.

    Parameters
    ----------
    rd : LotReader
    value : str
        The path as written.
    field : str
        Its field path, for messages.
    folder : pathlib.Path
        The lot folder.
    allow_outside : bool
        Allow absolute paths, '..' and symbolic links leading out of ``folder``.
    what : str
        The key, for messages (``"nk_file"``, ``"reference_file"``, ...).

    Returns
    -------
    pathlib.Path
    """
    if not value.strip():
        rd.fail(f"empty path; expected a {what} path relative to the lot folder", field)
    if not allow_outside and _escapes(value):
        rd.fail(f"path {value!r} leaves the lot folder (absolute path or '..'); expected a path "
                "inside the lot folder (read_lot_file(..., allow_outside=True) permits this)",
                field)
    path = Path(value) if os.path.isabs(value) else folder / value
    if not path.is_file():
        rd.fail(f"{what} {value!r} not found (looked for {path}); expected an existing file", field)
    if not allow_outside and not _inside(path, folder):
        rd.fail(f"{what} {value!r} resolves outside the lot folder (symlink?) to {path.resolve()}",
                field)
    return path


def resolve_globs(rd, patterns, folder, allow_outside, exclude, require_files=True,
                   where="lot folder"):
    """The data files matched by the ``files`` globs, sorted by path, sandboxed in ``folder``.

    Parameters
    ----------
    rd : LotReader
    patterns : list
        The globs as written (``**`` allowed).
    folder : pathlib.Path
        The folder they are relative to (the lot folder, or ``data_dir``).
    allow_outside : bool
        Allow globs and matches leading out of ``folder``.
    exclude : list of pathlib.Path
        Files never taken as data (the lot file, its nk, dark and reference files).
    require_files : bool
        Refuse a glob that matches no data file.
    where : str
        ``"lot folder"`` or ``"data_dir"``, for messages.

    Returns
    -------
    tuple of pathlib.Path
    """
    field = "measurement.files"
    if not patterns:
        rd.fail("files is empty; expected at least one glob such as \"*.csv\"", field)
    matched = {}
    excluded = {p.resolve() for p in exclude}
    for i, pattern in enumerate(patterns, start=1):
        if not isinstance(pattern, str):
            rd.fail(f"files[{i}]: expected a string glob, found {found(pattern)}", field)
        if not pattern.strip():
            rd.fail(f"files[{i}] is empty; expected a glob such as \"*.csv\"", field)
        if not allow_outside and _escapes(pattern):
            rd.fail(f"glob {pattern!r} leaves the {where} (absolute path or '..'); globs are "
                    f"relative to the {where} (name another folder with data_dir in "
                    "[measurement], or read_lot_file(..., allow_outside=True))", field)
        if os.path.isabs(pattern):
            matches = [Path(m) for m in glob.glob(pattern, recursive=True)]
        else:
            matches = [folder / m for m in glob.glob(pattern, root_dir=folder, recursive=True)]
        matches = [m for m in matches if m.is_file()]
        kept = [m for m in matches if m.resolve() not in excluded]
        if not kept and require_files:
            extra = (" (only the lot file or its dark/reference/nk files, which are not data "
                     "files)" if matches else "")
            rd.fail(f"glob {pattern!r} matches no data files in {folder}{extra}; expected at "
                    "least one file", field)
        for m in kept:
            if not allow_outside and not _inside(m, folder):
                rd.fail(f"glob {pattern!r} matches {m}, which resolves outside the {where} "
                        f"(symlink?) to {m.resolve()}; to read a folder elsewhere, name it with "
                        "data_dir in [measurement]", field)
            matched.setdefault(str(m), m)
    return tuple(matched[k] for k in sorted(matched))


def read_data_dir(rd, t, w, folder):
    """The folder named by ``data_dir`` (absolute, or relative to the lot folder), or None.

    Naming it is the user's explicit choice to read outside the lot folder, so '..', an
    absolute path and a symbolic link are all accepted here; the files it holds are still
    only read (and hashed), and the output folder may not lie in it (`filmmap.pipeline.guard`).
    """
    value = rd.string(t, "data_dir", w, default=None)
    if value is None:
        return None
    path = Path(value) if os.path.isabs(value) else folder / value
    if not path.is_dir():
        rd.fail(f"data_dir {value!r} is not an existing folder (looked for {path}); expected "
                "the folder holding the spectra files", f"{w}.data_dir")
    return Path(os.path.abspath(path))

