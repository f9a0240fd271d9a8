"""JSON Schemas (draft 2020-12) of filmmap's JSON outputs, shipped with the package.

``summary.schema.json`` describes summary.json, ``advice.schema.json`` advice.json.
Load one with `load_schema`; validate with the ``jsonschema`` package (a test
dependency, not needed to run filmmap).
"""

from __future__ import annotations

import json
from importlib import resources

SCHEMAS = ("summary", "advice")


def load_schema(name):
    """The JSON Schema of output ``name`` ('summary' or 'advice') as a dict."""
    if name not in SCHEMAS:
        raise ValueError(f"no schema {name!r}; expected one of {SCHEMAS}")
    text = resources.files(__name__).joinpath(f"{name}.schema.json").read_text(encoding="utf-8")
    return json.loads(text)
