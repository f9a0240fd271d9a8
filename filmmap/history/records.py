"""What the run history keeps about one lot, and how a record is made from the lot view.

`LotRecord` (with its `WaferSummary` and `SlotSummary` lines) is the unit of the run
history: the lot's identity (lot id, furnace, run date), the recipe as run (with its
SHA-256), per-wafer and per-slot summaries, the advice the lot produced, the path and
SHA-256 of its ``lot.nc``, and three headline figures: the lot mean (nm), the
wafer-to-wafer non-uniformity WTW (%) and the mean within-wafer non-uniformity WIW (%).

`record_from_view` builds the record from the in-memory result of a reduce: the lot view
(`filmmap.lotstats.view.LotView`, which owns every lot figure) and the advice dict.  The
history computes no statistic of its own.  `make_record` checks and normalises a record
(from the view, from a mapping, or read back from the database) before it is stored.

Storing and reading records is `filmmap.history.store` (SQLite); rebuilding a record
from an old output folder is `filmmap.history.importing`.

Units: thickness nm, non-uniformity percent, temperature offsets and trims K.

References
----------
.. [1] FIPS PUB 180-4, Secure Hash Standard (SHA-256), via `hashlib`.
.. [2] Wafer-to-wafer and within-wafer non-uniformity as 100 sigma / mean: common
   practice, no source.
"""

from __future__ import annotations

import datetime as _dt
import hashlib
import json
import math
from collections.abc import Mapping
from dataclasses import dataclass, fields

from filmmap.errors import FilmmapInputError

__all__ = ["LotRecord", "SlotSummary", "WaferSummary", "canonical_json", "file_sha256",
           "finite_or_none", "make_record", "recipe_sha256", "recipe_steps",
           "record_from_view"]


@dataclass(frozen=True)
class WaferSummary:
    """Within-wafer summary of one wafer of a recorded lot.

    Attributes
    ----------
    wafer : str
        Wafer id.
    slot : int
        Boat slot (1 = load/door end), dimensionless.
    role : str
        ``"product"``, ``"monitor"`` or ``"dummy"``.
    mean_nm, sigma_nm : float or None
        Within-wafer mean and standard deviation of the thickness, nm.
    nu_pct : float or None
        Within-wafer non-uniformity 100 sigma / mean, percent.
    sites_used : int or None
        Sites behind the statistics (count).

    References
    ----------
    .. [1] Non-uniformity as 100 sigma / mean: common practice, no source.
    """

    wafer: str
    slot: int
    role: str = "product"
    mean_nm: float | None = None
    sigma_nm: float | None = None
    nu_pct: float | None = None
    sites_used: int | None = None


@dataclass(frozen=True)
class SlotSummary:
    """One boat slot of a recorded lot.

    Attributes
    ----------
    slot : int
        Boat slot (1 = load/door end), dimensionless.
    mean_nm : float or None
        Mean thickness of the wafer in that slot, nm (None: no usable mean).
    offset_C : float or None
        Effective temperature offset of the slot read from its oxide by the advice
        (``effective_offset_C_by_slot``), K; None where not calibrated.

    References
    ----------
    .. [1] B. E. Deal and A. S. Grove, J. Appl. Phys. 36, 3770-3778 (1965) (the model
       behind the effective offset).
    """

    slot: int
    mean_nm: float | None = None
    offset_C: float | None = None


@dataclass(frozen=True)
class LotRecord:
    """Everything the history keeps about one lot.

    Attributes
    ----------
    lot_id : str
        Lot id (non-empty).
    furnace : str
        Furnace name; ``""`` when the lot file names none.
    run_date : str or None
        Run date (or date and time), ISO 8601, e.g. ``"2026-11-30"``.
    recipe : list of dict or None
        The recipe as run: steps with ``name``, ``ambient``, ``minutes`` and ``at_C`` or
        ``from_C``/``to_C`` (minutes, degrees Celsius).
    advice : dict or None
        The advice the lot produced (``advice.json``).
    lot_nc_path : str or None
        Absolute path of the lot's ``lot.nc``.
    lot_nc_sha256 : str or None
        SHA-256 of that file (hex).
    lot_mean_nm : float or None
        Mean of the usable product wafer means, nm.
    wtw_pct : float or None
        Wafer-to-wafer non-uniformity of the product wafers, 100 s / mean, percent.
    wiw_mean_pct : float or None
        Mean within-wafer non-uniformity of the usable product wafers, percent.
    target_nm : float or None
        Target thickness, nm.
    tolerance_pct : float or None
        Spec half-width, percent of the target.
    applied_trims_C : dict or None
        Zone name -> trim in force during the run, K (None: not known, taken as 0).
    wafers : tuple of WaferSummary
    slots : tuple of SlotSummary
    recorded_at : str or None
        When the lot was recorded (UTC, ISO 8601); set by the store.

    Notes
    -----
    `recipe_sha256` is derived from ``recipe``; it is not a field.

    References
    ----------
    .. [1] Wafer-to-wafer and within-wafer non-uniformity: common practice, no source.
    """

    lot_id: str
    furnace: str = ""
    run_date: str | None = None
    recipe: list | None = None
    advice: dict | None = None
    lot_nc_path: str | None = None
    lot_nc_sha256: str | None = None
    lot_mean_nm: float | None = None
    wtw_pct: float | None = None
    wiw_mean_pct: float | None = None
    target_nm: float | None = None
    tolerance_pct: float | None = None
    applied_trims_C: dict | None = None
    wafers: tuple = ()
    slots: tuple = ()
    recorded_at: str | None = None

    @property
    def recipe_sha256(self):
        """SHA-256 (hex) of the canonical JSON of the recipe, None without a recipe."""
        return recipe_sha256(self.recipe)

    @property
    def recipe_json(self):
        """The recipe as canonical JSON text (sorted keys, no spaces), or None."""
        return canonical_json(self.recipe)


def canonical_json(value):
    if value is None:
        return None
    return json.dumps(value, sort_keys=True, separators=(",", ":"), allow_nan=False,
                      ensure_ascii=False)


def recipe_sha256(recipe):
    """SHA-256 of a recipe, independent of key order and whitespace.

    Parameters
    ----------
    recipe : list of dict or None
        Recipe steps (minutes, degrees Celsius).

    Returns
    -------
    str or None
        Hex digest of the UTF-8 canonical JSON (sorted keys, ``","`` and ``":"``
        separators), None for None.

    References
    ----------
    .. [1] FIPS PUB 180-4, Secure Hash Standard.
    """
    text = canonical_json(recipe)
    return None if text is None else hashlib.sha256(text.encode("utf-8")).hexdigest()


def file_sha256(path, chunk=1 << 20):
    """SHA-256 (hex) of a file's bytes, read in chunks of ``chunk`` bytes.

    References
    ----------
    .. [1] FIPS PUB 180-4, Secure Hash Standard.
    """
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(chunk), b""):
            h.update(block)
    return h.hexdigest()


def finite_or_none(value, name):
    """float or None (None, NaN and +/-inf are missing); FilmmapInputError naming `name`
    for a value that is not a number."""
    if value is None:
        return None
    if isinstance(value, bool):
        raise FilmmapInputError(f"{name} must be a number, got {value!r}", field=name)
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise FilmmapInputError(f"{name} must be a number, got {value!r}", field=name) from None
    return v if math.isfinite(v) else None


def _int(value, name, optional=False):
    if value is None and optional:
        return None
    try:
        f = float(value)
    except (TypeError, ValueError):
        raise FilmmapInputError(f"{name} must be a whole number, got {value!r}",
                                field=name) from None
    if optional and not math.isfinite(f):
        return None
    if isinstance(value, bool) or not math.isfinite(f) or f != round(f):
        raise FilmmapInputError(f"{name} must be a whole number, got {value!r}", field=name)
    return int(f)


def _run_date(value):
    if value is None or value == "":
        return None
    if isinstance(value, (_dt.date, _dt.datetime)):
        return value.isoformat()
    text = str(value).strip()
    try:
        if len(text) == 10:
            _dt.date.fromisoformat(text)
        else:
            _dt.datetime.fromisoformat(text)
    except ValueError:
        raise FilmmapInputError(f"run date {value!r} is not an ISO 8601 date such as "
                                "2026-11-30", field="run_date") from None
    return text


def _json_obj(value, name, kind):
    if value is None:
        return None
    if isinstance(value, str):
        try:
            value = json.loads(value)
        except ValueError as exc:
            raise FilmmapInputError(f"{name} is not valid JSON: {exc}", field=name) from None
    if not isinstance(value, kind):
        raise FilmmapInputError(f"{name} must be a JSON {kind.__name__}, got "
                                f"{type(value).__name__}", field=name)
    try:  # must serialise as strict JSON; also a deep copy
        return json.loads(json.dumps(value, allow_nan=False))
    except (TypeError, ValueError) as exc:
        raise FilmmapInputError(f"{name} cannot be stored as JSON: {exc}", field=name) from None


def _as_dataclass(cls, item, name):
    if isinstance(item, cls):
        data = {f.name: getattr(item, f.name) for f in fields(cls)}
    elif isinstance(item, Mapping):
        unknown = set(item) - {f.name for f in fields(cls)}
        if unknown:
            raise FilmmapInputError(f"{name}: unknown key(s) {sorted(unknown)}", field=name)
        data = dict(item)
    else:
        raise FilmmapInputError(f"{name}: expected a {cls.__name__} or a mapping, got "
                                f"{type(item).__name__}", field=name)
    return data


def make_record(record):
    """Check a lot record and return it as a normalised `LotRecord`.

    Parameters
    ----------
    record : LotRecord or mapping
        The fields of `LotRecord` (``wafers`` and ``slots`` as `WaferSummary` /
        `SlotSummary` objects or mappings).  Unknown keys are refused.

    Returns
    -------
    LotRecord
        Missing or non-finite numbers as None, the run date as ISO text, the furnace as
        a string (``""`` when unknown), wafers and slots sorted by slot (then wafer id).

    Raises
    ------
    FilmmapInputError
        For an empty lot id, a bad run date, a wafer or slot listed twice, or a value
        of the wrong type.

    References
    ----------
    .. [1] ISO 8601 dates, via `datetime.date.fromisoformat`.
    """
    data = _as_dataclass(LotRecord, record, "record")
    lot_id = data.get("lot_id")
    if not isinstance(lot_id, str) or not lot_id.strip():
        raise FilmmapInputError(f"lot id must be a non-empty string, got {lot_id!r}",
                                field="lot_id")
    furnace = data.get("furnace") or ""
    if not isinstance(furnace, str):
        raise FilmmapInputError(f"furnace must be a string, got {furnace!r}", field="furnace")
    wafers = []
    for i, w in enumerate(data.get("wafers") or ()):
        d = _as_dataclass(WaferSummary, w, f"wafers[{i}]")
        wid = d.get("wafer")
        if not isinstance(wid, str) or not wid:
            raise FilmmapInputError(f"wafers[{i}]: wafer id must be a non-empty string, got "
                                    f"{wid!r}", field=f"wafers[{i}].wafer")
        wafers.append(WaferSummary(
            wafer=wid, slot=_int(d.get("slot"), f"wafers[{i}].slot"),
            role=str(d.get("role", "product")),
            mean_nm=finite_or_none(d.get("mean_nm"), f"wafers[{i}].mean_nm"),
            sigma_nm=finite_or_none(d.get("sigma_nm"), f"wafers[{i}].sigma_nm"),
            nu_pct=finite_or_none(d.get("nu_pct"), f"wafers[{i}].nu_pct"),
            sites_used=_int(d.get("sites_used"), f"wafers[{i}].sites_used", optional=True)))
    ids = [w.wafer for w in wafers]
    if len(set(ids)) != len(ids):
        dup = sorted({v for v in ids if ids.count(v) > 1})
        raise FilmmapInputError(f"wafer(s) {dup} listed twice", field="wafers")
    slots = []
    for i, s in enumerate(data.get("slots") or ()):
        d = _as_dataclass(SlotSummary, s, f"slots[{i}]")
        slots.append(SlotSummary(slot=_int(d.get("slot"), f"slots[{i}].slot"),
                                 mean_nm=finite_or_none(d.get("mean_nm"), f"slots[{i}].mean_nm"),
                                 offset_C=finite_or_none(d.get("offset_C"), f"slots[{i}].offset_C")))
    nums = [s.slot for s in slots]
    if len(set(nums)) != len(nums):
        raise FilmmapInputError(f"slot(s) {sorted({v for v in nums if nums.count(v) > 1})} "
                                "listed twice", field="slots")
    trims = _json_obj(data.get("applied_trims_C"), "applied_trims_C", dict)
    if trims is not None:
        trims = {str(k): finite_or_none(v, f"applied_trims_C.{k}") for k, v in trims.items()}
    return LotRecord(
        lot_id=lot_id, furnace=furnace, run_date=_run_date(data.get("run_date")),
        recipe=_json_obj(data.get("recipe"), "recipe", list),
        advice=_json_obj(data.get("advice"), "advice", dict),
        lot_nc_path=None if data.get("lot_nc_path") is None else str(data["lot_nc_path"]),
        lot_nc_sha256=data.get("lot_nc_sha256"),
        lot_mean_nm=finite_or_none(data.get("lot_mean_nm"), "lot_mean_nm"),
        wtw_pct=finite_or_none(data.get("wtw_pct"), "wtw_pct"),
        wiw_mean_pct=finite_or_none(data.get("wiw_mean_pct"), "wiw_mean_pct"),
        target_nm=finite_or_none(data.get("target_nm"), "target_nm"),
        tolerance_pct=finite_or_none(data.get("tolerance_pct"), "tolerance_pct"),
        applied_trims_C=trims,
        wafers=tuple(sorted(wafers, key=lambda w: (w.slot, w.wafer))),
        slots=tuple(sorted(slots, key=lambda s: s.slot)),
        recorded_at=data.get("recorded_at"))


# --------------------------------------------------------------------------- from the lot view

def recipe_steps(config):
    """The recipe of a lot configuration as the history stores it.

    Parameters
    ----------
    config : filmmap.io.lotfile.LotConfig or None
        The lot file as read; its ``recipe`` steps are used.

    Returns
    -------
    list of dict or None
        One dict per step: ``name``, ``ambient``, ``minutes`` (min) and ``at_C`` or
        ``from_C``/``to_C`` (degrees Celsius), as floats; None without a config or steps.
    """
    if config is None:
        return None
    steps = []
    for s in config.recipe or ():
        d = {"name": s.name, "ambient": s.ambient, "minutes": float(s.minutes)}
        if s.at_C is not None:
            d["at_C"] = float(s.at_C)
        if s.from_C is not None:
            d["from_C"], d["to_C"] = float(s.from_C), float(s.to_C)
        steps.append(d)
    return steps or None


def _as_json_data(advice, name):
    """The advice as its JSON text reads back (str keys, lists, floats), or None.

    The record of an in-memory advice must equal the record of its advice.json: a
    round trip through the JSON encoder gives exactly the types that file has.
    """
    if advice is None:
        return None
    try:
        return json.loads(json.dumps(advice, allow_nan=False))
    except (TypeError, ValueError) as exc:
        raise FilmmapInputError(f"{name} cannot be stored as JSON: {exc}", field=name) from None


def record_from_view(view, advice=None, recipe=None, *, lot_nc_path=None, lot_nc_sha256=None,
                     applied_trims_C=None):
    """The history record of a reduced lot, from its lot view and advice.

    Parameters
    ----------
    view : filmmap.lotstats.view.LotView
        The lot view (`filmmap.lotstats.view.lot_view`): identity, wafer lines, WTW
        figures, mean WIW, target and tolerance.
    advice : dict, optional
        The advice of the lot (``advice.json``); its ``effective_offset_C_by_slot`` gives
        the slots' offsets (K), and its ``target_nm`` the target when the view has none.
    recipe : list of dict, optional
        The recipe as run (`recipe_steps`; minutes, degrees Celsius).
    lot_nc_path : str or path-like, optional
        Absolute path of the published ``lot.nc``.
    lot_nc_sha256 : str, optional
        SHA-256 (hex) of that file (`file_sha256`).
    applied_trims_C : mapping, optional
        Zone name -> trim in force during this run, K (for run-to-run control).

    Returns
    -------
    LotRecord
        Checked by `make_record`.  ``lot_mean_nm`` and ``wtw_pct`` are the view's grand
        mean and WTW (``view.wtw``), ``wiw_mean_pct`` is ``view.wiw_mean_pct``; one
        `WaferSummary` per wafer (as measured, excluded wafers included) and one
        `SlotSummary` per wafer with its lot-statistics mean (None for a wafer left out
        by the minimum-sites rule) and the advice's effective offset of its slot.

    Raises
    ------
    FilmmapInputError
        When the advice cannot be stored as JSON, or the record is invalid
        (`make_record`).

    References
    ----------
    .. [1] Wafer-to-wafer and within-wafer non-uniformity as 100 sigma / mean: common
       practice, no source.
    """
    advice = _as_json_data(advice, "advice")
    by_slot = (advice or {}).get("effective_offset_C_by_slot") or {}
    target, tolerance = view.target_nm, view.tolerance_pct
    if target is None and advice is not None:
        target = advice.get("target_nm")
    wafers = [WaferSummary(wafer=w.wafer, slot=w.slot, role=w.role, mean_nm=w.mean_nm,
                           sigma_nm=w.sigma_nm, nu_pct=w.nu_pct, sites_used=w.sites_used)
              for w in view.wafers]
    slots = [SlotSummary(slot=w.slot, mean_nm=math.nan if w.excluded else w.mean_nm,
                         offset_C=by_slot.get(str(w.slot))) for w in view.wafers]
    return make_record(LotRecord(
        lot_id=view.lot_id, furnace=view.furnace, run_date=view.run_date or None,
        recipe=recipe, advice=advice,
        lot_nc_path=None if lot_nc_path is None else str(lot_nc_path),
        lot_nc_sha256=lot_nc_sha256, lot_mean_nm=view.wtw.grand_mean_nm,
        wtw_pct=view.wtw.wtw_nu_pct, wiw_mean_pct=view.wiw_mean_pct, target_nm=target,
        tolerance_pct=tolerance, applied_trims_C=applied_trims_C, wafers=tuple(wafers),
        slots=tuple(slots)))
