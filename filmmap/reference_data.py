"""The published tables and constants filmmap ships (``reference/``), read in one place.

Each file cites its source in its header. They are package data (``filmmap.reference``
when installed, ``reference/`` in a checkout), trusted and read once; the layers that
need them (materials: the built-in optical constants; growth: the Deal-Grove constants)
receive parsed values from here and do no file I/O of their own. User files (n,k
tables, spectra, the lot file) are read by `filmmap.io` with its strict input checks.
"""

from __future__ import annotations

import tomllib
from importlib import resources
from pathlib import Path

import numpy as np

__all__ = ["reference_file", "reference_toml", "reference_table"]


def reference_file(name):
    """Path of a file in ``reference/`` whether filmmap is installed or run from a checkout.

    Parameters
    ----------
    name : str
        File name, e.g. ``"deal_grove_constants.toml"``.

    Returns
    -------
    pathlib.Path

    Raises
    ------
    FileNotFoundError
        When the package ships no such file.
    """
    try:
        candidate = resources.files("filmmap.reference").joinpath(name)
        if candidate.is_file():
            return Path(str(candidate))
    except ModuleNotFoundError:
        pass
    path = Path(__file__).resolve().parents[1] / "reference" / name
    if not path.is_file():
        raise FileNotFoundError(f"reference data file {name!r} not found")
    return path


def reference_toml(name):
    """The parsed TOML reference file ``name`` (a dict; ``#`` header lines cite the source)."""
    return tomllib.loads(reference_file(name).read_text(encoding="utf-8"))


def reference_table(name):
    """A CSV reference table: ``#`` comment lines (its source), a header, numeric rows.

    Parameters
    ----------
    name : str
        File name, e.g. ``"si_green2008.csv"``.

    Returns
    -------
    columns : dict of str to numpy.ndarray
        Each header name -> its column (float), in the file's order.
    comments : list of str
        The comment lines without their ``#``, the citation of the data.
    """
    lines = reference_file(name).read_text(encoding="utf-8").splitlines()
    comments = [line.lstrip("#").strip() for line in lines if line.startswith("#")]
    rows = [line for line in lines if line.strip() and not line.startswith("#")]
    header = [c.strip() for c in rows[0].split(",")]
    values = np.array([[float(c) for c in row.split(",")] for row in rows[1:]], ndmin=2)
    return {h: values[:, j] for j, h in enumerate(header)}, comments
