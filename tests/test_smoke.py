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
