"""``[growth]``: the growth model's pressures, thin regime and rate constants, as the owner sets
them (docs/furnace.md). Every override is bounded far outside any published value
(`filmmap.io.lotfile.schema.RATE_BOUNDS`), so a typo such as an exponent off by ten is caught."""

from __future__ import annotations

from filmmap.growth.deal_grove import OXIDANTS
from filmmap.growth.recipe import THIN_REGIMES
from filmmap.io.lotfile.schema import KEYS, RATE_BOUNDS, GrowthConfig


def _overrides(rd, table, where, schema):
    """The rate-constant overrides present in ``table``, each within `RATE_BOUNDS`."""
    rd.keys(table, where, schema)
    return rd.numbers(table, where, {key: RATE_BOUNDS[key] for key in KEYS[schema]})


def read_growth(rd, doc):
    """The ``[growth]`` table (with ``massoud``, ``O2``, ``H2O`` sub-tables) as `GrowthConfig`,
    or None."""
    t = rd.table(doc, "growth", "")
    if t is None:
        return None
    w = "growth"
    rd.keys(t, w, "growth")
    source = rd.string(t, "wet_source", w, default=None, choices=("bubbler", "pyrogenic"))
    h2o = rd.number(t, "h2o_pressure_atm", w, default=None, lo=0.001, hi=30.0, unit=" atm")
    o2 = rd.number(t, "o2_pressure_atm", w, default=None, lo=0.001, hi=30.0, unit=" atm")
    if source is not None and h2o is not None:
        rd.fail("give wet_source or h2o_pressure_atm, not both", f"{w}.h2o_pressure_atm")
    regime = rd.string(t, "thin_regime", w, default=None, choices=THIN_REGIMES)
    x_i = rd.number(t, "initial_oxide_nm", w, default=None, lo=0.0, hi=100.0, unit=" nm")
    mt = rd.table(t, "massoud", w)
    massoud = {} if mt is None else _overrides(rd, mt, f"{w}.massoud", "growth.massoud")
    ambients = {}
    for amb in OXIDANTS:
        at = rd.table(t, amb, w)
        if at is not None:
            ambients[amb] = _overrides(rd, at, f"{w}.{amb}", "growth.ambient")
    return GrowthConfig(wet_source=source, h2o_pressure_atm=h2o, o2_pressure_atm=o2,
                        thin_regime=regime, initial_oxide_nm=x_i, massoud=massoud,
                        ambients=ambients)
