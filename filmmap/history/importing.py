"""Import an old output folder into the run history: a thin adapter over the lot view.

``filmmap reduce`` records the lot it has in memory (`filmmap.history.records.record_from_view`).
This module is for results that exist only as a published folder: an output folder made
before the history existed, or one whose record was interrupted (the pending-record marker
of `filmmap.pipeline`).  It reads ``lot.nc`` and ``advice.json`` back, builds the same
lot view the reduce builds (`filmmap.lotstats.view.lot_view`) and hands it to
`record_from_view`, so an imported record holds exactly the figures a live one would.

Units: thickness nm, non-uniformity percent, temperature offsets K.

References
----------
.. [1] FIPS PUB 180-4, Secure Hash Standard (SHA-256), via `hashlib`.
"""

from __future__ import annotations

import json
import tomllib
from pathlib import Path
from types import SimpleNamespace

from filmmap.errors import FilmmapInputError
from filmmap.history.records import file_sha256, recipe_steps, record_from_view

__all__ = ["record_from_outputs"]


def _lot_file_of(ds):
    """(path, sha256) of the lot file recorded in lot.nc (its first input), or (None, None)."""
    from filmmap.lotstats.view import read_input_hashes

    inputs, _problem = read_input_hashes(ds)
    if not inputs:
        return None, None
    return Path(inputs[0]["file"]), inputs[0]["sha256"]


def _recipe_and_target_from_lot_file(path, sha256):
    """Recipe steps and a ``target`` namespace from the lot file, when it is unchanged.

    The lot file is read as plain TOML, not with the lot-file reader: an old lot file
    whose measurement files have moved since still gives its recipe and target.

    Returns
    -------
    (list of dict or None, SimpleNamespace or None)
        The steps (minutes, degrees Celsius) and a configuration stand-in with only
        ``target.thickness_nm`` (nm) and ``target.tolerance_pct`` (%), for
        `filmmap.lotstats.view.lot_view`; (None, None) when the file is gone, changed
        (another SHA-256) or unreadable.
    """
    if path is None or not path.is_file() or file_sha256(path) != sha256:
        return None, None
    try:
        data = tomllib.loads(path.read_text(encoding="utf-8"))
    except (OSError, UnicodeError, tomllib.TOMLDecodeError):
        return None, None
    steps = []
    for s in (data.get("recipe") or {}).get("step") or []:
        d = {k: s[k] for k in ("name", "ambient", "minutes", "at_C", "from_C", "to_C") if k in s}
        for k in ("minutes", "at_C", "from_C", "to_C"):
            if k in d:
                d[k] = float(d[k])
        steps.append(d)
    target = data.get("target") or {}
    spec = None
    if target.get("thickness_nm") is not None and target.get("tolerance_pct") is not None:
        spec = SimpleNamespace(target=SimpleNamespace(thickness_nm=target["thickness_nm"],
                                                      tolerance_pct=target["tolerance_pct"]))
    return steps or None, spec


def _read_advice(outdir):
    path = outdir / "advice.json"
    if not path.is_file():
        return None
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except ValueError as exc:
        raise FilmmapInputError(f"advice.json is not valid JSON: {exc}", file=path) from None


def record_from_outputs(outdir, config=None, *, applied_trims_C=None, min_sites=None):
    """Build the history record of a reduced lot from its output folder.

    Parameters
    ----------
    outdir : str or path-like
        The folder ``filmmap reduce`` wrote: ``lot.nc`` is required, ``advice.json``
        is used when present.
    config : filmmap.io.lotfile.LotConfig, optional
        The lot file as read by reduce: gives the recipe, target and tolerance.  Without
        it they are read from the lot file named in ``lot.nc`` (its first input file),
        provided that file still exists with the SHA-256 recorded there; otherwise the
        recipe is None and the target comes from the advice.
    applied_trims_C : mapping, optional
        Zone name -> trim in force during this run, K (for run-to-run control).
    min_sites : int, optional
        Wafers with fewer usable sites are left out of the lot figures (default
        `filmmap.lotstats.exclusion.DEFAULT_MIN_SITES`, the threshold the reduce pipeline
        uses for lot statistics and advice).

    Returns
    -------
    LotRecord
        As `filmmap.history.records.record_from_view` makes it from the lot view of
        ``lot.nc``.

    Raises
    ------
    FilmmapInputError
        When ``lot.nc`` is missing or lacks the variables of the lot view, or
        ``advice.json`` is not valid JSON.

    References
    ----------
    .. [1] Non-uniformity as 100 sigma / mean with the n - 1 sample standard deviation:
       common practice, no source.
    """
    import xarray as xr

    from filmmap.lotstats.exclusion import DEFAULT_MIN_SITES
    from filmmap.lotstats.view import lot_view

    outdir = Path(outdir).absolute()
    nc = outdir / "lot.nc"
    if not nc.is_file():
        raise FilmmapInputError("no lot.nc in the output folder; run filmmap reduce first",
                                file=outdir)
    recipe = recipe_steps(config)
    try:
        with xr.open_dataset(nc) as ds:
            view_config = config
            if config is None:
                recipe, view_config = _recipe_and_target_from_lot_file(*_lot_file_of(ds))
            view = lot_view(ds, view_config,
                            min_sites=DEFAULT_MIN_SITES if min_sites is None else min_sites)
    except FilmmapInputError as exc:
        raise FilmmapInputError(exc.reason, file=nc, field=exc.field) from None
    except (OSError, ValueError) as exc:
        raise FilmmapInputError(f"cannot read lot.nc: {exc}", file=nc) from None
    return record_from_view(view, _read_advice(outdir), recipe, lot_nc_path=nc,
                            lot_nc_sha256=file_sha256(nc), applied_trims_C=applied_trims_C)
