"""No module imports from a higher layer (the layer table of docs/architecture.md).

Walks every module of the package with `ast` (imports inside functions count too) and
fails on an import that points up the stack. A new top-level module or package must be
given a layer here and in docs/architecture.md.
"""

import ast
from pathlib import Path

import pytest

import filmmap

#: Top-level module or package of filmmap -> layer (lower layers never import higher ones).
LAYERS = {
    "errors": 0, "bounds": 0, "workers": 0, "atomic": 0, "bridge": 0, "cautions": 0, "reference_data": 0,
    "materials": 1,
    "optics": 2,
    "fitting": 3, "wafermap": 3, "lotstats": 3,
    "growth": 4,
    "io": 5, "schemas": 5,
    "history": 6,
    "report": 7,
    "pipeline": 8,
    "cli": 9,
    "__init__": 10,  # the package root: lazy re-exports of the end-to-end API
}

ROOT = Path(filmmap.__file__).resolve().parent


def imported_modules(text, parts):
    """``(line, [part, ...])`` for every filmmap import in `text`.

    `parts` is the importing module's path inside the package, e.g. ``["io", "results"]``
    or ``["io", "__init__"]``; relative imports are resolved against it.
    """
    package = parts[:-1]
    for node in ast.walk(ast.parse(text)):
        if isinstance(node, ast.ImportFrom):
            if node.level:
                base = package[:len(package) - (node.level - 1)]
                target = base + (node.module.split(".") if node.module else [])
                if not target:
                    target = [node.names[0].name]
                yield node.lineno, target
            elif node.module and node.module.split(".")[0] == "filmmap":
                yield node.lineno, node.module.split(".")[1:] or ["__init__"]
        elif isinstance(node, ast.Import):
            for alias in node.names:
                if alias.name.split(".")[0] == "filmmap":
                    yield node.lineno, alias.name.split(".")[1:] or ["__init__"]


def upward_imports(text, parts):
    """The imports of `text` that point to a higher layer, as readable lines."""
    own = parts[0] if len(parts) > 1 else parts[0]
    own = "__init__" if parts == ["__init__"] else own
    out = []
    for line, target in imported_modules(text, parts):
        other = target[0]
        if other == "__init__":
            continue   # `from filmmap import __version__`: the version string only
        if other not in LAYERS:
            out.append(f"line {line}: imports filmmap.{'.'.join(target)}, which has no layer")
        elif LAYERS[other] > LAYERS[own]:
            out.append(f"line {line}: {own} (layer {LAYERS[own]}) imports "
                       f"filmmap.{'.'.join(target)} (layer {LAYERS[other]})")
    return out


def _modules():
    return sorted(p for p in ROOT.rglob("*.py") if "__pycache__" not in p.parts)


def _parts(path):
    parts = list(path.relative_to(ROOT).with_suffix("").parts)
    return parts


def test_every_top_level_module_has_a_layer():
    tops = {_parts(p)[0] for p in _modules()}
    assert tops <= set(LAYERS), f"give these a layer: {sorted(tops - set(LAYERS))}"


@pytest.mark.parametrize("path", _modules(), ids=lambda p: str(p.relative_to(ROOT)))
def test_no_import_from_a_higher_layer(path):
    problems = upward_imports(path.read_text(encoding="utf-8"), _parts(path))
    assert not problems, f"filmmap/{path.relative_to(ROOT)}:\n" + "\n".join(problems)


@pytest.mark.parametrize("text, parts, caught", [
    ("from filmmap.report import html\n", ["materials", "probe"], True),
    ("def f():\n    import filmmap.pipeline.run\n", ["io", "probe"], True),
    ("from ..history import store\n", ["io", "layouts", "probe"], False),  # io.history: own package
    ("from ...history import store\n", ["io", "layouts", "probe"], True),
    ("from filmmap.materials import Sellmeier\n", ["optics", "probe"], False),
    ("from filmmap import __version__\n", ["io", "probe"], False),
])
def test_the_checker_catches_what_it_should(text, parts, caught):
    """The walk itself, on small probes: upward, inside a function, relative, allowed."""
    assert bool(upward_imports(text, parts)) is caught
