"""Bad input, faults and crashes: the command-level catalogue of bad inputs.

Every case starts from one small valid lot (2 wafers x 9 sites x 61 wavelengths,
spectra from `tmm`, see test_reduce.py), mutates it into one bad input and runs the
command line in this process (`filmmap.cli.main.main`), a handful also through a real
subprocess.  Each bad case must give exit code 2 and a message on stderr that names the
file (its basename at least) and the line (``file:N``) or the field (``field '...'``),
says what was expected, and carries no traceback.  Inputs the format accepts (a UTF-8
byte-order mark, CRLF line ends, spectral columns in any order) must reduce to the
thicknesses the spectra were made with.

Catalogue size (checked by `test_catalogue_summary`, which also prints it): 90 bad-input
cases run in process (3 of them again through a subprocess), every one giving the clear
exit-2 message. Besides the table: 3 accepted variants that must reduce correctly,
partial failure (unusable spectra, a flat spectrum that must not pass as a film), hostile
ids (a long id, two ids with one file-system-safe name), paths outside the lot folder,
untouched inputs, the size limit.
"""

from __future__ import annotations

import hashlib
import re
import shutil
import subprocess
import sys
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pytest
import xarray as xr

from filmmap.cli.main import main
from filmmap.errors import FilmmapInputError
from filmmap.io.lotfile import read_lot_file
from filmmap.io.spectra_csv import read_spectra_csv

from test_reduce import write_lot

# the thicknesses the base lot's spectra are made with (tmm, not filmmap)
THICKNESS = {"A01": (4, np.linspace(150.0, 1350.0, 9)),
             "A02": (5, np.linspace(420.0, 980.0, 9))}
TOL_NM = 0.01          # noise-free round trip, as in test_reduce.py
COMMENTS = 1           # write_lot puts one '#' line before the header
HEADER_LINE = COMMENTS + 1


def row_line(k):
    """1-based line of data row k (0-based) in a file written by write_lot."""
    return HEADER_LINE + 1 + k


@pytest.fixture(scope="module")
def base_lot(tmp_path_factory):
    """The valid lot every case copies: (folder, truth {(wafer, site): nm})."""
    folder = tmp_path_factory.mktemp("base") / "lot"
    lot, truth = write_lot(folder, THICKNESS)
    return lot.parent, truth


@pytest.fixture
def lot_copy(base_lot, tmp_path):
    folder = tmp_path / "lot"
    shutil.copytree(base_lot[0], folder)
    return folder


# --------------------------------------------------------------------------- editing helpers

def read_table(folder, name="A01.csv"):
    lines = (folder / name).read_text(encoding="utf-8").splitlines()
    return lines[:COMMENTS], lines[COMMENTS].split(","), [r.split(",") for r in lines[COMMENTS + 1:]]


def write_table(folder, comments, header, rows, name="A01.csv", sep=",", eol="\n"):
    text = eol.join(comments + [sep.join(header)] + [sep.join(r) for r in rows]) + eol
    (folder / name).write_bytes(text.encode("utf-8"))


def set_cell(name, row, column, value):
    def mutate(folder):
        c, h, rows = read_table(folder, name)
        rows[row][h.index(column)] = value
        write_table(folder, c, h, rows, name)
    return mutate


def rename_column(old, new, names=("A01.csv",)):
    def mutate(folder):
        for name in names:
            c, h, rows = read_table(folder, name)
            h[h.index(old)] = new
            write_table(folder, c, h, rows, name)
    return mutate


def drop_column(column, name="A01.csv"):
    def mutate(folder):
        c, h, rows = read_table(folder, name)
        j = h.index(column)
        write_table(folder, c, h[:j] + h[j + 1:], [r[:j] + r[j + 1:] for r in rows], name)
    return mutate


def add_column(column, value_of, names=("A01.csv",)):
    """Append a column; value_of(header, row) gives the cell."""
    def mutate(folder):
        for name in names:
            c, h, rows = read_table(folder, name)
            write_table(folder, c, h + [column], [r + [value_of(h, r)] for r in rows], name)
    return mutate


def replace_in(name, old, new, count=1):
    def mutate(folder):
        path = folder / name
        text = path.read_text(encoding="utf-8")
        assert old in text, (name, old)
        path.write_text(text.replace(old, new, count), encoding="utf-8")
    return mutate


def append_to(name, text):
    def mutate(folder):
        with open(folder / name, "a", encoding="utf-8") as fh:
            fh.write(text)
    return mutate


def write_bytes(name, data):
    def mutate(folder):
        (folder / name).write_bytes(data)
    return mutate


def chain(*mutations):
    def mutate(folder):
        for m in mutations:
            m(folder)
    return mutate


def data_rows_only(transform, name="A01.csv"):
    """Apply transform(text) to the data rows of a file (comments and header kept)."""
    def mutate(folder):
        lines = (folder / name).read_text(encoding="utf-8").splitlines()
        head, rows = lines[:COMMENTS + 1], lines[COMMENTS + 1:]
        (folder / name).write_text("\n".join(head + [transform(r) for r in rows]) + "\n",
                                   encoding="utf-8")
    return mutate


def whole_file(transform, name="A01.csv"):
    def mutate(folder):
        path = folder / name
        path.write_text(transform(path.read_text(encoding="utf-8")), encoding="utf-8")
    return mutate


def truncate_mid_row(name="A01.csv"):
    """Cut the file in the middle of its last row (a copy interrupted mid-write)."""
    def mutate(folder):
        path = folder / name
        raw = path.read_bytes().rstrip(b"\n")
        last = raw.rfind(b"\n") + 1
        path.write_bytes(raw[:last + (len(raw) - last) // 2])
    return mutate


def multiply_spectra(factor, name="A01.csv"):
    def mutate(folder):
        c, h, rows = read_table(folder, name)
        for r in rows:
            for j, col in enumerate(h):
                if col.startswith("R@"):
                    r[j] = f"{float(r[j]) * factor:.10g}"
        write_table(folder, c, h, rows, name)
    return mutate


def set_wafer_slot(name, wafer, slot):
    """Every row of a file: wafer id and slot replaced."""
    def mutate(folder):
        c, h, rows = read_table(folder, name)
        for r in rows:
            r[h.index("wafer")], r[h.index("slot")] = wafer, str(slot)
        write_table(folder, c, h, rows, name)
    return mutate


RECIPE = """
[target]
thickness_nm = 1000.0
tolerance_pct = 2.0
adjust_step = "wet"

[[recipe.step]]
name = "ramp-up"
ambient = "N2"
minutes = 30
from_C = 800
to_C = 1000

[[recipe.step]]
name = "wet"
ambient = "H2O"
minutes = 160
at_C = 1000
"""

JUNK = bytes(np.random.default_rng(7).integers(0, 256, 3000, dtype=np.uint8)) + b"\x00\x01"


def nk_table(text):
    """The layer as a user material read from n.csv in the lot folder."""
    def mutate(folder):
        (folder / "n.csv").write_text(text)
        replace_in("lot.toml", 'material = "SiO2"',
                   'material = "my-oxide"\nnk_file = "n.csv"')(folder)
    return mutate


def drop_header(text):
    return "\n".join(line for i, line in enumerate(text.splitlines()) if i != COMMENTS) + "\n"


def move_column_first(column, name="A01.csv"):
    def mutate(folder):
        c, h, rows = read_table(folder, name)
        j = h.index(column)
        order = [j] + [k for k in range(len(h)) if k != j]
        write_table(folder, c, [h[k] for k in order], [[r[k] for k in order] for r in rows], name)
    return mutate


def latin1_wafer_id(folder):
    """A wafer id with an e-acute saved as Latin-1 (byte 0xe9), as an old export would."""
    path = folder / "A01.csv"
    raw = path.read_bytes()
    assert b"\nA01,4," in raw
    path.write_bytes(raw.replace(b"\nA01,4,", b"\nA\xe901,4,", 1))


def to_utf16(folder):
    path = folder / "A01.csv"
    path.write_bytes(path.read_text(encoding="utf-8").encode("utf-16"))   # with its BOM


def reference_outside(folder):
    """Raw-intensity mode with the reference spectrum one folder up."""
    (folder.parent / "bare_si.spec").write_text("I@400,I@410\n1000,1000\n")
    replace_in("lot.toml", 'reflectance_unit = "fraction"\n',
               'reference_file = "../bare_si.spec"\n')(folder)


def lot_line(folder, needle):
    """1-based line of the first line of lot.toml containing needle."""
    for i, line in enumerate((folder / "lot.toml").read_text().splitlines(), start=1):
        if needle in line:
            return i
    raise AssertionError(needle)


# --------------------------------------------------------------------------- the catalogue

def reduce_argv(folder, out):
    return ["reduce", str(folder / "lot.toml"), "-o", str(out), "--no-figures", "--quiet"]


@dataclass
class Case:
    """One bad input.

    mutate(folder) turns the valid lot into the bad one.  where(folder) is a regex the
    message must match to name the place: a ``file:line`` or a ``field '...'`` (computed
    from the edited files, not from filmmap).  hints are what the message must say
    (what is wrong and what was expected), case-insensitively.
    """

    mutate: object
    file: str
    where: object
    hints: tuple
    argv: object = reduce_argv
    prepare_out: object = None


def at_line(name, line):
    return lambda folder: rf"{re.escape(name)}:{line}\b"


def at_field(name):
    return lambda folder: rf"field '{re.escape(name)}'"


def at_lot_line(needle, field_name=None):
    """lot.toml:N (N = the line holding needle in the edited file), and the field if given."""
    def where(folder):
        pat = rf"lot\.toml:{lot_line(folder, needle)}\b"
        return pat + (rf".*field '{re.escape(field_name)}'" if field_name else "")
    return where


def whole_file_only(name):
    """Problems of a whole file (empty, unreadable): the file itself is the place."""
    return lambda folder: rf"{re.escape(name)}: "


def predict_argv(*extra):
    return lambda folder, out: ["predict", str(folder / "lot.toml"), *extra]


def reduce_with(*extra):
    return lambda folder, out: ["reduce", str(folder / "lot.toml"), "-o", str(out), "--quiet",
                                "--no-figures", *extra]


def foreign_outdir(out):
    out.mkdir()
    (out / "notes.txt").write_text("someone else's files\n")


def outdir_is_a_file(out):
    out.write_text("not a folder\n")


def case(id, mutate, file, where, *hints, marks=(), **kw):
    return pytest.param(Case(mutate, file, where, hints, **kw), id=id, marks=marks)




CASES = [
    # ---- spectra files: header
    case("missing-column", drop_column("y_mm"), "A01.csv", at_line("A01.csv", HEADER_LINE),
         "missing required column 'y_mm'", "the header needs"),
    case("misspelt-column", rename_column("wafer", "wafr"), "A01.csv",
         at_line("A01.csv", HEADER_LINE), "unknown column 'wafr'", "did you mean 'wafer'"),
    case("misspelt-spectral-column", rename_column("R@500", "R500"), "A01.csv",
         at_line("A01.csv", HEADER_LINE), "unknown column 'R500'", "did you mean 'R@500'"),
    case("bad-wavelength-in-column", rename_column("R@500", "R@abc"), "A01.csv",
         at_line("A01.csv", HEADER_LINE), "expected R@<wavelength in nm>"),
    case("other-technique-columns", rename_column("R@500", "psi@500"), "A01.csv",
         at_line("A01.csv", HEADER_LINE), "belongs to technique 'ellipsometry'", "expects R@<nm>"),
    case("duplicate-column", rename_column("x_mm", "y_mm"), "A01.csv",
         at_line("A01.csv", HEADER_LINE), "duplicate column 'y_mm'"),
    case("empty-column-name", add_column("", lambda h, r: "1"), "A01.csv",
         at_line("A01.csv", HEADER_LINE), "empty column name", "trailing comma"),
    case("no-header", whole_file(drop_header), "A01.csv", at_line("A01.csv", HEADER_LINE),
         "no header row", "expected a header"),
    case("no-header-numeric-first-column", chain(move_column_first("slot"), whole_file(drop_header)),
         "A01.csv", at_line("A01.csv", HEADER_LINE), "no header row",
         "line 2 looks like data", "expected a header naming the columns"),
    case("header-only", whole_file(lambda t: "\n".join(t.splitlines()[:COMMENTS + 1]) + "\n"),
         "A01.csv", at_line("A01.csv", HEADER_LINE), "no data rows", "expected one row per site"),
    case("duplicate-wavelength",
         add_column("R@400.0", lambda h, r: r[h.index("R@400")]), "A01.csv",
         at_line("A01.csv", HEADER_LINE), "duplicate wavelength 400 nm", "'R@400'", "'R@400.0'",
         "expected each wavelength once"),
    case("psi-without-delta",
         chain(replace_in("lot.toml", 'technique = "reflectance"',
                          'technique = "ellipsometry"\nangle_deg = 70.0'),
               replace_in("lot.toml", 'reflectance_unit = "fraction"\n', ""),
               *[rename_column(f"R@{w}", f"{'psi' if w <= 700 else 'delta'}@{w}",
                               ("A01.csv", "A02.csv")) for w in range(400, 1001, 10)]),
         "A01.csv", at_line("A01.csv", HEADER_LINE), "psi@400 has no matching delta@400",
         "expected psi and delta at the same wavelengths"),
    # ---- spectra files: cells
    case("non-numeric-cell", set_cell("A01.csv", 1, "R@500", "abc"), "A01.csv",
         at_line("A01.csv", row_line(1)), "non-numeric cell 'abc' in column 'R@500'",
         "expected a number"),
    case("empty-cell", set_cell("A01.csv", 2, "x_mm", ""), "A01.csv",
         at_line("A01.csv", row_line(2)), "empty cell in column 'x_mm'", "expected a number"),
    case("nan-cell", set_cell("A01.csv", 3, "R@600", "nan"), "A01.csv",
         at_line("A01.csv", row_line(3)), "NaN in column 'R@600'", "expected a finite number"),
    case("inf-cell", set_cell("A01.csv", 0, "R@600", "inf"), "A01.csv",
         at_line("A01.csv", row_line(0)), "+inf in column 'R@600'", "expected a finite number"),
    case("minus-inf-coordinate", set_cell("A01.csv", 4, "y_mm", "-inf"), "A01.csv",
         at_line("A01.csv", row_line(4)), "-inf in column 'y_mm'", "expected a finite number"),
    case("negative-reflectance", set_cell("A01.csv", 5, "R@500", "-0.01"), "A01.csv",
         at_line("A01.csv", row_line(5)), "negative reflectance -0.01 in column 'R@500'",
         "expected reflectance >= 0"),
    case("percent-declared-as-fraction", multiply_spectra(100.0), "A01.csv",
         at_line("A01.csv", row_line(0)), "too large for a fraction 0-1",
         'reflectance_unit = "percent"'),
    case("fraction-declared-as-percent",
         replace_in("lot.toml", 'reflectance_unit = "fraction"', 'reflectance_unit = "percent"'),
         "A01.csv", at_line("A01.csv", row_line(0)), "looks like fractions",
         'set reflectance_unit = "fraction"'),
    case("slot-not-an-integer", set_cell("A01.csv", 0, "slot", "4.5"), "A01.csv",
         at_line("A01.csv", row_line(0)), "slot 4.5 is not a positive integer"),
    case("slot-zero", set_wafer_slot("A01.csv", "A01", 0), "A01.csv",
         at_line("A01.csv", row_line(0)), "slot 0 is not a positive integer"),
    case("site-not-an-integer", set_cell("A01.csv", 6, "site", "2.5"), "A01.csv",
         at_line("A01.csv", row_line(6)), "site 2.5 is not an integer"),
    case("empty-wafer-id", set_cell("A01.csv", 2, "wafer", ""), "A01.csv",
         at_line("A01.csv", row_line(2)), "empty wafer id", "expected a text id"),
    # ---- spectra files: rows and consistency
    case("duplicate-wafer-site",
         whole_file(lambda t: t + t.splitlines()[row_line(3) - 1] + "\n"), "A01.csv",
         at_line("A01.csv", row_line(9)), "duplicate wafer 'A01' site 4",
         f"also at line {row_line(3)}", "expected each (wafer, site) once"),
    case("wafer-in-two-slots-one-file", set_cell("A01.csv", 2, "slot", "8"), "A01.csv",
         at_line("A01.csv", row_line(2)), "wafer 'A01' is in slot 8 here but in slot 4",
         "expected one slot per wafer"),
    case("wafer-in-two-slots-two-files", set_wafer_slot("A02.csv", "A01", 8), "A02.csv",
         at_line("A02.csv", row_line(0)), "wafer 'A01' is in slot 8 here but in slot 4",
         "A01.csv:3", "expected one slot per wafer"),
    case("wafer-in-two-files", set_wafer_slot("A02.csv", "A01", 4), "A02.csv",
         at_line("A02.csv", row_line(0)), "wafer 'A01' appears in two files", "A01.csv:3",
         "expected each wafer in one file"),
    case("two-wafers-in-one-slot", set_wafer_slot("A02.csv", "A02", 4), "A02.csv",
         at_line("A02.csv", row_line(0)), "slot 4 holds wafer 'A02' here but wafer 'A01'",
         "expected one wafer per slot"),
    case("slot-outside-boat",
         chain(append_to("lot.toml", "\n[boat]\nslots = 50\n"),
               set_wafer_slot("A02.csv", "A02", 51)), "A02.csv",
         at_line("A02.csv", row_line(0)), "slot 51 is outside the boat (slots 1..50)"),
    case("site-outside-wafer",
         chain(set_cell("A01.csv", 1, "x_mm", "60"), set_cell("A01.csv", 1, "y_mm", "60")),
         "A01.csv", at_line("A01.csv", row_line(1)), "(x, y) = (60, 60) mm", "84.85",
         "outside the wafer radius 75 mm"),
    case("different-wavelength-sets", drop_column("R@1000", "A02.csv"), "A02.csv",
         at_line("A02.csv", HEADER_LINE), "wavelength set differs", "60 wavelengths",
         "expected the same wavelength columns in every file"),
    # ---- spectra files: the file as a whole
    case("empty-file", write_bytes("A01.csv", b""), "A01.csv", whole_file_only("A01.csv"),
         "empty file", "expected a header row and data rows"),
    case("comments-only", write_bytes("A01.csv", b"# nothing measured\n\n"), "A01.csv",
         whole_file_only("A01.csv"), "no header row", "only comments"),
    case("truncated-file", truncate_mid_row(), "A01.csv", at_line("A01.csv", row_line(8)),
         "truncated row", "but the header has 66 columns"),
    case("binary-junk", write_bytes("A01.csv", JUNK), "A01.csv", lambda f: r"A01\.csv:\d+",
         "binary data", "not a UTF-8 CSV text file"),
    case("not-utf8", latin1_wafer_id,
         "A01.csv", lambda f: r"A01\.csv:\d+", "not UTF-8 text", "expected a UTF-8 CSV"),
    case("utf16", to_utf16, "A01.csv", at_line("A01.csv", 1),
         "UTF-16", "expected UTF-8"),
    case("semicolon-separated", whole_file(lambda t: t.replace(",", ";")), "A01.csv",
         at_line("A01.csv", HEADER_LINE), "semicolon-separated", "expects comma-separated CSV"),
    case("semicolon-and-decimal-comma",
         whole_file(lambda t: t.replace(",", ";").replace(".", ",")), "A01.csv",
         at_line("A01.csv", HEADER_LINE), "semicolon-separated", "decimal points",
         "decimal commas"),
    case("decimal-comma-in-comma-file", data_rows_only(lambda r: r.replace(".", ",")),
         "A01.csv", at_line("A01.csv", row_line(0)), "decimal commas", "decimal points (0.45)"),
    case("tab-separated", whole_file(lambda t: t.replace(",", "\t")), "A01.csv",
         at_line("A01.csv", HEADER_LINE), "tab-separated", "expects comma-separated CSV"),
    case("wavelength-above-material-range",
         add_column("R@1500", lambda h, r: "0.3", ("A01.csv", "A02.csv")), "A01.csv",
         at_field("wavelength"), "material 'Si' is valid for 250-1450 nm",
         "asked for 1500 nm"),
    case("wavelength-below-material-range",
         add_column("R@240", lambda h, r: "0.3", ("A01.csv", "A02.csv")), "A01.csv",
         at_field("wavelength"), "material 'Si' is valid for 250-1450 nm", "240 nm"),
    # ---- lot file
    case("lot-missing-required-key", replace_in("lot.toml", 'id = "T-0001"\n', ""), "lot.toml",
         at_field("lot.id"), "missing required key 'id'"),
    case("lot-missing-files-key", replace_in("lot.toml", 'files = ["*.csv"]\n', ""), "lot.toml",
         at_field("measurement.files"), "missing required key 'files'", "an array of globs"),
    case("lot-missing-stack", whole_file(lambda t: t.split("[stack]")[0], "lot.toml"),
         "lot.toml", at_field("stack"), "missing required [stack] table"),
    case("lot-missing-substrate", replace_in("lot.toml", 'substrate = "Si"\n', ""),
         "lot.toml", at_field("stack.substrate"), "missing required key 'substrate'",
         "(a string)"),
    case("lot-misspelt-key", append_to("lot.toml", "fitt = true\n"), "lot.toml",
         at_lot_line("fitt = true", "stack.layer[1].fitt"), "unknown key 'fitt'",
         "did you mean 'fit'"),
    case("lot-misspelt-table", replace_in("lot.toml", "[measurement]", "[measurment]"),
         "lot.toml", at_lot_line("[measurment]", "measurment"), "unknown key 'measurment'",
         "did you mean 'measurement'"),
    case("lot-wrong-type", replace_in("lot.toml", "wafer_diameter_mm = 150",
                                      'wafer_diameter_mm = "150"'), "lot.toml",
         at_lot_line("wafer_diameter_mm", "measurement.wafer_diameter_mm"),
         "expected a number, found string '150'"),
    case("lot-bad-choice", replace_in("lot.toml", 'technique = "reflectance"',
                                      'technique = "reflectometry"'), "lot.toml",
         at_lot_line("technique", "measurement.technique"), "did you mean 'reflectance'",
         "expected one of"),
    case("lot-edge-exclusion-too-large", replace_in("lot.toml", "edge_exclusion_mm = 3",
                                                    "edge_exclusion_mm = 80"), "lot.toml",
         at_lot_line("edge_exclusion_mm", "measurement.edge_exclusion_mm"),
         "not smaller than the wafer radius 75 mm"),
    case("lot-id-with-slash", replace_in("lot.toml", 'id = "T-0001"', 'id = "T/0001"'),
         "lot.toml", at_lot_line('id = "T/0001"', "lot.id"), "expected a plain lot id"),
    case("toml-syntax-error", chain(replace_in("lot.toml", "search_nm = [5, 3000]",
                                               "search_nm = [5, 3000"),
                                    append_to("lot.toml", "fit = true\n")), "lot.toml",
         lambda f: rf"lot\.toml:{lot_line(f, 'search_nm') + 1}\b", "TOML syntax error",
         "unclosed array"),
    case("toml-unclosed-array-at-end", replace_in("lot.toml", "search_nm = [5, 3000]",
                                                  "search_nm = [5, 3000"), "lot.toml",
         at_lot_line("search_nm"), "TOML syntax error", "unclosed array"),
    case("toml-duplicate-key", replace_in("lot.toml", 'furnace = "test tube"',
                                          'furnace = "test tube"\nfurnace = "tube-3"'),
         "lot.toml", at_lot_line('furnace = "tube-3"'), "TOML syntax error",
         "cannot overwrite a value"),
    case("toml-unquoted-string", replace_in("lot.toml", 'furnace = "test tube"',
                                            "furnace = test tube"), "lot.toml",
         at_lot_line("furnace = test tube"), "TOML syntax error", "invalid value"),
    case("lot-file-binary", write_bytes("lot.toml", JUNK), "lot.toml",
         lambda f: r"lot\.toml:\d+", "binary data, not TOML text"),
    case("lot-file-missing", lambda folder: (folder / "lot.toml").unlink(), "lot.toml",
         whole_file_only("lot.toml"), "cannot read lot file", "No such file"),
    case("unknown-material", replace_in("lot.toml", 'material = "SiO2"', 'material = "SiO3"'),
         "lot.toml", at_lot_line("SiO3", "stack.layer[1].material"), "unknown material 'SiO3'",
         "did you mean 'SiO2'"),
    case("search-range-absurd", replace_in("lot.toml", "search_nm = [5, 3000]",
                                           "search_nm = [5, 1e15]"), "lot.toml",
         at_lot_line("search_nm", "stack.layer[1].search_nm"), "search_nm"),
    case("cauchy-negative-index",
         replace_in("lot.toml", 'material = "SiO2"',
                    'material = "my-oxide"\ncauchy = { A = 0.5, B = -0.4 }'), "lot.toml",
         at_lot_line("cauchy", "stack.layer[1].cauchy"), "n"),
    case("cauchy-range-misses-the-data",
         replace_in("lot.toml", 'material = "SiO2"',
                    'material = "my-oxide"\ncauchy = { A = 1.45, B = 0.004, range_nm = [500, 900] }'),
         "A01.csv", at_field("wavelength"), "material 'my-oxide' is valid for 500-900 nm",
         "asked for 400 nm"),
    case("nk-table-non-numeric", nk_table("wavelength_nm,n,k\n400,1.47,0\n500,abc,0\n"), "n.csv",
         at_line("n.csv", 3), "expected three numbers", "'500,abc,0'"),
    case("nk-table-too-short", nk_table("wavelength_nm,n,k\n400,1.47,0\n"), "n.csv",
         whole_file_only("n.csv"), "needs a header and at least two rows"),
    case("nk-table-bad-header", nk_table("lambda,n,k\n400,1.47,0\n900,1.45,0\n"), "n.csv",
         at_line("n.csv", 1), "expected header 'wavelength_nm,n,k'"),
    case("nk-table-negative-k",
         nk_table("wavelength_nm,n,k\n300,1.47,0\n700,1.46,-0.1\n1200,1.45,0\n"), "n.csv",
         at_line("n.csv", 3), "k must be >= 0"),
    case("nk-table-not-increasing",
         nk_table("wavelength_nm,n,k\n300,1.47,0\n800,1.46,0\n700,1.46,0\n1200,1.45,0\n"),
         "n.csv", at_line("n.csv", 4), "strictly increasing"),
    case("recipe-negative-minutes",
         append_to("lot.toml", RECIPE.replace("minutes = 160", "minutes = -3")), "lot.toml",
         at_lot_line("minutes = -3", "recipe.step[2].minutes"),
         "minutes = -3 min is out of range", "expected 0 < value <= 10080 min"),
    case("recipe-ramp-without-end",
         append_to("lot.toml", RECIPE.replace("to_C = 1000\n", "")), "lot.toml",
         at_field("recipe.step[1].to_C"), "step 'ramp-up' is a ramp with from_C but no to_C",
         "expected the end temperature to_C"),
    case("target-outside-search-range",
         append_to("lot.toml", RECIPE.replace("thickness_nm = 1000.0", "thickness_nm = 6000.0")),
         "lot.toml", at_lot_line("thickness_nm = 6000", "target.thickness_nm"),
         "target thickness 6000 nm is outside the search range [5, 3000] nm"),
    case("adjust-step-not-in-recipe",
         append_to("lot.toml", RECIPE.replace('adjust_step = "wet"', 'adjust_step = "wett"')),
         "lot.toml", at_lot_line('adjust_step = "wett"', "target.adjust_step"),
         "is not a recipe step", "did you mean 'wet'"),
    case("glob-matches-nothing", replace_in("lot.toml", '"*.csv"', '"q*.csv"'), "lot.toml",
         at_lot_line("q*.csv", "measurement.files"), "glob 'q*.csv' matches no data files",
         "expected at least one file"),
    case("glob-leaves-lot-folder", replace_in("lot.toml", '"*.csv"', '"../*.csv"'), "lot.toml",
         at_lot_line("../*.csv", "measurement.files"), "glob '../*.csv' leaves the lot folder",
         "relative to the lot folder"),
    case("glob-absolute", replace_in("lot.toml", '"*.csv"', '"/tmp/*.csv"'), "lot.toml",
         at_lot_line("/tmp/*.csv", "measurement.files"), "leaves the lot folder"),
    case("reference-file-outside", reference_outside, "lot.toml", at_field("measurement.reference_file"), "leaves the lot folder",
         "expected a path inside the lot folder"),
    # ---- command line
    case("outdir-foreign-non-empty", lambda folder: None, "out", at_field("-o"),
         "not empty and was not written by filmmap", "choose a new or empty folder",
         prepare_out=foreign_outdir),
    case("outdir-is-a-file", lambda folder: None, "out", at_field("-o"),
         "exists and is not a folder", prepare_out=outdir_is_a_file),
    case("workers-zero", lambda folder: None, "--workers", at_field("--workers"),
         "--workers must be >= 1", "got 0", argv=reduce_with("--workers", "0")),
    case("workers-negative", lambda folder: None, "--workers", at_field("--workers"),
         "--workers must be >= 1", "got -1", argv=reduce_with("--workers", "-1")),
    case("predict-set-not-a-number", append_to("lot.toml", RECIPE), "--set", at_field("--set"),
         "expected STEP.FIELD=NUMBER", "'wet.minutes=abc'",
         argv=predict_argv("--set", "wet.minutes=abc")),
    case("predict-set-no-field", append_to("lot.toml", RECIPE), "--set", at_field("--set"),
         "expected STEP.FIELD=NUMBER", argv=predict_argv("--set", "wet=170")),
    case("predict-set-unknown-step", append_to("lot.toml", RECIPE), "'nosuch'",
         lambda f: r"field '[^']+'", "no recipe step named 'nosuch'", "'ramp-up', 'wet'",
         argv=predict_argv("--set", "nosuch.minutes=10")),
    case("predict-set-negative-minutes", append_to("lot.toml", RECIPE), "'wet'",
         lambda f: r"field '[^']*minutes'", "minutes must be > 0", "-5",
         argv=predict_argv("--set", "wet.minutes=-5")),
    case("predict-set-key-of-a-ramp-on-a-hold", append_to("lot.toml", RECIPE), "'wet'",
         at_field("overrides.wet.from_C"), "is a hold", "it takes minutes, at_C",
         argv=predict_argv("--set", "wet.from_C=900")),
    case("predict-set-nan", append_to("lot.toml", RECIPE), "'wet'",
         at_field("overrides.wet.minutes"), "must be a finite number",
         argv=predict_argv("--set", "wet.minutes=nan")),
    case("predict-trim-unknown-zone", append_to("lot.toml", RECIPE), "'nozone'",
         at_field("zone_offsets_C"), "zones are 'boat'", argv=predict_argv("--trim", "nozone=2")),
    case("predict-without-recipe", lambda folder: None, "lot.toml",
         lambda f: r"lot\.toml.*field 'recipe'", "no [[recipe.step]]",
         argv=predict_argv()),
    case("predict-advice-missing", append_to("lot.toml", RECIPE), "advice.json",
         whole_file_only("advice.json"), "cannot read effective_offset_C_by_slot",
         argv=lambda folder, out: ["predict", str(folder / "lot.toml"), "--advice",
                                   str(folder / "advice.json")]),
]


def run_case(c, folder, out, capsys):
    argv = c.argv(folder, out)
    capsys.readouterr()
    rc = main(argv)
    return rc, capsys.readouterr().err


def check_message(c, folder, rc, err):
    assert rc == 2, f"exit {rc}, stderr: {err}"
    assert "Traceback" not in err, err
    assert err.startswith("filmmap: error: "), err
    assert err.count("\n") == 1, f"expected a one-line message: {err!r}"
    assert c.file in err, f"{c.file!r} not named: {err}"
    where = c.where(folder)
    assert re.search(where, err), f"place {where!r} not in: {err}"
    for h in c.hints:
        assert h.lower() in err.lower(), f"{h!r} not in: {err}"


@pytest.mark.parametrize("c", CASES)
def test_bad_input_exits_2_with_clear_message(c, lot_copy, tmp_path, capsys):
    c.mutate(lot_copy)
    out = tmp_path / "out"
    if c.prepare_out:
        c.prepare_out(out)
    before = _hashes(tmp_path)
    rc, err = run_case(c, lot_copy, out, capsys)
    assert rc == 2, f"exit {rc}, stderr: {err}"
    assert _hashes(tmp_path) == before, "a failing run changed its inputs or left files behind"
    check_message(c, lot_copy, rc, err)


# one spectra-file, one lot-file and one command-line case (each subprocess spends seconds
# importing; they run side by side)
SUBPROCESS_CASES = ["non-numeric-cell", "toml-syntax-error", "outdir-foreign-non-empty"]


@pytest.fixture(scope="module")
def subprocess_runs(base_lot, tmp_path_factory):
    """The subprocess cases, started together (each spends seconds importing) and awaited."""
    runs = {}
    for p in CASES:
        if p.id not in SUBPROCESS_CASES:
            continue
        c = p.values[0]
        root = tmp_path_factory.mktemp("sub")
        folder = root / "lot"
        shutil.copytree(base_lot[0], folder)
        c.mutate(folder)
        if c.prepare_out:
            c.prepare_out(root / "out")
        proc = subprocess.Popen([sys.executable, "-m", "filmmap.cli.main",
                                 *c.argv(folder, root / "out")],
                                stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
        runs[p.id] = (c, folder, proc)
    results = {}
    for pid, (c, folder, proc) in runs.items():
        stdout, stderr = proc.communicate(timeout=300)
        results[pid] = (c, folder, proc.returncode, stdout, stderr)
    return results


@pytest.mark.parametrize("case_id", SUBPROCESS_CASES)
def test_bad_input_through_subprocess(case_id, subprocess_runs):
    c, folder, rc, stdout, stderr = subprocess_runs[case_id]
    check_message(c, folder, rc, stderr)
    assert stdout == ""


def test_debug_flag_shows_the_traceback(lot_copy, tmp_path, capsys):
    set_cell("A01.csv", 1, "R@500", "abc")(lot_copy)
    rc = main(reduce_argv(lot_copy, tmp_path / "out") + ["--debug"])
    err = capsys.readouterr().err
    assert rc == 2 and "Traceback" in err and "non-numeric cell 'abc'" in err


def test_foreign_outdir_is_left_alone(lot_copy, tmp_path, capsys):
    out = tmp_path / "out"
    foreign_outdir(out)
    assert main(reduce_argv(lot_copy, out)) == 2
    assert sorted(p.name for p in out.iterdir()) == ["notes.txt"]
    assert (out / "notes.txt").read_text() == "someone else's files\n"
    assert not list(tmp_path.glob(".out.filmmap-*"))


# --------------------------------------------------------------------------- accepted inputs

def shuffle_spectral_columns(folder):
    for name in ("A01.csv", "A02.csv"):
        c, h, rows = read_table(folder, name)
        order = list(range(5)) + list(5 + np.random.default_rng(3).permutation(len(h) - 5))
        assert order[5:] != sorted(order[5:])
        write_table(folder, c, [h[j] for j in order], [[r[j] for j in order] for r in rows], name)


def add_bom(folder):
    for name in ("A01.csv", "A02.csv"):
        (folder / name).write_bytes(b"\xef\xbb\xbf" + (folder / name).read_bytes())


def crlf(folder):
    for name in ("A01.csv", "A02.csv"):
        (folder / name).write_bytes((folder / name).read_bytes().replace(b"\n", b"\r\n"))


@pytest.mark.parametrize("mutate", [shuffle_spectral_columns, add_bom, crlf],
                         ids=["non-monotonic-wavelengths", "utf8-bom", "crlf-line-ends"])
def test_accepted_variants_reduce_correctly(mutate, base_lot, lot_copy, tmp_path, capsys):
    mutate(lot_copy)
    out = tmp_path / "out"
    rc = main(reduce_argv(lot_copy, out))
    assert rc == 0, capsys.readouterr().err
    with xr.open_dataset(out / "lot.nc") as ds:
        for (wid, site), d in base_lot[1].items():
            v = float(ds["thickness"].sel(wafer=wid, site=site))
            assert abs(v - d) <= TOL_NM, (wid, site, v, d)
        assert bool(ds["fit_ok"].all())
        np.testing.assert_array_equal(ds["slot"].values, [4, 5])


# --------------------------------------------------------------------------- partial failure

def _reduce_with_unusable_spectra(lot_copy, out, bad, capsys):
    """Replace the spectra of rows {row: values} of A01.csv, reduce (exit 0), return the
    dataset and the site numbers replaced."""
    c, h, rows = read_table(lot_copy, "A01.csv")
    spectral = [j for j, name in enumerate(h) if name.startswith("R@")]
    for k, values in bad.items():
        assert len(values) == len(spectral)
        for j, v in zip(spectral, values):
            rows[k][j] = f"{v:.6f}"
    write_table(lot_copy, c, h, rows, "A01.csv")
    assert main(reduce_argv(lot_copy, out)) == 0, capsys.readouterr().err
    return xr.open_dataset(out / "lot.nc"), [int(rows[k][h.index("site")]) for k in bad]


def _assert_unusable(ds, sites):
    a01 = ds.sel(wafer="A01")
    for s in sites:
        note = str(a01["fit_note"].sel(site=s).values)
        assert np.isnan(float(a01["thickness"].sel(site=s))), (s, note)
        assert np.isnan(float(a01["thickness_sigma"].sel(site=s))), (s, note)
        assert not bool(a01["fit_ok"].sel(site=s)), (s, note)
        assert note.strip() and note != "not measured", s


N_WL = 61


def test_unusable_spectra_fail_honestly_and_the_rest_reduce(base_lot, lot_copy, tmp_path, capsys):
    """Spectra that pass the reader but hold no film: NaN thickness, fit_ok False and a note,
    while every other site of the lot reduces as usual (exit 0)."""
    rng = np.random.default_rng(11)
    bad = {2: rng.uniform(0.0, 0.6, N_WL),      # random numbers
           5: np.full(N_WL, 0.10),               # flat and dim: lamp failing, mis-focused
           7: np.zeros(N_WL),                    # dark: shutter closed
           8: np.full(N_WL, 0.55)}               # flat and bright: saturated detector
    ds, bad_sites = _reduce_with_unusable_spectra(lot_copy, tmp_path / "out", bad, capsys)
    with ds:
        _assert_unusable(ds, bad_sites)
        for (wid, site), d in base_lot[1].items():
            if wid == "A01" and site in bad_sites:
                continue
            assert bool(ds["fit_ok"].sel(wafer=wid, site=site)), (wid, site)
            assert abs(float(ds["thickness"].sel(wafer=wid, site=site)) - d) <= TOL_NM
        assert int(ds["sites_used"].sel(wafer="A01")) <= 9 - len(bad_sites)
        assert int(ds["sites_used"].sel(wafer="A02")) == 9
        assert np.isfinite(float(ds["mean_nm"].sel(wafer="A01")))


def test_flat_spectrum_at_thin_oxide_level_is_not_accepted(lot_copy, tmp_path, capsys):
    ds, bad_sites = _reduce_with_unusable_spectra(lot_copy, tmp_path / "out",
                                                  {5: np.full(N_WL, 0.30)}, capsys)
    with ds:
        _assert_unusable(ds, bad_sites)


# --------------------------------------------------------------------------- no surprises

HOSTILE_WAFER = "<script>alert(\"W'1\")</script>&amp;"
HOSTILE_LOT = "<img src=x onerror=alert('L\"1')>&lt;"


def test_hostile_ids_round_trip_unchanged(lot_copy, tmp_path, capsys):
    c, h, rows = read_table(lot_copy, "A01.csv")
    quoted = '"' + HOSTILE_WAFER.replace('"', '""') + '"'      # CSV quoting of the quotes
    for r in rows:
        r[h.index("wafer")] = quoted
    write_table(lot_copy, c, h, rows, "A01.csv")
    toml_id = HOSTILE_LOT.replace("\\", "\\\\").replace('"', '\\"')
    replace_in("lot.toml", 'id = "T-0001"', f'id = "{toml_id}"')(lot_copy)
    out = tmp_path / "out"
    argv = [a for a in reduce_argv(lot_copy, out) if a != "--no-figures"]   # maps too
    assert main(argv) == 0, capsys.readouterr().err
    with xr.open_dataset(out / "lot.nc") as ds:
        assert ds.attrs["lot_id"] == HOSTILE_LOT
        assert HOSTILE_WAFER in [str(w) for w in ds["wafer"].values]
        assert int(ds["sites_used"].sel(wafer=HOSTILE_WAFER)) == 9
    summary = (out / "summary.csv").read_text(encoding="utf-8")
    assert "<script>" in summary and "&amp;" in summary     # not escaped: raw data file
    # the '/' of '</script>' does not make a figure path leave OUTDIR/figures
    written = [p for p in tmp_path.rglob("*") if p.is_file() and lot_copy not in p.parents]
    assert all(out in p.parents for p in written)
    assert not [p for p in written if set(p.name) & set("<>\"'&")], written
    assert len(list((out / "figures").glob("*.png"))) >= 2


def _rename_wafer(folder, name, new_id):
    c, h, rows = read_table(folder, name)
    for r in rows:
        r[h.index("wafer")] = new_id
    write_table(folder, c, h, rows, name)


def test_long_wafer_id_does_not_crash(lot_copy, tmp_path, capsys):
    # ids are bounded at filmmap.bounds.MAX_ID_CHARS (docs/formats.md, bounds table): a
    # 300-character id is refused naming file, line and field, before anything is written;
    # an id at the bound goes through to the maps (its file name stays under NAME_MAX)
    from filmmap.bounds import MAX_ID_CHARS

    _rename_wafer(lot_copy, "A01.csv", "W" * 300)
    argv = [a for a in reduce_argv(lot_copy, tmp_path / "out") if a != "--no-figures"]
    rc = main(argv)
    err = capsys.readouterr().err
    assert "internal error" not in err and "Traceback" not in err, err
    assert rc == 2 and re.search(r"A01\.csv:\d+, field 'wafer'", err), (rc, err)
    assert f"expected at most {MAX_ID_CHARS}" in err and not (tmp_path / "out").exists()
    _rename_wafer(lot_copy, "A01.csv", "W" * MAX_ID_CHARS)
    assert main(argv) == 0, capsys.readouterr().err
    assert (tmp_path / "out" / "figures" / ("W" * MAX_ID_CHARS + ".png")).is_file()


def test_wafer_ids_sharing_a_figure_name(lot_copy, tmp_path, capsys):
    _rename_wafer(lot_copy, "A01.csv", "a/b")
    _rename_wafer(lot_copy, "A02.csv", "a_b")
    out = tmp_path / "out"
    rc = main([a for a in reduce_argv(lot_copy, out) if a != "--no-figures"])
    err = capsys.readouterr().err
    # the two wafers keep a map each, under distinct file-system-safe names
    assert rc == 0, err
    names = sorted(p.name for p in (out / "figures").iterdir())
    assert len(names) == 2 and len(set(names)) == 2 and not any("/" in n for n in names), names


def test_paths_outside_the_lot_folder_are_refused_unless_allowed(lot_copy, tmp_path):
    outside = tmp_path / "elsewhere"
    outside.mkdir()
    shutil.copy(lot_copy / "A02.csv", outside / "A02.csv")
    (lot_copy / "A02.csv").unlink()
    toml = lot_copy / "lot.toml"
    text = toml.read_text()
    cases = {
        "dotdot glob": text.replace('["*.csv"]', '["*.csv", "../elsewhere/*.csv"]'),
        "absolute glob": text.replace('["*.csv"]', f'["*.csv", "{outside.as_posix()}/*.csv"]'),
    }
    for label, variant in cases.items():
        toml.write_text(variant)
        with pytest.raises(FilmmapInputError) as err:
            read_lot_file(toml)
        assert "leaves the lot folder" in str(err.value) and err.value.field == "measurement.files"
        cfg = read_lot_file(toml, allow_outside=True)
        assert (outside / "A02.csv").resolve() in [p.resolve() for p in cfg.measurement.files], label
    # a symlink inside the folder that points outside it
    (lot_copy / "A02.csv").symlink_to(outside / "A02.csv")
    toml.write_text(text)
    with pytest.raises(FilmmapInputError) as err:
        read_lot_file(toml)
    assert "resolves outside the lot folder" in str(err.value)
    assert len(read_lot_file(toml, allow_outside=True).measurement.files) == 2
    # and the command line (which has no way to allow it) refuses with exit 2
    assert main(reduce_argv(lot_copy, tmp_path / "out")) == 2
    # single paths too: a user material's n,k table one folder up
    (lot_copy / "A02.csv").unlink()
    shutil.copy(outside / "A02.csv", lot_copy / "A02.csv")
    (tmp_path / "n.csv").write_text("wavelength_nm,n,k\n300,1.47,0\n1200,1.45,0\n")
    toml.write_text(text.replace('material = "SiO2"', 'material = "my-oxide"\nnk_file = "../n.csv"'))
    with pytest.raises(FilmmapInputError) as err:
        read_lot_file(toml)
    assert "leaves the lot folder" in str(err.value)
    assert err.value.field == "stack.layer[1].nk_file"
    layer = read_lot_file(toml, allow_outside=True).stack.layers[0]
    assert layer.nk_file.resolve() == (tmp_path / "n.csv").resolve()


def _hashes(root):
    return {str(p.relative_to(root)): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(Path(root).rglob("*")) if p.is_file()}


def test_inputs_are_never_modified(lot_copy, tmp_path, capsys):
    append_to("lot.toml", "\n[boat]\nslots = 50\n")(lot_copy)
    before = _hashes(lot_copy)
    assert len(before) == 3
    assert main(reduce_argv(lot_copy, tmp_path / "out") + ["--keep-spectra"]) == 0
    assert _hashes(lot_copy) == before
    # a run that fails late (after every fit: a site outside the wafer) leaves them alone too
    set_cell("A02.csv", 8, "x_mm", "90")(lot_copy)
    before = _hashes(lot_copy)
    assert main(reduce_argv(lot_copy, tmp_path / "out2")) == 2
    assert "outside the wafer radius" in capsys.readouterr().err
    assert _hashes(lot_copy) == before
    assert not (tmp_path / "out2").exists()


def test_file_larger_than_the_limit_is_refused(base_lot):
    path = base_lot[0] / "A01.csv"
    size = path.stat().st_size
    with pytest.raises(FilmmapInputError) as err:
        read_spectra_csv(path, "reflectance", max_bytes=size - 1)
    assert err.value.file == str(path)
    assert f"file is {size} bytes, larger than the limit of {size - 1} bytes" in str(err.value)
    table = read_spectra_csv(path, "reflectance", max_bytes=size)   # exactly at the limit: read
    assert table.n_rows == 9 and table.n_wavelengths == 61
    with pytest.raises(ValueError):
        read_spectra_csv(path, "reflectance", max_bytes=0)


# --------------------------------------------------------------------------- summary

# every row of the bad-input table in docs/formats.md, and the cases here that cover it
DOCS_ROWS = {
    "empty file": ["empty-file"],
    "no header": ["no-header"],
    "missing column": ["missing-column"],
    "misspelt / unknown column": ["misspelt-column", "misspelt-spectral-column"],
    "non-numeric cell": ["non-numeric-cell", "empty-cell"],
    "NaN / inf": ["nan-cell", "inf-cell", "minus-inf-coordinate"],
    "negative reflectance": ["negative-reflectance"],
    "percent declared as fraction": ["percent-declared-as-fraction"],
    "duplicate wavelength": ["duplicate-wavelength"],
    "psi without delta": ["psi-without-delta"],
    "truncated row": ["truncated-file"],
    "semicolon- or tab-separated": ["semicolon-separated", "semicolon-and-decimal-comma",
                                    "tab-separated"],
    "decimal commas in a comma-separated file": ["decimal-comma-in-comma-file"],
    "different wavelength sets between files": ["different-wavelength-sets"],
    "search range beyond any film": ["search-range-absurd"],
    "Cauchy index below 1": ["cauchy-negative-index"],
    "n,k table rows": ["nk-table-negative-k", "nk-table-not-increasing"],
    "output folder not filmmap's": ["outdir-foreign-non-empty"],
    "output folder holds an input": [],        # tests/test_safety.py, one test per case
    "output folder is a symbolic link": [],    # tests/test_safety.py
    "`--workers 0`": ["workers-zero"],
    "`predict` errors": ["predict-without-recipe", "predict-set-no-field"],
    "binary junk / not UTF-8": ["binary-junk", "not-utf8"],
    "duplicate (wafer, site)": ["duplicate-wafer-site"],
    "one wafer in two slots": ["wafer-in-two-slots-one-file", "wafer-in-two-slots-two-files"],
    "one wafer in two files": ["wafer-in-two-files"],
    "slot outside the boat": ["slot-outside-boat"],
    "site outside the wafer": ["site-outside-wafer"],
    "file too large": [],    # API level: test_file_larger_than_the_limit_is_refused
    "TOML syntax": ["toml-syntax-error", "toml-unquoted-string"],
    "unknown lot-file key": ["lot-misspelt-key", "lot-misspelt-table"],
    "wrong type": ["lot-wrong-type"],
    "missing required key": ["lot-missing-required-key", "lot-missing-files-key"],
    "unknown material": ["unknown-material"],
    "wavelength outside a material's range": ["wavelength-above-material-range",
                                              "wavelength-below-material-range"],
    "glob matches nothing / leaves the lot folder": ["glob-matches-nothing",
                                                     "glob-leaves-lot-folder"],
    "negative step time": ["recipe-negative-minutes"],
    "ramp without end temperature": ["recipe-ramp-without-end"],
    "target outside the search range": ["target-outside-search-range"],
}


def _docs_table_rows():
    text = (Path(__file__).resolve().parents[1] / "docs" / "formats.md").read_text()
    section = text.split("## Bad input: what filmmap says", 1)[1]
    rows = [line.split("|")[1].strip() for line in section.splitlines()
            if line.startswith("|") and not line.startswith("|---")]
    return rows[1:]   # drop the "case | message" header


# cases outside the table that once failed (a flat spectrum accepted as a film, a long wafer
# id crashing the maps, two ids sharing a map file name), kept as regular tests
FORMER_BUGS = ["test_flat_spectrum_at_thin_oxide_level_is_not_accepted",
               "test_long_wafer_id_does_not_crash", "test_wafer_ids_sharing_a_figure_name"]
ACCEPTED_VARIANTS = 3   # test_accepted_variants_reduce_correctly: BOM, CRLF, column order


def test_catalogue_summary(capsys):
    ids = [p.id for p in CASES]
    assert len(ids) == len(set(ids))
    xfails = [p.id for p in CASES if any(m.name == "xfail" for m in p.marks)]
    # every row of the documented table is exercised here ("file too large" at the API level,
    # by test_file_larger_than_the_limit_is_refused)
    undocumented = sorted(set(_docs_table_rows()) - set(DOCS_ROWS))
    assert not undocumented, f"docs/formats.md rows without a case here: {undocumented}"
    for row, covered in DOCS_ROWS.items():
        assert set(covered) <= set(ids), row
    for name in FORMER_BUGS:
        assert callable(globals()[name]) and not getattr(globals()[name], "pytestmark", [])
    n_cases, n_clear = len(ids), len(ids) - len(xfails)
    assert (n_cases, n_clear, len(xfails), len(SUBPROCESS_CASES)) == (90, 90, 0, 3)
    with capsys.disabled():
        sys.stdout.write(
            f"\nbad-input catalogue: {n_cases} cases, {n_clear} give the clear exit-2 message, "
            f"{len(xfails)} xfails; {len(SUBPROCESS_CASES)} also through a subprocess; "
            f"{ACCEPTED_VARIANTS} accepted variants reduce correctly; {len(FORMER_BUGS)} former "
            "bugs outside the table pass\n")
