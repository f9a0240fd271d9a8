"""``[stack]`` and its ``[[stack.layer]]``: substrate, layers, and each layer's material.

A layer's ``material`` names a registry material (`filmmap.materials.available`), or a
user material defined in the layer by an n,k table (``nk_file``, read by
`filmmap.io.nktable.read_nk_table`) or inline Cauchy coefficients (``cauchy``).
"""

from __future__ import annotations

import difflib

import numpy as np

from filmmap.errors import FilmmapInputError
from filmmap.io.lotfile.paths import relative_file
from filmmap.io.lotfile.reader import found
from filmmap.io.lotfile.schema import MAX_SEARCH_NM, CauchySpec, LayerConfig, StackConfig
from filmmap.io.nktable import read_nk_table
from filmmap.materials import Cauchy, available, get_material


def read_stack(rd, doc, folder, allow_outside, lot_path):
    """The ``[stack]`` table as `StackConfig`, each layer's material resolved to a model."""
    t = rd.table(doc, "stack", "", required=True, what="[stack] table")
    rd.keys(t, "stack", "stack")
    substrate = rd.string(t, "substrate", "stack", required=True)
    _registry_material(rd, substrate, "stack.substrate")
    orientation = t.get("orientation", "100")
    if not isinstance(orientation, str):
        rd.fail(f"expected a string \"100\" or \"111\" (quoted), found {found(orientation)}",
                "stack.orientation")
    rd.string(t, "orientation", "stack", choices=("100", "111"))
    raw_layers = rd.tables(t, "layer", "stack", what="layers")
    if raw_layers is None:
        rd.fail("missing [[stack.layer]]; expected one or more layers, top first", "stack.layer")
    layers = tuple(_read_layer(rd, layer, f"stack.layer[{i}]", folder, allow_outside, lot_path)
                   for i, layer in enumerate(raw_layers, start=1))
    if not any(layer.fit for layer in layers):
        rd.fail("no layer has fit = true; expected at least one fitted layer", "stack.layer")
    return StackConfig(substrate=substrate, orientation=orientation, layers=layers)


def _registry_material(rd, name, field, user_hint=False):
    try:
        return get_material(name)
    except FilmmapInputError:
        known = available()
        close = difflib.get_close_matches(name, known, n=1, cutoff=0.5)
        hint = f"; did you mean {close[0]!r}?" if close else ""
        how = (" - or define it in the layer with nk_file = \"table.csv\" or "
               "cauchy = { A = ..., B = ... }") if user_hint else ""
        rd.fail(f"unknown material {name!r}{hint} (known: {', '.join(known)}){how}", field)


def _read_layer(rd, t, where, folder, allow_outside, lot_path):
    rd.keys(t, where, "stack.layer")
    name = rd.string(t, "material", where, required=True)
    has_nk, has_cauchy = "nk_file" in t, "cauchy" in t
    if has_nk and has_cauchy:
        rd.fail("give either nk_file or cauchy for a user material, not both", f"{where}.cauchy")
    nk_file = cauchy = None
    if has_nk or has_cauchy:
        if name in available():
            rd.fail(f"material {name!r} is a built-in name; give the user material "
                    f"({'nk_file' if has_nk else 'cauchy'}) a name of its own",
                    f"{where}.material")
    if has_nk:
        rel = rd.string(t, "nk_file", where)
        nk_file = relative_file(rd, rel, f"{where}.nk_file", folder, allow_outside, "nk_file")
        model = read_nk_table(nk_file, name=name)
        source = "nk_file"
    elif has_cauchy:
        ct = rd.value(t, "cauchy", where, "table")
        cw = f"{where}.cauchy"
        rd.keys(ct, cw, "stack.layer.cauchy")
        a = rd.number(ct, "A", cw, required=True, lo=0.0, lo_open=True)
        b = rd.number(ct, "B", cw, default=0.0)
        c = rd.number(ct, "C", cw, default=0.0)
        rng = rd.pair(ct, "range_nm", cw, default=(200.0, 2000.0))
        cauchy = CauchySpec(A=a, B_um2=b, C_um4=c, range_nm=rng)
        model = Cauchy(name, a, b, c, range_nm=rng, source=f"Cauchy coefficients from {lot_path}")
        probe = np.linspace(rng[0], rng[1], 64)
        n_probe = model(probe).real
        if not np.all(n_probe >= 1.0):
            bad = probe[np.argmin(n_probe)]
            rd.fail(f"Cauchy index n = A + B/lambda^2 + C/lambda^4 falls to {n_probe.min():.3g} at "
                    f"{bad:.0f} nm; expected n >= 1 over range_nm [{rng[0]:g}, {rng[1]:g}] nm", cw)
        source = "cauchy"
    else:
        model = _registry_material(rd, name, f"{where}.material", user_hint=True)
        source = "registry"
    thickness = rd.number(t, "thickness_nm", where, lo=0.0, hi=MAX_SEARCH_NM, unit=" nm")
    search = rd.pair(t, "search_nm", where, max_hi=MAX_SEARCH_NM)
    fit = rd.value(t, "fit", where, "boolean", default=True)
    if fit and thickness == 0 and search is None:
        # the search range is [0.5, 2] x the nominal: a nominal of 0 leaves nothing to search
        rd.fail("thickness_nm = 0 on a fitted layer gives an empty search range ([0.5, 2] x the "
                "nominal); expected a nominal > 0 or search_nm = [lo, hi]",
                f"{where}.thickness_nm")
    if not fit and thickness is None:
        rd.fail("a layer with fit = false needs thickness_nm (its fixed thickness in nm)",
                f"{where}.thickness_nm")
    if thickness is not None and search is not None and not search[0] <= thickness <= search[1]:
        rd.fail(f"thickness_nm = {thickness:g} nm is outside search_nm "
                f"[{search[0]:g}, {search[1]:g}]; expected the nominal inside the search range",
                f"{where}.thickness_nm")
    index_scale = rd.number(t, "index_scale", where, default=1.0, lo=0.8, hi=1.2)
    fit_scale = rd.value(t, "fit_index_scale", where, "boolean", default=False)
    return LayerConfig(material=name, model=model, source=source, nk_file=nk_file, cauchy=cauchy,
                       thickness_nm=thickness, search_nm=search, fit=bool(fit),
                       index_scale=float(index_scale), fit_index_scale=bool(fit_scale))
