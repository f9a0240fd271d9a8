"""The pipeline layer: reduce a lot into its output folder, record it, build the reports.

Modules: `history_report` (the run-history page and charts ``filmmap history`` writes).
"""

# Transitional, for branch hist16 only (drop on merge): the root module filmmap/pipeline.py
# moves into this package on another branch. Until the two meet, this package serves that
# module's names (reduce_to_folder, record_history, ...), which a package of the same name
# would otherwise hide.
from pathlib import Path as _Path

_ROOT_MODULE = _Path(__file__).resolve().parent.parent / "pipeline.py"
_DOC = __doc__
exec(compile(_ROOT_MODULE.read_text(encoding="utf-8"), str(_ROOT_MODULE), "exec"))
__doc__ = _DOC
