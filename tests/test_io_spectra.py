"""Spectra CSV reader: valid files read exactly, every bad file names file, line and column."""

import hashlib
import os

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from filmmap.errors import FilmmapInputError
from filmmap.io import check_tables, read_spectra_csv, read_spectrum_file

FIXED = "wafer,slot,site,x_mm,y_mm"
H = FIXED + ",R@400,R@500,R@600"
ROW1 = "W1,3,1,0,0,0.1,0.2,0.3"
ROW2 = "W1,3,2,10,0,0.11,0.21,0.31"
GOOD = f"# lot test\n{H}\n{ROW1}\n{ROW2}\n"   # header on line 2, rows on lines 3 and 4


def write(tmp_path, text, name="a.csv"):
    path = tmp_path / name
    path.write_bytes(text.encode("utf-8") if isinstance(text, str) else text)
    return path


def error_of(path, technique="reflectance", **kw):
    with pytest.raises(FilmmapInputError) as info:
        read_spectra_csv(path, technique, **kw)
    return info.value


def assert_error(err, path, *fragments, line=None, field=None):
    """The error names the file, the line/field given, and every fragment."""
    assert err.file == str(path)
    assert str(path) in str(err)
    if line is not None:
        assert err.line == line
        assert f"{path}:{line}" in str(err)
    if field is not None:
        assert err.field == field
        assert f"'{field}'" in str(err)
    for fragment in fragments:
        assert fragment in str(err), (fragment, str(err))


def random_table(rng, n_rows, wl, wafer="W7", slot=7):
    data = rng.uniform(0.0, 1.0, (n_rows, len(wl)))
    x = rng.uniform(-50, 50, n_rows)
    y = rng.uniform(-50, 50, n_rows)
    lines = [FIXED + "," + ",".join(f"R@{w!r}" for w in wl)]
    for i in range(n_rows):
        cells = [wafer, slot, i + 1, repr(float(x[i])), repr(float(y[i]))]
        lines.append(",".join(map(str, cells + [repr(float(v)) for v in data[i]])))
    return "\n".join(lines) + "\n", data, x, y


# --------------------------------------------------------------------------- valid files

def test_round_trip_exact(tmp_path):
    rng = np.random.default_rng(1)
    wl = [400.0 + 2.5 * k for k in range(50)]
    text, data, x, y = random_table(rng, 12, wl)
    path = write(tmp_path, text)
    t = read_spectra_csv(path, "reflectance")
    assert t.technique == "reflectance"
    np.testing.assert_array_equal(t.wavelength_nm, wl)
    np.testing.assert_array_equal(t.data["R"], data)
    np.testing.assert_array_equal(t.x_mm, x)
    np.testing.assert_array_equal(t.y_mm, y)
    assert t.wafer.tolist() == ["W7"] * 12
    assert t.slot.tolist() == [7] * 12 and t.slot.dtype.kind == "i"
    assert t.site.tolist() == list(range(1, 13)) and t.site.dtype.kind == "i"
    assert t.line.tolist() == list(range(2, 14))
    assert t.n_rows == 12 and t.n_wavelengths == 50
    assert t.sha256 == hashlib.sha256(path.read_bytes()).hexdigest()


def test_input_file_is_not_modified(tmp_path):
    path = write(tmp_path, GOOD)
    before = (path.read_bytes(), os.stat(path).st_mtime_ns)
    read_spectra_csv(path, "reflectance")
    assert (path.read_bytes(), os.stat(path).st_mtime_ns) == before


def test_comments_blank_lines_and_line_numbers(tmp_path):
    text = f"# one\n\n  # two\n{H}\n\n{ROW1}\n   \n{ROW2}\n\n"
    t = read_spectra_csv(write(tmp_path, text), "reflectance")
    assert t.line.tolist() == [6, 8]
    assert t.site.tolist() == [1, 2]


def test_bom_and_crlf_accepted(tmp_path):
    path = write(tmp_path, "\ufeff" + GOOD.replace("\n", "\r\n"))
    t = read_spectra_csv(path, "reflectance")
    assert t.line.tolist() == [3, 4]
    np.testing.assert_array_equal(t.data["R"][0], [0.1, 0.2, 0.3])


def test_columns_in_any_order_are_sorted_by_wavelength(tmp_path):
    text = "R@600,site,wafer,R@400,x_mm,slot,y_mm,R@500\n0.3,1,W1,0.1,5,2,-5,0.2\n"
    t = read_spectra_csv(write(tmp_path, text), "reflectance")
    np.testing.assert_array_equal(t.wavelength_nm, [400, 500, 600])
    np.testing.assert_array_equal(t.data["R"], [[0.1, 0.2, 0.3]])
    assert (t.slot[0], t.site[0], t.x_mm[0], t.y_mm[0]) == (2, 1, 5.0, -5.0)


def test_percent_converted_to_fraction(tmp_path):
    path = write(tmp_path, f"{H}\nW1,3,1,0,0,10,20,35.5\n")
    t = read_spectra_csv(path, "reflectance", reflectance_unit="percent")
    np.testing.assert_allclose(t.data["R"], [[0.1, 0.2, 0.355]])


def test_ellipsometry_interleaved_columns(tmp_path):
    text = (FIXED + ",psi@500,delta@500,psi@400,delta@400\n"
            "W1,1,1,0,0,30,100,20,-170\nW1,1,2,1,1,31,101,21,359\n")
    t = read_spectra_csv(write(tmp_path, text), "ellipsometry")
    np.testing.assert_array_equal(t.wavelength_nm, [400, 500])
    np.testing.assert_array_equal(t.data["psi"], [[20, 30], [21, 31]])
    np.testing.assert_array_equal(t.data["delta"], [[-170, 100], [359, 101]])
    assert set(t.data) == {"psi", "delta"}


def test_intensity_columns_read_as_counts(tmp_path):
    text = FIXED + ",I@400,I@400.5\nW1,1,1,0,0,12000,-3.5\n"
    t = read_spectra_csv(write(tmp_path, text), "intensity")
    np.testing.assert_array_equal(t.wavelength_nm, [400, 400.5])
    np.testing.assert_array_equal(t.data["I"], [[12000, -3.5]])


def test_quoted_cells_take_the_exact_path(tmp_path):
    text = f'{H}\n"W,1",3,1,0,0,"0.1",0.2,0.3\n"W,1",3,2,0,0,0.1,0.2,0.3\n'
    t = read_spectra_csv(write(tmp_path, text), "reflectance")
    assert t.wafer.tolist() == ["W,1", "W,1"]
    np.testing.assert_array_equal(t.data["R"][0], [0.1, 0.2, 0.3])


def test_several_wafers_in_one_file(tmp_path):
    text = f"{H}\n{ROW1}\nW2,4,1,0,0,0.1,0.2,0.3\n"
    t = read_spectra_csv(write(tmp_path, text), "reflectance")
    assert t.wafer.tolist() == ["W1", "W2"] and t.slot.tolist() == [3, 4]


def test_bad_arguments_are_programming_errors(tmp_path):
    path = write(tmp_path, GOOD)
    with pytest.raises(ValueError, match="technique"):
        read_spectra_csv(path, "xray")
    with pytest.raises(ValueError, match="reflectance_unit"):
        read_spectra_csv(path, "reflectance", reflectance_unit="permille")


# --------------------------------------------------------------------------- file-level errors

def test_empty_file(tmp_path):
    for i, text in enumerate(["", "  \n\n"]):
        path = write(tmp_path, text, f"e{i}.csv")
        assert_error(error_of(path), path, "empty file")


def test_no_header_only_comments(tmp_path):
    path = write(tmp_path, "# just a comment\n\n")
    assert_error(error_of(path), path, "no header row")


def test_header_missing_file_starts_with_data(tmp_path):
    path = write(tmp_path, "# c\n1,3,1,0,0,0.1\n")
    assert_error(error_of(path), path, "no header row", "looks like data", line=2)


def test_no_data_rows(tmp_path):
    path = write(tmp_path, f"{H}\n\n")
    assert_error(error_of(path), path, "no data rows", line=1)


def test_missing_required_column(tmp_path):
    path = write(tmp_path, "# c\n" + H.replace("slot,", "") + "\nW1,1,0,0,0.1,0.2,0.3\n")
    assert_error(error_of(path), path, "missing required column 'slot'", line=2, field="slot")


def test_misspelt_column_suggests_closest(tmp_path):
    path = write(tmp_path, H.replace("wafer", "wafr") + "\n" + ROW1 + "\n")
    assert_error(error_of(path), path, "unknown column 'wafr'", "did you mean 'wafer'",
                 line=1, field="wafr")


def test_misspelt_spectral_columns_suggest_closest(tmp_path):
    path = write(tmp_path, H + ",R500.5\n")
    assert_error(error_of(path), path, "did you mean 'R@500.5'", line=1, field="R500.5")
    path = write(tmp_path, FIXED + ",Psi@400,delta@400\n", "b.csv")
    assert_error(error_of(path, "ellipsometry"), path, "did you mean 'psi@400'", line=1,
                 field="Psi@400")


def test_unknown_column_without_suggestion(tmp_path):
    path = write(tmp_path, H + ",operator\n")
    err = error_of(path)
    assert_error(err, path, "unknown column 'operator'", line=1, field="operator")
    assert "did you mean" not in str(err)


def test_bad_wavelength_in_column_name(tmp_path):
    for i, name in enumerate(["R@abc", "R@0", "R@-5", "R@", "R@inf"]):
        path = write(tmp_path, f"{H},{name}\n", f"w{i}.csv")
        assert_error(error_of(path), path, "positive number", line=1, field=name)


def test_duplicate_fixed_column(tmp_path):
    path = write(tmp_path, H + ",wafer\n")
    assert_error(error_of(path), path, "duplicate column 'wafer'", line=1, field="wafer")


def test_empty_column_name(tmp_path):
    path = write(tmp_path, H + ",\n" + ROW1 + ",\n")
    assert_error(error_of(path), path, "empty column name", "trailing comma", line=1)


def test_duplicate_wavelength_columns(tmp_path):
    path = write(tmp_path, H + ",R@400.0\n" + ROW1 + ",0.4\n")
    assert_error(error_of(path), path, "duplicate wavelength 400 nm", "'R@400'", line=1,
                 field="R@400.0")


def test_no_spectral_columns(tmp_path):
    path = write(tmp_path, FIXED + "\nW1,1,1,0,0\n")
    assert_error(error_of(path), path, "no R@<nm> columns", line=1)


def test_columns_of_another_technique(tmp_path):
    path = write(tmp_path, FIXED + ",psi@400,delta@400\n")
    assert_error(error_of(path), path, "belongs to technique 'ellipsometry'", "R@<nm>", line=1,
                 field="psi@400")
    path = write(tmp_path, H + "\n", "b.csv")
    assert_error(error_of(path, "intensity"), path, "I@<nm>", line=1, field="R@400")


def test_psi_without_matching_delta(tmp_path):
    path = write(tmp_path, "# c\n" + FIXED + ",psi@400,psi@500,delta@400\n")
    assert_error(error_of(path, "ellipsometry"), path, "psi@500 has no matching delta@500",
                 line=2, field="psi@500")
    path = write(tmp_path, FIXED + ",delta@400,psi@500,delta@500\n", "b.csv")
    assert_error(error_of(path, "ellipsometry"), path, "delta@400 has no matching psi@400",
                 line=1, field="delta@400")


def test_psi_and_delta_ranges(tmp_path):
    path = write(tmp_path, FIXED + ",psi@400,delta@400\nW1,1,1,0,0,95,10\n")
    assert_error(error_of(path, "ellipsometry"), path, "psi 95 deg", line=2, field="psi@400")
    path = write(tmp_path, FIXED + ",psi@400,delta@400\nW1,1,1,0,0,45,400\n", "b.csv")
    assert_error(error_of(path, "ellipsometry"), path, "delta 400 deg", line=2, field="delta@400")


def test_not_utf8(tmp_path):
    path = write(tmp_path, b"# c\n" + H.encode() + b"\nW\xe91,3,1,0,0,0.1,0.2,0.3\n")
    assert_error(error_of(path), path, "not UTF-8", line=3)


def test_binary_junk(tmp_path):
    path = write(tmp_path, bytes(range(256)) * 4)
    assert_error(error_of(path), path, "binary data", line=1)


def test_utf16(tmp_path):
    path = write(tmp_path, GOOD.encode("utf-16"))
    assert_error(error_of(path), path, "UTF-16", line=1)


def test_semicolon_separated(tmp_path):
    path = write(tmp_path, "# c\n" + H.replace(",", ";") + "\nW1;3;1;0;0;0.1;0.2;0.3\n")
    err = error_of(path)
    assert_error(err, path, "semicolon-separated", "comma-separated", line=2)
    assert "decimal commas" not in str(err)


def test_semicolon_with_decimal_commas(tmp_path):
    path = write(tmp_path, H.replace(",", ";") + "\nW1;3;1;0;0;0,1;0,2;0,3\n")
    assert_error(error_of(path), path, "semicolon-separated", "decimal commas", line=1)


def test_tab_separated(tmp_path):
    path = write(tmp_path, H.replace(",", "\t") + "\n")
    assert_error(error_of(path), path, "tab-separated", line=1)


def test_decimal_comma_in_comma_file(tmp_path):
    path = write(tmp_path, f"{H}\nW1,3,1,0,0,0,1,0,2,0,3\n")
    assert_error(error_of(path), path, "11 cells", "8 columns", "decimal commas", line=2)
    path = write(tmp_path, f'{H}\nW1,3,1,0,0,"0,1",0.2,0.3\n', "b.csv")
    assert_error(error_of(path), path, "decimal comma", line=2, field="R@400")


def test_truncated_row(tmp_path):
    path = write(tmp_path, f"{H}\n{ROW1}\nW1,3,2,0,0,0.1")  # file cut short mid-row
    assert_error(error_of(path), path, "truncated row", "6 cells", line=3)


def test_too_many_cells_with_semicolons(tmp_path):
    path = write(tmp_path, f"{H}\n{ROW1},0.4;0.5\n")
    assert_error(error_of(path), path, "semicolons", line=2)


def test_malformed_quoting(tmp_path):
    path = write(tmp_path, f'{H}\n{ROW1}\n"W1,3,2,0,0,0.1,0.2,0.3\n')
    assert_error(error_of(path), path, "quoting", line=3)


def test_non_numeric_cell(tmp_path):
    path = write(tmp_path, f"{H}\n{ROW1}\nW1,3,2,0,0,0.1,abc,0.3\n")
    assert_error(error_of(path), path, "non-numeric cell 'abc'", "expected a number", line=3,
                 field="R@500")


def test_python_only_number_syntax_rejected(tmp_path):
    path = write(tmp_path, f"{H}\nW1,3,1,0,0,0.1,1_0,0.3\n")
    assert_error(error_of(path), path, "non-numeric", line=2, field="R@500")


def test_empty_cell(tmp_path):
    path = write(tmp_path, f"{H}\nW1,3,1,0,,0.1,0.2,0.3\n")
    assert_error(error_of(path), path, "empty cell", line=2, field="y_mm")


@pytest.mark.parametrize("cell, word", [("nan", "NaN"), ("inf", "+inf"), ("-Infinity", "-inf"),
                                        ("1e999", "+inf")])
def test_nan_and_inf(tmp_path, cell, word):
    path = write(tmp_path, f"{H}\n{ROW1}\nW1,3,2,0,0,0.1,0.2,{cell}\n")
    assert_error(error_of(path), path, word, "finite", line=3, field="R@600")


def test_nan_position(tmp_path):
    path = write(tmp_path, f"{H}\nW1,3,1,nan,0,0.1,0.2,0.3\n")
    assert_error(error_of(path), path, "NaN", line=2, field="x_mm")


def test_negative_reflectance(tmp_path):
    path = write(tmp_path, f"{H}\n{ROW1}\nW1,3,2,0,0,0.1,-0.01,0.3\n")
    assert_error(error_of(path), path, "negative reflectance -0.01", line=3, field="R@500")


def test_reflectance_above_fraction_suggests_percent(tmp_path):
    path = write(tmp_path, f"{H}\nW1,3,1,0,0,12,35,40\n")
    assert_error(error_of(path), path, 'reflectance_unit = "percent"', "12", line=2,
                 field="R@400")


def test_percent_checks(tmp_path):
    path = write(tmp_path, f"{H}\nW1,3,1,0,0,12,350,40\n")
    assert_error(error_of(path, reflectance_unit="percent"), path, "350%", line=2, field="R@500")
    path = write(tmp_path, GOOD, "b.csv")
    assert_error(error_of(path, reflectance_unit="percent"), path, "looks like fractions",
                 'reflectance_unit = "fraction"', line=3)


def test_duplicate_wafer_site_names_both_lines(tmp_path):
    path = write(tmp_path, f"{H}\n{ROW1}\n{ROW2}\n{ROW1}\n")
    assert_error(error_of(path), path, "duplicate wafer 'W1' site 1", "also at line 2",
                 line=4, field="site")


def test_one_wafer_in_two_slots(tmp_path):
    path = write(tmp_path, f"{H}\n{ROW1}\nW1,4,2,0,0,0.1,0.2,0.3\n")
    assert_error(error_of(path), path, "wafer 'W1' is in slot 4", "slot 3 at line 2",
                 line=3, field="slot")


def test_two_wafers_in_one_slot(tmp_path):
    path = write(tmp_path, f"{H}\n{ROW1}\nW2,3,1,0,0,0.1,0.2,0.3\n")
    assert_error(error_of(path), path, "slot 3 holds wafer 'W2'", "'W1' at line 2", line=3,
                 field="slot")


@pytest.mark.parametrize("slot", ["0", "-2", "2.5", "x"])
def test_slot_not_positive_integer(tmp_path, slot):
    path = write(tmp_path, f"{H}\nW1,{slot},1,0,0,0.1,0.2,0.3\n")
    err = error_of(path)
    assert_error(err, path, line=2, field="slot")
    assert "positive integer" in str(err) or "expected a number" in str(err)


def test_site_not_integer(tmp_path):
    path = write(tmp_path, f"{H}\nW1,1,1.5,0,0,0.1,0.2,0.3\n")
    assert_error(error_of(path), path, "site 1.5 is not an integer", line=2, field="site")


def test_empty_or_unprintable_wafer_id(tmp_path):
    path = write(tmp_path, f"{H}\n ,1,1,0,0,0.1,0.2,0.3\n")
    assert_error(error_of(path), path, "empty wafer id", line=2, field="wafer")
    path = write(tmp_path, f"{H}\nW\x071,1,1,0,0,0.1,0.2,0.3\n", "b.csv")
    assert_error(error_of(path), path, "non-printable", line=2, field="wafer")


def test_file_larger_than_max_bytes(tmp_path):
    path = write(tmp_path, GOOD)
    assert_error(error_of(path, max_bytes=100), path, "larger than the limit of 100 bytes")
    assert read_spectra_csv(path, "reflectance", max_bytes=len(GOOD)).n_rows == 2


def test_missing_file_and_directory(tmp_path):
    path = tmp_path / "nope.csv"
    assert_error(error_of(path), path, "cannot read")
    assert_error(error_of(tmp_path), tmp_path, "directory")


# --------------------------------------------------------------------------- single spectrum

def test_read_spectrum_file(tmp_path):
    path = write(tmp_path, "# dark, 20 ms\nI@500,I@400\n101.5,99.0\n")
    s = read_spectrum_file(path)
    np.testing.assert_array_equal(s.wavelength_nm, [400, 500])
    np.testing.assert_array_equal(s.counts, [99.0, 101.5])
    assert s.line == 3
    assert s.sha256 == hashlib.sha256(path.read_bytes()).hexdigest()


def test_spectrum_file_errors(tmp_path):
    path = write(tmp_path, "I@400,I@500\n1,2\n3,4\n")
    assert_error(pytest.raises(FilmmapInputError, read_spectrum_file, path).value, path,
                 "exactly one data row", line=3)
    path = write(tmp_path, "I@400,R@500\n1,2\n", "b.csv")
    assert_error(pytest.raises(FilmmapInputError, read_spectrum_file, path).value, path,
                 "I@<nm>", line=1, field="R@500")
    path = write(tmp_path, "I@400,I@500\n1,nan\n", "c.csv")
    assert_error(pytest.raises(FilmmapInputError, read_spectrum_file, path).value, path,
                 "NaN", line=2, field="I@500")
    path = write(tmp_path, "wafer,I@400\nW1,2\n", "d.csv")
    assert_error(pytest.raises(FilmmapInputError, read_spectrum_file, path).value, path,
                 "unknown column 'wafer'", line=1, field="wafer")
    path = write(tmp_path, "I@400,I@500\n", "e.csv")
    assert_error(pytest.raises(FilmmapInputError, read_spectrum_file, path).value, path,
                 "exactly one data row", line=1)


def test_counts_to_reflectance_by_hand(tmp_path):
    from types import SimpleNamespace

    from filmmap.io import intensity_to_reflectance, read_dark_and_reference

    # R = (I - dark) / (ref - dark) * R_Si, worked by hand: (550 - 50) / (1050 - 50) * 0.35
    R = intensity_to_reflectance(np.array([[550.0, 80.0]]), np.array([50.0, 100.0]),
                                 np.array([1050.0, 100.0]), np.array([0.35, 0.30]))
    assert R[0, 0] == pytest.approx(0.175, rel=1e-15)   # float rounding only
    assert np.isnan(R[0, 1])                  # reference not above the dark: no reflectance
    ref = write(tmp_path, "I@500,I@400\n900,1000\n", "ref.csv")
    dark = write(tmp_path, "I@400,I@500\n100,950\n", "dark.csv")
    m = SimpleNamespace(raw_intensity=True, reference_file=ref, dark_file=dark)
    err = pytest.raises(FilmmapInputError, read_dark_and_reference, m).value
    assert_error(err, ref, "not above the dark", line=2, field="reference_file")
    assert "at 500 nm" in str(err) and "1 of 2 wavelengths" in str(err)
    m = SimpleNamespace(raw_intensity=True, reference_file=ref, dark_file=None)
    counts, spectrum, read = read_dark_and_reference(m)
    np.testing.assert_array_equal(counts, [0.0, 0.0])
    np.testing.assert_array_equal(spectrum.counts, [1000.0, 900.0])
    assert read == [spectrum]
    assert read_dark_and_reference(SimpleNamespace(raw_intensity=False)) == (None, None, [])


# --------------------------------------------------------------------------- across files

def lot_tables(tmp_path, files):
    return [read_spectra_csv(write(tmp_path, text, name), t)
            for name, text, t in files]


def test_check_tables_accepts_a_consistent_lot(tmp_path):
    tables = lot_tables(tmp_path, [("a.csv", GOOD, "reflectance"),
                                   ("b.csv", f"{H}\nW2,4,1,0,74.9,0.1,0.2,0.3\n", "reflectance")])
    assert check_tables(tables, 150.0, boat_slots=50) is None


def test_check_tables_wafer_in_two_files(tmp_path):
    a, b = lot_tables(tmp_path, [("a.csv", GOOD, "reflectance"),
                                 ("b.csv", f"{H}\nW1,3,9,0,0,0.1,0.2,0.3\n", "reflectance")])
    err = pytest.raises(FilmmapInputError, check_tables, [a, b], 150).value
    assert_error(err, b.path, "wafer 'W1' appears in two files", f"{a.path}:3", line=2,
                 field="wafer")


def test_check_tables_wafer_in_two_slots(tmp_path):
    a, b = lot_tables(tmp_path, [("a.csv", GOOD, "reflectance"),
                                 ("b.csv", f"{H}\nW1,8,9,0,0,0.1,0.2,0.3\n", "reflectance")])
    err = pytest.raises(FilmmapInputError, check_tables, [a, b], 150).value
    assert_error(err, b.path, "wafer 'W1' is in slot 8", f"slot 3 in {a.path}:3", line=2)


def test_check_tables_two_wafers_in_one_slot(tmp_path):
    a, b = lot_tables(tmp_path, [("a.csv", GOOD, "reflectance"),
                                 ("b.csv", f"# c\n{H}\nW2,3,1,0,0,0.1,0.2,0.3\n", "reflectance")])
    err = pytest.raises(FilmmapInputError, check_tables, [a, b], 150).value
    assert_error(err, b.path, "slot 3 holds wafer 'W2'", f"'W1' at {a.path}:3", line=3,
                 field="slot")


def test_check_tables_slot_outside_boat(tmp_path):
    (a,) = lot_tables(tmp_path, [("a.csv", f"# c\n{H}\nW1,51,1,0,0,0.1,0.2,0.3\n",
                                  "reflectance")])
    err = pytest.raises(FilmmapInputError, check_tables, [a], 150, 50).value
    assert_error(err, a.path, "slot 51 is outside the boat", "1..50", line=3, field="slot")


def test_check_tables_site_outside_wafer(tmp_path):
    (a,) = lot_tables(tmp_path, [("a.csv", f"{H}\n{ROW1}\nW1,3,2,60,60,0.1,0.2,0.3\n",
                                  "reflectance")])
    err = pytest.raises(FilmmapInputError, check_tables, [a], 150).value
    assert_error(err, a.path, "outside the wafer radius 75 mm", line=3, field="x_mm")
    assert check_tables([a], 200) is None


def test_check_tables_mixed_technique(tmp_path):
    a, b = lot_tables(tmp_path, [
        ("a.csv", GOOD, "reflectance"),
        ("b.csv", FIXED + ",I@400,I@500,I@600\nW2,4,1,0,0,1,2,3\n", "intensity")])
    err = pytest.raises(FilmmapInputError, check_tables, [a, b], 150).value
    assert_error(err, b.path, "technique 'intensity' differs", str(a.path))


def test_check_tables_different_wavelengths(tmp_path):
    a, b, c = lot_tables(tmp_path, [
        ("a.csv", GOOD, "reflectance"),
        ("b.csv", FIXED + ",R@400,R@550,R@600\nW2,4,1,0,0,0.1,0.2,0.3\n", "reflectance"),
        ("c.csv", FIXED + ",R@400,R@500\nW3,5,1,0,0,0.1,0.2\n", "reflectance")])
    err = pytest.raises(FilmmapInputError, check_tables, [a, b], 150).value
    assert_error(err, b.path, "wavelength set differs", "550 nm here but 500 nm", str(a.path))
    err = pytest.raises(FilmmapInputError, check_tables, [a, c], 150).value
    assert_error(err, c.path, "2 wavelengths 400-500 nm here", "3 wavelengths")


def test_check_tables_same_file_twice(tmp_path):
    (a,) = lot_tables(tmp_path, [("a.csv", GOOD, "reflectance")])
    err = pytest.raises(FilmmapInputError, check_tables, [a, a], 150).value
    assert_error(err, a.path, "listed twice")


def test_check_tables_needs_tables():
    with pytest.raises(FilmmapInputError, match="at least one"):
        check_tables([], 150)


# --------------------------------------------------------------------------- fuzz

FUZZ = settings(max_examples=150, deadline=None,
                suppress_health_check=[HealthCheck.function_scoped_fixture])


def _read_any(path):
    try:
        table = read_spectra_csv(path, "reflectance")
    except FilmmapInputError as exc:
        assert exc.file == str(path)
        return None
    assert table.data["R"].shape == (table.n_rows, table.n_wavelengths)
    assert np.all(np.isfinite(table.data["R"]))
    assert np.all(np.diff(table.wavelength_nm) > 0)
    return table


@FUZZ
@given(st.binary(max_size=400))
def test_fuzz_random_bytes(tmp_path, blob):
    path = tmp_path / "fuzz.csv"
    path.write_bytes(blob)
    _read_any(path)
    try:
        read_spectrum_file(path)
    except FilmmapInputError:
        pass


_PIECES = st.sampled_from([",", ";", '"', "\n", "\r", "\r\n", "#", " ", "\t", "@", ".", "-",
                           "e", "nan", "inf", "0", "1", "9", "R@", "psi@", "x", "\x00", "\ufeff",
                           "é", "1e999", "W1", "wafer", "slot"])


@FUZZ
@given(st.lists(st.tuples(st.sampled_from(["insert", "delete", "replace", "truncate"]),
                          st.integers(0, 10**6), st.integers(1, 8), _PIECES),
                min_size=1, max_size=6))
def test_fuzz_mutated_valid_file(tmp_path, edits):
    text = GOOD + "W2,5,1,1,1,0.4,0.5,0.6\n"
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
    path = tmp_path / "fuzz.csv"
    path.write_bytes(text.encode("utf-8", "surrogatepass"))
    _read_any(path)


@FUZZ
@given(st.lists(st.text(alphabet=",;\"\n0123456789.-eRI@#wafer slot", max_size=30),
                max_size=6))
def test_fuzz_random_text_lines(tmp_path, lines):
    path = tmp_path / "fuzz.csv"
    path.write_text(H + "\n" + "\n".join(lines), encoding="utf-8")
    _read_any(path)
