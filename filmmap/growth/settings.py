"""The growth model a lot runs with: oxidant pressures, thin regime and rate constants.

The rate constants of the reference file (`reference/deal_grove_constants.toml`,
Plummer, Deal & Griffin 2000 after Deal & Grove 1965, quoted from memory) describe
Deal & Grove's furnaces, not the user's. The furnace owner states in the lot file's
``[growth]`` what differs:

- the steam partial pressure: a bubbler (water at 95 C carried by O2) gives the
  640 torr of Deal & Grove's own wet data; a pyrogenic torch burns H2 in O2 and gives
  nearly 1 atm of steam;
- the thin regime of dry oxidation: the Deal-Grove initial-oxide rule (x_i), the
  Massoud term, or neither;
- the constants themselves (prefactors, activation energies) or one rate factor per
  ambient, e.g. one learned from the furnace's own history.

B and B/A scale with the oxidant partial pressure (Henry's law, as in Deal & Grove 1965).

References
----------
.. [1] B. E. Deal and A. S. Grove, J. Appl. Phys. 36, 3770-3778 (1965) (640 torr wet
   data; linear pressure dependence of B and B/A).
.. [2] J. D. Plummer, M. D. Deal and P. B. Griffin, Silicon VLSI Technology (2000),
   ch. 6 (constants; pyrogenic steam; from memory).
.. [3] H. Z. Massoud, J. D. Plummer and E. A. Irene, J. Electrochem. Soc. 132, 2685 (1985).
"""

from __future__ import annotations

import copy
from dataclasses import dataclass, field

from filmmap.growth import deal_grove as dg

TORR_PER_ATM = 760.0

PYROGENIC_H2_TO_O2 = 1.8
"""H2 : O2 flow ratio of a pyrogenic torch: below the stoichiometric 2 so that no hydrogen
survives the torch (common practice, no source)."""

WET_SOURCE_PRESSURE_ATM = {
    # water at 95 C carried by O2: Deal & Grove's own wet data (640 torr)
    "bubbler": 640.0 / TORR_PER_ATM,
    # 2 H2 + O2 -> 2 H2O at H2 : O2 = r : 1 and 1 atm total: r H2O and (1 - r/2) O2 left,
    # so p(H2O) = r / (r + 1 - r/2) = 0.947 atm for r = 1.8 (stoichiometry)
    "pyrogenic": PYROGENIC_H2_TO_O2 / (PYROGENIC_H2_TO_O2 + 1.0 - PYROGENIC_H2_TO_O2 / 2.0),
}
"""Steam partial pressure by wet source, atm."""

DRY_O2_PRESSURE_ATM = 1.0
"""Dry oxidation in O2 at atmospheric pressure."""


@dataclass(frozen=True)
class GrowthSettings:
    """What `integrate_recipe`, the calibration and the advice run with.

    Attributes
    ----------
    pressure_atm : dict or None
        ``{"O2": p, "H2O": p}`` in atm; None = the rate data's reference pressures.
    thin_regime : str
        ``"deal-grove"``, ``"massoud"`` or ``"none"``.
    constants : dict or None
        Rate constants shaped like `filmmap.growth.deal_grove.load_constants`, with the
        lot file's overrides; None = the reference file's as they are.
    notes : tuple of str
        Where each deviation from the reference came from (for advice.json).
    """

    pressure_atm: dict | None = None
    thin_regime: str = "deal-grove"
    constants: dict | None = None
    notes: tuple = field(default_factory=tuple)

    def kwargs(self):
        """Keyword arguments for `integrate_recipe` and friends."""
        return dict(pressure_atm=self.pressure_atm, thin_regime=self.thin_regime,
                    constants=self.constants)


def growth_settings(config, rate_factors=None):
    """The growth settings of a lot file (its ``[growth]``, else the reference).

    Parameters
    ----------
    config : filmmap.io.lotfile.LotConfig
    rate_factors : dict, optional
        ``{ambient: factor}`` multiplying B and B/A, e.g. learned from the furnace's history;
        applied on top of the lot file's.

    Returns
    -------
    GrowthSettings
    """
    g = getattr(config, "growth", None)
    if g is None and not rate_factors:
        return GrowthSettings()
    notes = []
    pressures = None
    if g is not None and (g.wet_source or g.h2o_pressure_atm or g.o2_pressure_atm):
        ref = dg.load_constants()
        pressures = {"O2": ref["O2"]["reference_pressure_torr"] / TORR_PER_ATM,
                     "H2O": ref["H2O"]["reference_pressure_torr"] / TORR_PER_ATM}
        if g.wet_source:
            pressures["H2O"] = WET_SOURCE_PRESSURE_ATM[g.wet_source]
            notes.append(f"steam at {pressures['H2O']:.3f} atm ({g.wet_source} source)")
        if g.h2o_pressure_atm is not None:
            pressures["H2O"] = float(g.h2o_pressure_atm)
            notes.append(f"steam at {pressures['H2O']:g} atm (lot file)")
        if g.o2_pressure_atm is not None:
            pressures["O2"] = float(g.o2_pressure_atm)
            notes.append(f"O2 at {pressures['O2']:g} atm (lot file)")
    regime = (g.thin_regime if g is not None and g.thin_regime else "deal-grove")
    if regime != "deal-grove":
        notes.append(f"dry thin regime: {regime}")
    constants = None
    overrides = bool(g is not None and (g.ambients or g.massoud or g.initial_oxide_nm is not None))
    if overrides or rate_factors:
        constants = copy.deepcopy(dg.load_constants())
        if g is not None:
            for amb, vals in g.ambients.items():
                for key, v in vals.items():
                    constants[amb][key] = float(v)
                    notes.append(f"{amb} {key} = {v:g} (lot file)")
            for key, v in g.massoud.items():
                constants["massoud"][key] = float(v)
                notes.append(f"Massoud {key} = {v:g} (lot file)")
            if g.initial_oxide_nm is not None:
                constants["O2"]["initial_oxide_nm"] = float(g.initial_oxide_nm)
                notes.append(f"dry initial oxide x_i = {g.initial_oxide_nm:g} nm (lot file)")
        for amb, factor in (rate_factors or {}).items():
            constants[amb]["rate_factor"] = constants[amb].get("rate_factor", 1.0) * float(factor)
            notes.append(f"{amb} rate x {float(factor):.4g} (learned from the furnace's history)")
    return GrowthSettings(pressure_atm=pressures, thin_regime=regime, constants=constants,
                          notes=tuple(notes))
