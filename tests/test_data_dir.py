"""data_dir: spectra in a folder outside the lot folder, named explicitly in the lot file.

The default stays sandboxed (a glob through a symbolic link or '..' is refused); with
``data_dir`` the named folder (even a symbolic link to elsewhere) is read, hashed into
the provenance relative to the lot folder, and left unmodified.
"""

import hashlib
import json
import subprocess
import sys

import pytest
import xarray as xr

from filmmap.errors import FilmmapInputError
from filmmap.io.lotfile import read_lot_file

from test_reduce import write_lot


def _digest(folder):
    return {p.name: hashlib.sha256(p.read_bytes()).hexdigest() for p in sorted(folder.iterdir())}


@pytest.fixture
def layout(tmp_path):
    lot, truth = write_lot(tmp_path / "store" / "run1", {"A01": (4, [100.0, 102.0, 98.0, 101.0,
                                                                      99.0, 100.5, 97.5, 103.0,
                                                                      100.0])})
    data = lot.parent
    lot.unlink()                                  # only the spectra stay in the data folder
    (tmp_path / "lots").mkdir()
    (tmp_path / "lots" / "run1-data").symlink_to(data, target_is_directory=True)
    return tmp_path, data, truth, None


def _lot_text(extra):
    return f'''[lot]
id = "D-1"

[measurement]
technique = "reflectance"
files = ["*.csv"]
{extra}
[stack]
substrate = "Si"

[[stack.layer]]
material = "SiO2"
search_nm = [5, 3000]
'''


def test_default_stays_sandboxed(layout):
    root, data, _truth, _ = layout
    lot = root / "lots" / "lot.toml"
    lot.write_text(_lot_text("").replace('files = ["*.csv"]', 'files = ["run1-data/*.csv"]'))
    with pytest.raises(FilmmapInputError, match="resolves outside the lot folder") as e:
        read_lot_file(lot)
    assert "data_dir" in str(e.value)


def test_named_data_dir_is_read_hashed_and_left_alone(layout):
    root, data, truth, _ = layout
    lot = root / "lots" / "lot.toml"
    lot.write_text(_lot_text('data_dir = "run1-data"\n'))       # a symbolic link, named
    before = _digest(data)
    r = subprocess.run([sys.executable, "-m", "filmmap.cli.main", "reduce", lot, "-o",
                        root / "out", "--no-figures", "--no-history"],
                       capture_output=True, text=True, timeout=300)
    assert r.returncode == 0, r.stderr
    assert _digest(data) == before                                # never modified
    ds = xr.open_dataset(root / "out" / "lot.nc")
    inputs = json.loads(ds.attrs["input_files_sha256"])
    assert [i["file"] for i in inputs] == ["lot.toml", "run1-data/A01.csv"]
    assert inputs[1]["sha256"] == before["A01.csv"]
    assert len(truth) == 9
    for (w, site), d in truth.items():      # noise-free tmm spectra: the 0.01 nm
        assert abs(float(ds["thickness"].sel(wafer=w, site=site)) - d) < 0.01
    # the named data folder as output is refused (replacing it would delete the spectra)
    r = subprocess.run([sys.executable, "-m", "filmmap.cli.main", "reduce", lot, "-o", data,
                        "--no-figures", "--no-history"], capture_output=True, text=True,
                       timeout=300)
    assert r.returncode == 2, r.stderr
    assert _digest(data) == before


def test_missing_data_dir_names_the_key(layout):
    root, *_ = layout
    lot = root / "lots" / "lot.toml"
    lot.write_text(_lot_text('data_dir = "nowhere"\n'))
    with pytest.raises(FilmmapInputError, match="not an existing folder") as e:
        read_lot_file(lot)
    assert e.value.field == "measurement.data_dir" and e.value.line == 7
