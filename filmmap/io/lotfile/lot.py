"""``[lot]``: which lot (id, furnace, run date)."""

from __future__ import annotations

import datetime

from filmmap.io.lotfile.reader import found
from filmmap.io.lotfile.schema import LotInfo


def read_lot(rd, doc):
    """The ``[lot]`` table as `LotInfo` (`rd` a `LotReader`, `doc` the parsed file)."""
    t = rd.table(doc, "lot", "", required=True, what="[lot] table (with id = \"...\")")
    rd.keys(t, "lot", "lot")
    lot_id = rd.string(t, "id", "lot", required=True)
    if not lot_id.isprintable() or "/" in lot_id or "\\" in lot_id:
        rd.fail(f"id {lot_id!r} contains '/', '\\' or non-printable characters; expected a plain "
                "lot id (it is used in output file names)", "lot.id")
    rd.name(t, "id", "lot")
    furnace = rd.name(t, "furnace", "lot")
    run_date = t.get("run_date")
    if run_date is not None:
        if isinstance(run_date, str):
            try:
                run_date = datetime.date.fromisoformat(run_date)
            except ValueError:
                rd.fail(f"run_date {run_date!r} is not a date; expected YYYY-MM-DD", "lot.run_date")
        elif isinstance(run_date, datetime.datetime) or not isinstance(run_date, datetime.date):
            rd.fail(f"expected a date (2026-11-30), found {found(run_date)}", "lot.run_date")
    return LotInfo(id=lot_id, furnace=furnace, run_date=run_date)
