"""summary.json (pinned format) and the per-wafer rows of summary.csv, from a `LotView`.

Pinned format of ``OUTDIR/summary.json`` (these keys and their nesting never
change; further keys may be added after them, never renamed or dropped)::

    {"lot": {"id": str, "mean_nm": float|null, "wtw_pct": float|null,
             "edge_slots": [int, ...], "flat_zone": [int, int]|null,
             "extra_dummies": {"load": int, "source": int}, ...extras},
     "wafers": [{"wafer": str, "slot": int, "role": "product"|"monitor"|"dummy",
                 "mean_nm": float|null, "sigma_nm": float|null, "nu_pct": float|null,
                 "range_nm": float|null, "halfrange_pct": float|null,
                 "sites_used": int, "in_spec": bool|null, ...extras}, ...],
     ...extras}

Meanings: ``lot.mean_nm`` is the grand mean of the product wafer means (wafers
with too few usable sites left out), ``lot.wtw_pct`` the wafer-to-wafer
non-uniformity 100 s / mean over the same wafers (n - 1 sample standard
deviation), ``edge_slots`` / ``flat_zone`` / ``extra_dummies`` those of the
slot profile (`filmmap.lotstats.slot_profile`). Per wafer, the within-wafer
figures of `filmmap.wafermap.stats`; ``in_spec`` is null without a target,
for dummies, and for wafers not judged. Every NaN is written as null.

summary.csv has the same per-wafer rows, columns `SUMMARY_CSV_COLUMNS`: the
pinned ones first, extras after them.
"""

from __future__ import annotations

import json
import math
from pathlib import Path

from filmmap import __version__
from filmmap.atomic import write_text_atomic
from filmmap.report.formatting import flag_text

#: Pinned keys of summary.json, in order.
LOT_KEYS = ("id", "mean_nm", "wtw_pct", "edge_slots", "flat_zone", "extra_dummies")
WAFER_KEYS = ("wafer", "slot", "role", "mean_nm", "sigma_nm", "nu_pct", "range_nm",
              "halfrange_pct", "sites_used", "in_spec")

#: Extra per-wafer keys, after the pinned ones (JSON and CSV).
WAFER_EXTRA_KEYS = ("sites_measured", "sites_fit_ok", "min_nm", "max_nm", "in_lot_stats",
                    "flag", "note")

#: Columns of summary.csv: the pinned per-wafer keys, then the extras, then the lot id
#: (last, so that no pinned or earlier column moves).
SUMMARY_CSV_COLUMNS = WAFER_KEYS + WAFER_EXTRA_KEYS + ("lot_id",)

#: Version of the summary.json layout (an extra key; bumped only when keys are added;
#: 2 added ``created``).
SUMMARY_FORMAT = 2


def _num(value):
    """float, or None for NaN / None (JSON null)."""
    if value is None:
        return None
    v = float(value)
    return v if math.isfinite(v) else None


def wafer_rows(view):
    """Per-wafer rows (dicts, slot order) of summary.json and summary.csv.

    Parameters
    ----------
    view : LotView

    Returns
    -------
    list of dict
        Keys `WAFER_KEYS` then `WAFER_EXTRA_KEYS`; NaN as None.
    """
    rows = []
    for w in view.wafers:
        rows.append({
            "wafer": w.wafer, "slot": int(w.slot), "role": w.role,
            "mean_nm": _num(w.mean_nm), "sigma_nm": _num(w.sigma_nm), "nu_pct": _num(w.nu_pct),
            "range_nm": _num(w.range_nm), "halfrange_pct": _num(w.halfrange_pct),
            "sites_used": int(w.sites_used),
            "in_spec": None if w.in_spec is None else bool(w.in_spec),
            "sites_measured": int(w.sites_measured), "sites_fit_ok": int(w.sites_fit_ok),
            "min_nm": _num(w.min_nm), "max_nm": _num(w.max_nm),
            "in_lot_stats": bool(w.in_lot_stats), "flag": flag_text(w),
            "note": w.note or w.flag_reason,
        })
    return rows


def summary_dict(view, created=None):
    """The summary.json content as a dict (see the module docstring for the pinned keys).

    Parameters
    ----------
    view : LotView
    created : str, optional
        Creation time (ISO 8601, UTC) recorded as ``created``; default now (the
        reduce passes lot.nc's, so both files carry one time).

    Returns
    -------
    dict
    """
    w, p = view.wtw, view.profile
    lot = {
        "id": view.lot_id,
        "mean_nm": _num(w.grand_mean_nm),
        "wtw_pct": _num(w.wtw_nu_pct),
        "edge_slots": [int(s) for s in p.edge_slots],
        "flat_zone": None if p.flat_zone is None else [int(s) for s in p.flat_zone],
        "extra_dummies": {"load": int(p.extra_dummies["load"]),
                          "source": int(p.extra_dummies["source"])},
        # extras
        "furnace": view.furnace,
        "run_date": view.run_date,
        "target_nm": _num(view.target_nm),
        "tolerance_pct": _num(view.tolerance_pct),
        "boat_slots": int(view.boat_size),
        "n_product": int(w.n_product),
        "n_product_used": int(w.n_used),
        "in_spec_count": None if w.in_spec_count is None else int(w.in_spec_count),
        "wtw_sigma_nm": _num(w.wtw_sigma_nm),
        "range_nm": _num(w.range_nm),
        "min_nm": _num(w.min_nm),
        "max_nm": _num(w.max_nm),
        "reference_nm": _num(p.reference_nm),
        "flagged_slots": [int(s) for s in p.flagged_slots],
        "edge_slots_load": [int(s) for s in p.edge_slots_load],
        "edge_slots_source": [int(s) for s in p.edge_slots_source],
        "min_sites": int(view.min_sites),
        "excluded_wafers": list(view.excluded),
        "failed_sites": len(view.failed_sites),
        "suspect_sites": len(view.suspect_sites),
        "recommendations": [dict(r) for r in getattr(view, "recommendations", ())],
        "verdict": view.verdict,
    }
    return {"lot": lot, "wafers": wafer_rows(view), "warnings": list(view.warnings),
            "notes": list(view.notes), "software": f"filmmap {__version__}",
            "summary_format": SUMMARY_FORMAT, "created": created or _now()}


def _now():
    import datetime as _dt

    return _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")


def _dumps(obj, level=0):
    """Strict JSON; a list or object holding only scalars goes on one line (one wafer per line)."""
    def scalar(v):
        return not isinstance(v, (dict, list, tuple))

    if scalar(obj) or (all(scalar(v) for v in (obj.values() if isinstance(obj, dict) else obj))):
        return json.dumps(obj, ensure_ascii=False, allow_nan=False)
    pad, inner = "  " * level, "  " * (level + 1)
    if isinstance(obj, dict):
        items = [f"{inner}{json.dumps(str(k), ensure_ascii=False)}: {_dumps(v, level + 1)}"
                 for k, v in obj.items()]
        return "{\n" + ",\n".join(items) + "\n" + pad + "}"
    items = [f"{inner}{_dumps(v, level + 1)}" for v in obj]
    return "[\n" + ",\n".join(items) + "\n" + pad + "]"


def summary_json_text(view, created=None):
    """summary.json as text: UTF-8, strict JSON (no NaN), one wafer per line."""
    return _dumps(summary_dict(view, created)) + "\n"


def write_summary_json(view, outdir, created=None):
    """Write ``OUTDIR/summary.json`` atomically; return its path.

    Parameters
    ----------
    view : LotView
    outdir : str or path-like
        Output folder (must exist).
    """
    return write_text_atomic(Path(outdir) / "summary.json", summary_json_text(view, created))


def _csv_value(value):
    if value is None:
        return ""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int):
        return value
    if isinstance(value, float):
        return f"{value:.4f}"
    return str(value)


def summary_csv_rows(view):
    """Header and rows of summary.csv (values as written: 4 decimals, '' for missing).

    Parameters
    ----------
    view : LotView

    Returns
    -------
    (list of str, list of list)
        `SUMMARY_CSV_COLUMNS` and one row per wafer in slot order; in_spec and
        in_lot_stats as ``true`` / ``false`` ('' for in_spec when not judged).
    """
    header = list(SUMMARY_CSV_COLUMNS)
    return header, [[_csv_value({**r, "lot_id": view.lot_id}[c]) for c in header]
                    for r in wafer_rows(view)]


def write_summary_csv(view, path):
    """Write summary.csv (`summary_csv_rows`) atomically to ``path``; return the path."""
    from filmmap.io.results import write_csv_atomic

    header, rows = summary_csv_rows(view)
    return write_csv_atomic(path, header, rows)
