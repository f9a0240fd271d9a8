"""Figures of a reduced lot: one map per wafer and a lot contact sheet (PNG)."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from filmmap.bridge import site_grid
from filmmap.atomic import write_bytes_atomic
from filmmap.wafermap.figures import MapRendering, contact_sheet_png
from filmmap.wafermap.sites import coordinate_groups
from filmmap.wafermap.surface import tps_polar_surface


def write_figures(ds, config, outdir, workers=1, *, out_of_spec=(), progress=None, notes=None,
                  while_maps=None):
    """Render wafer maps (figures/<wafer>.png) and the contact sheet (contact_sheet.png).

    Wafers with different site layouts (a missing site, another pattern) are each mapped
    from their own sites; a missing site is never drawn, a failed site is a white X.
    The worker processes draw the maps and the contact sheet while this process runs
    ``while_maps``. `FigureWork` does the same in two steps (the maps can start before the
    caller knows which wafers are out of spec).

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
    with FigureWork(ds, config, outdir, workers, out_of_spec=out_of_spec, progress=progress,
                    notes=notes) as work:
        return work.finish(while_maps=while_maps)


class FigureWork:
    """The figures of a lot in two steps: the workers start at once, the rest follows.

    Creating it computes the thickness surface of each site layout and sets the worker
    processes drawing the contact sheet and the wafer maps; while they draw, this process
    can write other outputs (lot.nc, the summaries, the reports) and then call `finish`.
    Use as a context manager: leaving it ends the workers.

    Parameters
    ----------
    ds, config, outdir, workers, out_of_spec, progress, notes
        As for `write_figures`.
    """

    def __init__(self, ds, config, outdir, workers=1, *, out_of_spec=(), progress=None,
                 notes=None):
        self.ds, self.outdir = ds, Path(outdir)
        m = config.measurement
        self.diameter_mm, self.edge_exclusion_mm = m.wafer_diameter_mm, m.edge_exclusion_mm
        self.lot_id = str(config.lot.id)
        grid = site_grid(ds)
        t, ok = grid.thickness_nm, grid.fit_ok
        wafers, slots = grid.wafer, grid.slot
        self.notes = [] if notes is None else notes
        groups = list(coordinate_groups(grid.x_mm, grid.y_mm))
        if len(groups) > 1:
            self.notes.append(f"the wafers have {len(groups)} different site layouts (missing "
                              "sites): each wafer is mapped from its own sites")
        # the thickness surface of each site layout is computed once, for the maps and the
        # sheet (before any worker starts: no numerical work runs while the pool forks)
        self.surfaces = []
        for rows, x, y, present in groups:
            self.surfaces.append((rows, tps_polar_surface(
                np.where(present, t[rows], np.nan), ok[rows] & present, x, y,
                self.diameter_mm, self.edge_exclusion_mm)))
        self.bar = progress(len(wafers)) if progress is not None else None
        self.maps = MapRendering(workers, self.bar.update if self.bar is not None else None)
        self.group_paths = []
        self.sheet_png = self.sheet_path = None
        try:
            # the contact sheet first: report.pdf waits for it, for no map
            oos = set(map(str, out_of_spec))
            self.sheet = self.maps.submit(
                contact_sheet_png, t, ok, grid.x_mm, grid.y_mm,
                self.diameter_mm, self.edge_exclusion_mm, wafer_ids=[str(w) for w in wafers],
                slots=[int(s) for s in slots], out_of_spec=[str(w) in oos for w in wafers],
                lot_id=self.lot_id, surfaces=self.surfaces)
            for (rows, x, y, present), (_, surface) in zip(groups, self.surfaces):
                self.group_paths.append(self.maps.add(
                    self.outdir / "figures", np.where(present, t[rows], np.nan),
                    ok[rows] & present, x, y, self.diameter_mm, self.edge_exclusion_mm,
                    wafer_ids=[str(w) for w in wafers[rows]],
                    slots=[int(s) for s in slots[rows]], present=present, lot_id=self.lot_id,
                    surface=surface))
            self.maps.pump()            # the workers start on the maps now
        except BaseException:
            self.close()
            raise

    def pump(self):
        """Keep the map workers supplied (call now and then during other work)."""
        self.maps.pump()

    def contact_sheet(self):
        """The contact sheet's PNG bytes, written to contact_sheet.png (waits for the worker
        drawing it, keeping the map workers supplied meanwhile)."""
        if self.sheet_path is None:
            self.sheet_png = self.maps.result(self.sheet)
            self.sheet_path = write_bytes_atomic(self.outdir / "contact_sheet.png",
                                                 self.sheet_png, durable=False)
            self.sheet = None
        return self.sheet_png

    def finish(self, while_maps=None):
        """``while_maps(pump)``, then the contact sheet and the other maps.

        ``while_maps`` runs while the workers draw (report.pdf, which calls `contact_sheet`
        when it reaches that page); it calls ``pump()`` now and then to keep the workers
        supplied.

        Returns
        -------
        dict {name: path}
        """
        grid, written = site_grid(self.ds), {}
        ok, wafers = grid.fit_ok, grid.wafer
        if while_maps is not None:
            while_maps(self.maps.pump)
        self.contact_sheet()
        self.maps.finish()
        for paths in self.group_paths:
            for path in paths:
                written[f"figures/{Path(path).name}"] = path
        written["contact_sheet.png"] = self.sheet_path
        no_fit = [str(w) for w, okw in zip(wafers, ok) if not np.any(okw)]
        if no_fit:
            self.notes.append(f"{len(no_fit)} wafer map(s) show no thickness (no accepted "
                              "fit): " + ", ".join(no_fit[:8]) + (" ..." if len(no_fit) > 8
                                                                  else ""))
        return written

    def close(self):
        """End the map workers and the progress display."""
        try:
            self.maps.close()
        finally:
            if self.bar is not None:
                self.bar.close()
                self.bar = None

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
