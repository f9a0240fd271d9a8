"""``[target]``: the wanted thickness of the top fitted layer and the step that adjusts it."""

from __future__ import annotations

import difflib

from filmmap.io.lotfile.schema import MAX_SEARCH_NM, OXIDISING_AMBIENTS, TargetConfig


def read_target(rd, doc, stack):
    """The ``[target]`` table as `TargetConfig`, or None; checked against the stack's search
    range (`rd` a `LotReader`, `doc` the parsed file, `stack` its `StackConfig`)."""
    t = rd.table(doc, "target", "")
    if t is None:
        return None
    w = "target"
    rd.keys(t, w, "target")
    thickness = rd.number(t, "thickness_nm", w, required=True, lo=0.0, hi=MAX_SEARCH_NM,
                          lo_open=True, unit=" nm")
    tol = rd.number(t, "tolerance_pct", w, required=True, lo=0.0, hi=100.0, lo_open=True,
                    hi_open=True, unit=" %")
    adjust = rd.string(t, "adjust_step", w)
    layer = stack.layers[stack.top_fitted]
    if layer.search_nm is not None and not layer.search_nm[0] <= thickness <= layer.search_nm[1]:
        rd.fail(f"target thickness {thickness:g} nm is outside the search range "
                f"[{layer.search_nm[0]:g}, {layer.search_nm[1]:g}] nm of the top fitted layer "
                f"stack.layer[{stack.top_fitted + 1}] ({layer.material})", f"{w}.thickness_nm")
    return TargetConfig(thickness_nm=thickness, tolerance_pct=tol, adjust_step=adjust)


def check_adjust_step(rd, target, recipe):
    """``target.adjust_step`` must name an oxidising step of the recipe."""
    if target is None or target.adjust_step is None:
        return
    name = target.adjust_step
    field = "target.adjust_step"
    if not recipe:
        rd.fail(f"adjust_step {name!r} names no recipe step: the lot file has no "
                "[[recipe.step]]", field)
    step = next((s for s in recipe if s.name == name), None)
    if step is None:
        names = [s.name for s in recipe]
        close = difflib.get_close_matches(name, names, n=1, cutoff=0.5)
        hint = f"; did you mean {close[0]!r}?" if close else ""
        rd.fail(f"adjust_step {name!r} is not a recipe step{hint} (steps: "
                f"{', '.join(repr(n) for n in names)})", field)
    if not step.oxidising:
        rd.fail(f"adjust_step {name!r} runs in {step.ambient}, which grows no oxide; expected a "
                f"step with ambient {' or '.join(OXIDISING_AMBIENTS)}", field)


