"""Number formatting for the reports.

A number that could not be computed is shown as '—' with its reason, never invented.
"""

from __future__ import annotations

import math

#: Shown for a number that could not be computed.
MISSING = "—"


def is_number(value):
    """True for a finite int or float (bools are not numbers here)."""
    if value is None or isinstance(value, bool):
        return False
    try:
        return math.isfinite(float(value))
    except (TypeError, ValueError):
        return False


def fmt(value, digits=2, unit="", reason=None):
    """``value`` with ``digits`` decimals (and ``unit``), or '—' (with the reason) if not finite.

    Parameters
    ----------
    value : float or None
    digits : int
        Decimals.
    unit : str
        Appended after a space when the value is finite.
    reason : str, optional
        Why the value is missing, shown as '— (reason)'.

    Returns
    -------
    str
    """
    if not is_number(value):
        return MISSING if not reason else f"{MISSING} ({reason})"
    text = f"{float(value):.{digits}f}"
    return f"{text} {unit}" if unit else text


def signed(value, digits=1, unit=""):
    """``value`` with its sign and ``digits`` decimals (and ``unit``), or '—' if not finite.

    Rounded before the sign is chosen, so a value that rounds to zero reads ``+0.0``,
    never ``-0.0`` or a float artefact such as ``1.16e-14``.

    Parameters
    ----------
    value : float or None
    digits : int
        Decimals.
    unit : str
        Appended after a space when the value is finite.

    Returns
    -------
    str
    """
    if not is_number(value):
        return MISSING
    text = f"{round(float(value), digits) + 0.0:+.{digits}f}"
    return f"{text} {unit}" if unit else text


#: A dict of more scalars than this is shown compactly ("k: v, k: v, ...") in the reports.
COMPACT_DICT_MIN = 9


def is_long_scalar_dict(value):
    """True for a dict of more than `COMPACT_DICT_MIN` - 1 scalar values (e.g. a value per slot)."""
    return (isinstance(value, dict) and len(value) >= COMPACT_DICT_MIN
            and not any(isinstance(v, (dict, list, tuple)) for v in value.values()))


def scalar_text(value, digits=6):
    """Plain text of an advice scalar: '—' for None / NaN, yes/no, numbers with ``digits``."""
    if value is None:
        return MISSING
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, float):
        return f"{value:.{digits}g}" if math.isfinite(value) else MISSING
    return str(value)


def compact_dict_text(value):
    """``"k: v, k: v, ..."`` of a scalar dict, numbers to 4 significant digits."""
    return ", ".join(f"{k}: {scalar_text(v, 4)}" for k, v in value.items())


def missing_reason(line, field):
    """Why a per-wafer figure of a `WaferLine` is NaN (short text), or None when it is finite.

    Parameters
    ----------
    line : WaferLine
    field : str
        ``"mean_nm"``, ``"sigma_nm"``, ``"nu_pct"``, ``"min_nm"``, ``"max_nm"``,
        ``"range_nm"`` or ``"halfrange_pct"``.
    """
    value = getattr(line, field)
    if is_number(value):
        return None
    if line.sites_used == 0:
        return "no usable site"
    if field in ("sigma_nm", "nu_pct") and line.sites_used == 1:
        return "one site"
    if field in ("nu_pct", "halfrange_pct") and is_number(line.mean_nm) and line.mean_nm <= 0:
        return "mean not positive"
    return "not in the dataset" if field in ("min_nm", "max_nm") else "not computed"


def fmt_wafer(line, field, digits=2, unit=""):
    """A per-wafer figure formatted with `fmt`, with its `missing_reason` when NaN."""
    return fmt(getattr(line, field), digits, unit, missing_reason(line, field))


def fmt_in_spec(value, line=None, target_given=True):
    """'yes', 'no', or '—' with the reason the wafer is not judged."""
    if value is True:
        return "yes"
    if value is False:
        return "no"
    if not target_given:
        return f"{MISSING} (no target)"
    if line is not None and line.role == "dummy":
        return f"{MISSING} (dummy)"
    if line is not None and line.excluded:
        return f"{MISSING} (too few sites)"
    return f"{MISSING} (no mean)"


def flag_text(line):
    """Short slot-profile status of a wafer: 'edge', 'flagged', 'excluded' or ''."""
    if line.excluded:
        return "excluded"
    if line.edge:
        return "edge"
    if line.flagged:
        return "flagged"
    return ""


def wtw_rows(view):
    """(label, text) rows of the wafer-to-wafer and slot-profile figures of a `LotView`."""
    w, p = view.wtw, view.profile
    few = "fewer than 2 product wafers with a usable mean"
    none = "no product wafer with a usable mean"
    rows = [
        ("product wafers", f"{w.n_product} ({w.n_used} with a usable mean"
         + (f", {w.n_missing} left out: {', '.join(w.missing_ids)}" if w.n_missing else "") + ")"),
        ("monitor wafers (listed, not counted)", str(w.n_monitor)),
        ("grand mean of product wafer means", fmt(w.grand_mean_nm, 2, "nm", none)),
        ("WTW sigma (n - 1)", fmt(w.wtw_sigma_nm, 3, "nm", few)),
        ("WTW NU (100 sigma / mean)", fmt(w.wtw_nu_pct, 3, "%", few)),
        ("WTW range (max - min)", fmt(w.range_nm, 2, "nm", none)),
        ("lowest wafer mean",
         fmt(w.min_nm, 2, "nm", none) + (f" ({w.min_wafer})" if w.min_wafer else "")),
        ("highest wafer mean",
         fmt(w.max_nm, 2, "nm", none) + (f" ({w.max_wafer})" if w.max_wafer else "")),
    ]
    if view.target_nm is None:
        rows.append(("in spec", f"{MISSING} (no target given)"))
    else:
        rows.append(("target", f"{view.target_nm:g} nm ± {view.tolerance_pct:g} %"))
        rows.append(("in spec", f"{w.in_spec_count} of {w.n_used} judged product wafers"
                     + (f"; out of spec: {', '.join(w.out_of_spec_ids)}"
                        if w.out_of_spec_ids else "")))
    rows += [
        ("boat", f"{view.boat_size} slots" + ("" if view.boat_from_config
                                              else " (highest slot; no [boat] in the lot file)")),
        ("product region / centre slots",
         (f"slots {p.product_region[0]}-{p.product_region[1]}" if p.product_region else MISSING)
         + (f" / {p.central_region[0]}-{p.central_region[1]}" if p.central_region else "")),
        ("reference level (median of centre slots)", fmt(p.reference_nm, 2, "nm", none)),
        ("robust sigma (1.4826 MAD, floored)", fmt(p.robust_sigma_nm, 3, "nm", none)),
        ("flag limit", (f"± {p.limit_nm:.2f} nm from the reference level (k = {p.k:.2f} "
                        "robust sigmas, set so that a boat without a real outlier flags a slot "
                        "by chance about once in 100 lots)" if p.limit_nm is not None
                        else f"{MISSING} (robust rule off)")),
        ("flagged slots", ", ".join(map(str, p.flagged_slots)) or "none"),
        ("edge slots, load end", ", ".join(map(str, p.edge_slots_load)) or "none"),
        ("edge slots, source end", ", ".join(map(str, p.edge_slots_source)) or "none"),
        ("flat zone",
         f"slots {p.flat_zone[0]}-{p.flat_zone[1]}" if p.flat_zone else f"{MISSING} (none)"),
        ("extra dummies suggested (advisory)",
         f"load end {p.extra_dummies['load']}, source end {p.extra_dummies['source']}"),
    ]
    return rows
