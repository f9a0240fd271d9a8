"""The reduce pipeline: lot file and spectra in, a published folder and a history record out.

The top layer below the command line. It joins the layers under it - the input readers
(`filmmap.io`), the fitter, the wafer maps, the lot statistics, the growth model, the
history and the reports - into the jobs a user runs, as functions a notebook can call::

    from filmmap.pipeline import reduce_to_folder
    reduction, written, seconds = reduce_to_folder("lot.toml", "results/")

Rooms, one job each:

- `reducing`: fit every spectrum of a lot in batches of files (`reduce_lot`), in worker
  processes when asked; the optical stack and systematics of a lot file.
- `wafer_analysis`: per-wafer statistics, Zernike shape, radial profile and map trust,
  added to the lot dataset.
- `lot_files`: lot.nc, sites.csv and spectra.nc of a reduced lot (`write_lot`).
- `publishing`: the staging folder that replaces the output folder whole once complete
  (`staged_output`), and the named fault points of the publish-then-record sequence.
- `guard`: the checks before any work (outputs never replace inputs, a writable place,
  a usable history).
- `figures`: the wafer maps and the contact sheet of a reduced lot.
- `run`: `reduce_to_folder`, `reduce_many`, advice.json, and the history record.
- `furnace`: the furnace model a prediction or plan uses (learned rate and coupling
  width, a calibrated profile from an advice.json) and the checks of what-if values.
- `export`: the tables of an existing lot.nc (``filmmap export``).
- `demo`: the invented demo lot.
- `history_report`: the run-history page, its charts and the run-to-run estimate
  (``filmmap history``).

Names are imported on first use (PEP 562), so ``import filmmap.pipeline`` stays light.
"""

from __future__ import annotations

import importlib

_EXPORTS = {
    "reduce_lot": "reducing", "LotReduction": "reducing", "SiteResults": "reducing",
    "build_stack": "reducing", "lot_systematics": "reducing",
    "add_wafer_statistics": "wafer_analysis",
    "write_lot": "lot_files", "WrittenLot": "lot_files", "staged_output": "publishing",
    "FAULT_ENV": "publishing", "FAULT_POINTS": "publishing",
    "reduce_to_folder": "run", "reduce_many": "run", "write_advice": "run",
    "record_history": "run", "history_record": "run", "complete_pending_record": "run",
    "discard_pending_record": "run", "record_reduced_lot": "run",
    "run_to_run_estimate": "run", "HistoryOptions": "run", "PENDING_RECORD": "run",
    "ADVICE_FORMAT": "run", "read_lots": "run",
    "export_lot": "export",
    "generate_demo_lot": "demo",
    "write_history_report": "history_report", "HistoryReport": "history_report",
}

__all__ = sorted(_EXPORTS)


def __getattr__(name):
    module = _EXPORTS.get(name)
    if module is None:
        raise AttributeError(f"module 'filmmap.pipeline' has no attribute {name!r}")
    value = getattr(importlib.import_module(f"filmmap.pipeline.{module}"), name)
    globals()[name] = value
    return value


def __dir__():
    return sorted(set(globals()) | set(_EXPORTS))
