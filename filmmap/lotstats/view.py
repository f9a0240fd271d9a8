"""The lot view: every figure the reports show, computed once from the lot dataset.

`lot_view` takes the lot dataset (``lot.nc``, see `filmmap.io.results.lot_dataset`
with the per-wafer statistics of the reduce pipeline) and the lot configuration, and
returns a `LotView`: per-wafer lines, the wafer-to-wafer (WTW) figures, the slot profile
along the boat, the failed sites, and plain-text warnings. summary.json, summary.csv,
report.html, report.pdf and the run history are all made from one `LotView`, so they
cannot disagree. The arrays come through the one dataset bridge (`filmmap.bridge`); the
minimum-sites rule is `filmmap.lotstats.exclusion`.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass

import numpy as np

from filmmap.bridge import NOT_MEASURED, config_value, site_grid, wafer_values
from filmmap.errors import FilmmapInputError
from filmmap.lotstats.causes import count_causes
from filmmap.lotstats.exclusion import DEFAULT_MIN_SITES, check_min_sites, exclusion_note
from filmmap.lotstats.roles import ROLES, roles_from_boat
from filmmap.lotstats.slots import slot_profile
from filmmap.lotstats.wtw import wafer_to_wafer

#: Per-wafer variables the lot view needs in the dataset.
REQUIRED_WAFER_VARS = ("mean_nm", "sigma_nm", "nu_pct", "range_nm", "halfrange_pct",
                       "sites_used")

#: Per-site variables the lot view needs in the dataset.
REQUIRED_SITE_VARS = ("fit_ok", "fit_note")

__all__ = ["LotView", "WaferLine", "FailedSite", "lot_view", "with_boat_model",
           "read_input_hashes", "DEFAULT_MIN_SITES", "NOT_MEASURED"]


@dataclass(frozen=True)
class WaferLine:
    """One wafer of the lot as the reports show it.

    Attributes
    ----------
    wafer : str
        Wafer id (as read from the input files: escape before any markup).
    slot : int
        Boat slot (1 = load/door end).
    role : str
        ``"product"``, ``"monitor"`` or ``"dummy"``.
    mean_nm, sigma_nm : float
        Within-wafer mean and sample standard deviation, nm (NaN = not computable).
    nu_pct : float
        100 sigma / mean, %.
    min_nm, max_nm, range_nm : float
        Extremes and their difference, nm (NaN when the dataset lacks them).
    halfrange_pct : float
        100 range / (2 mean), %.
    sites_measured, sites_fit_ok, sites_used : int
        Sites with a spectrum, sites whose fit is ok, sites in the statistics.
    in_spec : bool or None
        Mean inside the spec band; None without a target, for dummies, and for
        wafers whose mean is not judged (excluded or NaN).
    in_lot_stats : bool
        Counted in the product lot figures (product, usable mean).
    excluded : bool
        Fewer than ``min_sites`` usable sites: left out of the lot statistics.
    flagged : bool
        Flagged in the slot profile.
    edge : bool
        An edge slot: flagged and contiguous with an end of the product region or, with a
        growth model, a slot the advised run still leaves out of tolerance because of an
        end effect (`with_boat_model`).
    flag_reason : str
        Why the slot is flagged ('' when not flagged).
    note : str
        Why the wafer is excluded ('' when it is not).
    """

    wafer: str
    slot: int
    role: str
    mean_nm: float
    sigma_nm: float
    nu_pct: float
    min_nm: float
    max_nm: float
    range_nm: float
    halfrange_pct: float
    sites_measured: int
    sites_fit_ok: int
    sites_used: int
    in_spec: bool | None
    in_lot_stats: bool
    excluded: bool
    flagged: bool
    edge: bool
    flag_reason: str
    note: str


@dataclass(frozen=True)
class FailedSite:
    """A measured site whose fit was not accepted.

    Attributes
    ----------
    wafer : str
    slot : int
    site : int
    note : str
        The fitter's reason (``fit_note``), from the dataset.
    fit_quality : float
        Reduced chi-square of the unchecked best fit (NaN when none).
    x_mm, y_mm : float
        Site position, mm.
    """

    wafer: str
    slot: int
    site: int
    note: str
    fit_quality: float
    x_mm: float
    y_mm: float


@dataclass(frozen=True)
class LotView:
    """Everything the lot reports show (see the module docstring).

    Attributes
    ----------
    lot_id, furnace, run_date : str
        From the lot configuration (or the dataset attributes); '' when unknown.
    wafers : tuple of WaferLine
        Every wafer of the dataset, in slot order.
    wtw : filmmap.lotstats.WaferToWafer
        Wafer-to-wafer figures over the product wafers (excluded wafers as NaN).
    profile : filmmap.lotstats.SlotProfile
        Slot profile over the whole boat.
    boat_size : int
        Slots in the boat.
    boat_from_config : bool
        False when the lot file has no [boat] and the size is the highest slot.
    layout_role : tuple of str
        Role of every slot 1 .. boat_size from the dataset and the lot file's
        [boat]: ``"product"``, ``"monitor"``, ``"dummy"`` or ``"empty"``
        (dummies listed in [boat] but not measured count as ``"dummy"``).
    measured : tuple of bool
        Per slot: a wafer of the dataset sits there.
    zones : tuple of (str, int, int)
        Heater zones (name, first slot, last slot), load end first; empty without [furnace].
    target_nm, tolerance_pct : float or None
        The spec, None without a [target].
    diameter_mm, edge_exclusion_mm : float
        Wafer geometry.
    min_sites : int
        Fewest usable sites for the lot statistics.
    excluded : tuple of str
        Ids of the excluded wafers, slot order.
    failed_sites : tuple of FailedSite
        Every measured site whose fit failed, in wafer (slot) then site order.
    n_sites_measured : int
        Sites with a spectrum, over the lot.
    warnings : list of str
        What the reader must know (plain text).
    notes : list of str
        Remarks of the slot profile (rules switched off, floors used ...).
    """

    lot_id: str
    furnace: str
    run_date: str
    wafers: tuple
    wtw: object
    profile: object
    boat_size: int
    boat_from_config: bool
    layout_role: tuple
    measured: tuple
    zones: tuple
    target_nm: float | None
    tolerance_pct: float | None
    diameter_mm: float
    edge_exclusion_mm: float
    min_sites: int
    excluded: tuple
    failed_sites: tuple
    n_sites_measured: int
    warnings: list
    notes: list
    suspect_sites: tuple = ()
    recommendations: tuple = ()

    @property
    def product_lines(self):
        """WaferLines of the product wafers."""
        return [w for w in self.wafers if w.role == "product"]

    @property
    def wiw_mean_pct(self):
        """Mean within-wafer non-uniformity (WIW) of the lot, percent; NaN without one.

        The mean of ``nu_pct`` over the product wafers counted in the lot statistics
        (``in_lot_stats``: a usable mean, `filmmap.lotstats.exclusion`) whose ``nu_pct``
        is finite - the same wafers as the grand mean and WTW. The run history charts it
        per lot.

        References
        ----------
        .. [1] Within-wafer non-uniformity averaged over a lot: common practice, no source.
        """
        nu = np.array([w.nu_pct for w in self.wafers if w.role == "product" and w.in_lot_stats],
                      dtype=float)
        nu = nu[np.isfinite(nu)]
        return float(np.mean(nu)) if nu.size else math.nan

    @property
    def failure_counts(self):
        """``{reason: count}`` of the failed sites (reason = text before the first ':')."""
        return count_causes(f.note for f in self.failed_sites)

    @property
    def verdict(self):
        """One line: in-spec count, WTW NU %, edge slots with the dummies to add, flat zone."""
        w, p = self.wtw, self.profile
        parts = []
        if w.n_product == 0:
            parts.append("no product wafers in the lot: nothing to judge")
        elif w.n_used == 0:
            parts.append(f"none of the {w.n_product} product wafers has a usable mean "
                         f"(at least {self.min_sites} usable sites): nothing to judge")
        elif self.target_nm is None:
            parts.append(f"no target given: {w.n_product} product wafer(s), in-spec not judged")
        else:
            parts.append(f"{w.in_spec_count} of {w.n_product} product wafers in spec "
                         f"(target {self.target_nm:g} nm ± {self.tolerance_pct:g} %)")
        if w.n_missing and w.n_used:
            parts.append(f"{w.n_missing} product wafer(s) not judged (too few usable sites)")
        if w.n_used >= 2 and math.isfinite(w.wtw_nu_pct):
            parts.append(f"WTW NU {w.wtw_nu_pct:.2f} %")
        if w.n_used:
            if p.edge_slots_load:
                parts.append("edge slots at the load end: "
                             + ", ".join(map(str, p.edge_slots_load)))
            if p.edge_slots_source:
                parts.append("edge slots at the source end: "
                             + ", ".join(map(str, p.edge_slots_source)))
            if not p.edge_slots:
                parts.append("no edge slots")
            for end in ("load", "source"):
                n = int(p.extra_dummies.get(end, 0))
                if n:
                    parts.append(f"add {n} dumm{'y' if n == 1 else 'ies'} at the {end} end")
            if p.flat_zone:
                parts.append(f"flat zone: slots {p.flat_zone[0]}-{p.flat_zone[1]}")
        return "; ".join(parts)


def read_input_hashes(ds):
    """The ``input_files_sha256`` attribute as a list of ``{"file", "sha256"}`` dicts.

    Returns
    -------
    (list of dict, str or None)
        The entries, and a problem description when the attribute is missing
        or unreadable (then the list is empty).
    """
    raw = ds.attrs.get("input_files_sha256")
    if raw is None:
        return [], "the dataset records no input files (attribute input_files_sha256 missing)"
    try:
        items = json.loads(raw) if isinstance(raw, str) else list(raw)
        out = [{"file": str(i["file"]), "sha256": str(i["sha256"])} for i in items]
    except (ValueError, TypeError, KeyError):
        return [], "the attribute input_files_sha256 is not a JSON list of {file, sha256}"
    return out, None


def lot_view(ds, config, *, min_sites=DEFAULT_MIN_SITES, k=None, false_alarm=0.01,
             sigma_floor_pct=0.1, min_robust_slots=8, dummy_margin=0):
    """Compute the lot view of a reduced lot.

    Parameters
    ----------
    ds : xarray.Dataset
        The lot dataset: coordinates ``wafer``, ``slot`` (and ``role``), per-wafer
        ``mean_nm``, ``sigma_nm``, ``nu_pct``, ``range_nm``, ``halfrange_pct``,
        ``sites_used`` (``min_nm``, ``max_nm`` optional), per-site ``fit_ok``,
        ``fit_note`` (``fit_quality``, ``x_mm``, ``y_mm`` optional).
    config : LotConfig or any object with the same attributes
        Used: ``lot.id``, ``lot.furnace``, ``lot.run_date``, ``target``
        (``thickness_nm``, ``tolerance_pct``; may be None), ``boat`` (``slots``,
        ``dummy_slots``, ``monitor_slots``; may be None), ``furnace.zones``
        (may be None), ``measurement.wafer_diameter_mm`` and
        ``edge_exclusion_mm`` (else the dataset attributes).
    min_sites : int
        Fewest usable sites for a wafer to enter the lot statistics (>= 1,
        default `DEFAULT_MIN_SITES`).
    k, false_alarm, sigma_floor_pct, min_robust_slots, dummy_margin
        Passed to `filmmap.lotstats.slot_profile`.

    Returns
    -------
    LotView

    Raises
    ------
    FilmmapInputError
        Missing variables, a bad ``min_sites``, or lot arrays that
        `filmmap.lotstats.check_lot` refuses (e.g. a slot beyond the boat).
    """
    min_sites = check_min_sites(min_sites)
    missing = [v for v in REQUIRED_WAFER_VARS + REQUIRED_SITE_VARS + ("slot",)
               if v not in ds.variables]
    if missing:
        raise FilmmapInputError(f"the lot dataset lacks {', '.join(missing)}", field="dataset")
    warnings: list[str] = []

    grid = site_grid(ds)
    ids, slots = grid.wafer, grid.slot
    n = ids.size
    if grid.role is not None:
        roles = grid.role
    else:
        roles = roles_from_boat(slots, config_value(config, "boat"))
        warnings.append("the dataset has no wafer roles: taken from the lot file's [boat] "
                        "(product where not listed)")
    unknown = sorted(set(roles) - set(ROLES))
    if unknown:
        raise FilmmapInputError(f"unknown role(s) {unknown}; expected one of {list(ROLES)}",
                                field="role")

    stats = {name: wafer_values(ds, name) for name in
             ("mean_nm", "sigma_nm", "nu_pct", "min_nm", "max_nm", "range_nm", "halfrange_pct")}
    for name in ("min_nm", "max_nm"):
        if stats[name] is None:
            stats[name] = np.full(n, math.nan)
    used = np.nan_to_num(wafer_values(ds, "sites_used"), nan=0.0).astype(int)
    fit_ok, notes_site, measured_site = grid.fit_ok, grid.fit_note, grid.measured
    sites_measured = measured_site.sum(axis=1).astype(int)
    sites_fit_ok = (fit_ok & measured_site).sum(axis=1).astype(int)

    # --- lot configuration
    lot_id = str(config_value(config, "lot", "id", default=ds.attrs.get("lot_id", "")))
    furnace = str(config_value(config, "lot", "furnace", default=ds.attrs.get("furnace", "")) or "")
    run_date = str(config_value(config, "lot", "run_date", default=ds.attrs.get("run_date", "")) or "")
    target = config_value(config, "target")
    target_nm = None if target is None else float(target.thickness_nm)
    tol_pct = None if target is None else float(target.tolerance_pct)
    boat = config_value(config, "boat")
    if boat is not None:
        boat_size, from_config = int(boat.slots), True
    else:
        boat_size, from_config = int(slots.max()), False
        warnings.append(f"the lot file has no [boat]: boat size taken as the highest measured "
                        f"slot ({boat_size}); dummy slots that were not measured are unknown")
    zones = tuple((str(z.name), int(z.first_slot), int(z.last_slot))
                  for z in (config_value(config, "furnace", "zones", default=()) or ()))
    diameter = float(config_value(config, "measurement", "wafer_diameter_mm",
                          default=ds.attrs.get("wafer_diameter_mm", math.nan)))
    edge_excl = float(config_value(config, "measurement", "edge_exclusion_mm",
                           default=ds.attrs.get("edge_exclusion_mm", math.nan)))

    # --- wafers with too few usable sites: out of the lot statistics
    excluded_mask = used < min_sites
    lot_mean = np.where(excluded_mask, math.nan, stats["mean_nm"])
    order = np.argsort(slots, kind="stable")
    excluded_notes = {}
    for i in order[excluded_mask[order]]:
        why = exclusion_note(used[i], min_sites)
        excluded_notes[i] = why
        warnings.append(f"wafer {ids[i]} (slot {slots[i]}, {roles[i]}): {why}")

    wtw = wafer_to_wafer(ids, slots, roles, lot_mean, stats["sigma_nm"],
                         target_nm=target_nm, tolerance_pct=tol_pct)
    prof = slot_profile(ids, slots, roles, lot_mean, stats["sigma_nm"], boat_size,
                        target_nm=target_nm, tolerance_pct=tol_pct, k=k, false_alarm=false_alarm,
                        sigma_floor_pct=sigma_floor_pct, min_robust_slots=min_robust_slots,
                        dummy_margin=dummy_margin)
    spec_of = {r.wafer_id: r.in_spec for r in wtw.wafers}
    counted = {r.wafer_id: r.counted for r in wtw.wafers}
    edge = set(prof.edge_slots)

    lines = []
    for i in order:
        s = int(slots[i])
        flagged = bool(prof.flags[s - 1])
        lines.append(WaferLine(
            wafer=str(ids[i]), slot=s, role=str(roles[i]),
            mean_nm=float(stats["mean_nm"][i]), sigma_nm=float(stats["sigma_nm"][i]),
            nu_pct=float(stats["nu_pct"][i]), min_nm=float(stats["min_nm"][i]),
            max_nm=float(stats["max_nm"][i]), range_nm=float(stats["range_nm"][i]),
            halfrange_pct=float(stats["halfrange_pct"][i]),
            sites_measured=int(sites_measured[i]), sites_fit_ok=int(sites_fit_ok[i]),
            sites_used=int(used[i]), in_spec=spec_of.get(str(ids[i])),
            in_lot_stats=bool(counted.get(str(ids[i]), False)), excluded=bool(excluded_mask[i]),
            flagged=flagged, edge=s in edge, flag_reason=prof.reasons.get(s, ""),
            note=excluded_notes.get(i, "")))

    # --- slot layout over the whole boat
    layout = list(prof.role)
    if boat is not None:
        for s in config_value(boat, "dummy_slots", default=()) or ():
            if 1 <= s <= boat_size and layout[s - 1] == "empty":
                layout[s - 1] = "dummy"
        for s in config_value(boat, "monitor_slots", default=()) or ():
            if 1 <= s <= boat_size and layout[s - 1] == "empty":
                layout[s - 1] = "monitor"
    measured_slots = tuple(bool(r != "empty") for r in prof.role)

    # --- failed sites
    quality, x, y, site_ids = grid.fit_quality, grid.x_mm, grid.y_mm, grid.site

    def site_line(i, j, note):
        return FailedSite(wafer=str(ids[i]), slot=int(slots[i]), site=int(site_ids[j]),
                          note=note, fit_quality=float(quality[i, j]), x_mm=float(x[i, j]),
                          y_mm=float(y[i, j]))

    failed = [site_line(i, j, str(notes_site[i, j]) or "fit not accepted (no reason recorded)")
              for i in order for j in np.flatnonzero(measured_site[i] & ~fit_ok[i])]
    suspect = [site_line(i, j, str(notes_site[i, j]))
               for i in order for j in np.flatnonzero(measured_site[i] & fit_ok[i]
                                                      & grid.suspect[i])]
    n_meas = int(sites_measured.sum())
    if suspect:
        warnings.append(f"{len(suspect)} accepted sites are suspect: their fit is far worse "
                        "than the lot's typical one (still reported; see fit_note)")
    if failed:
        counts = count_causes(f.note for f in failed)
        warnings.append(f"{len(failed)} of {n_meas} measured sites failed the fit ("
                        + ", ".join(f"{r}: {c}" for r, c in counts.items()) + ")")
    if wtw.n_product and wtw.n_used == 0:
        warnings.append("no product wafer has a usable mean: no lot figures")
    for note in prof.notes:
        if note.startswith("edge runs cover more than half"):
            warnings.append(note)

    return LotView(
        lot_id=lot_id, furnace=furnace, run_date=run_date, wafers=tuple(lines), wtw=wtw,
        profile=prof, boat_size=boat_size, boat_from_config=from_config,
        layout_role=tuple(str(r) for r in layout), measured=measured_slots, zones=zones,
        target_nm=target_nm, tolerance_pct=tol_pct, diameter_mm=diameter,
        edge_exclusion_mm=edge_excl, min_sites=min_sites,
        excluded=tuple(str(ids[i]) for i in order[excluded_mask[order]]),
        failed_sites=tuple(failed), n_sites_measured=n_meas, warnings=warnings,
        notes=[nt for nt in prof.notes if not nt.startswith("edge runs cover more than half")],
        suspect_sites=tuple(suspect))


def with_boat_model(view, advice):
    """The lot view with its boat-end verdicts taken from the advice's one boat model.

    Without a growth model (no recipe, target or zones) the lot view judges the boat ends
    statistically (`filmmap.lotstats.slots`). With one, the advice has fitted zone errors,
    end effects and a residual together (`filmmap.growth.boat`), and the verdict must say
    the same as the advice: edge slots are those the advised run still leaves out of
    tolerance because of an end effect, extra dummies answer only those, and the flat zone
    is the run of product slots predicted within tolerance after the advice.

    Parameters
    ----------
    view : LotView
    advice : dict or None
        The advice (`filmmap.growth.advice.advise`); without ``boat_model`` the view is
        returned unchanged.

    Returns
    -------
    LotView
    """
    from dataclasses import replace

    if not advice or "boat_model" not in advice:
        return view
    edges = advice.get("edge_slots", {})
    load = [int(s) for s in edges.get("load", [])]
    source = [int(s) for s in edges.get("source", [])]
    flat = advice.get("flat_zone_slots")
    extra = {k: int(v) for k, v in advice.get("extra_dummies", {}).items()}
    profile = replace(view.profile, edge_slots=sorted(load + source), edge_slots_load=load,
                      edge_slots_source=source, flat_zone=list(flat) if flat else None,
                      extra_dummies={"load": extra.get("load", 0),
                                     "source": extra.get("source", 0)})
    notes = list(view.notes) + [
        "edge slots, extra dummies and the flat zone come from the advice's boat model "
        "(zone errors, end effects and residual fitted together): edge slots are those the "
        "advised run still leaves out of tolerance because of an end effect"]
    recs = tuple({"action": str(r.get("action", "")), "answers": str(r.get("answers", ""))}
                 for r in advice.get("recommendations", ()))
    # every wafer line says the same: the slot plot and the tables mark these edge slots
    edge = set(profile.edge_slots)
    wafers = tuple(replace(w, edge=w.slot in edge) for w in view.wafers)
    return replace(view, profile=profile, notes=notes, recommendations=recs, wafers=wafers)
