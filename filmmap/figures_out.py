"""Figures of a reduced lot: one map per wafer and a lot contact sheet (PNG)."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from filmmap.outputs import coordinate_groups
from filmmap.wafermap.figures import MapRendering, contact_sheet_png, write_bytes_atomic
from filmmap.wafermap.surface import tps_polar_surface


def write_figures(ds, config, outdir, workers=1, *, out_of_spec=(), progress=None, notes=None,
                  while_maps=None):
    """Render wafer maps (figures/<wafer>.png) and the contact sheet (contact_sheet.png).

    Wafers with different site layouts (a missing site, another pattern) are each mapped
    from their own sites; a missing site is never drawn, a failed site is a white X.
    The worker processes draw the maps while this process draws the contact sheet and
    then runs ``while_maps``.

    Parameters
    ----------
    ds : xarray.Dataset
        The lot dataset (see `filmmap.io.results.lot_dataset`).
    config : LotConfig
        For the wafer diameter, the edge exclusion and the lot id.
    outdir : path-like
        Output folder.
    workers : int
        Processes rendering wafer maps.
    out_of_spec : iterable of str
        Wafer ids marked out of spec on the contact sheet.
    progress : callable(total) -> object with update(n) and close(), optional
        Progress display factory for the wafer maps.
    notes : list, optional
        Receives plain-text notes on what was left out of the figures (for the console).
    while_maps : callable(pump), optional
        Work done in this process once the contact sheet is written, while the workers
        still draw maps (report.pdf needs the sheet, no map); it calls ``pump()`` now and
        then to keep the workers supplied.

    Returns
    -------
    dict {name: path}
    """
    outdir = Path(outdir)
    m = config.measurement
    lot_id = str(config.lot.id)
    t, ok = ds["thickness"].values, ds["fit_ok"].values
    wafers, slots = ds.wafer.values, ds.slot.values
    notes = [] if notes is None else notes
    written = {}
    fig_dir = outdir / "figures"
    groups = list(coordinate_groups(ds["x_mm"].values, ds["y_mm"].values))
    if len(groups) > 1:
        notes.append(f"the wafers have {len(groups)} different site layouts (missing sites): "
                     "each wafer is mapped from its own sites")
    # the thickness surface of each site layout is computed once, for the maps and the sheet
    # (before any worker starts: no numerical work runs while the pool forks)
    surfaces = []
    for rows, x, y, present in groups:
        surfaces.append((rows, tps_polar_surface(np.where(present, t[rows], np.nan),
                                                 ok[rows] & present, x, y, m.wafer_diameter_mm,
                                                 m.edge_exclusion_mm)))
    bar = progress(len(wafers)) if progress is not None else None
    try:
        with MapRendering(workers, bar.update if bar is not None else None) as maps:
            group_paths = []
            for (rows, x, y, present), (_, surface) in zip(groups, surfaces):
                group_paths.append(maps.add(
                    fig_dir, np.where(present, t[rows], np.nan), ok[rows] & present, x, y,
                    m.wafer_diameter_mm, m.edge_exclusion_mm,
                    wafer_ids=[str(w) for w in wafers[rows]],
                    slots=[int(s) for s in slots[rows]], present=present, lot_id=lot_id,
                    surface=surface))
            maps.pump()                 # the workers start on the maps now
            oos = set(map(str, out_of_spec))
            png = contact_sheet_png(t, ok, ds["x_mm"].values, ds["y_mm"].values,
                                    m.wafer_diameter_mm, m.edge_exclusion_mm,
                                    wafer_ids=[str(w) for w in wafers],
                                    slots=[int(s) for s in slots],
                                    out_of_spec=[str(w) in oos for w in wafers], lot_id=lot_id,
                                    surfaces=surfaces, between_panels=maps.pump)
            sheet = write_bytes_atomic(png, outdir / "contact_sheet.png")
            del png
            if while_maps is not None:
                while_maps(maps.pump)
            maps.finish()
            for paths in group_paths:
                for path in paths:
                    written[f"figures/{Path(path).name}"] = path
            written["contact_sheet.png"] = sheet
    finally:
        if bar is not None:
            bar.close()
    no_fit = [str(w) for w, okw in zip(wafers, ok) if not np.any(okw)]
    if no_fit:
        notes.append(f"{len(no_fit)} wafer map(s) show no thickness (no accepted fit): "
                     + ", ".join(no_fit[:8]) + (" ..." if len(no_fit) > 8 else ""))
    return written
