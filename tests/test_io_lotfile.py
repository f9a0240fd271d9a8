"""Lot file reader: a valid lot reads completely; every bad lot names file, line and field."""

import datetime
import hashlib
import os

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from filmmap.errors import FilmmapInputError
from filmmap.io import read_lot_file
from filmmap.materials import Cauchy, Tabulated

BASE = """\
[lot]
id = "PL-0001"
furnace = "tube-2"
run_date = 2026-11-30

[measurement]
technique = "reflectance"
angle_deg = 0.0
files = ["w*.csv"]
wafer_diameter_mm = 150
edge_exclusion_mm = 3
reflectance_unit = "fraction"

[stack]
substrate = "Si"
orientation = "100"

[[stack.layer]]
material = "SiO2"
thickness_nm = 1000.0
search_nm = [5, 5000]
fit = true

[target]
thickness_nm = 1000.0
tolerance_pct = 2.0
adjust_step = "wet"

[boat]
slots = 50
dummy_slots = [1, 2, 3, 48, 49, 50]
monitor_slots = [25]

[furnace]
zones = [ { name = "load", slots = [1, 17] }, { name = "center", slots = [18, 34] }, { name = "source", slots = [35, 50] } ]
max_offset_C = 5.0
max_time_change_pct = 15.0

[[recipe.step]]
name = "ramp-up"
ambient = "N2"
minutes = 150
from_C = 800
to_C = 1000

[[recipe.step]]
name = "wet"
ambient = "H2O"
minutes = 90
at_C = 1000
"""

MINIMAL = """\
[lot]
id = "L1"
[measurement]
technique = "reflectance"
files = ["w1.csv"]
[stack]
substrate = "Si"
[[stack.layer]]
material = "SiO2"
"""


def line_of(text, fragment, nth=1):
    """1-based line of the nth line containing ``fragment``."""
    hits = [i for i, line in enumerate(text.splitlines(), start=1) if fragment in line]
    return hits[nth - 1]


@pytest.fixture
def folder(tmp_path):
    d = tmp_path / "lot"
    d.mkdir()
    for name in ("w1.csv", "w2.csv", "w10.csv"):
        (d / name).write_text("wafer,slot,site,x_mm,y_mm,R@400\nW1,1,1,0,0,0.3\n")
    (d / "nitride.csv").write_text("# typical nitride\nwavelength_nm,n,k\n300,2.1,0\n1000,2.0,0\n")
    (d / "dark.csv").write_text("I@400\n10\n")
    (d / "bare_si.csv").write_text("I@400\n1000\n")
    return d


def write_lot(folder, text, name="lot.toml"):
    path = folder / name
    path.write_text(text, encoding="utf-8")
    return path


def lot_error(folder, text, **kw):
    path = write_lot(folder, text)
    with pytest.raises(FilmmapInputError) as info:
        read_lot_file(path, **kw)
    return path, info.value


def check(folder, text, *fragments, field=None, line=None, **kw):
    """Read a bad lot; the error must name the file, the field and line, and the fragments."""
    path, err = lot_error(folder, text, **kw)
    assert err.file == str(path.absolute())
    assert str(path) in str(err)
    if field is not None:
        assert err.field == field
        assert f"field '{field}'" in str(err)
    if line is not None:
        assert err.line == line
        assert f"{path}:{line}" in str(err)
    for fragment in fragments:
        assert fragment in str(err), (fragment, str(err))
    return err


def edit(old, new, text=BASE):
    assert old in text, old
    return text.replace(old, new, 1)


# --------------------------------------------------------------------------- valid lots

def test_full_lot_reads_every_section(folder):
    path = write_lot(folder, BASE)
    cfg = read_lot_file(path)
    assert cfg.path == path.absolute() and cfg.folder == folder.absolute()
    assert cfg.sha256 == hashlib.sha256(path.read_bytes()).hexdigest()
    assert (cfg.lot.id, cfg.lot.furnace, cfg.lot.run_date) == (
        "PL-0001", "tube-2", datetime.date(2026, 11, 30))
    m = cfg.measurement
    assert m.technique == "reflectance" and m.file_technique == "reflectance"
    assert not m.raw_intensity
    assert [p.name for p in m.files] == ["w1.csv", "w10.csv", "w2.csv"]
    assert all(p.is_absolute() for p in m.files)
    assert m.file_globs == ("w*.csv",)
    assert (m.angle_deg, m.wafer_diameter_mm, m.edge_exclusion_mm, m.reflectance_unit) == (
        0.0, 150.0, 3.0, "fraction")
    assert cfg.stack.substrate == "Si" and cfg.stack.orientation == "100"
    (layer,) = cfg.stack.layers
    assert (layer.material, layer.source, layer.thickness_nm, layer.search_nm, layer.fit) == (
        "SiO2", "registry", 1000.0, (5.0, 5000.0), True)
    assert layer.model.name == "SiO2"
    assert cfg.target.thickness_nm == 1000.0 and cfg.target.tolerance_pct == 2.0
    assert cfg.target.adjust_step == "wet"
    assert cfg.boat.slots == 50 and cfg.boat.dummy_slots == (1, 2, 3, 48, 49, 50)
    assert cfg.boat.monitor_slots == (25,)
    zones = cfg.furnace.zones
    assert [(z.name, z.first_slot, z.last_slot) for z in zones] == [
        ("load", 1, 17), ("center", 18, 34), ("source", 35, 50)]
    assert cfg.furnace.zone_of(18).name == "center" and cfg.furnace.zone_of(51) is None
    assert (cfg.furnace.max_offset_C, cfg.furnace.max_time_change_pct) == (5.0, 15.0)
    ramp, wet = cfg.recipe
    assert ramp.is_ramp and (ramp.start_C, ramp.end_C) == (800.0, 1000.0) and not ramp.oxidising
    assert not wet.is_ramp and wet.at_C == 1000.0 and wet.oxidising and wet.minutes == 90.0
    assert cfg.step("wet") is wet and cfg.step("dry") is None


def test_minimal_lot_defaults(folder):
    cfg = read_lot_file(write_lot(folder, MINIMAL))
    m = cfg.measurement
    assert (m.angle_deg, m.wafer_diameter_mm, m.edge_exclusion_mm, m.reflectance_unit) == (
        0.0, 150.0, 3.0, "fraction")
    assert cfg.stack.orientation == "100"
    assert cfg.stack.layers[0].fit is True and cfg.stack.layers[0].search_nm is None
    assert cfg.target is None and cfg.boat is None and cfg.furnace is None
    assert cfg.recipe == ()
    assert cfg.lot.furnace is None and cfg.lot.run_date is None


def test_lot_file_not_modified(folder):
    path = write_lot(folder, BASE)
    before = (path.read_bytes(), os.stat(path).st_mtime_ns)
    read_lot_file(path)
    assert (path.read_bytes(), os.stat(path).st_mtime_ns) == before


def test_bom_crlf_and_quoted_date(folder):
    text = "\ufeff" + edit("run_date = 2026-11-30", 'run_date = "2026-11-30"').replace("\n", "\r\n")
    cfg = read_lot_file(write_lot(folder, text))
    assert cfg.lot.run_date == datetime.date(2026, 11, 30)


def test_ellipsometry_lot(folder):
    text = edit('technique = "reflectance"\nangle_deg = 0.0', 'technique = "ellipsometry"\n'
                'angle_deg = 70.0').replace('reflectance_unit = "fraction"\n', "")
    cfg = read_lot_file(write_lot(folder, text))
    assert cfg.measurement.technique == "ellipsometry" and cfg.measurement.angle_deg == 70.0


def test_raw_intensity_mode_excludes_spectra_from_globs(folder):
    text = edit('files = ["w1.csv"]', 'files = ["*.csv"]\ndark_file = "dark.csv"\n'
                'reference_file = "bare_si.csv"', MINIMAL)
    text = edit('material = "SiO2"', 'material = "nit"\nnk_file = "nitride.csv"', text)
    cfg = read_lot_file(write_lot(folder, text))
    m = cfg.measurement
    assert m.raw_intensity and m.file_technique == "intensity"
    assert m.dark_file.name == "dark.csv" and m.reference_file.name == "bare_si.csv"
    assert [p.name for p in m.files] == ["w1.csv", "w10.csv", "w2.csv"]


def test_user_materials_nk_file_and_cauchy(folder):
    text = MINIMAL + """
[[stack.layer]]
material = "my-nitride"
nk_file = "nitride.csv"
thickness_nm = 80
fit = false

[[stack.layer]]
material = "pad-oxide"
cauchy = { A = 1.45, B = 0.0036, range_nm = [300, 1000] }
thickness_nm = 10
"""
    top, nit, pad = read_lot_file(write_lot(folder, text)).stack.layers
    assert isinstance(nit.model, Tabulated) and nit.source == "nk_file"
    assert nit.model.name == "my-nitride" and nit.nk_file == folder.absolute() / "nitride.csv"
    assert isinstance(pad.model, Cauchy) and pad.source == "cauchy"
    assert (pad.cauchy.A, pad.cauchy.B_um2, pad.cauchy.C_um4, pad.cauchy.range_nm) == (
        1.45, 0.0036, 0.0, (300.0, 1000.0))
    assert abs(pad.model(633.0).real - (1.45 + 0.0036 / 0.633**2)) < 1e-12


def test_allow_outside(folder, tmp_path):
    (tmp_path / "elsewhere.csv").write_text("x")
    text = edit('files = ["w1.csv"]', 'files = ["../elsewhere.csv"]', MINIMAL)
    check(folder, text, "leaves the lot folder", "allow_outside=True", field="measurement.files",
          line=5)
    cfg = read_lot_file(folder / "lot.toml", allow_outside=True)
    assert [p.name for p in cfg.measurement.files] == ["elsewhere.csv"]
    absolute = edit('files = ["w1.csv"]', f'files = ["{tmp_path / "elsewhere.csv"}"]', MINIMAL)
    check(folder, absolute, "absolute path", field="measurement.files")
    cfg = read_lot_file(write_lot(folder, absolute), allow_outside=True)
    assert cfg.measurement.files[0].name == "elsewhere.csv"


def test_symlink_escaping_the_folder(folder, tmp_path):
    (tmp_path / "outside.csv").write_text("x")
    (folder / "link.csv").symlink_to(tmp_path / "outside.csv")
    text = edit('files = ["w1.csv"]', 'files = ["link.csv"]', MINIMAL)
    check(folder, text, "resolves outside the lot folder", field="measurement.files")


# --------------------------------------------------------------------------- file-level errors

def test_toml_syntax_error_names_line(folder):
    text = edit("edge_exclusion_mm = 3", "edge_exclusion_mm = = 3")
    check(folder, text, "TOML syntax error", "column", line=line_of(text, "edge_exclusion_mm"))


def test_empty_binary_and_non_utf8_lot_files(folder):
    check(folder, "", "empty lot file")
    path = folder / "lot.toml"
    path.write_bytes(b"[lot]\nid = \"\xff\"\n")
    err = pytest.raises(FilmmapInputError, read_lot_file, path).value
    assert err.line == 2 and "not UTF-8" in str(err) and str(path) in str(err)
    path.write_bytes(b"[lot]\x00")
    err = pytest.raises(FilmmapInputError, read_lot_file, path).value
    assert err.line == 1 and "binary" in str(err)


def test_missing_lot_file_and_size_limit(folder):
    err = pytest.raises(FilmmapInputError, read_lot_file, folder / "none.toml").value
    assert "cannot read" in str(err) and "none.toml" in str(err)
    path = write_lot(folder, BASE)
    err = pytest.raises(FilmmapInputError, read_lot_file, path, max_bytes=100).value
    assert "larger than the limit" in str(err) and str(path) in str(err)


# --------------------------------------------------------------------------- keys and types

@pytest.mark.parametrize("old, new, field, suggestion", [
    ("[target]", "[targt]", "targt", "target"),
    ("furnace = \"tube-2\"", "furnance = \"tube-2\"", "lot.furnance", "furnace"),
    ("wafer_diameter_mm = 150", "wafer_diamter_mm = 150", "measurement.wafer_diamter_mm",
     "wafer_diameter_mm"),
    ("fit = true", "fitt = true", "stack.layer[1].fitt", "fit"),
    ("tolerance_pct = 2.0", "tolerance = 2.0", "target.tolerance", "tolerance_pct"),
    ("slots = 50", "slot = 50", "boat.slot", "slots"),
    ("max_offset_C = 5.0", "max_offset_c = 5.0", "furnace.max_offset_c", "max_offset_C"),
    ("at_C = 1000", "temp_C = 1000", "recipe.step[2].temp_C", "to_C"),
    ('{ name = "center", slots', '{ nam = "center", slots', "furnace.zones[2].nam", "name"),
])
def test_unknown_key_suggests_closest(folder, old, new, field, suggestion):
    text = edit(old, new)
    check(folder, text, "unknown key", f"did you mean '{suggestion}'", field=field,
          line=line_of(text, new.split("=")[0].strip()))


def test_unknown_key_in_cauchy_table(folder):
    text = edit('material = "SiO2"', 'material = "ox"\ncauchy = { A = 1.46, D = 1 }', MINIMAL)
    check(folder, text, "unknown key 'D'", field="stack.layer[1].cauchy.D",
          line=line_of(text, "cauchy"))


@pytest.mark.parametrize("old, new, field, expected, found", [
    ('id = "PL-0001"', "id = 1", "lot.id", "a string", "integer 1"),
    ("wafer_diameter_mm = 150", 'wafer_diameter_mm = "150"', "measurement.wafer_diameter_mm",
     "a number", "string '150'"),
    ("angle_deg = 0.0", "angle_deg = true", "measurement.angle_deg", "a number", "boolean True"),
    ('files = ["w*.csv"]', 'files = "w*.csv"', "measurement.files", "an array", "string"),
    ("fit = true", 'fit = "yes"', "stack.layer[1].fit", "a boolean", "string 'yes'"),
    ("slots = 50\n", "slots = 50.0\n", "boat.slots", "an integer", "float 50.0"),
    ("minutes = 90", 'minutes = "90"', "recipe.step[2].minutes", "a number", "string '90'"),
    ("run_date = 2026-11-30", "run_date = 20261130", "lot.run_date", "a date", "integer"),
    ('orientation = "100"', "orientation = 100", "stack.orientation", '"100" or "111"',
     "integer 100"),
])
def test_wrong_type_names_key_expected_and_found(folder, old, new, field, expected, found):
    text = edit(old, new)
    check(folder, text, expected, found, field=field, line=line_of(text, new.split("\n")[0]))


def test_nan_and_inf_values_rejected(folder):
    text = edit("tolerance_pct = 2.0", "tolerance_pct = nan")
    check(folder, text, "finite number", field="target.tolerance_pct",
          line=line_of(text, "tolerance_pct"))


def test_missing_sections_and_keys(folder):
    check(folder, BASE.replace('[lot]\nid = "PL-0001"\nfurnace = "tube-2"\nrun_date = 2026-11-30\n',
                               ""), "missing required [lot]", field="lot")
    check(folder, edit('technique = "reflectance"\n', ""), "missing required key 'technique'",
          field="measurement.technique")
    check(folder, edit('files = ["w*.csv"]\n', ""), "missing required key 'files'",
          field="measurement.files")
    check(folder, edit('substrate = "Si"\n', ""), "missing required key 'substrate'",
          field="stack.substrate")
    check(folder, MINIMAL.replace('[[stack.layer]]\nmaterial = "SiO2"\n', ""),
          "missing [[stack.layer]]", field="stack.layer")
    check(folder, edit('material = "SiO2"\n', ""), "missing required key 'material'",
          field="stack.layer[1].material")


def test_layer_written_as_single_table(folder):
    text = MINIMAL.replace("[[stack.layer]]", "[stack.layer]")
    check(folder, text, "array of tables", field="stack.layer", line=8)


def test_bad_choices_suggest(folder):
    text = edit('technique = "reflectance"', 'technique = "reflectometry"')
    check(folder, text, "did you mean 'reflectance'", field="measurement.technique",
          line=line_of(text, "technique"))
    text = edit('reflectance_unit = "fraction"', 'reflectance_unit = "%"')
    check(folder, text, "'fraction', 'percent'", field="measurement.reflectance_unit")
    text = edit('orientation = "100"', 'orientation = "110"')
    check(folder, text, "'100', '111'", field="stack.orientation")


def test_lot_id_must_be_plain(folder):
    text = edit('id = "PL-0001"', 'id = "PL/0001"')
    check(folder, text, "'/'", field="lot.id", line=2)
    check(folder, edit('id = "PL-0001"', 'id = " "'), "empty", field="lot.id")
    check(folder, edit("run_date = 2026-11-30", 'run_date = "30.11.2026"'), "YYYY-MM-DD",
          field="lot.run_date")


# --------------------------------------------------------------------------- ranges

@pytest.mark.parametrize("old, new, field, fragment", [
    ("angle_deg = 0.0", "angle_deg = 90.0", "measurement.angle_deg", "0 <= value <= 89"),
    ("angle_deg = 0.0", "angle_deg = -1", "measurement.angle_deg", "out of range"),
    ("wafer_diameter_mm = 150", "wafer_diameter_mm = 0", "measurement.wafer_diameter_mm",
     "0 < value <= 450"),
    ("edge_exclusion_mm = 3", "edge_exclusion_mm = 75", "measurement.edge_exclusion_mm",
     "not smaller than the wafer radius 75 mm"),
    ("edge_exclusion_mm = 3", "edge_exclusion_mm = -1", "measurement.edge_exclusion_mm",
     "value >= 0"),
    ("tolerance_pct = 2.0", "tolerance_pct = 0", "target.tolerance_pct", "0 < value < 100"),
    ("thickness_nm = 1000.0\ntolerance", "thickness_nm = -5\ntolerance", "target.thickness_nm",
     "0 < value <= 50000"),
    ("search_nm = [5, 5000]", "search_nm = [5000, 5]", "stack.layer[1].search_nm",
     "0 < lo < hi"),
    ("search_nm = [5, 5000]", "search_nm = [0, 5000]", "stack.layer[1].search_nm",
     "0 < lo < hi"),
    ("search_nm = [5, 5000]", "search_nm = [5]", "stack.layer[1].search_nm", "[lo, hi]"),
    ("search_nm = [5, 5000]", "search_nm = [5, 900]", "stack.layer[1].thickness_nm",
     "outside search_nm [5, 900]"),
    ("max_offset_C = 5.0", "max_offset_C = 0", "furnace.max_offset_C", "0 < value <= 100"),
    ("max_offset_C = 5.0", "max_offset_C = 1000", "furnace.max_offset_C", "0 < value <= 100"),
    ("max_time_change_pct = 15.0", "max_time_change_pct = 100", "furnace.max_time_change_pct",
     "0 < value < 100"),
    ("minutes = 150", "minutes = 0", "recipe.step[1].minutes", "0 < value <= 10080"),
    # physical bounds (filmmap.bounds, docs/formats.md "Bounds")
    ("minutes = 150", "minutes = 1e9", "recipe.step[1].minutes", "0 < value <= 10080"),
    ("slots = 50", "slots = 100000000", "boat.slots", "at most 1200"),
    ('id = "PL-0001"', 'id = "' + "L" * 65 + '"', "lot.id", "at most 64"),
    ("at_C = 1000", "at_C = 2000", "recipe.step[2].at_C", "0 < value <= 1400"),
])
def test_out_of_range_values(folder, old, new, field, fragment):
    text = edit(old, new)
    check(folder, text, fragment, field=field)


def test_ellipsometry_needs_angle(folder):
    text = edit('technique = "reflectance"\nangle_deg = 0.0\n', 'technique = "ellipsometry"\n')
    text = text.replace('reflectance_unit = "fraction"\n', "")
    check(folder, text, "angle_deg is required for technique 'ellipsometry'",
          field="measurement.angle_deg", line=line_of(text, "[measurement]"))
    text = edit('technique = "reflectance"', 'technique = "ellipsometry"')
    text = text.replace('reflectance_unit = "fraction"\n', "")
    check(folder, text, "0 < value <= 89", field="measurement.angle_deg",
          line=line_of(text, "angle_deg"))


def test_target_outside_top_fitted_search_range(folder):
    text = edit("thickness_nm = 1000.0\ntolerance", "thickness_nm = 6000.0\ntolerance")
    check(folder, text, "outside the search range [5, 5000] nm", "stack.layer[1]",
          field="target.thickness_nm", line=line_of(text, "thickness_nm = 6000"))


def test_target_checks_first_fitted_layer(folder):
    text = edit('[[stack.layer]]\nmaterial = "SiO2"', '[[stack.layer]]\nmaterial = "Si3N4"\n'
                'thickness_nm = 50\nfit = false\n\n[[stack.layer]]\nmaterial = "SiO2"')
    text = edit("thickness_nm = 1000.0\ntolerance", "thickness_nm = 4.0\ntolerance", text)
    check(folder, text, "stack.layer[2] (SiO2)", field="target.thickness_nm")


def test_layers_need_a_fit_and_fixed_layers_a_thickness(folder):
    text = edit("fit = true", "fit = false")
    text = edit("[target]\nthickness_nm = 1000.0\ntolerance_pct = 2.0\nadjust_step = \"wet\"\n",
                "", text)
    check(folder, text, "no layer has fit = true", field="stack.layer")
    text = MINIMAL + '[[stack.layer]]\nmaterial = "Si3N4"\nfit = false\n'
    check(folder, text, "fit = false needs thickness_nm", field="stack.layer[2].thickness_nm",
          line=line_of(text, "[[stack.layer]]", 2))


# --------------------------------------------------------------------------- materials

def test_unknown_material_field_path(folder):
    text = edit('material = "SiO2"', 'material = "SiO3"')
    err = check(folder, text, "unknown material 'SiO3'", "did you mean 'SiO2'", "nk_file",
                field="stack.layer[1].material", line=line_of(text, "SiO3"))
    assert "stack.layer[1].material" in str(err)


def test_unknown_substrate(folder):
    text = edit('substrate = "Si"', 'substrate = "Ge"')
    check(folder, text, "unknown material 'Ge'", field="stack.substrate",
          line=line_of(text, "substrate"))


def test_user_material_errors(folder):
    both = edit('material = "SiO2"', 'material = "x"\nnk_file = "nitride.csv"\ncauchy = {A = 2}',
                MINIMAL)
    check(folder, both, "either nk_file or cauchy", field="stack.layer[1].cauchy")
    builtin = edit('material = "SiO2"', 'material = "SiO2"\ncauchy = {A = 1.5}', MINIMAL)
    check(folder, builtin, "built-in name", field="stack.layer[1].material")
    missing = edit('material = "SiO2"', 'material = "x"\nnk_file = "none.csv"', MINIMAL)
    check(folder, missing, "nk_file 'none.csv' not found", field="stack.layer[1].nk_file",
          line=line_of(missing, "nk_file"))
    outside = edit('material = "SiO2"', 'material = "x"\nnk_file = "../n.csv"', MINIMAL)
    check(folder, outside, "leaves the lot folder", field="stack.layer[1].nk_file")
    no_a = edit('material = "SiO2"', 'material = "x"\ncauchy = {B = 0.01}', MINIMAL)
    check(folder, no_a, "missing required key 'A'", field="stack.layer[1].cauchy.A")
    (folder / "bad_nk.csv").write_text("wavelength_nm,n,k\n300,2.1,0\n200,2.0,0\n")
    bad = edit('material = "SiO2"', 'material = "x"\nnk_file = "bad_nk.csv"', MINIMAL)
    path, err = lot_error(folder, bad)
    assert "bad_nk.csv" in str(err) and "increasing" in str(err)


# --------------------------------------------------------------------------- files

def test_glob_matching_nothing(folder):
    text = edit('files = ["w*.csv"]', 'files = ["w*.csv", "scan_*.csv"]')
    check(folder, text, "glob 'scan_*.csv' matches no data files", field="measurement.files",
          line=line_of(text, "files ="))
    text = edit('files = ["w*.csv"]', "files = []")
    check(folder, text, "at least one glob", field="measurement.files")
    text = edit('files = ["w*.csv"]', 'files = ["lot.toml"]')
    check(folder, text, "not data files", field="measurement.files")


def test_raw_intensity_errors(folder):
    text = edit('files = ["w1.csv"]', 'files = ["w1.csv"]\ndark_file = "dark.csv"', MINIMAL)
    check(folder, text, "dark_file needs reference_file", field="measurement.dark_file",
          line=line_of(text, "dark_file"))
    text = edit('files = ["w1.csv"]', 'files = ["w1.csv"]\nreference_file = "gone.csv"', MINIMAL)
    check(folder, text, "reference_file 'gone.csv' not found", field="measurement.reference_file")
    text = edit('technique = "reflectance"', 'technique = "ellipsometry"\nangle_deg = 70\n'
                'reference_file = "bare_si.csv"', MINIMAL)
    check(folder, text, "technique 'reflectance' only", field="measurement.reference_file")
    text = edit('files = ["w1.csv"]', 'files = ["w1.csv"]\nreference_file = "bare_si.csv"\n'
                'reflectance_unit = "percent"', MINIMAL)
    check(folder, text, "raw-intensity mode", field="measurement.reflectance_unit")
    text = edit('technique = "reflectance"\nangle_deg = 0.0', 'technique = "ellipsometry"\n'
                'angle_deg = 70')
    check(folder, text, "reflectance_unit does not apply", field="measurement.reflectance_unit",
          line=line_of(text, "reflectance_unit"))


# --------------------------------------------------------------------------- boat and furnace

def test_dummy_and_monitor_slots(folder):
    text = edit("dummy_slots = [1, 2, 3, 48, 49, 50]", "dummy_slots = [1, 2, 51]")
    check(folder, text, "dummy_slots[3] = 51 is outside the boat", field="boat.dummy_slots",
          line=line_of(text, "dummy_slots"))
    text = edit("dummy_slots = [1, 2, 3, 48, 49, 50]", "dummy_slots = [1, 1]")
    check(folder, text, "listed twice", field="boat.dummy_slots")
    text = edit("monitor_slots = [25]", "monitor_slots = [3]")
    check(folder, text, "slot 3 is both a dummy and a monitor slot", field="boat.monitor_slots")
    text = edit("slots = 50\n", "slots = 0\n")
    check(folder, text, "positive number of boat slots", field="boat.slots")


@pytest.mark.parametrize("zones, field, fragment", [
    ('{ name = "load", slots = [1, 17] }, { name = "center", slots = [17, 34] }, '
     '{ name = "source", slots = [35, 50] }', "furnace.zones[2].slots", "zones overlap"),
    ('{ name = "load", slots = [1, 17] }, { name = "center", slots = [20, 34] }, '
     '{ name = "source", slots = [35, 50] }', "furnace.zones[2].slots",
     "slots 18-19 between zones 'load' and 'center' belong to no zone"),
    ('{ name = "load", slots = [2, 17] }, { name = "center", slots = [18, 50] }',
     "furnace.zones[1].slots", "start at slot 1"),
    ('{ name = "load", slots = [1, 17] }, { name = "center", slots = [18, 60] }',
     "furnace.zones[2].slots", "outside the boat (slots 1..50)"),
    ('{ name = "load", slots = [1, 17] }, { name = "center", slots = [18, 40] }',
     "furnace.zones[2].slots", "cover the whole boat"),
    ('{ name = "load", slots = [1, 17] }, { name = "load", slots = [18, 50] }',
     "furnace.zones[2].name", "used twice"),
    ('{ name = "load", slots = [17, 1] }', "furnace.zones[1].slots", "first <= last"),
    ('{ name = "load", slots = [1] }', "furnace.zones[1].slots", "two integers"),
    ('{ name = "load" }', "furnace.zones[1].slots", "missing required key 'slots'"),
    ('"load"', "furnace.zones[1]", "expected a zone table"),
])
def test_bad_zones(folder, zones, field, fragment):
    text = edit('{ name = "load", slots = [1, 17] }, { name = "center", slots = [18, 34] }, '
                '{ name = "source", slots = [35, 50] }', zones)
    check(folder, text, fragment, field=field, line=line_of(text, "zones ="))


def test_zones_on_separate_lines_report_their_line(folder):
    text = edit('zones = [ { name = "load", slots = [1, 17] }, { name = "center", slots = '
                '[18, 34] }, { name = "source", slots = [35, 50] } ]',
                'zones = [\n  { name = "load", slots = [1, 17] },\n  { name = "center", slots = '
                '[19, 34] },\n  { name = "source", slots = [35, 50] },\n]')
    check(folder, text, "slot 18", field="furnace.zones[2].slots",
          line=line_of(text, '"center"'))


def test_zones_without_boat_must_start_at_one(folder):
    text = MINIMAL + '[furnace]\nzones = [ { name = "a", slots = [1, 10] }, { name = "b", ' \
                     'slots = [11, 20] } ]\n'
    cfg = read_lot_file(write_lot(folder, text))
    assert [z.last_slot for z in cfg.furnace.zones] == [10, 20]
    check(folder, MINIMAL + "[furnace]\nzones = []\n", "at least one heater zone",
          field="furnace.zones")
    check(folder, MINIMAL + "[furnace]\nmax_offset_C = 3\n", "missing required key 'zones'",
          field="furnace.zones")


# --------------------------------------------------------------------------- recipe and target

def test_ramp_without_end_temperature_names_the_step(folder):
    text = edit("to_C = 1000\n", "")
    check(folder, text, "step 'ramp-up' is a ramp with from_C but no to_C",
          field="recipe.step[1].to_C", line=line_of(text, "[[recipe.step]]"))
    text = edit("from_C = 800\n", "")
    check(folder, text, "step 'ramp-up' is a ramp with to_C but no from_C",
          field="recipe.step[1].from_C")


def test_step_temperature_forms(folder):
    text = edit("at_C = 1000", "at_C = 1000\nfrom_C = 900")
    check(folder, text, "step 'wet' gives at_C and from_C", field="recipe.step[2].at_C",
          line=line_of(text, "at_C"))
    text = edit("at_C = 1000", "")
    check(folder, text, "step 'wet' has no temperature", field="recipe.step[2].at_C")


THREE_STEPS = edit("""[[recipe.step]]
name = "wet"
""", """[[recipe.step]]
name = "dry"
ambient = "O2"
minutes = 10
at_C = 950

[[recipe.step]]
name = "wet"
""")


def test_wet_step_below_the_furnace_range_fails_at_read_time(folder):
    # the case: a wet step at 550 C used to pass the reader and fail after every
    # fit, as 'steps[2].at_C' with no file or line; now the reader names file, line and
    # the lot file's own path, counting steps as the file does (the third step is [3])
    text = edit("at_C = 1000", "at_C = 550", THREE_STEPS)
    err = check(folder, text, "step 'wet' (H2O): at_C = 550 C is outside the furnace range",
                "expected 600 <= at_C <= 1300 C", field="recipe.step[3].at_C",
                line=line_of(text, "at_C = 550"))
    assert "temperature_range_C" not in str(err)     # an option the CLI does not have
    assert "steps[" not in str(err)


def test_reduce_refuses_the_out_of_range_step_before_any_work(folder, tmp_path, capsys):
    from filmmap.cli.main import main

    text = edit("at_C = 1000", "at_C = 550", THREE_STEPS)
    path = write_lot(folder, text)
    out = tmp_path / "out"
    assert main(["reduce", str(path), "-o", str(out), "--no-figures", "--quiet"]) == 2
    err = capsys.readouterr().err
    assert f"{path}:{line_of(text, 'at_C = 550')}, field 'recipe.step[3].at_C'" in err
    assert not out.exists()


def test_furnace_range_covers_ramps_and_spares_inert_steps(folder):
    text = edit('ambient = "N2"\nminutes = 150\nfrom_C = 800\nto_C = 1000',
                'ambient = "O2"\nminutes = 150\nfrom_C = 1000\nto_C = 1350')
    check(folder, text, "step 'ramp-up' (O2): to_C = 1350 C", field="recipe.step[1].to_C",
          line=line_of(text, "to_C = 1350"))
    # an N2 step grows nothing: only the sanity bound of every temperature applies
    cfg = read_lot_file(write_lot(folder, edit("from_C = 800", "from_C = 300")))
    assert cfg.recipe[0].from_C == 300.0
    # the range is inclusive at both ends
    for t in (600, 1300):
        cfg = read_lot_file(write_lot(folder, edit("at_C = 1000", f"at_C = {t}")))
        assert cfg.step("wet").at_C == float(t)


def test_recipe_steps_are_growth_steps_the_model_accepts(folder):
    from filmmap.growth import Step, integrate_recipe, steps_from_config, validate_steps
    from filmmap.io import RecipeStep

    text = edit("at_C = 1000", "at_C = 600", THREE_STEPS)      # the edge of the range
    cfg = read_lot_file(write_lot(folder, text))
    assert RecipeStep is Step and all(type(s) is Step for s in cfg.recipe)
    assert [s.name for s in cfg.recipe] == ["ramp-up", "dry", "wet"]
    # what the reader accepted, the growth model accepts unchanged (no late failure)
    assert validate_steps(cfg.recipe) == cfg.recipe
    assert steps_from_config(cfg) == cfg.recipe
    assert integrate_recipe(cfg.recipe, "100", 1.5) > 1.5


def test_step_ambient_and_names(folder):
    text = edit('ambient = "H2O"', 'ambient = "steam"')
    check(folder, text, "'N2', 'O2', 'H2O'", field="recipe.step[2].ambient",
          line=line_of(text, "steam"))
    text = edit('ambient = "H2O"', 'ambient = "o2"')
    check(folder, text, "did you mean 'O2'", field="recipe.step[2].ambient")
    text = edit('name = "wet"', 'name = "ramp-up"')
    check(folder, text, "step name 'ramp-up' is used twice", field="recipe.step[2].name",
          line=line_of(text, 'name = "ramp-up"', 2))
    text = edit('name = "wet"\n', "")
    check(folder, text, "missing required key 'name'", field="recipe.step[2].name",
          line=line_of(text, "[[recipe.step]]", 2))


def test_recipe_table_shapes(folder):
    check(folder, MINIMAL + "[recipe]\n", "no [[recipe.step]]", field="recipe.step")
    check(folder, MINIMAL + "[recipe]\nsteps = 1\n", "did you mean 'step'", field="recipe.steps")
    check(folder, MINIMAL + "[recipe.step]\nname = \"a\"\n", "array of tables",
          field="recipe.step")


def test_adjust_step_must_exist_and_oxidise(folder):
    text = edit('adjust_step = "wet"', 'adjust_step = "wett"')
    check(folder, text, "adjust_step 'wett' is not a recipe step", "did you mean 'wet'",
          field="target.adjust_step", line=line_of(text, "adjust_step"))
    text = edit('adjust_step = "wet"', 'adjust_step = "ramp-up"')
    check(folder, text, "runs in N2, which grows no oxide", field="target.adjust_step")
    text = MINIMAL + '[target]\nthickness_nm = 100\ntolerance_pct = 1\nadjust_step = "wet"\n'
    check(folder, text, "no [[recipe.step]]", field="target.adjust_step")
    text = MINIMAL + "[target]\nthickness_nm = 100\n"
    check(folder, text, "missing required key 'tolerance_pct'", field="target.tolerance_pct")


# --------------------------------------------------------------------------- fuzz

FUZZ = settings(max_examples=120, deadline=None,
                suppress_health_check=[HealthCheck.function_scoped_fixture])

_PIECES = st.sampled_from(["=", "[", "]", "[[", "]]", "{", "}", '"', "'", ",", "\n", "#", ".",
                           " ", "-", "0", "1", "99", "1e400", "nan", "inf", "true", "x", "é",
                           "\x00", "..", "/", "*", "layer", "step", "slots", "zones", "\ufeff"])


@FUZZ
@given(st.lists(st.tuples(st.sampled_from(["insert", "delete", "replace", "truncate"]),
                          st.integers(0, 10**6), st.integers(1, 12), _PIECES),
                min_size=1, max_size=5))
def test_fuzz_mutated_lot_file(folder, edits):
    text = BASE
    for op, pos, length, piece in edits:
        pos %= len(text) + 1
        if op == "insert":
            text = text[:pos] + piece + text[pos:]
        elif op == "delete":
            text = text[:pos] + text[pos + length:]
        elif op == "replace":
            text = text[:pos] + piece + text[pos + len(piece):]
        else:
            text = text[:pos]
    path = folder / "fuzz.toml"
    path.write_bytes(text.encode("utf-8"))
    try:
        cfg = read_lot_file(path)
    except FilmmapInputError as exc:
        assert exc.file == str(path)
    else:
        assert cfg.measurement.files and cfg.stack.layers


@FUZZ
@given(st.binary(max_size=300))
def test_fuzz_random_bytes_lot_file(folder, blob):
    path = folder / "fuzz.toml"
    path.write_bytes(blob)
    with pytest.raises(FilmmapInputError):
        read_lot_file(path)


# --------------------------------------------------------------------------- systematics keys

def test_systematics_priors_and_index_scale_keys(folder):
    text = edit('reflectance_unit = "fraction"\n', 'reflectance_unit = "fraction"\n'
                'offset_sigma = 0.001\nscale_sigma = 0\nwavelength_shift_sigma_nm = 0.5\n')
    text = edit('fit = true\n', 'fit = true\nindex_scale = 1.003\nfit_index_scale = true\n', text)
    cfg = read_lot_file(write_lot(folder, text))
    m = cfg.measurement
    assert (m.offset_sigma, m.scale_sigma, m.wavelength_shift_sigma_nm) == (0.001, 0.0, 0.5)
    assert m.angle_offset_sigma_deg is None          # the technique's default applies
    assert cfg.stack.layers[0].index_scale == 1.003 and cfg.stack.layers[0].fit_index_scale
    # what reduce makes of them: the fitted parameters with their priors
    from filmmap.pipeline.reducing import build_stack, lot_systematics
    sys_ = lot_systematics(cfg)
    assert (sys_.offset_sigma, sys_.scale_sigma, sys_.wavelength_shift_nm) == (0.001, 0.0, 0.5)
    _stack, free, _names = build_stack(cfg)
    kinds = {f.kind: f for f in free}
    assert "scale" not in kinds and kinds["offset"].prior_sigma == 0.001
    assert "index_scale" in kinds


def test_fit_offset_alias(folder):
    text = edit('reflectance_unit = "fraction"\n', 'reflectance_unit = "fraction"\nfit_offset = false\n')
    assert read_lot_file(write_lot(folder, text)).measurement.offset_sigma == 0.0
    text = edit('reflectance_unit = "fraction"\n',
                'reflectance_unit = "fraction"\nfit_offset = true\noffset_sigma = 0.002\n')
    check(folder, text, "not both", field="measurement.fit_offset")


@pytest.mark.parametrize("old, new, field, fragment", [
    ('reflectance_unit = "fraction"\n', 'reflectance_unit = "fraction"\noffset_sigma = 2\n',
     "measurement.offset_sigma", "offset_sigma"),
    ('reflectance_unit = "fraction"\n', 'reflectance_unit = "fraction"\nscale_sigma = -0.01\n',
     "measurement.scale_sigma", "scale_sigma"),
    ('reflectance_unit = "fraction"\n', 'reflectance_unit = "fraction"\ndelta_convention = "reversed"\n',
     "measurement.delta_convention", "'ellipsometry' only"),
    ('fit = true\n', 'fit = true\nindex_scale = 1.5\n', "stack.layer[1].index_scale", "index_scale"),
])
def test_bad_systematics_keys_name_the_field(folder, old, new, field, fragment):
    check(folder, edit(old, new), fragment, field=field)


def test_wafer_diameter_bounded(folder):
    # the largest standardised silicon wafer is 450 mm (SEMI M1, from memory)
    check(folder, edit("wafer_diameter_mm = 150\n", "wafer_diameter_mm = 4500\n"),
          "wafer_diameter_mm", field="measurement.wafer_diameter_mm")
