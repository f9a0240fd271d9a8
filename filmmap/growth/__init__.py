"""Thermal oxide growth: Deal-Grove kinetics, recipe integration, calibration and advice.

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
    temperatures_outside_range,
    thickness_sensitivity_to_minutes,
    thickness_sensitivity_to_temperature,
    validate_steps,
)
from filmmap.growth.calibrate import (
    COUPLING_SHAPES,
    DEFAULT_INITIAL_NM,
    SlotCalibration,
    ZoneFit,
    calibrate_slots,
    fit_zones,
    gain_matrix,
    normalise_zones,
    steps_from_config,
    with_minutes,
    zones_from_config,
)
from filmmap.growth.advice import ADVICE_KEYS, CAUTION, advise, advise_from_config, roles_from_boat
from filmmap.growth.predict import apply_overrides, predict_by_zone

__all__ = [
    "AMBIENTS", "BOLTZMANN_EV", "DEFAULT_TEMPERATURE_RANGE_C", "ORIENTATIONS", "OXIDANTS",
    "RateConstants", "Step", "THIN_REGIMES",
    "growth_rate_nm_per_min", "initial_oxide_nm", "integrate_recipe", "linear_B_over_A",
    "load_constants", "massoud_C", "massoud_decay_length_nm", "minutes_for_target",
    "oxidation_minutes", "oxide_thickness_nm", "parabolic_B", "pressure_factor",
    "rate_constants", "reference_pressure_atm", "step_index", "step_thicknesses",
    "tau_minutes", "temperatures_outside_range", "thickness_sensitivity_to_minutes",
    "thickness_sensitivity_to_temperature",
    "validate_steps",
    # calibration, advice, prediction
    "ADVICE_KEYS", "CAUTION", "COUPLING_SHAPES", "DEFAULT_INITIAL_NM", "SlotCalibration",
    "ZoneFit", "advise", "advise_from_config", "apply_overrides", "calibrate_slots",
    "fit_zones", "gain_matrix", "normalise_zones", "predict_by_zone", "roles_from_boat",
    "steps_from_config", "with_minutes", "zones_from_config",
]
