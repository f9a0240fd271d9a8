"""Per-site table, lot id in summary.csv, export, CF conventions and JSON Schemas of the outputs.

Outside references:
- NetCDF Climate and Forecast (CF) Metadata Conventions 1.10 (cfconventions.org): the
  ``Conventions`` attribute (2.6.1), ``units`` in udunits syntax (3.1), ``long_name``
  (3.2), ``flag_values`` / ``flag_meanings`` (3.5), strings as character arrays (2.2).
- The CF checker ``cfchecker`` (NCAS-CMS, PyPI), run when installed; it needs the
  udunits-2 C library (Debian ``libudunits2-0``). Version 4.1.0 knows CF up to 1.8, so
  it checks a copy of lot.nc whose Conventions says CF-1.8 (the attributes used here
  mean the same in 1.8 and 1.10). Its standard-name, area-type and region tables are
  fetched from the internet by default; filmmap sets no standard_name, area type or
  region, so empty local tables are given instead (offline).
- udunits-2 unit syntax through ``cfunits`` (which wraps the udunits-2 C library).
- JSON Schema draft 2020-12 through ``jsonschema``.

The outputs are those of the invented demo lot (`filmmap.pipeline.demo`), reduced once per module.
"""

import csv
import json
import shutil
import subprocess
import sys

import numpy as np
import pytest
import xarray as xr

from filmmap.pipeline.demo import generate_demo_lot
from filmmap.growth.advice import ADVICE_KEYS
from filmmap.io.cf import CONVENTIONS, missing_cf_attributes
from filmmap.io.sites_csv import SITES_CSV_COLUMNS
from filmmap.report.summary_json import WAFER_EXTRA_KEYS, WAFER_KEYS
from filmmap.schemas import load_schema


def run_cli(*args, cwd=None):
    return subprocess.run([sys.executable, "-m", "filmmap.cli.main", *map(str, args)],
                          capture_output=True, text=True, cwd=cwd, timeout=600)


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    root = tmp_path_factory.mktemp("demo")
    lot = generate_demo_lot(root / "lot")
    # a relative lot path from the run folder, as a user types it
    r = run_cli("reduce", "lot/lot.toml", "-o", "out", "--keep-spectra", "--no-figures",
                "--no-history", "--quiet", cwd=root)
    assert r.returncode == 0, r.stderr
    return root, lot, root / "out"


def _csv(path):
    with open(path, newline="", encoding="utf-8") as fh:
        rows = list(csv.reader(fh))
    return rows[0], rows[1:]


# ------------------------------------------------------------------------ sites.csv

def test_sites_csv_matches_lot_nc(demo):
    _, _, out = demo
    header, rows = _csv(out / "sites.csv")
    # the columns docs/formats.md states, written out here (the module's constant must agree)
    assert tuple(header) == ("lot_id", "wafer", "slot", "role", "site", "x_mm", "y_mm",
                             "thickness_nm", "sigma_nm", "fit_ok", "suspect", "reason")
    assert tuple(header) == SITES_CSV_COLUMNS
    ds = xr.open_dataset(out / "lot.nc")
    measured = int((ds["fit_note"].values != "not measured").sum())
    assert len(rows) == measured == ds.sizes["wafer"] * ds.sizes["site"]
    col = {c: header.index(c) for c in header}
    for row in rows[::37]:
        w, site = row[col["wafer"]], int(row[col["site"]])
        sel = ds.sel(wafer=w, site=site)
        assert row[col["lot_id"]] == ds.attrs["lot_id"] == "DEMO-W2-0417"
        assert int(row[col["slot"]]) == int(sel["slot"])
        assert row[col["role"]] == str(sel["role"].values)
        # written with 4 decimals (nm) and 3 (mm): half a unit of the last digit
        assert float(row[col["thickness_nm"]]) == pytest.approx(float(sel["thickness"]), abs=5e-5)
        assert float(row[col["sigma_nm"]]) == pytest.approx(float(sel["thickness_sigma"]), abs=5e-5)
        assert float(row[col["x_mm"]]) == pytest.approx(float(sel["x_mm"]), abs=5e-4)
        assert row[col["fit_ok"]] == ("true" if int(sel["fit_ok"]) else "false")
        assert row[col["suspect"]] == ("true" if int(sel["suspect"]) else "false")
        assert row[col["reason"]] == str(sel["fit_note"].values)


def test_sites_csv_rejected_site_has_reason_and_no_thickness():
    from filmmap.io.sites_csv import site_rows

    ds = xr.Dataset(
        {"thickness": (("wafer", "site"), [[100.0, np.nan, np.nan]]),
         "thickness_sigma": (("wafer", "site"), [[0.1, np.nan, np.nan]]),
         "fit_ok": (("wafer", "site"), [[True, False, False]]),
         "suspect": (("wafer", "site"), np.zeros((1, 3), np.int8)),
         "fit_note": (("wafer", "site"), [["", "no convergence", "not measured"]]),
         "x_mm": (("wafer", "site"), [[0.0, 10.0, np.nan]]),
         "y_mm": (("wafer", "site"), [[0.0, 0.0, np.nan]])},
        coords={"wafer": ["A"], "site": [1, 2, 3], "slot": ("wafer", [7])},
        attrs={"lot_id": "L1"})
    _, rows = site_rows(ds)
    assert rows == [["L1", "A", "7", "product", "1", "0.000", "0.000", "100.0000", "0.1000",
                     "true", "false", ""],
                    ["L1", "A", "7", "product", "2", "10.000", "0.000", "", "", "false", "false",
                     "no convergence"]]


# --------------------------------------------------------------------- summary.csv

def test_summary_csv_keeps_pinned_columns_and_adds_lot_id(demo):
    _, _, out = demo
    header, rows = _csv(out / "summary.csv")
    assert tuple(header[:len(WAFER_KEYS)]) == WAFER_KEYS == (
        "wafer", "slot", "role", "mean_nm", "sigma_nm", "nu_pct", "range_nm", "halfrange_pct",
        "sites_used", "in_spec")
    # docs/formats.md: the extras follow the pinned columns (their names are the module's
    # to choose; this only checks the writer follows its declaration) and lot_id comes last
    assert header[-1] == "lot_id"
    assert tuple(header) == WAFER_KEYS + WAFER_EXTRA_KEYS + ("lot_id",)
    assert rows and {r[-1] for r in rows} == {"DEMO-W2-0417"}


# -------------------------------------------------------------------------- export

def test_export_rebuilds_the_tables(demo, tmp_path):
    _, _, out = demo
    r = run_cli("export", out / "lot.nc", "-o", tmp_path / "tables")
    assert r.returncode == 0, r.stderr
    for name in ("sites.csv", "summary.csv"):
        assert (tmp_path / "tables" / name).read_bytes() == (out / name).read_bytes(), name
    header, rows = _csv(tmp_path / "tables" / "spectra.csv")
    sp = xr.open_dataset(out / "spectra.nc")
    assert header[:5] == ["lot_id", "wafer", "slot", "site", "quantity"]
    assert len(rows) == sp.sizes["wafer"] * sp.sizes["site"] * sp.sizes["point"]
    first = rows[0]
    w, site = first[1], int(first[3])
    assert float(first[6]) == float(sp["measured"].sel(wafer=w, site=site).values[0])
    assert float(first[5]) == float(sp["wavelength_nm"].values[0])


def test_export_refuses_the_folder_of_lot_nc_and_a_foreign_file(demo, tmp_path):
    _, _, out = demo
    before = sorted(p.name for p in out.iterdir())
    r = run_cli("export", out / "lot.nc", "-o", out)
    assert r.returncode == 2 and "lot.nc" in r.stderr
    assert sorted(p.name for p in out.iterdir()) == before
    bad = tmp_path / "lot.nc"
    bad.write_text("not netcdf\n")
    r = run_cli("export", bad, "-o", tmp_path / "t")
    assert r.returncode == 2 and str(bad) in r.stderr and "netCDF" in r.stderr


# ------------------------------------------------------------------ CF conventions

def test_lot_nc_and_spectra_nc_carry_cf_attributes(demo):
    _, _, out = demo
    for name in ("lot.nc", "spectra.nc"):
        ds = xr.open_dataset(out / name)
        assert ds.attrs["Conventions"] == CONVENTIONS == "CF-1.10", name
        assert missing_cf_attributes(ds) == [], name
        assert ds.attrs["lot_id"] == "DEMO-W2-0417" and ds.attrs["software"].startswith("filmmap ")
        assert ds.attrs["created"]
    ds = xr.open_dataset(out / "lot.nc")
    assert ds["rms_residual"].attrs["units"] == "1"            # a reflectance fraction
    assert list(ds["fit_ok"].attrs["flag_values"]) == [0, 1]
    assert ds["fit_ok"].attrs["flag_meanings"] == "rejected accepted"
    # the pinned selection by wafer id still works on the file as written
    assert float(ds["mean_nm"].sel(wafer="W2-04")) > 0


def test_units_are_udunits(demo):
    cfunits = pytest.importorskip("cfunits", reason="cfunits (udunits-2 C library) not installed")
    _, _, out = demo
    for name in ("lot.nc", "spectra.nc"):
        ds = xr.open_dataset(out / name)
        units = {var: ds[var].attrs["units"] for var in list(ds.data_vars) + list(ds.coords)
                 if "units" in ds[var].attrs}
        assert "thickness" in units or "wavelength_nm" in units, (name, sorted(units))
        for var, unit in units.items():
            assert cfunits.Units(unit).isvalid, (name, var, unit)
    assert not cfunits.Units("fraction").isvalid   # the unit lot.nc used to carry


def test_xarray_and_netcdf4_read_the_same_types(demo):
    netCDF4 = pytest.importorskip("netCDF4", reason="netCDF4-python not installed")
    _, _, out = demo
    for name in ("lot.nc", "spectra.nc"):
        ds = xr.open_dataset(out / name)
        with netCDF4.Dataset(out / name) as nc:
            compared = [v for v in list(ds.data_vars) + list(ds.coords) if v in nc.variables]
            assert len(compared) >= 3, (name, compared)      # the loop below really runs
            for var in compared:
                a, b = ds[var].dtype, nc.variables[var][...].dtype
                if a.kind in "OUS":    # strings: char arrays, text on both sides
                    assert b.kind in "OUS", (name, var, b)
                else:
                    assert a == b, (name, var, a, b)
    with netCDF4.Dataset(out / "lot.nc") as nc:
        assert nc.variables["fit_ok"][...].dtype == np.int8


_EMPTY_TABLES = {
    "sn.xml": "<standard_name_table><version_number>0</version_number>"
              "<last_modified>2026-01-01T00:00:00Z</last_modified></standard_name_table>",
    "at.xml": "<area_type_table><version_number>0</version_number><date>2026-01-01</date>"
              "</area_type_table>",
    "rn.xml": "<standardized_region_list><version_number>0</version_number>"
              "<date>2026-01-01</date></standardized_region_list>",
}


def _cf_check(path, tmp_path):
    pytest.importorskip("cfunits", reason="cfunits needs the udunits-2 C library "
                                          "(Debian libudunits2-0): CF checker not run")
    checks = pytest.importorskip("cfchecker.cfchecks", reason="cfchecker not installed: "
                                                              "CF checker not run")
    netCDF4 = pytest.importorskip("netCDF4", reason="netCDF4-python not installed")
    for name, text in _EMPTY_TABLES.items():
        (tmp_path / name).write_text('<?xml version="1.0"?>\n' + text)
    copy = tmp_path / path.name
    shutil.copyfile(path, copy)
    with netCDF4.Dataset(copy, "a") as nc:
        assert nc.Conventions == "CF-1.10"
        nc.Conventions = "CF-1.8"          # the newest version cfchecker 4.1 knows
    inst = checks.CFChecker(cfStandardNamesXML=str(tmp_path / "sn.xml"),
                            cfAreaTypesXML=str(tmp_path / "at.xml"),
                            cfRegionNamesXML=str(tmp_path / "rn.xml"),
                            version=checks.CFVersion((1, 8)), silent=True)
    return inst.checker(str(copy))


@pytest.mark.parametrize("name", ["lot.nc", "spectra.nc"])
def test_cf_checker(demo, tmp_path, name):
    _, _, out = demo
    res = _cf_check(out / name, tmp_path)
    errors = [m for v in res["variables"].values() for m in v["ERROR"]] + res["global"]["ERROR"]
    assert errors == []
    warns = {k: v["WARN"] for k, v in res["variables"].items() if v["WARN"]}
    # the only warnings: string-valued dimension coordinates (CF 5 wants them numeric),
    # kept so that ds.sel(wafer="W2-04") works (see filmmap.io.cf)
    assert set(warns) <= {"wafer", "parameter", "parameter_b"}, warns
    assert all("(5)" in w for ws in warns.values() for w in ws)


def test_cf_checker_catches_a_bad_unit(demo, tmp_path):
    # the checker is really looking: the unit lot.nc used to carry is an error
    netCDF4 = pytest.importorskip("netCDF4")
    _, _, out = demo
    bad = tmp_path / "bad"
    bad.mkdir()
    shutil.copyfile(out / "lot.nc", bad / "lot.nc")
    with netCDF4.Dataset(bad / "lot.nc", "a") as nc:
        nc.variables["rms_residual"].units = "fraction"
    res = _cf_check(bad / "lot.nc", tmp_path)
    assert any("fraction" in m for m in res["variables"]["rms_residual"]["ERROR"])


# ---------------------------------------------------------------------- provenance

def test_provenance_paths_are_relative_to_the_lot_folder(demo):
    import hashlib

    root, lot, out = demo
    ds = xr.open_dataset(out / "lot.nc")
    inputs = json.loads(ds.attrs["input_files_sha256"])
    assert inputs[0]["file"] == "lot.toml"
    assert all(not i["file"].startswith("/") and "\\" not in i["file"] for i in inputs)
    for i in inputs:
        data = (lot.parent / i["file"]).read_bytes()
        assert hashlib.sha256(data).hexdigest() == i["sha256"], i["file"]
    assert str(root) not in ds.attrs["input_files_sha256"]


# -------------------------------------------------------------------- JSON Schemas

def _validator(name):
    jsonschema = pytest.importorskip("jsonschema")
    schema = load_schema(name)
    jsonschema.Draft202012Validator.check_schema(schema)
    return jsonschema.Draft202012Validator(schema,
                                           format_checker=jsonschema.FormatChecker())


@pytest.mark.parametrize("name", ["summary", "advice"])
def test_json_outputs_validate_against_shipped_schemas(demo, name):
    _, _, out = demo
    doc = json.loads((out / f"{name}.json").read_text(encoding="utf-8"))
    errors = list(_validator(name).iter_errors(doc))
    assert errors == [], [e.message for e in errors]
    lot_nc = xr.open_dataset(out / "lot.nc")
    created = doc["created"]
    assert created == lot_nc.attrs["created"]
    lot_id = doc["lot"]["id"] if name == "summary" else doc["lot_id"]
    assert lot_id == lot_nc.attrs["lot_id"]


def test_advice_keeps_pinned_key_order_with_format_version_after(demo):
    _, _, out = demo
    doc = json.loads((out / "advice.json").read_text(encoding="utf-8"))
    keys = list(doc)
    # the brief's pinned keys, written out (not read from the module under test)
    pinned = ("adjust_step", "minutes_now", "minutes_next", "zone_offsets_C",
              "effective_offset_C_by_slot", "predicted_wtw_pct_now", "predicted_wtw_pct_next",
              "warnings")
    assert tuple(keys[:len(pinned)]) == pinned == ADVICE_KEYS
    assert keys.index("advice_format") > len(ADVICE_KEYS) and doc["advice_format"] == 1


@pytest.mark.parametrize("name,drop", [("summary", "created"), ("advice", "minutes_next"),
                                       ("advice", "advice_format")])
def test_schemas_reject_a_missing_key(demo, name, drop):
    _, _, out = demo
    doc = json.loads((out / f"{name}.json").read_text(encoding="utf-8"))
    del doc[drop]
    assert list(_validator(name).iter_errors(doc))


def test_schemas_ship_in_the_package_and_docs():
    from importlib import resources
    from pathlib import Path

    docs = Path(__file__).resolve().parents[1] / "docs" / "schemas"
    for name in ("summary", "advice"):
        shipped = resources.files("filmmap.schemas").joinpath(f"{name}.schema.json").read_text()
        assert json.loads(shipped) == load_schema(name)
        assert json.loads((docs / f"{name}.schema.json").read_text()) == load_schema(name)


def test_catch_up_record_still_finds_the_recipe(demo, tmp_path):
    # lot.nc records its inputs relative to the lot folder; a record made later from the
    # published folder (after a crash between publishing and recording) takes the lot
    # file from the folder's pending-record marker instead, so the recipe is not lost
    import os

    from filmmap.history import lots

    _, lot, _ = demo
    out, db = tmp_path / "out", tmp_path / "h.sqlite"
    env = {**os.environ, "FILMMAP_FAULT_AT": "after-publish"}
    r = subprocess.run([sys.executable, "-m", "filmmap.cli.main", "reduce", lot, "-o", out,
                        "--no-figures", "--quiet", "--history", db], capture_output=True,
                       text=True, timeout=600, env=env)
    assert r.returncode == 86, r.stderr
    marker = json.loads((out / ".filmmap-history-pending").read_text())
    assert marker["lot_file"] == str(lot)
    from filmmap.pipeline import complete_pending_record

    complete_pending_record(out)
    (rec,) = lots(db)
    assert rec.lot_id == "DEMO-W2-0417"
    assert [s["name"] for s in rec.recipe][:2] == ["push-and-ramp", "dry-cap"]
