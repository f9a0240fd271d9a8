"""A commented lot-file template (``filmmap init``) and the installed formats document.

The template is a valid lot file once ``files`` matches the data: every key it sets
is one `filmmap.io.lotfile` reads, with a value in range; optional keys are commented
out with their meaning. It names no real facility or tool.
"""

from __future__ import annotations

from importlib import resources
from pathlib import Path

from filmmap.errors import FilmmapInputError
from filmmap.atomic import write_text_atomic
from filmmap.io.layouts import DEFAULT_LAYOUT, LAYOUTS

TEMPLATE = '''\
# filmmap lot file: one furnace run (a lot) measured on a reflectometer or ellipsometer.
# Every key is explained in docs/formats.md (print it with: filmmap formats).
# Paths are relative to this file's folder.

[lot]
id = "LOT-0001"                 # used in output names; no '/' or '\\\\'
furnace = "tube 1"
run_date = "2026-01-31"

[measurement]
technique = "reflectance"       # or "ellipsometry" (then angle_deg = 70.0 is required)
files = ["spectra/*.csv"]       # globs of the data files
wafer_diameter_mm = 150
edge_exclusion_mm = 3
reflectance_unit = "fraction"   # or "percent"
# layout = "wide"               # or {other_layouts}
# site_map = "polar-49"         # site -> x_mm, y_mm: "polar-<n>", "cartesian-<n>" or a CSV
#                               #   site,x_mm,y_mm (when the files have no coordinates)
# slot_map = "slots.csv"        # CSV wafer,slot (when the files have no slot)
# file_pattern = "{wafer}_site{site}.txt"   # wafer, site (and slot) from file names
# data_dir = "/shared/instrument/run-0131"  # data outside this folder, named explicitly

[stack]
substrate = "Si"
orientation = "100"             # or "111" (growth rate constants)

[[stack.layer]]                 # top layer first
material = "SiO2"
thickness_nm = 100              # nominal: a start for the fit
search_nm = [5, 3000]           # where to look for the thickness

[target]
thickness_nm = 100
tolerance_pct = 2.0
adjust_step = "wet"             # the recipe step whose time the advice adjusts

[boat]
slots = 50                      # 1 = load/door end
dummy_slots = [1, 2, 49, 50]
monitor_slots = []

[furnace]
zones = [ { name = "load", slots = [1, 17] },
          { name = "center", slots = [18, 34] },
          { name = "source", slots = [35, 50] } ]
max_offset_C = 5.0              # largest zone trim the advice may propose, K
max_time_change_pct = 15.0

[[recipe.step]]
name = "ramp-up"
ambient = "N2"
minutes = 30.0
from_C = 800.0
to_C = 1000.0

[[recipe.step]]
name = "wet"
ambient = "H2O"
minutes = 20.0
at_C = 1000.0

[[recipe.step]]
name = "ramp-down"
ambient = "N2"
minutes = 40.0
from_C = 1000.0
to_C = 750.0
'''
# the layouts the registry knows, so a new layout needs no edit here
TEMPLATE = TEMPLATE.replace("{other_layouts}",
                            ", ".join(f'"{name}"' for name in LAYOUTS if name != DEFAULT_LAYOUT))



def write_template(path):
    """Write the lot-file template to ``path``; never over an existing file.

    Returns
    -------
    pathlib.Path

    Raises
    ------
    FilmmapInputError
        ``path`` exists (a lot file is an input: filmmap never overwrites one).
    """
    path = Path(path)
    if path.exists() or path.is_symlink():
        raise FilmmapInputError("exists; filmmap init never overwrites a file, choose a new name",
                                file=path)
    if not path.parent.is_dir():
        raise FilmmapInputError("folder does not exist; expected an existing folder",
                                file=path.parent)
    return write_text_atomic(path, TEMPLATE)


def formats_text():
    """docs/formats.md as installed with the package (or from a checkout)."""
    try:
        doc = resources.files("filmmap.docs").joinpath("formats.md")
        if doc.is_file():
            return doc.read_text(encoding="utf-8")
    except ModuleNotFoundError:
        pass
    return (Path(__file__).resolve().parents[2] / "docs" / "formats.md").read_text(
        encoding="utf-8")
