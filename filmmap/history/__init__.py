"""Run history and run-to-run control of a furnace.

`records`
    What the history keeps about a lot (`LotRecord`) and how a record is made from the
    in-memory lot view and advice: `record_from_view`, `make_record`.
`store`
    An embedded SQLite history of reduced lots (WAL mode, one transaction per write,
    schema migrations): `record_lot`, `lots`.
`importing`
    Rebuilding a record from an old output folder (lot.nc, advice.json) through the
    lot view: `record_from_outputs`.
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

from importlib import import_module

# names load on first use (PEP 562): recording a lot must not import the chart code
_EXPORTS = {
    'METRICS': 'charts',
    'RULE_TEXT': 'charts',
    'EwmaChart': 'charts',
    'IndividualsChart': 'charts',
    'baseline_limits': 'charts',
    'control_charts': 'charts',
    'ewma_chart': 'charts',
    'ewma_figure': 'charts',
    'history_figures': 'charts',
    'history_html': 'charts',
    'individuals_chart': 'charts',
    'metric_series': 'charts',
    'save_chart': 'charts',
    'trend_figure': 'charts',
    'western_electric_flags': 'charts',
    'write_history_html': 'charts',
    'FurnaceEstimate': 'r2r',
    'LotOffsets': 'r2r',
    'NextRun': 'r2r',
    'SimulationResult': 'r2r',
    'SyntheticFurnace': 'r2r',
    'estimate_from_records': 'r2r',
    'estimate_furnace': 'r2r',
    'ewma_filter': 'r2r',
    'lot_offsets': 'r2r',
    'next_run': 'r2r',
    'next_run_from_history': 'r2r',
    'simulate': 'r2r',
    'CURRENT_VERSION': 'store',
    'MIGRATIONS': 'store',
    'default_history_path': 'store',
    'lots': 'store',
    'open_history': 'store',
    'record_lot': 'store',
    'schema_version': 'store',
    'LotRecord': 'records',
    'SlotSummary': 'records',
    'WaferSummary': 'records',
    'make_record': 'records',
    'recipe_steps': 'records',
    'record_from_view': 'records',
    'record_from_outputs': 'importing',
}


def __getattr__(name):
    if name in _EXPORTS:
        value = getattr(import_module(f"filmmap.history.{_EXPORTS[name]}"), name)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'filmmap.history' has no attribute {name!r}")


__all__ = [
    "CURRENT_VERSION", "MIGRATIONS", "LotRecord", "SlotSummary", "WaferSummary",
    "default_history_path", "lots", "make_record", "open_history", "recipe_steps",
    "record_from_outputs", "record_from_view", "record_lot", "schema_version",
    "METRICS", "RULE_TEXT", "EwmaChart", "IndividualsChart", "baseline_limits",
    "control_charts", "ewma_chart", "ewma_figure", "history_figures", "history_html",
    "individuals_chart", "metric_series", "save_chart", "trend_figure",
    "western_electric_flags", "write_history_html",
    "FurnaceEstimate", "LotOffsets", "NextRun", "SimulationResult", "SyntheticFurnace",
    "estimate_from_records", "estimate_furnace", "ewma_filter", "lot_offsets", "next_run",
    "next_run_from_history", "simulate",
]
