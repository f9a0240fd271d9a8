"""Figures of a reduced lot: one map per wafer and a lot contact sheet (PNG)."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from filmmap.outputs import coordinate_groups
from filmmap.wafermap.figures import lot_contact_sheet, render_wafer_pngs, save_figure


CONTACT_SHEET_MAX_IN = 40.0
"""Largest contact-sheet side, inches (4000 px at 100 dpi): panels shrink for big lots, so
the sheet's memory (an RGBA canvas, 4 bytes a pixel) stays bounded (common practice, no
source)."""


def contact_panel_in(n_wafers, largest_in=2.0):
    """Panel size of the contact sheet, inches: 2 in, less when the square grid would exceed
    `CONTACT_SHEET_MAX_IN` (at 1,200 wafers, 35 columns of 1.1 in)."""
    ncols = max(1, int(np.ceil(np.sqrt(n_wafers))))
    return min(largest_in, CONTACT_SHEET_MAX_IN / ncols)


def _draw_contact_sheet(path, args, kwargs):
    return save_figure(lot_contact_sheet(*args, **kwargs), path)


def _contact_sheet_apart(path, args, kwargs):
    """Draw the contact sheet in a process of its own, when one can be started.

    A big lot's sheet has one axes a wafer; matplotlib's objects and the heap they leave
    behind stayed in the reducing process through report.html and report.pdf.  In a
    short-lived child the memory goes back to the system when it ends.  A daemonic process
    (a worker of some pools) may not start children: it draws the sheet itself.
    """
    import multiprocessing

    if multiprocessing.current_process().daemon:
        return _draw_contact_sheet(path, args, kwargs)
    from concurrent.futures import ProcessPoolExecutor

    from filmmap.workers import end_with_parent

    with ProcessPoolExecutor(max_workers=1, initializer=end_with_parent) as pool:
        return Path(pool.submit(_draw_contact_sheet, path, args, kwargs).result())


def write_figures(ds, config, outdir, workers=1):
    """Render wafer maps (figures/<wafer>.png) and the contact sheet (contact_sheet.png).

    Parameters
    ----------
    ds : xarray.Dataset
        The lot dataset (see `filmmap.io.results.lot_dataset`).
    config : LotConfig
        For the wafer diameter and edge exclusion.
    outdir : path-like
        Output folder.
    workers : int
        Processes rendering wafer maps.

    Returns
    -------
    dict {name: path}
    """
    outdir = Path(outdir)
    m = config.measurement
    t, ok = ds["thickness"].values, ds["fit_ok"].values
    wafers, slots = ds.wafer.values, ds.slot.values
    written = {}
    fig_dir = outdir / "figures"
    groups = list(coordinate_groups(ds["x_mm"].values, ds["y_mm"].values))
    for rows, x, y, present in groups:
        paths = render_wafer_pngs(fig_dir, np.where(present, t[rows], np.nan), ok[rows] & present,
                                  x, y, m.wafer_diameter_mm, m.edge_exclusion_mm,
                                  wafer_ids=[str(w) for w in wafers[rows]],
                                  slots=[int(s) for s in slots[rows]], workers=workers)
        for w, path in zip(wafers[rows], paths):
            written[f"figures/{Path(path).name}"] = path
    if len(groups) == 1:
        rows, x, y, present = groups[0]
        args = (np.where(present, t, np.nan), ok & present, x, y, m.wafer_diameter_mm,
                m.edge_exclusion_mm)
        kwargs = dict(wafer_ids=[str(w) for w in wafers], slots=[int(s) for s in slots],
                      title=f"lot {config.lot.id}: thickness (nm), common scale",
                      panel_in=contact_panel_in(len(wafers)))
        written["contact_sheet.png"] = _contact_sheet_apart(outdir / "contact_sheet.png", args,
                                                            kwargs)
    return written
