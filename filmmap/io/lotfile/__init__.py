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
    to_C = 1000                 # ... or a hold: at_C; 0 < T <= 1400 C, and for
                                # O2 and H2O steps 600-1300 C (the furnace range)

Layer materials
---------------
``material`` always names the layer's material.  Without further keys the
name must be in the material registry (`filmmap.materials.available`).  A
user material is defined in the layer itself by exactly one of

``nk_file = "nitride.csv"``
    An n, k table (``wavelength_nm,n,k`` CSV, see
    `filmmap.io.nktable.read_nk_table`), path relative to the lot folder.
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

Recipe steps are `filmmap.growth.Step` objects checked once, here, with the
growth model's rules (`filmmap.io.lotfile.furnace`): what this reader accepts,
the fits, the advice and ``predict``/``plan`` accept too.

Field paths in messages count array entries from 1: ``stack.layer[1]`` is
the top layer, ``recipe.step[3]`` the third step.

The package: `schema` (keys and dataclasses), `locator` (key -> line),
`reader` (typed, located access), `paths` (the folder sandbox) and one module
per section: `lot`, `measurement`, `stack`, `target`, `furnace` (boat, zones,
recipe), `growth`.
"""

from __future__ import annotations

import re
import tomllib
from pathlib import Path

from filmmap.errors import FilmmapInputError
from filmmap.io.lotfile.furnace import read_boat, read_furnace, read_recipe
from filmmap.io.lotfile.growth import read_growth
from filmmap.io.lotfile.lot import read_lot
from filmmap.io.lotfile.measurement import read_measurement
from filmmap.io.lotfile.reader import LotReader
from filmmap.io.lotfile.schema import (AMBIENTS, DEFAULT_MAX_LOT_BYTES, LOT_TECHNIQUES,
                                       MAX_SEARCH_NM, OXIDISING_AMBIENTS, BoatConfig, CauchySpec,
                                       FurnaceConfig, GrowthConfig, LayerConfig, LotConfig,
                                       LotInfo, MeasurementConfig, RecipeStep, StackConfig,
                                       TargetConfig, Zone)
from filmmap.io.lotfile.stack import read_stack
from filmmap.io.lotfile.target import check_adjust_step, read_target
from filmmap.io.textfile import read_text_file

__all__ = ["LotConfig", "LotInfo", "MeasurementConfig", "StackConfig", "LayerConfig",
           "CauchySpec", "TargetConfig", "BoatConfig", "Zone", "FurnaceConfig", "GrowthConfig",
           "RecipeStep", "read_lot_file", "AMBIENTS", "OXIDISING_AMBIENTS", "LOT_TECHNIQUES",
           "DEFAULT_MAX_LOT_BYTES", "MAX_SEARCH_NM"]


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
        unmatched glob, inconsistent boat/furnace/recipe/target, a recipe step the
        growth model would refuse.
    """
    path = Path(path).absolute()
    source = read_text_file(path, max_bytes, what="lot file", expected="TOML text")
    text = source.text
    if not text.strip():
        raise FilmmapInputError("empty lot file; expected [lot], [measurement] and [stack] tables",
                                file=path)
    doc = _parse_toml(text, path)
    rd = LotReader(path, text)
    rd.keys(doc, "", "")
    folder = path.parent
    lot = read_lot(rd, doc)
    stack = read_stack(rd, doc, folder, allow_outside, path)
    exclude = [path] + [layer.nk_file for layer in stack.layers if layer.nk_file is not None]
    measurement = read_measurement(rd, doc, folder, allow_outside, exclude, require_files)
    target = read_target(rd, doc, stack)
    boat = read_boat(rd, doc)
    furnace = read_furnace(rd, doc, boat)
    recipe = read_recipe(rd, doc)
    check_adjust_step(rd, target, recipe)
    growth = read_growth(rd, doc)
    return LotConfig(path=path, folder=folder, sha256=source.sha256, lot=lot,
                     measurement=measurement, stack=stack, target=target, boat=boat,
                     furnace=furnace, recipe=recipe, growth=growth)


def _parse_toml(text, path):
    """The parsed document, or a syntax error naming the line and column."""
    try:
        return tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        msg = str(exc)
        m = re.search(r"\(at line (\d+), column (\d+)\)", msg)
        line = int(m.group(1)) if m else None
        if m:
            msg = msg[:m.start()].rstrip() + f" (column {m.group(2)})"
        elif "end of document" in msg:
            line = text.rstrip("\n").count("\n") + 1
        raise FilmmapInputError(f"TOML syntax error: {msg}", file=path, line=line) from None
