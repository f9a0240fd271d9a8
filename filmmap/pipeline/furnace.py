"""The furnace model a prediction or a plan runs on, and the jobs behind ``predict`` and ``plan``.

The growth model itself lives in `filmmap.growth`; what a furnace has learned lives in
its run history (`filmmap.history.rate`). This module joins them for one lot file:

- `learn_from_history`: the furnace's growth rate and zone coupling width learned from
  its recorded lots (``--furnace-history``), with the lines the console shows;
- `read_advice_offsets`: the calibrated slot profile of an earlier advice.json
  (``--advice``);
- `predict_recipe` and `plan_recipe`: thickness by zone for a recipe with what-if
  changes, and the step time that hits the target, every value checked first.

    from filmmap.pipeline.furnace import plan_recipe
    result = plan_recipe("lot.toml", trims={"load": 1.5})
    result.plan["minutes_planned"]
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field

from filmmap.bounds import (DEFAULT_MAX_OFFSET_C, MAX_STEP_MINUTES, MAX_TEMPERATURE_OFFSET_K,
                            TEMPERATURE_RANGE_C, check_in_range, check_zone_trims)
from filmmap.errors import FilmmapInputError
from filmmap.io.lotfile import read_lot_file


@dataclass(frozen=True)
class FurnaceLearning:
    """What a furnace's recorded lots say about it, for one lot file.

    Attributes
    ----------
    rate_factors : dict {ambient: factor} or None
        Learned growth-rate factor on top of the lot file's ``[growth]`` (None: the rate
        constants as they are).
    coupling : dict
        ``{"width_slots", "width_source"}`` of a learned zone coupling width, or {}
        (the keywords `filmmap.growth.advice.advise_from_config` takes).
    lines : tuple of str
        What was learned, in words, for the console (each line indented, prefixed
        ``furnace ...:``, ``note:`` or ``warning:``).
    """

    rate_factors: dict | None = None
    coupling: dict = field(default_factory=dict)
    lines: tuple = ()

    def growth(self, config):
        """The lot file's growth settings with the learned rate (`filmmap.growth.settings`)."""
        from filmmap.growth.settings import growth_settings

        return growth_settings(config, rate_factors=self.rate_factors)


NOTHING_LEARNED = FurnaceLearning()
"""The furnace model of the lot file alone (no ``--furnace-history``)."""


def learn_from_history(config, db_path=None):
    """The furnace's growth rate and coupling width learned from its recorded lots.

    Parameters
    ----------
    config : LotConfig
        The lot file; its ``[lot] furnace`` names the furnace.
    db_path : path-like, optional
        History database (None: the per-user default).

    Returns
    -------
    FurnaceLearning
        The rate only when a recorded lot of the furnace has a recipe and a product mean;
        the coupling width only when the lot file has ``[furnace]`` zones without a width
        of its own and the history holds lots run with different trims.

    Raises
    ------
    FilmmapInputError
        The lot file names no furnace.
    """
    from filmmap.growth.settings import growth_settings
    from filmmap.history.rate import learn_coupling, learn_rate
    from filmmap.history.store import lots

    if not config.lot.furnace:
        raise FilmmapInputError("--furnace-history needs the lot file's [lot] furnace name",
                                file=config.path, field="lot.furnace")
    records = lots(db_path, furnace=config.lot.furnace)
    lines = []
    rate_factors = None
    learned = learn_rate(records, config.stack.orientation, growth_settings(config))
    if learned is None:
        lines.append(f"  note: no recorded lot of furnace {config.lot.furnace!r} with a recipe "
                     "and a product mean: the rate constants are used as they are")
    else:
        lines.append(f"  furnace {config.lot.furnace!r}: {learned.describe()}")
        if learned.changed:
            lines.append(f"  warning: {learned.changed}")
        rate_factors = {learned.ambient: learned.factor}
    coupling = {}
    if config.furnace is not None and getattr(config.furnace, "coupling_width_slots",
                                              None) is None:
        from filmmap.growth.calibrate import zones_from_config

        width = learn_coupling(records, zones_from_config(config))
        if width is not None:
            lines.append(f"  furnace {config.lot.furnace!r}: {width.describe()}")
            coupling = {"width_slots": width.width_slots,
                        "width_source": f"the furnace's history: {width.describe()}"}
    return FurnaceLearning(rate_factors, coupling, tuple(lines))


def read_advice_offsets(path, config, limit_K=MAX_TEMPERATURE_OFFSET_K):
    """``effective_offset_C_by_slot`` of an advice.json: slot (in the boat) -> finite K or null.

    Parameters
    ----------
    path : path-like
        advice.json written by ``filmmap reduce``.
    config : LotConfig
        The lot file the offsets are applied to (its boat bounds the slots).
    limit_K : float
        Largest offset magnitude accepted, K.

    Returns
    -------
    dict {str: float or None}

    Raises
    ------
    FilmmapInputError
        Not JSON, not an object with the offsets, a slot outside the boat or an offset
        that is not a number within the limit; naming the file.
    """
    field_name = "effective_offset_C_by_slot"
    try:
        with open(path, encoding="utf-8") as fh:
            advice = json.load(fh)
    except (OSError, ValueError) as exc:
        raise FilmmapInputError(f"cannot read effective_offset_C_by_slot: {exc}; expected "
                                "an advice.json written by filmmap reduce", file=path) from None
    if not isinstance(advice, dict) or not isinstance(advice.get(field_name), dict):
        raise FilmmapInputError(f"expected a JSON object with {field_name!r}, an object of slot "
                                "-> offset in K (an advice.json written by filmmap reduce)",
                                file=path, field=field_name)
    n_slots = config.boat.slots if config.boat is not None else None
    out = {}
    for slot, value in advice[field_name].items():
        if not str(slot).isdigit() or int(slot) < 1 or (n_slots and int(slot) > n_slots):
            raise FilmmapInputError(f"slot {slot!r} is not a slot of the boat in "
                                    f"{config.path}" + (f" (1..{n_slots})" if n_slots else ""),
                                    file=path, field=field_name)
        if value is not None and (isinstance(value, bool) or not isinstance(value, (int, float))
                                  or not abs(value) <= limit_K):
            raise FilmmapInputError(f"slot {slot}: offset {value!r}; expected a number of K "
                                    f"within +-{limit_K:g} or null", file=path, field=field_name)
        out[str(slot)] = value
    return out


def check_trims(trims, config, option="--trim"):
    """Zone trims (K) against the lot file's zones and limit, or its default limit.

    Without ``[furnace]`` the whole boat is one zone and the default limit
    (`filmmap.bounds.DEFAULT_MAX_OFFSET_C`) applies to any name.
    """
    if config.furnace is not None:
        check_zone_trims(trims, config, option)
        return
    for zone, value in trims.items():
        check_in_range(value, option, -DEFAULT_MAX_OFFSET_C, DEFAULT_MAX_OFFSET_C,
                       f"trim {zone}")


def what_if_changes(assignments, option="--set"):
    """``{"STEP.FIELD": value}`` as ``{step: {field: value}}``, each value within its bound.

    Upper physical bounds here, so that a what-if never runs the model on nonsense
    (non-positive and non-finite values are refused by the recipe check, by field).

    Raises
    ------
    FilmmapInputError
        A key without a dot, minutes above `filmmap.bounds.MAX_STEP_MINUTES` or a
        temperature above the furnace range.
    """
    overrides = {}
    for key, value in assignments.items():
        step, dot, fld = key.rpartition(".")
        if not dot:
            raise FilmmapInputError(f"expected STEP.FIELD=NUMBER, got {key!r}", field=option)
        if fld == "minutes" and value > MAX_STEP_MINUTES:
            check_in_range(value, option, 0.0, MAX_STEP_MINUTES, f"step {step!r}: minutes",
                           lo_open=True)
        elif fld in ("at_C", "from_C", "to_C") and value > TEMPERATURE_RANGE_C[1]:
            check_in_range(value, option, *TEMPERATURE_RANGE_C, f"step {step!r}: {fld}",
                           lo_open=True)
        overrides.setdefault(step, {})[fld] = value
    return overrides


@dataclass(frozen=True)
class RecipeOutlook:
    """A prediction or a plan for a lot file's recipe.

    Attributes
    ----------
    config : LotConfig
        The lot file as read (no spectra needed).
    result : dict
        `filmmap.growth.predict.predict_by_zone`'s table (`predict_recipe`) or
        `filmmap.growth.predict.plan_run`'s plan (`plan_recipe`).
    learning : FurnaceLearning
        What the furnace's history contributed.
    """

    config: object
    result: dict
    learning: FurnaceLearning


def _naming_lot_file(lotfile, call):
    """Run ``call``; a model error that names no file is said to be the lot file's."""
    try:
        return call()
    except FilmmapInputError as exc:
        if exc.file is not None:
            raise
        raise FilmmapInputError(exc.reason, file=lotfile, field=exc.field) from None


def predict_recipe(lotfile, changes=None, trims=None, advice=None, furnace_history=False,
                   history=None):
    """Thickness by zone for a lot file's recipe, with what-if changes (``filmmap predict``).

    Parameters
    ----------
    lotfile : path-like
        Lot file with ``[[recipe.step]]`` (spectra files need not exist).
    changes : dict {"STEP.FIELD": float}, optional
        What-if changes of steps (`what_if_changes`), e.g. ``{"wet.minutes": 170.0}``.
    trims : dict {zone: K}, optional
        What-if zone trims (`check_trims`).
    advice : path-like, optional
        advice.json whose calibrated slot profile to use (`read_advice_offsets`).
    furnace_history : bool
        Use the furnace's learned rate and coupling width (`learn_from_history`).
    history : path-like, optional
        History database (None: the per-user default).

    Returns
    -------
    RecipeOutlook
        ``result`` is the table of `filmmap.growth.predict.predict_by_zone`.
    """
    from filmmap.growth.predict import predict_by_zone

    config = read_lot_file(lotfile, require_files=False)   # a what-if needs no spectra
    learning = learn_from_history(config, history) if furnace_history else NOTHING_LEARNED
    overrides = what_if_changes(changes or {})
    trims = trims or {}
    check_trims(trims, config)
    slot_offsets = None if advice is None else read_advice_offsets(advice, config)
    table = _naming_lot_file(lotfile, lambda: predict_by_zone(
        config, overrides or None, trims or None, slot_offsets_C=slot_offsets,
        growth=learning.growth(config), width_slots=learning.coupling.get("width_slots")))
    return RecipeOutlook(config, table, learning)


def plan_recipe(lotfile, trims=None, advice=None, furnace_history=False, history=None):
    """The step time that hits the target, and thickness by zone and slot (``filmmap plan``).

    Parameters
    ----------
    lotfile : path-like
        Lot file with ``[[recipe.step]]`` and ``[target]`` (spectra files need not exist).
    trims, advice, furnace_history, history
        As for `predict_recipe`.

    Returns
    -------
    RecipeOutlook
        ``result`` is the plan of `filmmap.growth.predict.plan_run`.
    """
    from filmmap.growth.predict import plan_run

    config = read_lot_file(lotfile, require_files=False)
    trims = trims or {}
    check_trims(trims, config)
    slot_offsets = None if advice is None else read_advice_offsets(advice, config)
    learning = learn_from_history(config, history) if furnace_history else NOTHING_LEARNED
    out = _naming_lot_file(lotfile, lambda: plan_run(
        config, growth=learning.growth(config), slot_offsets_C=slot_offsets,
        zone_offsets_C=trims or None, width_slots=learning.coupling.get("width_slots")))
    return RecipeOutlook(config, out, learning)
