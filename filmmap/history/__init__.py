"""Run history and run-to-run control of a furnace.

`store`
    An embedded SQLite history of reduced lots (WAL mode, one transaction per write,
    schema migrations): `record_lot`, `lots`, `record_from_outputs`.
`charts`
    Shewhart individuals charts with the Western Electric run rules, EWMA charts, their
    figures and a self-contained HTML page: `individuals_chart`, `ewma_chart`,
    `control_charts`, `history_figures`, `history_html`.
`r2r`
    Run-to-run control: EWMA estimates of the furnace's effective offsets across lots and
    the next run's time and zone trims: `estimate_from_records`, `next_run`,
    `next_run_from_history`; a synthetic closed loop, `simulate`.

Everything here advises; nothing drives equipment.

References
----------
.. [1] Western Electric Company, Statistical Quality Control Handbook (1956).
.. [2] S. W. Roberts, Technometrics 1, 239-250 (1959).
.. [3] E. Sachs, A. Hu and A. Ingolfsson, IEEE Trans. Semicond. Manuf. 8, 26 (1995)
   (from memory).
"""

from filmmap.history.charts import (
    METRICS,
    RULE_TEXT,
    EwmaChart,
    IndividualsChart,
    baseline_limits,
    control_charts,
    ewma_chart,
    ewma_figure,
    history_figures,
    history_html,
    individuals_chart,
    metric_series,
    save_chart,
    trend_figure,
    western_electric_flags,
    write_history_html,
)
from filmmap.history.r2r import (
    FurnaceEstimate,
    LotOffsets,
    NextRun,
    SimulationResult,
    SyntheticFurnace,
    estimate_from_records,
    estimate_furnace,
    ewma_filter,
    lot_offsets,
    next_run,
    next_run_from_history,
    simulate,
)
from filmmap.history.store import (
    CURRENT_VERSION,
    MIGRATIONS,
    LotRecord,
    SlotSummary,
    WaferSummary,
    default_history_path,
    lots,
    make_record,
    open_history,
    record_from_outputs,
    record_lot,
    schema_version,
)

__all__ = [
    "CURRENT_VERSION", "MIGRATIONS", "LotRecord", "SlotSummary", "WaferSummary",
    "default_history_path", "lots", "make_record", "open_history", "record_from_outputs",
    "record_lot", "schema_version",
    "METRICS", "RULE_TEXT", "EwmaChart", "IndividualsChart", "baseline_limits",
    "control_charts", "ewma_chart", "ewma_figure", "history_figures", "history_html",
    "individuals_chart", "metric_series", "save_chart", "trend_figure",
    "western_electric_flags", "write_history_html",
    "FurnaceEstimate", "LotOffsets", "NextRun", "SimulationResult", "SyntheticFurnace",
    "estimate_from_records", "estimate_furnace", "ewma_filter", "lot_offsets", "next_run",
    "next_run_from_history", "simulate",
]
