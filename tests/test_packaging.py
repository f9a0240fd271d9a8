"""The wheel holds every sub-package: pyproject.toml lists packages by name.

A sub-package missing from ``[tool.setuptools] packages`` works in a checkout (and in the
test run, which imports from the checkout) but is absent after ``pip install .``; this
check fails first. An explicit list turns setuptools' automatic package discovery off
(setuptools user guide, "Package Discovery"; from memory).
"""

import tomllib
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def test_every_subpackage_is_in_the_wheel():
    config = tomllib.loads((ROOT / "pyproject.toml").read_text(encoding="utf-8"))
    listed = set(config["tool"]["setuptools"]["packages"])
    found = {".".join(p.parent.relative_to(ROOT).parts)
             for p in (ROOT / "filmmap").rglob("__init__.py")}
    assert found - listed == set(), "add these to [tool.setuptools] packages"
    # the data packages mapped from top-level folders (reference tables, docs)
    mapped = set(config["tool"]["setuptools"]["package-dir"]) - {"filmmap"}
    assert listed - found == mapped
