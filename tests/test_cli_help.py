"""Help in the tool: `filmmap init` (lot-file template), `filmmap check` (validate without
fitting) and `filmmap formats` (the installed formats document)."""

import subprocess
import sys
from pathlib import Path

from filmmap.io.lotfile import read_lot_file

from test_reduce import write_lot

DOCS = Path(__file__).resolve().parents[1] / "docs" / "formats.md"


def run_cli(*args, cwd=None):
    return subprocess.run([sys.executable, "-m", "filmmap.cli.main", *map(str, args)],
                          capture_output=True, text=True, cwd=cwd, timeout=300)


def test_init_writes_a_valid_template_and_never_overwrites(tmp_path):
    r = run_cli("init", cwd=tmp_path)
    assert r.returncode == 0, r.stderr
    lot = tmp_path / "lot.toml"
    config = read_lot_file(lot, require_files=False)
    # every section the issue asks the template to show
    assert config.stack.layers and config.target is not None and config.boat is not None
    assert config.furnace is not None and config.recipe
    text = lot.read_text()
    for key in ("site_map", "slot_map", "file_pattern", "layout", "data_dir"):
        assert f"# {key} = " in text, key
    lot.write_text("# mine\n")
    r = run_cli("init", lot)
    assert r.returncode == 2 and "never overwrites" in r.stderr
    assert lot.read_text() == "# mine\n"


def test_check_validates_without_fitting_or_writing(tmp_path):
    lot, _ = write_lot(tmp_path / "lot", {"A01": (4, [100.0] * 9), "A02": (5, [200.0] * 9)})
    before = sorted(p.name for p in tmp_path.rglob("*"))
    r = run_cli("check", lot)
    assert r.returncode == 0, r.stderr
    assert "OK" in r.stdout and "2 wafer(s)" in r.stdout and "18 site(s)" in r.stdout
    assert sorted(p.name for p in tmp_path.rglob("*")) == before
    # a bad data file: the same message a reduce would give, exit 2, nothing written
    bad = tmp_path / "lot" / "A02.csv"
    lines = bad.read_text().splitlines()
    lines[3] = lines[3].replace("A02,5,", "A02,6,", 1)     # one wafer in two slots
    bad.write_text("\n".join(lines) + "\n")
    r = run_cli("check", lot)
    assert r.returncode == 2 and f"{bad}:4" in r.stderr and "one slot per wafer" in r.stderr


def test_formats_prints_the_document():
    r = run_cli("formats")
    assert r.returncode == 0, r.stderr
    assert r.stdout == DOCS.read_text(encoding="utf-8")
