"""Thermal oxide growth: Deal-Grove kinetics and integration through furnace recipes.

Units: thickness nm, time minutes, temperature degrees Celsius, pressure atm; rate
constants in the literature's um and hours (see `deal_grove`).
"""

from filmmap.growth.deal_grove import (
    BOLTZMANN_EV,
    ORIENTATIONS,
    OXIDANTS,
    RateConstants,
    growth_rate_nm_per_min,
    initial_oxide_nm,
    linear_B_over_A,
    load_constants,
    massoud_C,
    massoud_decay_length_nm,
    oxidation_minutes,
    oxide_thickness_nm,
    parabolic_B,
    pressure_factor,
    rate_constants,
    reference_pressure_atm,
    tau_minutes,
)
from filmmap.growth.recipe import (
    AMBIENTS,
    DEFAULT_TEMPERATURE_RANGE_C,
    THIN_REGIMES,
    Step,
    integrate_recipe,
    minutes_for_target,
    step_index,
    step_thicknesses,
    thickness_sensitivity_to_minutes,
    thickness_sensitivity_to_temperature,
    validate_steps,
)

__all__ = [
    "AMBIENTS", "BOLTZMANN_EV", "DEFAULT_TEMPERATURE_RANGE_C", "ORIENTATIONS", "OXIDANTS",
    "RateConstants", "Step", "THIN_REGIMES",
    "growth_rate_nm_per_min", "initial_oxide_nm", "integrate_recipe", "linear_B_over_A",
    "load_constants", "massoud_C", "massoud_decay_length_nm", "minutes_for_target",
    "oxidation_minutes", "oxide_thickness_nm", "parabolic_B", "pressure_factor",
    "rate_constants", "reference_pressure_atm", "step_index", "step_thicknesses",
    "tau_minutes", "thickness_sensitivity_to_minutes", "thickness_sensitivity_to_temperature",
    "validate_steps",
]
