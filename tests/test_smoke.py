"""The package imports and the console entry point answers."""

import subprocess
import sys

import filmmap


def test_version_string():
    assert filmmap.__version__.count(".") == 2


def test_cli_version_runs():
    out = subprocess.run([sys.executable, "-m", "filmmap.cli.main", "--version"],
                         capture_output=True, text=True, check=True)
    assert out.stdout.startswith("filmmap ")


def test_end_to_end_api_is_exported_lazily():
    # `import filmmap` loads no numerical library; the four names of the whole job load
    # their modules on first use and are the pipeline's own functions
    code = ("import sys, filmmap; heavy = [m for m in ('numpy', 'xarray', 'scipy') "
            "if m in sys.modules]; print(heavy); print(sorted(filmmap.__all__))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True).stdout.splitlines()
    assert out[0] == "[]"
    assert "reduce_to_folder" in out[1] and "lot_view" in out[1]
    from filmmap.io.lotfile import read_lot_file
    from filmmap.lotstats.view import lot_view
    from filmmap.pipeline.reducing import reduce_lot
    from filmmap.pipeline.run import reduce_to_folder

    assert (filmmap.reduce_to_folder, filmmap.reduce_lot, filmmap.read_lot_file,
            filmmap.lot_view) == (reduce_to_folder, reduce_lot, read_lot_file, lot_view)
    try:
        filmmap.no_such_name
    except AttributeError as exc:
        assert "no_such_name" in str(exc)
    else:
        raise AssertionError("an unknown name must raise AttributeError")
