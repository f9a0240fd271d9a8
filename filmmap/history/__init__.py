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
`control`
    Control-chart statistics (pure numpy): Shewhart individuals charts with the Western
    Electric run rules and EWMA charts, one base `ControlChart`: `individuals_chart`,
    `ewma_chart`, `control_charts`, `baseline_warnings`.
`chart_figures`
    Their figures: `trend_figure`, `ewma_figure`, `history_figures`, `save_chart`.
`r2r`
    Run-to-run control: EWMA estimates of the furnace's effective offsets across lots and
    the next run's time and zone trims: `estimate_from_records`, `next_run`,
    `next_run_from_history`.
`rate`
    A furnace's growth rate and zone coupling learned from its history.

The history page (history.html) is drawn by the report layer,
`filmmap.report.history_page`; ``filmmap history`` assembles it with
`filmmap.pipeline.history_report`.  Everything here advises; nothing drives equipment.

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
    'D2_PAIRS': 'control',
    'METRICS': 'control',
    'MIN_BASELINE_LOTS': 'control',
    'RULE_TEXT': 'control',
    'ControlChart': 'control',
    'EwmaChart': 'control',
    'IndividualsChart': 'control',
    'baseline_limits': 'control',
    'baseline_warnings': 'control',
    'control_charts': 'control',
    'ewma_chart': 'control',
    'individuals_chart': 'control',
    'metric_series': 'control',
    'western_electric_flags': 'control',
    'ewma_figure': 'chart_figures',
    'history_figures': 'chart_figures',
    'save_chart': 'chart_figures',
    'trend_figure': 'chart_figures',
    'FurnaceEstimate': 'r2r',
    'LotOffsets': 'r2r',
    'NextRun': 'r2r',
    'estimate_from_records': 'r2r',
    'estimate_furnace': 'r2r',
    'ewma_filter': 'r2r',
    'lot_offsets': 'r2r',
    'next_run': 'r2r',
    'next_run_from_history': 'r2r',
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


__all__ = list(_EXPORTS)
