"""The lot description file (TOML): what was measured, on which stack, in which boat.

Layout (filmmap's own; every key below is the complete set, any other key is
an error naming it and suggesting the closest valid one)::

    [lot]
    id = "PL-0001"              # required string (no '/' or '\\')
    furnace = "tube-2"          # optional string
    run_date = 2026-11-30       # optional date (TOML date or "YYYY-MM-DD")

    [measurement]
    technique = "reflectance"   # required: "reflectance" or "ellipsometry"
    angle_deg = 0.0             # angle of incidence in air, deg; default 0 for
                                # reflectance (0-89), required for ellipsometry (>0-89)
    files = ["*.csv"]           # required: globs relative to the lot file's folder
    wafer_diameter_mm = 150     # default 150
    edge_exclusion_mm = 3       # default 3, >= 0 and < the wafer radius
    reflectance_unit = "fraction"   # "fraction" (default) or "percent"
    reference_file = "bare_si.csv"  # raw-intensity mode: reference spectrum
    dark_file = "dark.csv"          # raw-intensity mode: dark spectrum (optional)

    [stack]
    substrate = "Si"            # required registry name
    orientation = "100"         # "100" (default) or "111"

    [[stack.layer]]             # one or more, top layer first
    material = "SiO2"           # required: a name (see below)
    thickness_nm = 1000.0       # nominal, >= 0; required when fit = false
    search_nm = [5, 5000]       # optional [lo, hi], 0 < lo < hi
    fit = true                  # default true

    [target]                    # optional
    thickness_nm = 1000.0       # required in [target], > 0; inside the search_nm
                                # of the top fitted layer when that is given
    tolerance_pct = 2.0         # required in [target], 0 < tol < 100
    adjust_step = "wet"         # optional: an oxidising recipe step

    [boat]                      # optional
    slots = 50                  # required in [boat]
    dummy_slots = [1, 2, 49, 50]
    monitor_slots = [25]

    [furnace]                   # optional
    zones = [ { name = "load", slots = [1, 25] }, { name = "source", slots = [26, 50] } ]
    max_offset_C = 5.0          # default 5, > 0
    max_time_change_pct = 15.0  # default 15, 0 < x < 100

    [[recipe.step]]             # optional, in order
    name = "ramp-up"
    ambient = "N2"              # "N2", "O2" or "H2O"
    minutes = 150               # > 0
    from_C = 800                # a ramp: from_C and to_C ...
    to_C = 1000                 # ... or a hold: at_C

Layer materials
---------------
``material`` always names the layer's material.  Without further keys the
name must be in the material registry (`filmmap.materials.available`).  A
user material is defined in the layer itself by exactly one of

``nk_file = "nitride.csv"``
    An n, k table (``wavelength_nm,n,k`` CSV, see
    `filmmap.materials.Tabulated.from_csv`), path relative to the lot folder.
``cauchy = { A = 2.0, B = 0.02, C = 0.0, range_nm = [300, 1000] }``
    Cauchy coefficients: ``A`` (required, > 0), ``B`` in um^2 and ``C`` in
    um^4 (default 0), and the validity range in nm (default 200-2000).

A user material may not reuse a built-in name.  The resolved model is
`LayerConfig.model`.

Files and folders
-----------------
``files`` globs (``**`` allowed), ``dark_file``, ``reference_file`` and
``nk_file`` are relative to the lot file's folder and may not leave it (no
absolute paths, no ``..``, no symlinks pointing outside) unless
``read_lot_file(..., allow_outside=True)``.  Each glob must match at least one
file; the dark, reference and nk files and the lot file itself are never
taken as data files.  The data files are returned sorted by path.

Raw-intensity mode: giving ``reference_file`` (technique ``"reflectance"``
only) says the data files hold ``I@<nm>`` columns;
`MeasurementConfig.file_technique` is then ``"intensity"``.  ``dark_file``
is only allowed together with ``reference_file``.  ``reflectance_unit``
applies to reflectance files only: it is an error with ellipsometry or in
raw-intensity mode.

Field paths in messages count array entries from 1: ``stack.layer[1]`` is
the top layer.
"""

from __future__ import annotations

import csv
import datetime
import difflib
import glob
import hashlib
import math
import os
import re
import tomllib
from dataclasses import dataclass, field
from pathlib import Path, PurePosixPath, PureWindowsPath

import numpy as np

from filmmap.bounds import (MAX_BOAT_SLOTS, MAX_ID_CHARS, MAX_STEP_MINUTES,
                            MAX_TEMPERATURE_OFFSET_K, MAX_WAFER_DIAMETER_MM)
from filmmap.errors import FilmmapInputError
from filmmap.materials import Cauchy, Material, Tabulated, available, get_material

__all__ = ["LotConfig", "LotInfo", "MeasurementConfig", "StackConfig", "LayerConfig",
           "CauchySpec", "TargetConfig", "BoatConfig", "Zone", "FurnaceConfig", "RecipeStep",
           "read_lot_file", "AMBIENTS", "OXIDISING_AMBIENTS", "LOT_TECHNIQUES",
           "DEFAULT_MAX_LOT_BYTES"]

#: Techniques a lot can declare.
LOT_TECHNIQUES = ("reflectance", "ellipsometry")

#: Recipe step ambients, and the ones that grow oxide.
AMBIENTS = ("N2", "O2", "H2O")
OXIDISING_AMBIENTS = ("O2", "H2O")

#: Largest lot file read by default (bytes).
DEFAULT_MAX_LOT_BYTES = 4 * 2**20

#: Accepted furnace temperatures (deg C), a sanity range for thermal processes.
_TEMPERATURE_RANGE_C = (0.0, 1400.0)

_KEYS = {
    "": ("lot", "measurement", "stack", "target", "boat", "furnace", "recipe", "growth"),
    "lot": ("id", "furnace", "run_date"),
    "measurement": ("technique", "angle_deg", "files", "wafer_diameter_mm", "edge_exclusion_mm",
                    "reflectance_unit", "dark_file", "reference_file", "fit_offset",
                    "offset_sigma", "scale_sigma", "wavelength_shift_sigma_nm",
                    "angle_offset_sigma_deg", "delta_convention", "layout", "site_map",
                    "slot_map", "file_pattern", "data_dir"),
    "stack": ("substrate", "orientation", "layer"),
    "stack.layer": ("material", "nk_file", "cauchy", "thickness_nm", "search_nm", "fit",
                    "index_scale", "fit_index_scale"),
    "stack.layer.cauchy": ("A", "B", "C", "range_nm"),
    "target": ("thickness_nm", "tolerance_pct", "adjust_step"),
    "boat": ("slots", "dummy_slots", "monitor_slots"),
    "furnace": ("zones", "max_offset_C", "max_time_change_pct", "coupling_width_slots"),
    "growth": ("wet_source", "h2o_pressure_atm", "o2_pressure_atm", "thin_regime",
               "initial_oxide_nm", "massoud", "O2", "H2O"),
    "growth.massoud": ("C_prefactor_um_per_h", "C_activation_eV", "decay_length_nm"),
    "growth.ambient": ("B_prefactor_um2_per_h", "B_activation_eV", "B_over_A_prefactor_um_per_h",
                       "B_over_A_activation_eV", "rate_factor"),
    "furnace.zones": ("name", "slots"),
    "recipe": ("step",),
    "recipe.step": ("name", "ambient", "minutes", "at_C", "from_C", "to_C"),
}


# --------------------------------------------------------------------------- dataclasses

@dataclass(frozen=True)
class LotInfo:
    """``[lot]``: which lot.

    Attributes
    ----------
    id : str
        Lot id.
    furnace : str or None
        Furnace (tube) name.
    run_date : datetime.date or None
        Date of the furnace run.
    """

    id: str
    furnace: str | None = None
    run_date: datetime.date | None = None


@dataclass(frozen=True)
class MeasurementConfig:
    """``[measurement]``: how the wafers were measured and where the files are.

    Attributes
    ----------
    technique : str
        ``"reflectance"`` or ``"ellipsometry"``.
    angle_deg : float
        Angle of incidence in air, degrees.
    files : tuple of pathlib.Path
        Data files matched by the globs, sorted, absolute.
    file_globs : tuple of str
        The globs as written.
    wafer_diameter_mm : float
        Wafer diameter, mm.
    edge_exclusion_mm : float
        Edge exclusion, mm.
    reflectance_unit : str
        ``"fraction"`` or ``"percent"`` (unit of ``R@`` columns).
    dark_file, reference_file : pathlib.Path or None
        Raw-intensity mode spectra (absolute paths).
    fit_offset : bool or None
        Former switch for the reflectance offset, kept as an alias: true = fit the
        offset (under ``offset_sigma``, default prior), false = ``offset_sigma = 0``.
    offset_sigma, scale_sigma : float or None
        Prior standard deviations of the reflectance offset (fraction of R) and of
        the relative reflectance scale (fraction); None = the technique's default
        (`filmmap.fitting.systematics`), 0 = not fitted.
    wavelength_shift_sigma_nm : float or None
        Prior standard deviation of the wavelength-calibration shift, nm.
    angle_offset_sigma_deg : float or None
        Prior standard deviation of the angle-of-incidence offset, degrees.
    delta_convention : str
        ``"handbook"`` (Delta = 180 deg for a bare transparent substrate below
        Brewster: Azzam & Bashara 1977, Tompkins 1993; the default) or
        ``"reversed"`` (the instrument writes 360 - Delta; filmmap converts).
    layout : str
        Input layout of the data files (`filmmap.io.layouts.LAYOUTS`), default ``"wide"``.
    site_map : str, pathlib.Path or None
        A built-in pattern name (``"polar-49"``, ``"cartesian-25"``) or a CSV file
        ``site,x_mm,y_mm`` (absolute path) giving the site positions.
    slot_map : pathlib.Path or None
        CSV file ``wafer,slot``.
    file_pattern : str or None
        File-name pattern with ``{wafer}``, ``{site}``, ``{slot}`` fields.
    data_dir : pathlib.Path or None
        Folder the ``files`` globs are relative to, when the lot file names one
        (``data_dir``, absolute or relative to the lot folder; it may lie outside the
        lot folder or be a symbolic link, because the user named it). None: the lot
        folder, sandboxed.
    """

    technique: str
    angle_deg: float
    files: tuple
    file_globs: tuple
    wafer_diameter_mm: float = 150.0
    edge_exclusion_mm: float = 3.0
    reflectance_unit: str = "fraction"
    dark_file: Path | None = None
    reference_file: Path | None = None
    fit_offset: bool | None = None
    offset_sigma: float | None = None
    scale_sigma: float | None = None
    wavelength_shift_sigma_nm: float | None = None
    angle_offset_sigma_deg: float | None = None
    delta_convention: str = "handbook"
    layout: str = "wide"
    site_map: object = None
    slot_map: Path | None = None
    file_pattern: str | None = None
    data_dir: Path | None = None

    @property
    def raw_intensity(self):
        """True when the data files hold raw ``I@<nm>`` intensities."""
        return self.reference_file is not None

    @property
    def file_technique(self):
        """Technique to read the data files with (`filmmap.io.read_spectra_csv`)."""
        return "intensity" if self.raw_intensity else self.technique


@dataclass(frozen=True)
class CauchySpec:
    """Inline Cauchy coefficients of a user material.

    Attributes
    ----------
    A : float
        Constant term (dimensionless).
    B_um2 : float
        Coefficient of lambda^-2, um^2.
    C_um4 : float
        Coefficient of lambda^-4, um^4.
    range_nm : (float, float)
        Validity range, nm.
    """

    A: float
    B_um2: float = 0.0
    C_um4: float = 0.0
    range_nm: tuple = (200.0, 2000.0)


@dataclass(frozen=True)
class LayerConfig:
    """One ``[[stack.layer]]``.

    Attributes
    ----------
    material : str
        Material name.
    model : filmmap.materials.Material
        The resolved optical model.
    source : str
        ``"registry"``, ``"nk_file"`` or ``"cauchy"``.
    nk_file : pathlib.Path or None
        The n, k table of a user material.
    cauchy : CauchySpec or None
        The Cauchy coefficients of a user material.
    thickness_nm : float or None
        Nominal thickness, nm.
    search_nm : (float, float) or None
        Thickness search range, nm.
    fit : bool
        Whether the thickness is fitted.
    index_scale : float
        Factor on the material's complex index (1 = the dispersion model as it is),
        e.g. 1.003 for a dense thermal oxide whose index sits above the fused-silica
        Sellmeier curve.
    fit_index_scale : bool
        Fit that factor (started at ``index_scale``) with the thickness.
    """

    material: str
    model: Material
    source: str = "registry"
    nk_file: Path | None = None
    cauchy: CauchySpec | None = None
    thickness_nm: float | None = None
    search_nm: tuple | None = None
    fit: bool = True
    index_scale: float = 1.0
    fit_index_scale: bool = False


@dataclass(frozen=True)
class StackConfig:
    """``[stack]``: substrate and layers (top first).

    Attributes
    ----------
    substrate : str
        Registry name of the substrate.
    orientation : str
        Crystal orientation of the substrate surface, ``"100"`` or ``"111"``.
    layers : tuple of LayerConfig
        Top layer first.
    """

    substrate: str
    orientation: str
    layers: tuple

    @property
    def top_fitted(self):
        """Index of the top (first) fitted layer, or None."""
        return next((i for i, layer in enumerate(self.layers) if layer.fit), None)


@dataclass(frozen=True)
class TargetConfig:
    """``[target]``: the wanted thickness of the top fitted layer.

    Attributes
    ----------
    thickness_nm : float
        Target thickness, nm.
    tolerance_pct : float
        Allowed deviation, percent of the target.
    adjust_step : str or None
        Name of the recipe step whose time/temperature is adjusted.
    """

    thickness_nm: float
    tolerance_pct: float
    adjust_step: str | None = None


@dataclass(frozen=True)
class BoatConfig:
    """``[boat]``: the wafer boat.

    Attributes
    ----------
    slots : int
        Number of slots (1 = load/door end).
    dummy_slots : tuple of int
        Slots holding dummy wafers.
    monitor_slots : tuple of int
        Slots holding monitor wafers.
    """

    slots: int
    dummy_slots: tuple = ()
    monitor_slots: tuple = ()


@dataclass(frozen=True)
class Zone:
    """One heater zone: a contiguous slot range.

    Attributes
    ----------
    name : str
        Zone name.
    first_slot, last_slot : int
        Inclusive slot range.
    """

    name: str
    first_slot: int
    last_slot: int

    def __contains__(self, slot):
        return self.first_slot <= slot <= self.last_slot


@dataclass(frozen=True)
class FurnaceConfig:
    """``[furnace]``: heater zones (load end first) and adjustment limits.

    Attributes
    ----------
    zones : tuple of Zone
        Contiguous, non-overlapping, load end first.
    max_offset_C : float
        Largest zone temperature offset to propose, deg C.
    max_time_change_pct : float
        Largest step-time change to propose, percent.
    coupling_width_slots : float or None
        Width of the transition between neighbouring zones in the zone-to-slot model,
        slots (10-90 %); None = a sharp step (docs/furnace.md says how to measure it).
    """

    zones: tuple
    max_offset_C: float = 5.0
    max_time_change_pct: float = 15.0
    coupling_width_slots: float | None = None

    def zone_of(self, slot):
        """The `Zone` holding ``slot``, or None."""
        return next((z for z in self.zones if slot in z), None)


@dataclass(frozen=True)
class RecipeStep:
    """One ``[[recipe.step]]``: a hold (``at_C``) or a ramp (``from_C`` -> ``to_C``).

    Attributes
    ----------
    name : str
        Step name.
    ambient : str
        ``"N2"``, ``"O2"`` or ``"H2O"``.
    minutes : float
        Duration, min.
    at_C : float or None
        Hold temperature, deg C.
    from_C, to_C : float or None
        Ramp start and end temperatures, deg C.
    """

    name: str
    ambient: str
    minutes: float
    at_C: float | None = None
    from_C: float | None = None
    to_C: float | None = None

    @property
    def is_ramp(self):
        """True for a ramp (from_C -> to_C)."""
        return self.at_C is None

    @property
    def oxidising(self):
        """True when the ambient grows oxide."""
        return self.ambient in OXIDISING_AMBIENTS

    @property
    def start_C(self):
        """Temperature at the start of the step, deg C."""
        return self.at_C if self.at_C is not None else self.from_C

    @property
    def end_C(self):
        """Temperature at the end of the step, deg C."""
        return self.at_C if self.at_C is not None else self.to_C


@dataclass(frozen=True)
class LotConfig:
    """A whole lot file.

    Attributes
    ----------
    path : pathlib.Path
        The lot file (absolute).
    folder : pathlib.Path
        Its folder (absolute); relative paths are resolved against it.
    sha256 : str
        Hex SHA-256 of the lot file bytes.
    lot : LotInfo
    measurement : MeasurementConfig
    stack : StackConfig
    target : TargetConfig or None
    boat : BoatConfig or None
    furnace : FurnaceConfig or None
    recipe : tuple of RecipeStep
        In order; empty when the file has no recipe.
    growth : GrowthConfig or None
        The growth model's pressures, thin regime and constants, when given.
    """

    path: Path
    folder: Path
    sha256: str
    lot: LotInfo
    measurement: MeasurementConfig
    stack: StackConfig
    target: TargetConfig | None
    boat: BoatConfig | None
    furnace: FurnaceConfig | None
    recipe: tuple = ()
    growth: GrowthConfig | None = None

    def step(self, name):
        """The recipe step called ``name``, or None."""
        return next((s for s in self.recipe if s.name == name), None)


# --------------------------------------------------------------------------- line lookup

_TABLE_HEAD = re.compile(r"\[\s*([^\[\]]+?)\s*\]")
_ARRAY_HEAD = re.compile(r"\[\[\s*([^\[\]]+?)\s*\]\]")
_KEY_PART = r"""(?:[A-Za-z0-9_-]+|"[^"]*"|'[^']*')"""
_KEY_LINE = re.compile(rf"({_KEY_PART}(?:\s*\.\s*{_KEY_PART})*)\s*=")


def _norm_key(key):
    """``a . "b.c" . d`` -> ``a.b.c.d`` (quotes dropped; good enough for locating lines)."""
    return ".".join(p.strip("\"'") for p in re.findall(r'"[^"]*"|\'[^\']*\'|[^.\s]+', key))


def _key_lines(text):
    """Best-effort map from field path (``stack.layer[1].material``) to its 1-based line."""
    where = {}
    prefix = ""
    arrays = {}
    in_string = None
    in_array = None  # (field path, element count, depth)
    for lineno, raw in enumerate(text.splitlines(), start=1):
        s = raw.strip()
        if in_string:
            if s.count(in_string) % 2 == 1:
                in_string = None
            continue
        if in_array is not None:
            path, count, depth = in_array
            for ch in s.split("#", 1)[0]:
                if ch == "{" and depth == 1:
                    count += 1
                    where.setdefault(f"{path}[{count}]", lineno)
                depth += (ch in "[{") - (ch in "]}")
            in_array = (path, count, depth) if depth > 0 else None
            continue
        if not s or s.startswith("#"):
            continue
        m = _ARRAY_HEAD.match(s)
        if m:
            name = _norm_key(m.group(1))
            arrays[name] = arrays.get(name, 0) + 1
            prefix = f"{name}[{arrays[name]}]"
            where.setdefault(prefix, lineno)
            where.setdefault(name, lineno)
            continue
        m = _TABLE_HEAD.match(s)
        if m:
            name = _norm_key(m.group(1))
            prefix = name
            for arr, n in arrays.items():
                if name.startswith(arr + "."):
                    prefix = f"{arr}[{n}]{name[len(arr):]}"
            where.setdefault(prefix, lineno)
            continue
        m = _KEY_LINE.match(s)
        if not m:
            continue
        path = (prefix + "." if prefix else "") + _norm_key(m.group(1))
        where.setdefault(path, lineno)
        value = s[m.end():].strip()
        for delim in ('"""', "'''"):
            if value.count(delim) % 2 == 1:
                in_string = delim
        if value.startswith("["):
            count, depth = 0, 0
            for ch in value.split("#", 1)[0]:
                if ch == "{" and depth == 1:
                    count += 1
                    where.setdefault(f"{path}[{count}]", lineno)
                depth += (ch in "[{") - (ch in "]}")
            if depth > 0:
                in_array = (path, count, depth)
    return where


# --------------------------------------------------------------------------- typed access

def _type_name(value):
    if isinstance(value, bool):
        return "boolean"
    if isinstance(value, int):
        return "integer"
    if isinstance(value, float):
        return "float"
    if isinstance(value, str):
        return "string"
    if isinstance(value, list):
        return "array"
    if isinstance(value, dict):
        return "table"
    if isinstance(value, datetime.datetime):
        return "date-time"
    if isinstance(value, datetime.date):
        return "date"
    if isinstance(value, datetime.time):
        return "time"
    return type(value).__name__


def _found(value):
    text = repr(value)
    if len(text) > 60:
        text = text[:57] + "..."
    return f"{_type_name(value)} {text}"


def _is_number(value):
    return isinstance(value, (int, float)) and not isinstance(value, bool)


class _Reader:
    """Typed, located access to the parsed TOML document."""

    def __init__(self, path, text):
        self.path = path
        self.lines = _key_lines(text)

    def line_of(self, field):
        probe = field
        while probe:
            if probe in self.lines:
                return self.lines[probe]
            cut = max(probe.rfind("."), probe.rfind("["))
            probe = probe[:cut] if cut > 0 else ""
        return None

    def fail(self, message, field):
        raise FilmmapInputError(message, file=self.path, line=self.line_of(field), field=field)

    def keys(self, table, where, schema):
        """Reject keys not in ``_KEYS[schema]``, suggesting the closest one."""
        allowed = _KEYS[schema]
        for key in table:
            if key not in allowed:
                field = f"{where}.{key}" if where else key
                close = difflib.get_close_matches(key, allowed, n=1, cutoff=0.5)
                if not close:
                    close = [a for a in allowed if a.lower() == key.lower()]
                hint = f"; did you mean {close[0]!r}?" if close else ""
                section = ("the top level" if not where else where if "[" in where
                           else f"[{where}]")
                self.fail(f"unknown key {key!r}{hint} (valid keys in {section}: "
                          f"{', '.join(allowed)})", field)

    def table(self, parent, key, where, required=False, what=None):
        field = f"{where}.{key}" if where else key
        if key not in parent:
            if required:
                self.fail(f"missing required {what or f'[{field}] table'}", field)
            return None
        value = parent[key]
        if not isinstance(value, dict):
            self.fail(f"expected a table [{field}], found {_found(value)}", field)
        return value

    def value(self, table, key, where, kind, required=False, default=None):
        field = f"{where}.{key}"
        if key not in table:
            if required:
                self.fail(f"missing required key {key!r} in {where} ({_kind_text(kind)})", field)
            return default
        value = table[key]
        ok = {
            "string": isinstance(value, str),
            "number": _is_number(value),
            "integer": isinstance(value, int) and not isinstance(value, bool),
            "boolean": isinstance(value, bool),
            "array": isinstance(value, list),
            "table": isinstance(value, dict),
        }[kind]
        if not ok:
            self.fail(f"expected {_kind_text(kind)}, found {_found(value)}", field)
        if kind == "number":
            if not math.isfinite(value):
                self.fail(f"expected a finite number, found {value!r}", field)
            value = float(value)
        return value

    def number(self, table, key, where, required=False, default=None, lo=None, hi=None,
               lo_open=False, hi_open=False, unit=""):
        value = self.value(table, key, where, "number", required, default)
        if value is None or key not in table:
            return value
        bad_lo = lo is not None and (value <= lo if lo_open else value < lo)
        bad_hi = hi is not None and (value >= hi if hi_open else value > hi)
        if bad_lo or bad_hi:
            expected = _range_text(lo, hi, lo_open, hi_open)
            self.fail(f"{key} = {value:g}{unit} is out of range; expected {expected}{unit}",
                      f"{where}.{key}")
        return value

    def string(self, table, key, where, required=False, default=None, choices=None):
        value = self.value(table, key, where, "string", required, default)
        if value is None or key not in table:
            return value
        if choices is not None and value not in choices:
            close = difflib.get_close_matches(value, choices, n=1, cutoff=0.5)
            if not close:
                close = [c for c in choices if c.lower() == value.lower()]
            hint = f"; did you mean {close[0]!r}?" if close else ""
            self.fail(f"{key} = {value!r} is not valid{hint} (expected one of "
                      f"{', '.join(repr(c) for c in choices)})", f"{where}.{key}")
        if choices is None and not value.strip():
            self.fail(f"{key} is empty; expected a non-empty string", f"{where}.{key}")
        return value

    def int_list(self, table, key, where, lo, hi):
        values = self.value(table, key, where, "array", default=[])
        out = []
        for i, v in enumerate(values, start=1):
            if not (isinstance(v, int) and not isinstance(v, bool)):
                self.fail(f"{key}[{i}]: expected an integer slot, found {_found(v)}",
                          f"{where}.{key}")
            if not lo <= v <= hi:
                self.fail(f"{key}[{i}] = {v} is outside the boat (slots {lo}..{hi})",
                          f"{where}.{key}")
            if v in out:
                self.fail(f"{key}: slot {v} is listed twice", f"{where}.{key}")
            out.append(v)
        return tuple(out)


def _kind_text(kind):
    return {"string": "a string", "number": "a number", "integer": "an integer",
            "boolean": "a boolean (true or false)", "array": "an array", "table": "a table"}[kind]


def _range_text(lo, hi, lo_open, hi_open):
    if lo is not None and hi is not None:
        return f"{lo:g} {'<' if lo_open else '<='} value {'<' if hi_open else '<='} {hi:g}"
    if lo is not None:
        return f"value {'>' if lo_open else '>='} {lo:g}"
    return f"value {'<' if hi_open else '<='} {hi:g}"


# --------------------------------------------------------------------------- paths

def _escapes(pattern):
    if (os.path.isabs(pattern) or PureWindowsPath(pattern).is_absolute()
            or pattern.startswith(("/", "\\"))):
        return True
    parts = PurePosixPath(pattern.replace("\\", "/")).parts
    return ".." in parts


def _inside(path, folder):
    try:
        Path(path).resolve().relative_to(folder.resolve())
        return True
    except ValueError:
        return False


def _relative_file(rd, value, field, folder, allow_outside, what):
    """Resolve a single relative file path from the lot file."""
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


def _resolve_globs(rd, patterns, folder, allow_outside, exclude, require_files=True,
                   where="lot folder"):
    field = "measurement.files"
    if not patterns:
        rd.fail("files is empty; expected at least one glob such as \"*.csv\"", field)
    found = {}
    excluded = {p.resolve() for p in exclude}
    for i, pattern in enumerate(patterns, start=1):
        if not isinstance(pattern, str):
            rd.fail(f"files[{i}]: expected a string glob, found {_found(pattern)}", field)
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
            found.setdefault(str(m), m)
    return tuple(found[k] for k in sorted(found))


# --------------------------------------------------------------------------- sections

def _bounded_name(rd, value, field):
    """Ids and names end up in file names, tables and the history: at most MAX_ID_CHARS."""
    if value is not None and len(value) > MAX_ID_CHARS:
        rd.fail(f"{value[:24]!r}... is {len(value)} characters; expected at most {MAX_ID_CHARS}",
                field)
    return value


def _read_lot(rd, doc):
    t = rd.table(doc, "lot", "", required=True, what="[lot] table (with id = \"...\")")
    rd.keys(t, "lot", "lot")
    lot_id = rd.string(t, "id", "lot", required=True)
    if not lot_id.isprintable() or "/" in lot_id or "\\" in lot_id:
        rd.fail(f"id {lot_id!r} contains '/', '\\' or non-printable characters; expected a plain "
                "lot id (it is used in output file names)", "lot.id")
    _bounded_name(rd, lot_id, "lot.id")
    furnace = _bounded_name(rd, rd.string(t, "furnace", "lot"), "lot.furnace")
    run_date = t.get("run_date")
    if run_date is not None:
        if isinstance(run_date, str):
            try:
                run_date = datetime.date.fromisoformat(run_date)
            except ValueError:
                rd.fail(f"run_date {run_date!r} is not a date; expected YYYY-MM-DD", "lot.run_date")
        elif isinstance(run_date, datetime.datetime) or not isinstance(run_date, datetime.date):
            rd.fail(f"expected a date (2026-11-30), found {_found(run_date)}", "lot.run_date")
    return LotInfo(id=lot_id, furnace=furnace, run_date=run_date)


def _read_stack(rd, doc, folder, allow_outside, lot_path):
    t = rd.table(doc, "stack", "", required=True, what="[stack] table")
    rd.keys(t, "stack", "stack")
    substrate = rd.string(t, "substrate", "stack", required=True)
    _registry_material(rd, substrate, "stack.substrate")
    orientation = t.get("orientation", "100")
    if not isinstance(orientation, str):
        rd.fail(f"expected a string \"100\" or \"111\" (quoted), found {_found(orientation)}",
                "stack.orientation")
    rd.string(t, "orientation", "stack", choices=("100", "111"))
    raw_layers = t.get("layer")
    if raw_layers is None:
        rd.fail("missing [[stack.layer]]; expected one or more layers, top first", "stack.layer")
    if not isinstance(raw_layers, list) or not all(isinstance(x, dict) for x in raw_layers):
        rd.fail(f"expected [[stack.layer]] tables (an array of tables), found "
                f"{_found(raw_layers)}", "stack.layer")
    if not raw_layers:
        rd.fail("no layers; expected one or more [[stack.layer]] tables", "stack.layer")
    layers = tuple(_read_layer(rd, layer, f"stack.layer[{i}]", folder, allow_outside, lot_path)
                   for i, layer in enumerate(raw_layers, start=1))
    if not any(layer.fit for layer in layers):
        rd.fail("no layer has fit = true; expected at least one fitted layer", "stack.layer")
    return StackConfig(substrate=substrate, orientation=orientation, layers=layers)


def _registry_material(rd, name, field, user_hint=False):
    try:
        return get_material(name)
    except FilmmapInputError:
        known = available()
        close = difflib.get_close_matches(name, known, n=1, cutoff=0.5)
        hint = f"; did you mean {close[0]!r}?" if close else ""
        how = (" - or define it in the layer with nk_file = \"table.csv\" or "
               "cauchy = { A = ..., B = ... }") if user_hint else ""
        rd.fail(f"unknown material {name!r}{hint} (known: {', '.join(known)}){how}", field)


def _read_layer(rd, t, where, folder, allow_outside, lot_path):
    rd.keys(t, where, "stack.layer")
    name = rd.string(t, "material", where, required=True)
    has_nk, has_cauchy = "nk_file" in t, "cauchy" in t
    if has_nk and has_cauchy:
        rd.fail("give either nk_file or cauchy for a user material, not both", f"{where}.cauchy")
    nk_file = cauchy = None
    if has_nk or has_cauchy:
        if name in available():
            rd.fail(f"material {name!r} is a built-in name; give the user material "
                    f"({'nk_file' if has_nk else 'cauchy'}) a name of its own",
                    f"{where}.material")
    if has_nk:
        rel = rd.string(t, "nk_file", where)
        nk_file = _relative_file(rd, rel, f"{where}.nk_file", folder, allow_outside, "nk_file")
        try:
            model = Tabulated.from_csv(nk_file, name=name)
        except FilmmapInputError:
            raise
        except (ValueError, csv.Error) as exc:
            raise FilmmapInputError(f"cannot read n,k table: {exc}", file=nk_file,
                                    field=f"{where}.nk_file") from None
        source = "nk_file"
    elif has_cauchy:
        ct = rd.value(t, "cauchy", where, "table")
        cw = f"{where}.cauchy"
        rd.keys(ct, cw, "stack.layer.cauchy")
        a = rd.number(ct, "A", cw, required=True, lo=0.0, lo_open=True)
        b = rd.number(ct, "B", cw, default=0.0)
        c = rd.number(ct, "C", cw, default=0.0)
        rng = _pair(rd, ct, "range_nm", cw, default=(200.0, 2000.0))
        cauchy = CauchySpec(A=a, B_um2=b, C_um4=c, range_nm=rng)
        model = Cauchy(name, a, b, c, range_nm=rng, source=f"Cauchy coefficients from {lot_path}")
        probe = np.linspace(rng[0], rng[1], 64)
        n_probe = model(probe).real
        if not np.all(n_probe >= 1.0):
            bad = probe[np.argmin(n_probe)]
            rd.fail(f"Cauchy index n = A + B/lambda^2 + C/lambda^4 falls to {n_probe.min():.3g} at "
                    f"{bad:.0f} nm; expected n >= 1 over range_nm [{rng[0]:g}, {rng[1]:g}] nm", cw)
        source = "cauchy"
    else:
        model = _registry_material(rd, name, f"{where}.material", user_hint=True)
        source = "registry"
    thickness = rd.number(t, "thickness_nm", where, lo=0.0, hi=MAX_SEARCH_NM, unit=" nm")
    search = _pair(rd, t, "search_nm", where)
    fit = rd.value(t, "fit", where, "boolean", default=True)
    if fit and thickness == 0 and search is None:
        # the search range is [0.5, 2] x the nominal: a nominal of 0 leaves nothing to search
        rd.fail("thickness_nm = 0 on a fitted layer gives an empty search range ([0.5, 2] x the "
                "nominal); expected a nominal > 0 or search_nm = [lo, hi]",
                f"{where}.thickness_nm")
    if not fit and thickness is None:
        rd.fail("a layer with fit = false needs thickness_nm (its fixed thickness in nm)",
                f"{where}.thickness_nm")
    if thickness is not None and search is not None and not search[0] <= thickness <= search[1]:
        rd.fail(f"thickness_nm = {thickness:g} nm is outside search_nm "
                f"[{search[0]:g}, {search[1]:g}]; expected the nominal inside the search range",
                f"{where}.thickness_nm")
    index_scale = rd.number(t, "index_scale", where, default=1.0, lo=0.8, hi=1.2)
    fit_scale = rd.value(t, "fit_index_scale", where, "boolean", default=False)
    return LayerConfig(material=name, model=model, source=source, nk_file=nk_file, cauchy=cauchy,
                       thickness_nm=thickness, search_nm=search, fit=bool(fit),
                       index_scale=float(index_scale), fit_index_scale=bool(fit_scale))


MAX_SEARCH_NM = 50000.0
"""Largest accepted search_nm upper end (50 um, far above any thermal oxide)."""


def _pair(rd, t, key, where, default=None):
    """A ``[lo, hi]`` array with 0 < lo < hi (nm)."""
    if key not in t:
        return default
    v = rd.value(t, key, where, "array")
    field = f"{where}.{key}"
    if len(v) != 2 or not all(_is_number(x) for x in v):
        rd.fail(f"expected [lo, hi], two numbers in nm, found {_found(v)}", field)
    lo, hi = float(v[0]), float(v[1])
    if not (math.isfinite(lo) and math.isfinite(hi) and 0 < lo < hi):
        rd.fail(f"{key} = [{lo:g}, {hi:g}]: expected 0 < lo < hi (nm)", field)
    if key == "search_nm" and hi > MAX_SEARCH_NM:
        rd.fail(f"{key} = [{lo:g}, {hi:g}]: the upper end is above {MAX_SEARCH_NM:g} nm; expected "
                "a thickness range a film can have", field)
    return (lo, hi)


def _read_measurement(rd, doc, folder, allow_outside, exclude, require_files=True):
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
        reference = _relative_file(rd, rd.string(t, "reference_file", w),
                                   f"{w}.reference_file", folder, allow_outside, "reference_file")
        if "dark_file" in t:
            dark = _relative_file(rd, rd.string(t, "dark_file", w), f"{w}.dark_file", folder,
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
    data_dir = _read_data_dir(rd, t, w, folder)
    # a named data folder: the globs are sandboxed in it instead of the lot folder
    files = _resolve_globs(rd, patterns, data_dir or folder, allow_outside,
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


def _read_data_dir(rd, t, w, folder):
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


def _read_layout(rd, t, w, folder, allow_outside, technique, reference, diameter_mm):
    """``layout``, ``site_map``, ``slot_map``, ``file_pattern`` (`filmmap.io.layouts`)."""
    import re

    from filmmap.io.layouts import LAYOUTS

    layout = rd.string(t, "layout", w, default="wide", choices=tuple(LAYOUTS))
    if layout != "wide" and reference is not None:
        rd.fail("raw intensities (reference_file) are read from the wide layout only",
                f"{w}.layout")
    if layout == "jcamp" and technique != "reflectance":
        rd.fail("layout 'jcamp' holds reflectance spectra only", f"{w}.layout")
    # a map is a pattern name / CSV file (a string) or written inline (a table)
    site_map = (_inline_site_map(rd, t["site_map"], f"{w}.site_map", diameter_mm)
                if isinstance(t.get("site_map"), dict)
                else rd.string(t, "site_map", w, default=None))
    if isinstance(site_map, str) and not re.fullmatch(r"(polar|cartesian)-\d+", site_map):
        site_map = _relative_file(rd, site_map, f"{w}.site_map", folder, allow_outside,
                                  "site_map")
    slot_map = (_inline_slot_map(rd, t["slot_map"], f"{w}.slot_map")
                if isinstance(t.get("slot_map"), dict)
                else rd.string(t, "slot_map", w, default=None))
    if isinstance(slot_map, str):
        slot_map = _relative_file(rd, slot_map, f"{w}.slot_map", folder, allow_outside,
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
            rd.fail(f"site_map site {key}: expected [x_mm, y_mm], found {_found(xy)}", field)
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
            rd.fail(f"slot_map wafer {wafer!r}: expected a boat slot >= 1, found {_found(slot)}",
                    field)
        if slot in wafer_in:
            rd.fail(f"slot_map puts wafers {wafer_in[slot]!r} and {wafer!r} in slot {slot}; "
                    "expected one wafer per slot", field)
        out[str(wafer)], wafer_in[slot] = slot, wafer
    if not out:
        rd.fail("slot_map is empty; expected wafer = slot entries", field)
    return out


def _read_target(rd, doc, stack):
    t = rd.table(doc, "target", "")
    if t is None:
        return None
    w = "target"
    rd.keys(t, w, "target")
    thickness = rd.number(t, "thickness_nm", w, required=True, lo=0.0, hi=MAX_SEARCH_NM,
                          lo_open=True, unit=" nm")
    tol = rd.number(t, "tolerance_pct", w, required=True, lo=0.0, hi=100.0, lo_open=True,
                    hi_open=True, unit=" %")
    adjust = rd.string(t, "adjust_step", w)
    layer = stack.layers[stack.top_fitted]
    if layer.search_nm is not None and not layer.search_nm[0] <= thickness <= layer.search_nm[1]:
        rd.fail(f"target thickness {thickness:g} nm is outside the search range "
                f"[{layer.search_nm[0]:g}, {layer.search_nm[1]:g}] nm of the top fitted layer "
                f"stack.layer[{stack.top_fitted + 1}] ({layer.material})", f"{w}.thickness_nm")
    return TargetConfig(thickness_nm=thickness, tolerance_pct=tol, adjust_step=adjust)


def _read_boat(rd, doc):
    t = rd.table(doc, "boat", "")
    if t is None:
        return None
    w = "boat"
    rd.keys(t, w, "boat")
    slots = rd.value(t, "slots", w, "integer", required=True)
    if not 1 <= slots <= MAX_BOAT_SLOTS:
        rd.fail(f"slots = {slots}; expected a positive number of boat slots, at most "
                f"{MAX_BOAT_SLOTS}", f"{w}.slots")
    dummy = rd.int_list(t, "dummy_slots", w, 1, slots)
    monitor = rd.int_list(t, "monitor_slots", w, 1, slots)
    both = sorted(set(dummy) & set(monitor))
    if both:
        rd.fail(f"slot {both[0]} is both a dummy and a monitor slot", f"{w}.monitor_slots")
    return BoatConfig(slots=slots, dummy_slots=dummy, monitor_slots=monitor)


def _read_furnace(rd, doc, boat):
    t = rd.table(doc, "furnace", "")
    if t is None:
        return None
    w = "furnace"
    rd.keys(t, w, "furnace")
    if "zones" not in t:
        rd.fail("missing required key 'zones' in [furnace] (heater zones, load end first)",
                f"{w}.zones")
    raw = rd.value(t, "zones", w, "array")
    if not raw:
        rd.fail("zones is empty; expected at least one heater zone", f"{w}.zones")
    zones = []
    for i, z in enumerate(raw, start=1):
        zw = f"{w}.zones[{i}]"
        if not isinstance(z, dict):
            rd.fail(f"expected a zone table {{ name = \"...\", slots = [first, last] }}, found "
                    f"{_found(z)}", zw)
        rd.keys(z, zw, "furnace.zones")
        name = _bounded_name(rd, rd.string(z, "name", zw, required=True), f"{zw}.name")
        if any(name == other.name for other in zones):
            rd.fail(f"zone name {name!r} is used twice", f"{zw}.name")
        if "slots" not in z:
            rd.fail(f"missing required key 'slots' in zone {name!r} ([first, last], inclusive)",
                    f"{zw}.slots")
        s = rd.value(z, "slots", zw, "array")
        if len(s) != 2 or not all(isinstance(x, int) and not isinstance(x, bool) for x in s):
            rd.fail(f"zone {name!r}: expected slots = [first, last], two integers, found "
                    f"{_found(s)}", f"{zw}.slots")
        first, last = s
        if not 1 <= first <= last:
            rd.fail(f"zone {name!r}: slots = [{first}, {last}]; expected 1 <= first <= last",
                    f"{zw}.slots")
        if boat is not None and last > boat.slots:
            rd.fail(f"zone {name!r} reaches slot {last}, outside the boat (slots 1..{boat.slots})",
                    f"{zw}.slots")
        if not zones and first != 1:
            rd.fail(f"zone {name!r} starts at slot {first}; expected the first zone (load end) to "
                    "start at slot 1", f"{zw}.slots")
        if zones:
            prev = zones[-1]
            if first <= prev.last_slot:
                rd.fail(f"zone {name!r} starts at slot {first} but zone {prev.name!r} ends at slot "
                        f"{prev.last_slot}: zones overlap (expected load end first, each zone "
                        "starting after the previous one ends)", f"{zw}.slots")
            if first > prev.last_slot + 1:
                gap = (f"slot {prev.last_slot + 1}" if first == prev.last_slot + 2
                       else f"slots {prev.last_slot + 1}-{first - 1}")
                rd.fail(f"{gap} between zones {prev.name!r} and {name!r} belong to no zone; "
                        "expected contiguous zones", f"{zw}.slots")
        zones.append(Zone(name=name, first_slot=first, last_slot=last))
    if boat is not None and zones[-1].last_slot != boat.slots:
        rd.fail(f"the last zone {zones[-1].name!r} ends at slot {zones[-1].last_slot} but the boat "
                f"has {boat.slots} slots; expected the zones to cover the whole boat",
                f"{w}.zones[{len(zones)}].slots")
    offset = rd.number(t, "max_offset_C", w, default=5.0, lo=0.0, hi=MAX_TEMPERATURE_OFFSET_K,
                       lo_open=True, unit=" C")
    change = rd.number(t, "max_time_change_pct", w, default=15.0, lo=0.0, hi=100.0,
                       lo_open=True, hi_open=True, unit=" %")
    width = rd.number(t, "coupling_width_slots", w, default=None, lo=0.0, hi=50.0, unit=" slots")
    return FurnaceConfig(zones=tuple(zones), max_offset_C=offset, max_time_change_pct=change,
                         coupling_width_slots=width)


@dataclass(frozen=True)
class GrowthConfig:
    """``[growth]``: the growth model in the furnace owner's hands.

    Attributes
    ----------
    wet_source : str or None
        ``"bubbler"`` (H2O at 640 torr, Deal & Grove's own data) or ``"pyrogenic"``
        (H2/O2 torch, near 1 atm of steam); None = the rate data's reference (640 torr).
    h2o_pressure_atm, o2_pressure_atm : float or None
        Oxidant partial pressures, atm (override ``wet_source``).
    thin_regime : str or None
        Dry-oxidation thin regime: ``"deal-grove"`` (initial-oxide rule), ``"massoud"``
        or ``"none"``; None = ``"deal-grove"``.
    initial_oxide_nm : float or None
        Deal-Grove initial-oxide offset x_i of dry oxidation, nm.
    massoud : dict
        Overrides of the Massoud term (``C_prefactor_um_per_h``, ``C_activation_eV``,
        ``decay_length_nm``).
    ambients : dict
        Per ambient (``"O2"``, ``"H2O"``) overrides of ``B_prefactor_um2_per_h``,
        ``B_activation_eV``, ``B_over_A_prefactor_um_per_h``, ``B_over_A_activation_eV`` and
        ``rate_factor``.
    """

    wet_source: str | None = None
    h2o_pressure_atm: float | None = None
    o2_pressure_atm: float | None = None
    thin_regime: str | None = None
    initial_oxide_nm: float | None = None
    massoud: dict = field(default_factory=dict)
    ambients: dict = field(default_factory=dict)


#: Bounds of the rate-constant overrides: far outside any published value, inside which a
#: typo (an exponent off by ten) is still caught.
_RATE_BOUNDS = {"B_prefactor_um2_per_h": (1e-3, 1e8), "B_activation_eV": (0.1, 5.0),
                "B_over_A_prefactor_um_per_h": (1e2, 1e14), "B_over_A_activation_eV": (0.1, 5.0),
                "rate_factor": (0.2, 5.0), "C_prefactor_um_per_h": (1.0, 1e14),
                "C_activation_eV": (0.1, 5.0), "decay_length_nm": (0.1, 100.0)}


def _read_growth(rd, doc):
    t = rd.table(doc, "growth", "")
    if t is None:
        return None
    w = "growth"
    rd.keys(t, w, "growth")
    source = rd.string(t, "wet_source", w, default=None, choices=("bubbler", "pyrogenic"))
    h2o = rd.number(t, "h2o_pressure_atm", w, default=None, lo=0.001, hi=30.0, unit=" atm")
    o2 = rd.number(t, "o2_pressure_atm", w, default=None, lo=0.001, hi=30.0, unit=" atm")
    if source is not None and h2o is not None:
        rd.fail("give wet_source or h2o_pressure_atm, not both", f"{w}.h2o_pressure_atm")
    regime = rd.string(t, "thin_regime", w, default=None, choices=("deal-grove", "massoud", "none"))
    x_i = rd.number(t, "initial_oxide_nm", w, default=None, lo=0.0, hi=100.0, unit=" nm")
    massoud = {}
    mt = rd.table(t, "massoud", w)
    if mt is not None:
        rd.keys(mt, f"{w}.massoud", "growth.massoud")
        for key in _KEYS["growth.massoud"]:
            lo, hi = _RATE_BOUNDS[key]
            v = rd.number(mt, key, f"{w}.massoud", default=None, lo=lo, hi=hi)
            if v is not None:
                massoud[key] = v
    ambients = {}
    for amb in ("O2", "H2O"):
        at = rd.table(t, amb, w)
        if at is None:
            continue
        rd.keys(at, f"{w}.{amb}", "growth.ambient")
        vals = {}
        for key in _KEYS["growth.ambient"]:
            lo, hi = _RATE_BOUNDS[key]
            v = rd.number(at, key, f"{w}.{amb}", default=None, lo=lo, hi=hi)
            if v is not None:
                vals[key] = v
        ambients[amb] = vals
    return GrowthConfig(wet_source=source, h2o_pressure_atm=h2o, o2_pressure_atm=o2,
                        thin_regime=regime, initial_oxide_nm=x_i, massoud=massoud,
                        ambients=ambients)


def _read_recipe(rd, doc):
    t = rd.table(doc, "recipe", "")
    if t is None:
        return ()
    rd.keys(t, "recipe", "recipe")
    raw = t.get("step")
    if raw is None:
        rd.fail("[recipe] has no [[recipe.step]]; expected one or more steps", "recipe.step")
    if not isinstance(raw, list) or not all(isinstance(x, dict) for x in raw):
        rd.fail(f"expected [[recipe.step]] tables (an array of tables), found {_found(raw)}",
                "recipe.step")
    if not raw:
        rd.fail("no recipe steps; expected one or more [[recipe.step]] tables", "recipe.step")
    steps = []
    lo_t, hi_t = _TEMPERATURE_RANGE_C
    for i, s in enumerate(raw, start=1):
        w = f"recipe.step[{i}]"
        rd.keys(s, w, "recipe.step")
        name = _bounded_name(rd, rd.string(s, "name", w, required=True), f"{w}.name")
        if any(name == other.name for other in steps):
            rd.fail(f"step name {name!r} is used twice; expected unique step names", f"{w}.name")
        ambient = rd.string(s, "ambient", w, required=True, choices=AMBIENTS)
        minutes = rd.number(s, "minutes", w, required=True, lo=0.0, hi=MAX_STEP_MINUTES,
                            lo_open=True, unit=" min")
        temps = {k: rd.number(s, k, w, lo=lo_t, hi=hi_t, lo_open=True, unit=" C")
                 for k in ("at_C", "from_C", "to_C")}
        at, frm, to = temps["at_C"], temps["from_C"], temps["to_C"]
        if at is not None and (frm is not None or to is not None):
            rd.fail(f"step {name!r} gives at_C and from_C/to_C; expected either at_C (hold) or "
                    "from_C and to_C (ramp)", f"{w}.at_C")
        if at is None:
            if frm is None and to is None:
                rd.fail(f"step {name!r} has no temperature; expected at_C (hold) or from_C and "
                        "to_C (ramp), deg C", f"{w}.at_C")
            if to is None:
                rd.fail(f"step {name!r} is a ramp with from_C but no to_C; expected the end "
                        "temperature to_C (deg C)", f"{w}.to_C")
            if frm is None:
                rd.fail(f"step {name!r} is a ramp with to_C but no from_C; expected the start "
                        "temperature from_C (deg C)", f"{w}.from_C")
        steps.append(RecipeStep(name=name, ambient=ambient, minutes=minutes, at_C=at,
                                from_C=frm, to_C=to))
    return tuple(steps)


def _check_adjust_step(rd, target, recipe):
    if target is None or target.adjust_step is None:
        return
    name = target.adjust_step
    field = "target.adjust_step"
    if not recipe:
        rd.fail(f"adjust_step {name!r} names no recipe step: the lot file has no "
                "[[recipe.step]]", field)
    step = next((s for s in recipe if s.name == name), None)
    if step is None:
        names = [s.name for s in recipe]
        close = difflib.get_close_matches(name, names, n=1, cutoff=0.5)
        hint = f"; did you mean {close[0]!r}?" if close else ""
        rd.fail(f"adjust_step {name!r} is not a recipe step{hint} (steps: "
                f"{', '.join(repr(n) for n in names)})", field)
    if not step.oxidising:
        rd.fail(f"adjust_step {name!r} runs in {step.ambient}, which grows no oxide; expected a "
                f"step with ambient {' or '.join(OXIDISING_AMBIENTS)}", field)


# --------------------------------------------------------------------------- entry point

def read_lot_file(path, allow_outside=False, max_bytes=DEFAULT_MAX_LOT_BYTES, require_files=True):
    """Read and validate a lot file.

    Parameters
    ----------
    path : str or path-like
        The TOML lot file; opened read-only.
    allow_outside : bool
        Allow file globs and paths that leave the lot folder (absolute, ``..``
        or symlinks pointing outside).
    max_bytes : int
        Refuse lot files larger than this many bytes (default 4 MiB).
    require_files : bool
        Refuse globs that match no spectra file (default); False reads a lot file
        before its run, for planning (``filmmap plan``, ``filmmap predict``).

    Returns
    -------
    LotConfig

    Raises
    ------
    FilmmapInputError
        Any problem: syntax (with line), unknown key (with a suggestion),
        wrong type (expected and found), out-of-range value, unknown material,
        unmatched glob, inconsistent boat/furnace/recipe/target.
    """
    path = Path(path).absolute()
    try:
        size = os.stat(path).st_size
        if size > int(max_bytes):
            raise FilmmapInputError(f"lot file is {size} bytes, larger than the limit of "
                                    f"{int(max_bytes)} bytes", file=path)
        with open(path, "rb") as fh:
            raw = fh.read(int(max_bytes) + 1)
    except IsADirectoryError:
        raise FilmmapInputError("expected a lot file, found a directory", file=path) from None
    except OSError as exc:
        raise FilmmapInputError(f"cannot read lot file: {exc.strerror or exc}", file=path) from None
    sha = hashlib.sha256(raw).hexdigest()
    if b"\x00" in raw:
        raise FilmmapInputError("lot file contains NUL bytes: binary data, not TOML text",
                                file=path, line=raw.count(b"\n", 0, raw.find(b"\x00")) + 1)
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise FilmmapInputError(f"lot file is not UTF-8 text (invalid byte 0x{raw[exc.start]:02x});"
                                " expected a UTF-8 TOML file",
                                file=path, line=raw.count(b"\n", 0, exc.start) + 1) from None
    if text.startswith("\ufeff"):
        text = text[1:]
    if not text.strip():
        raise FilmmapInputError("empty lot file; expected [lot], [measurement] and [stack] tables",
                                file=path)
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        msg = str(exc)
        m = re.search(r"\(at line (\d+), column (\d+)\)", msg)
        line = int(m.group(1)) if m else None
        if m:
            msg = msg[:m.start()].rstrip() + f" (column {m.group(2)})"
        elif "end of document" in msg:
            line = text.rstrip("\n").count("\n") + 1
        raise FilmmapInputError(f"TOML syntax error: {msg}", file=path, line=line) from None
    rd = _Reader(path, text)
    rd.keys(doc, "", "")
    folder = path.parent
    lot = _read_lot(rd, doc)
    stack = _read_stack(rd, doc, folder, allow_outside, path)
    exclude = [path] + [layer.nk_file for layer in stack.layers if layer.nk_file is not None]
    measurement = _read_measurement(rd, doc, folder, allow_outside, exclude, require_files)
    target = _read_target(rd, doc, stack)
    boat = _read_boat(rd, doc)
    furnace = _read_furnace(rd, doc, boat)
    recipe = _read_recipe(rd, doc)
    _check_adjust_step(rd, target, recipe)
    growth = _read_growth(rd, doc)
    return LotConfig(path=path, folder=folder, sha256=sha, lot=lot, measurement=measurement,
                     stack=stack, target=target, boat=boat, furnace=furnace, recipe=recipe,
                     growth=growth)
