"""``[measurement]``: technique, angle, wafer, data files, their layout and maps, priors.

The data files are matched by the ``files`` globs (`filmmap.io.lotfile.paths`); the
layout is a name of the registry `filmmap.io.layouts.LAYOUTS`, checked against the
technique there; the maps may be files (read later, `filmmap.io.layouts.maps`) or written
inline in the lot file (checked here, so their errors name the lot file's line).
"""

from __future__ import annotations

import math
import re

from filmmap.bounds import MAX_WAFER_DIAMETER_MM
from filmmap.io.layouts import DEFAULT_LAYOUT, LAYOUTS, layout_problem
from filmmap.io.lotfile.paths import read_data_dir, relative_file, resolve_globs
from filmmap.io.lotfile.reader import found
from filmmap.io.lotfile.schema import LOT_TECHNIQUES, MeasurementConfig


def read_measurement(rd, doc, folder, allow_outside, exclude, require_files=True):
    """The ``[measurement]`` table as `MeasurementConfig`, its files and maps resolved."""
    t = rd.table(doc, "measurement", "", required=True, what="[measurement] table")
    w = "measurement"
    rd.keys(t, w, "measurement")
    technique = rd.string(t, "technique", w, required=True, choices=LOT_TECHNIQUES)
    if technique == "ellipsometry":
        if "angle_deg" not in t:
            rd.fail("angle_deg is required for technique 'ellipsometry' (angle of incidence in "
                    "air, degrees, e.g. 70.0)", f"{w}.angle_deg")
        angle = rd.number(t, "angle_deg", w, lo=0.0, hi=89.0, lo_open=True, unit=" deg")
    else:
        angle = rd.number(t, "angle_deg", w, default=0.0, lo=0.0, hi=89.0, unit=" deg")
    diameter = rd.number(t, "wafer_diameter_mm", w, default=150.0, lo=0.0, lo_open=True,
                         hi=MAX_WAFER_DIAMETER_MM, unit=" mm")
    edge = rd.number(t, "edge_exclusion_mm", w, default=3.0, lo=0.0, unit=" mm")
    if not edge < diameter / 2:
        rd.fail(f"edge_exclusion_mm = {edge:g} mm is not smaller than the wafer radius "
                f"{diameter / 2:g} mm", f"{w}.edge_exclusion_mm")
    unit = rd.string(t, "reflectance_unit", w, default="fraction", choices=("fraction", "percent"))
    reference = dark = None
    if "reference_file" in t or "dark_file" in t:
        if technique != "reflectance":
            key = "reference_file" if "reference_file" in t else "dark_file"
            rd.fail(f"{key} (raw-intensity mode) applies to technique 'reflectance' only",
                    f"{w}.{key}")
        if "reference_file" not in t:
            rd.fail("dark_file needs reference_file too (raw-intensity mode: reference spectrum "
                    "of a known sample, e.g. bare Si)", f"{w}.dark_file")
        reference = relative_file(rd, rd.string(t, "reference_file", w),
                                   f"{w}.reference_file", folder, allow_outside, "reference_file")
        if "dark_file" in t:
            dark = relative_file(rd, rd.string(t, "dark_file", w), f"{w}.dark_file", folder,
                                  allow_outside, "dark_file")
    if "reflectance_unit" in t and (technique != "reflectance" or reference is not None):
        mode = "raw-intensity mode" if reference is not None else "technique 'ellipsometry'"
        rd.fail(f"reflectance_unit does not apply with {mode} (the files hold no R@ columns); "
                "remove it", f"{w}.reflectance_unit")
    if "files" not in t:
        rd.fail("missing required key 'files' in [measurement] (an array of globs such as "
                "[\"*.csv\"])", f"{w}.files")
    patterns = rd.value(t, "files", w, "array")
    extra = [p for p in (reference, dark) if p is not None]
    data_dir = read_data_dir(rd, t, w, folder)
    # a named data folder: the globs are sandboxed in it instead of the lot folder
    files = resolve_globs(rd, patterns, data_dir or folder, allow_outside,
                           list(exclude) + extra, require_files,
                           where="data_dir" if data_dir is not None else "lot folder")
    fit_offset = rd.value(t, "fit_offset", w, "boolean", default=None)
    if fit_offset is not None and technique != "reflectance":
        rd.fail("fit_offset applies to technique 'reflectance' only; remove it",
                f"{w}.fit_offset")
    # instrument systematics: prior standard deviations (0 = not fitted); bounds are
    # far above any working instrument, so a typo like 2 for 0.002 is refused
    priors = {}
    for key, hi, key_unit, reflectance_only in (
            ("offset_sigma", 0.1, "", True), ("scale_sigma", 0.2, "", True),
            ("wavelength_shift_sigma_nm", 10.0, " nm", False),
            ("angle_offset_sigma_deg", 5.0, " deg", False)):
        priors[key] = rd.number(t, key, w, default=None, lo=0.0, hi=hi, unit=key_unit)
        if priors[key] is not None and reflectance_only and technique != "reflectance":
            rd.fail(f"{key} applies to technique 'reflectance' only; remove it", f"{w}.{key}")
    if fit_offset is not None and priors["offset_sigma"] is not None:
        rd.fail("give offset_sigma (the offset's prior; 0 = not fitted) or the older fit_offset, "
                "not both", f"{w}.fit_offset")
    if fit_offset is False:
        priors["offset_sigma"] = 0.0
    convention = rd.string(t, "delta_convention", w, default="handbook",
                           choices=("handbook", "reversed"))
    if "delta_convention" in t and technique != "ellipsometry":
        rd.fail("delta_convention applies to technique 'ellipsometry' only; remove it",
                f"{w}.delta_convention")
    layout, site_map, slot_map, pattern = _read_layout(rd, t, w, folder, allow_outside,
                                                        technique, reference, diameter)
    return MeasurementConfig(technique=technique, angle_deg=angle, files=files,
                             file_globs=tuple(patterns), wafer_diameter_mm=diameter,
                             edge_exclusion_mm=edge, reflectance_unit=unit, dark_file=dark,
                             reference_file=reference, fit_offset=fit_offset,
                             delta_convention=convention, layout=layout, site_map=site_map,
                             slot_map=slot_map, file_pattern=pattern, data_dir=data_dir,
                             **priors)


def _read_layout(rd, t, w, folder, allow_outside, technique, reference, diameter_mm):
    """``layout``, ``site_map``, ``slot_map``, ``file_pattern`` (`filmmap.io.layouts`)."""
    layout = rd.string(t, "layout", w, default=DEFAULT_LAYOUT, choices=tuple(LAYOUTS))
    problem = layout_problem(layout, "intensity" if reference is not None else technique)
    if problem:
        rd.fail(problem, f"{w}.layout")
    # a map is a pattern name / CSV file (a string) or written inline (a table)
    site_map = (_inline_site_map(rd, t["site_map"], f"{w}.site_map", diameter_mm)
                if isinstance(t.get("site_map"), dict)
                else rd.string(t, "site_map", w, default=None))
    if isinstance(site_map, str) and not re.fullmatch(r"(polar|cartesian)-\d+", site_map):
        site_map = relative_file(rd, site_map, f"{w}.site_map", folder, allow_outside,
                                  "site_map")
    slot_map = (_inline_slot_map(rd, t["slot_map"], f"{w}.slot_map")
                if isinstance(t.get("slot_map"), dict)
                else rd.string(t, "slot_map", w, default=None))
    if isinstance(slot_map, str):
        slot_map = relative_file(rd, slot_map, f"{w}.slot_map", folder, allow_outside,
                                  "slot_map")
    pattern = rd.string(t, "file_pattern", w, default=None)
    if pattern is not None:
        fields = re.findall(r"\{([^}]*)\}", pattern)
        bad = [f for f in fields if f not in ("wafer", "site", "slot")]
        if bad or len(set(fields)) != len(fields) or "wafer" not in fields:
            rd.fail(f"file_pattern {pattern!r}: expected {{wafer}} once and optionally "
                    "{site} and {slot} (no other fields)", f"{w}.file_pattern")
    return layout, site_map, slot_map, pattern


def _inline_site_map(rd, table, field, diameter_mm):
    """``site_map = { 1 = [0.0, 0.0], 2 = [36.0, 0.0] }`` -> {site: (x_mm, y_mm)}."""
    out = {}
    for key, xy in table.items():
        if not (isinstance(key, str) and key.lstrip("-").isdigit()):
            rd.fail(f"site_map key {key!r}: expected a site number", field)
        if not (isinstance(xy, list) and len(xy) == 2
                and all(isinstance(v, (int, float)) and not isinstance(v, bool)
                        and math.isfinite(v) for v in xy)):
            rd.fail(f"site_map site {key}: expected [x_mm, y_mm], found {found(xy)}", field)
        if math.hypot(*xy) > diameter_mm / 2 + 1e-6:
            rd.fail(f"site_map site {key} at ({xy[0]:g}, {xy[1]:g}) mm lies outside the wafer "
                    f"radius {diameter_mm / 2:g} mm", field)
        out[int(key)] = (float(xy[0]), float(xy[1]))
    if not out:
        rd.fail("site_map is empty; expected site = [x_mm, y_mm] entries", field)
    return out


def _inline_slot_map(rd, table, field):
    """``slot_map = { "W2-04" = 4, "W2-05" = 5 }`` -> {wafer: slot}, one wafer per slot."""
    out, wafer_in = {}, {}
    for wafer, slot in table.items():
        if not (isinstance(slot, int) and not isinstance(slot, bool) and slot >= 1):
            rd.fail(f"slot_map wafer {wafer!r}: expected a boat slot >= 1, found {found(slot)}",
                    field)
        if slot in wafer_in:
            rd.fail(f"slot_map puts wafers {wafer_in[slot]!r} and {wafer!r} in slot {slot}; "
                    "expected one wafer per slot", field)
        out[str(wafer)], wafer_in[slot] = slot, wafer
    if not out:
        rd.fail("slot_map is empty; expected wafer = slot entries", field)
    return out


