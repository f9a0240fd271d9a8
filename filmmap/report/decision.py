"""The decision block: lot disposition, key numbers and the next-run action in one sentence.

The same block heads report.html, page 1 of report.pdf and the console summary, so the
three never disagree; all are made from `decision(view, advice)`.

Disposition rule
----------------
`DISPOSITION_RULE` states it in words; `lot_disposition` applies it:

1. **out of spec** (action: hold) when any judged product wafer has its mean outside
   target ± tolerance;
2. otherwise **held for review** (action: hold for review) when the lot cannot be judged
   whole: no target given, no product wafer with a usable mean, a product wafer left out
   (fewer usable sites than the lot's minimum), or failed plus suspect sites above
   `REVIEW_SITE_FRACTION` of the measured sites;
3. otherwise **in spec** (action: release).

The 2 % site threshold is common practice, no source: on a 49-site wafer it is one site
per wafer on average, which a process engineer would look at before releasing.

Units: thickness nm, time min, temperature differences K (a difference of 1 K equals one
of 1 °C; the advice keys ending ``_C`` hold such differences).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from filmmap.report.cautions import SHORT_CAUTION
from filmmap.report.formatting import is_number, signed

#: Failed plus suspect sites, as a fraction of the measured sites, above which a lot that is
#: otherwise in spec is held for review (common practice, no source).
REVIEW_SITE_FRACTION = 0.02

IN_SPEC, OUT_OF_SPEC, REVIEW = "in spec", "out of spec", "held for review"

#: What to do with the lot for each disposition.
ACTIONS = {IN_SPEC: "release", OUT_OF_SPEC: "hold", REVIEW: "hold for review"}

#: The rule in words (shown under the disposition).
DISPOSITION_RULE = (
    "Rule: out of spec (hold) when any judged product wafer mean lies outside target ± "
    "tolerance; otherwise held for review when there is no target, no product wafer with a "
    "usable mean, a product wafer left out for too few usable sites, or failed plus suspect "
    f"sites above {100 * REVIEW_SITE_FRACTION:g} % of the measured sites; otherwise in spec "
    "(release).")

#: Stated once wherever a temperature difference is shown.
UNITS_NOTE = ("Temperature differences in K (1 K = 1 °C of difference); "
              "advice.json keys ending in _C hold the same numbers.")


@dataclass(frozen=True)
class Disposition:
    """Lot disposition against the target.

    Attributes
    ----------
    status : str
        `IN_SPEC`, `OUT_OF_SPEC` or `REVIEW`.
    action : str
        ``"release"``, ``"hold"`` or ``"hold for review"``.
    reasons : tuple of str
        Why (plain text, one finding each); empty for a clean release.
    rule : str
        `DISPOSITION_RULE`.
    """

    status: str
    action: str
    reasons: tuple
    rule: str = DISPOSITION_RULE

    @property
    def headline(self):
        """``"HOLD: out of spec"`` style headline."""
        return f"{self.action.upper()}: lot {self.status}"


def lot_disposition(view):
    """Apply the disposition rule (module docstring) to a `LotView`.

    Parameters
    ----------
    view : LotView

    Returns
    -------
    Disposition
    """
    w = view.wtw
    out_ids = list(w.out_of_spec_ids) if view.target_nm is not None else []
    reasons = []
    if out_ids:
        shown = ", ".join(out_ids[:6]) + (f" and {len(out_ids) - 6} more" if len(out_ids) > 6
                                          else "")
        reasons.append(f"{len(out_ids)} of {w.n_used} judged product wafers outside "
                       f"{view.target_nm:g} nm ± {view.tolerance_pct:g} %: {shown}")
    review = []
    if view.target_nm is None:
        review.append("no target given: the lot cannot be judged")
    if w.n_product == 0:
        review.append("no product wafers in the lot")
    elif w.n_used == 0:
        review.append("no product wafer has a usable mean")
    if w.n_missing:
        review.append(f"{w.n_missing} product wafer(s) left out for fewer than "
                      f"{view.min_sites} usable sites: {', '.join(w.missing_ids)}")
    n_bad = len(view.failed_sites) + len(view.suspect_sites)
    if view.n_sites_measured and n_bad > REVIEW_SITE_FRACTION * view.n_sites_measured:
        review.append(f"{len(view.failed_sites)} failed and {len(view.suspect_sites)} suspect "
                      f"of {view.n_sites_measured} measured sites "
                      f"({100 * n_bad / view.n_sites_measured:.1f} %, above "
                      f"{100 * REVIEW_SITE_FRACTION:g} %)")
    if out_ids:
        status = OUT_OF_SPEC
    elif review:
        status = REVIEW
    else:
        status = IN_SPEC
    return Disposition(status, ACTIONS[status], tuple(reasons + review))


def _k(value):
    return signed(value, 1, "K")


def has_standard_advice(advice):
    """True when ``advice`` carries the pinned keys of `filmmap.growth.advice` (readable form)."""
    return bool(advice) and all(k in advice for k in (
        "adjust_step", "minutes_now", "minutes_next", "zone_offsets_C",
        "predicted_wtw_pct_now", "predicted_wtw_pct_next"))


def advice_sentence(advice):
    """The next-run action in one sentence, with its bounds and predictions.

    Parameters
    ----------
    advice : dict
        An advice dict of `filmmap.growth.advice.advise` (pinned keys).

    Returns
    -------
    str
        E.g. ``"Set wet to 116.5 min (now 115.0 min, +1.3 %; bound ± 15 %) and trim the
        heater zones load +1.6 K, center -0.2 K, source -0.7 K (bound ± 5.0 K each):
        predicted mean 594.5 -> 600.0 nm, WTW NU 0.84 -> 0.62 %."``; '' without advice.
    """
    if not has_standard_advice(advice):
        return ""
    model = advice.get("model") or {}
    now, nxt = float(advice["minutes_now"]), float(advice["minutes_next"])
    tbound = model.get("max_time_change_pct")
    obound = model.get("max_offset_C")
    change = 100.0 * (nxt / now - 1.0) if now else math.nan
    at_t = is_number(tbound) and abs(change) >= float(tbound) - 1e-6
    parts = [f"Set {advice['adjust_step']} to {nxt:.1f} min (now {now:.1f} min, "
             f"{signed(change, 1)} %"
             + (f"; bound ± {float(tbound):g} %" if is_number(tbound) else "")
             + (", at the bound" if at_t else "") + ")"]
    trims = advice.get("zone_offsets_C") or {}
    if trims:
        at = [z for z, v in trims.items()
              if is_number(obound) and is_number(v) and abs(v) >= float(obound) - 1e-6]
        text = ", ".join(f"{z} {_k(v)}" for z, v in trims.items() if is_number(v))
        parts.append(f"trim the heater zones {text}"
                     + (f" (bound ± {float(obound):.1f} K each" if is_number(obound) else " (")
                     + (f"; at the bound: {', '.join(at)}" if at else "") + ")")
    # extra dummies answer the end effect the trims cannot remove (the boat model's verdict)
    for end, n in (advice.get("extra_dummies") or {}).items():
        if is_number(n) and int(n) > 0:
            parts.append(f"add {int(n)} dumm{'y' if int(n) == 1 else 'ies'} at the {end} end")
    pred = []
    if is_number(advice.get("predicted_mean_nm_now")) and is_number(
            advice.get("predicted_mean_nm_next")):
        pred.append(f"mean {advice['predicted_mean_nm_now']:.1f} -> "
                    f"{advice['predicted_mean_nm_next']:.1f} nm")
    if is_number(advice["predicted_wtw_pct_now"]) and is_number(advice["predicted_wtw_pct_next"]):
        pred.append(f"WTW NU {advice['predicted_wtw_pct_now']:.2f} -> "
                    f"{advice['predicted_wtw_pct_next']:.2f} %")
    head = (", ".join(parts[:-1]) + " and " + parts[-1]) if len(parts) > 1 else parts[0]
    return head + (": predicted " + ", ".join(pred) if pred else "") + "."


def advice_causes(advice, view=None):
    """Which finding each recommendation answers: list of (recommendation, cause) texts.

    An advice made with the boat model (`filmmap.growth.boat`) states this itself
    (``recommendations``: time, each zone trim, extra dummies, unexplained slots, each with
    the cause it answers); older advice files are explained from their numbers.
    """
    if not has_standard_advice(advice):
        return []
    recs = advice.get("recommendations")
    if isinstance(recs, list) and recs and all(isinstance(r, dict) for r in recs):
        return [(str(r.get("action", "")), str(r.get("answers", ""))) for r in recs]
    out = []
    target = advice.get("target_nm")
    mean_now = advice.get("predicted_mean_nm_now")
    if is_number(target) and is_number(mean_now):
        dev = 100.0 * (mean_now / target - 1.0)
        out.append((f"{advice['adjust_step']} time {advice['minutes_now']:.1f} -> "
                    f"{advice['minutes_next']:.1f} min",
                    f"product mean {mean_now:.1f} nm is {dev:+.2f} % off the {target:g} nm "
                    "target; the time moves the whole boat"))
    errs = advice.get("zone_errors_C") or {}
    trims = advice.get("zone_offsets_C") or {}
    if trims:
        err_text = ", ".join(f"{z} {_k(v)}" for z, v in errs.items() if is_number(v))
        edge = ""
        if view is not None and view.profile.edge_slots:
            edge = ("; edge slots " + ", ".join(map(str, view.profile.edge_slots))
                    + " are thin or thick because of the boat's end, which trims only partly cure")
        out.append(("zone trims " + ", ".join(f"{z} {_k(v)}" for z, v in trims.items()
                                              if is_number(v)),
                    "slot-to-slot profile along the boat"
                    + (f": estimated zone temperature errors {err_text}" if err_text else "")
                    + edge))
    return out


@dataclass(frozen=True)
class Decision:
    """Everything the decision block shows.

    Attributes
    ----------
    disposition : Disposition
    key_numbers : list of (str, str)
        Label and value text: mean vs target, WTW, worst WIW, edge slots, failed and
        suspect sites.
    action : str
        The next-run sentence ('' without advice).
    no_action_reason : str
        Why there is no next-run sentence ('' when there is one).
    caution : str
        The one-line caution (the full cautions are shown once, elsewhere).
    """

    disposition: Disposition
    key_numbers: list
    action: str
    no_action_reason: str
    caution: str

    def lines(self):
        """The block as plain-text lines (console, PDF)."""
        d = self.disposition
        out = [f"DECISION: {d.headline}"]
        out += [f"  - {r}" for r in d.reasons]
        out.append(d.rule)
        out += [f"{k}: {v}" for k, v in self.key_numbers]
        out.append("Next run: " + (self.action or self.no_action_reason))
        out.append(self.caution)
        return out




def key_numbers(view):
    """(label, value) pairs of the decision block (see `Decision`)."""
    w, p = view.wtw, view.profile
    rows = []
    if is_number(w.grand_mean_nm):
        text = f"{w.grand_mean_nm:.2f} nm"
        if view.target_nm is not None:
            dev = 100.0 * (w.grand_mean_nm / view.target_nm - 1.0)
            text += (f" vs target {view.target_nm:g} nm ± {view.tolerance_pct:g} % "
                     f"({dev:+.2f} %)")
        rows.append(("mean of product wafers", text))
    else:
        rows.append(("mean of product wafers", "— (no product wafer with a usable mean)"))
    if view.target_nm is not None and w.n_used:
        rows.append(("product wafers in spec", f"{w.in_spec_count} of {w.n_used} judged"
                     + (f" ({w.n_product} product)" if w.n_product != w.n_used else "")))
    rows.append(("WTW NU (wafer to wafer, 100 sigma / mean)",
                 f"{w.wtw_nu_pct:.2f} %, range {w.range_nm:.2f} nm"
                 if is_number(w.wtw_nu_pct) else "— (fewer than 2 product wafers)"))
    judged = [x for x in view.product_lines if x.in_lot_stats and is_number(x.nu_pct)]
    if judged:
        worst = max(judged, key=lambda x: x.nu_pct)
        rows.append(("worst WIW NU (within wafer)",
                     f"{worst.nu_pct:.2f} % (wafer {worst.wafer}, slot {worst.slot})"))
    rows.append(("edge slots", ", ".join(map(str, p.edge_slots)) or "none"))
    rows.append(("failed / suspect sites",
                 f"{len(view.failed_sites)} / {len(view.suspect_sites)} of "
                 f"{view.n_sites_measured} measured"))
    return rows


def decision(view, advice=None):
    """The decision block of a lot.

    Parameters
    ----------
    view : LotView
    advice : dict, optional
        Next-run advice (`filmmap.growth.advice.advise` output).

    Returns
    -------
    Decision
    """
    action = advice_sentence(advice) if advice else ""
    if action:
        why = ""
    elif advice:
        why = "see the advice section (the advice has no standard time and zone keys)"
    else:
        why = "no advice: the lot file needs a [recipe] and a [target] for next-run advice"
    return Decision(lot_disposition(view), key_numbers(view), action, why, SHORT_CAUTION)


__all__ = ["ACTIONS", "DISPOSITION_RULE", "Decision", "Disposition", "IN_SPEC", "OUT_OF_SPEC",
           "REVIEW", "REVIEW_SITE_FRACTION", "SHORT_CAUTION", "UNITS_NOTE", "advice_causes",
           "advice_sentence", "decision", "has_standard_advice", "key_numbers",
           "lot_disposition"]
