"""Number formatting for the reports: a failed number is shown as '—' with its reason, never invented."""

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
    """``value`` with ``digits`` decimals (and ``unit``), or '—' (with the reason) when not finite.

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
