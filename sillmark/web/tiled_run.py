"""The tiled engine inside a web analysis run, for DEMs above a size threshold.

:func:`analyse_if_large` is called by :func:`sillmark.web.worker._run` after the DEM
is read. For a DEM of more than ``TILED_ABOVE_CELLS`` cells (see
:mod:`sillmark.web.config`; the value travels with the run's settings) it runs
:func:`sillmark.run.analyse` on the DEM file, tile by tile with the tiles in
scratch files, instead of on the DEM in memory (it writes the same files, the
outlines and the hierarchy window by window), and reads the written GeoTIFFs
back into the
:class:`~sillmark.engine.flood.SpillResult` the viewer stores
(:func:`sillmark.web.arrays.save`). The run's phase shows the tiles done
(``flooding tiles: 3 of 12 tiles done``) and then the hierarchy's batches.

The tiles run one after another in the worker process (a serial executor),
not on a local Dask cluster: the worker is already a process of its own per
run, a cluster would add a scheduler and worker processes (about half a
gigabyte and seconds of start-up) on a laptop that also serves the app, and
dask.distributed is an optional extra the app does not need otherwise. The
tiled engine's gain here is memory: one tile's working arrays at a time
instead of the in-memory engine's 12 to 13 bytes a cell, and the hierarchy
built one window of depressions at a time (see ``sillmark analyse --tiles``).

Like :mod:`sillmark.web.worker`, this module imports no Flask.
"""

from __future__ import annotations

import time
import types
from pathlib import Path

import numpy as np
import rasterio

from sillmark.engine.executors import SerialExecutor
from sillmark.engine.flood import SpillResult
from sillmark.run import analyse
from sillmark.web import db
from sillmark.web.config import DEFAULTS

__all__ = ["analyse_if_large", "engine_settings"]

# Percent of the whole run at which each step of the tiled run starts; they
# fill the worker's "marking outlets" and "flooding from the outlets" phases
# (8 % to 62 %), after the hillshade.
_STEPS = {
    "flood": ("flooding tiles", 8.0, 40.0),
    "graph": ("solving the seed graph between tiles", 40.0, 42.0),
    "finish": ("finishing tiles", 42.0, 50.0),
    "join": ("joining depressions across tiles", 50.0, 51.0),
    "totals": ("totalling depressions", 51.0, 52.0),
    "write": ("writing the tiled result files", 52.0, 57.0),
    "outlines": ("outlining depressions window by window", 57.0, 59.0),
    "hierarchy": ("building the depression hierarchy", 59.0, 61.0),
    "hierarchy_files": ("formatting the depression hierarchy", 61.0, 61.5),
    "hierarchy_write": ("writing the depression hierarchy files", 61.5, 62.0),
}
#: What the done / total of a step counts (steps not named here show no count).
_COUNTED = {"flood": "tiles", "finish": "tiles", "write": "files", "hierarchy": "batches",
            "hierarchy_files": "batches", "hierarchy_write": "files"}


def engine_settings(config) -> dict:
    """The run settings that choose the engine, from the app's configuration."""
    return {"tiled_above_cells": int(config["TILED_ABOVE_CELLS"]),
            "tile_size": int(config["TILED_TILE_SIZE"])}


class _TileProgress(SerialExecutor):
    """Phase text and percent of the tiled steps, written to the run's row.

    ``step`` is the ``progress`` of :func:`sillmark.run.analyse` (called before
    and after each step); as an executor it runs the step's items one by one
    and reports each one done.
    """

    def __init__(self, progress) -> None:
        self.progress = progress  # sillmark.web.worker._Progress: conn, run_id, min_interval
        self.step_name = "flood"
        self._last = 0.0

    def _write(self, text: str, percent: float, force: bool) -> None:
        now = time.monotonic()
        if not force and now - self._last < self.progress.min_interval:
            return
        self._last = now
        self.progress.phase = text
        db.update_run(self.progress.conn, self.progress.run_id, phase=text,
                      percent=round(float(percent), 1))

    def show(self, name: str, done: int, total: int) -> None:
        label, lo, hi = _STEPS[name]
        fraction = done / total if total else 1.0
        what = _COUNTED.get(name)
        text = f"{label}: {done:,} of {total:,} {what} done" if what else label
        self._write(text, lo + (hi - lo) * fraction, force=done in (0, total))

    def step(self, name: str, done: int, total: int) -> None:
        self.step_name = name
        self.show(name, done, total)

    def map(self, fn, items) -> list:
        items = list(items)
        out = []
        for k, item in enumerate(items):
            out.append(fn(item))
            self.show(self.step_name, k + 1, len(items))
        return out


def _read_band(path: Path) -> np.ndarray:
    with rasterio.open(path) as ds:
        return ds.read(1)


def analyse_if_large(dem, dem_path: Path, specs: tuple, settings: dict, results: Path, progress):
    """Run the tiled engine when the DEM has more cells than the run's threshold.

    Parameters
    ----------
    dem : sillmark.grid.dem.DEM
        The DEM as the worker read it (its cells are the viewer's elevation).
    dem_path : Path
        The same DEM's file, read again tile by tile.
    specs : tuple
        Outlet sources, as for :func:`sillmark.grid.outlets.build_outlets`.
    settings : dict
        The run's settings (``connectivity``, ``vertical_unit``,
        ``tiled_above_cells``, ``tile_size``; the defaults of
        :data:`sillmark.web.config.DEFAULTS` where a run predates them).
    results : Path
        The run's ``results/`` folder.
    progress : sillmark.web.worker._Progress

    Returns
    -------
    None, when the DEM is small enough for the in-memory engine; otherwise
    ``(outlets, result)``: an object with the outlet ``count`` and ``sources``,
    and the :class:`~sillmark.engine.flood.SpillResult` read back from the files.
    """
    threshold = settings.get("tiled_above_cells")
    threshold = int(DEFAULTS["TILED_ABOVE_CELLS"] if threshold is None else threshold)
    if dem.rows * dem.cols <= threshold:
        return None

    tile = int(settings.get("tile_size") or DEFAULTS["TILED_TILE_SIZE"])
    connectivity = int(settings["connectivity"])
    tracker = _TileProgress(progress)
    run = analyse(dem_path, specs, results, executor=tracker, store="files", tile_size=tile,
                  connectivity=connectivity, vertical_unit=settings["vertical_unit"],
                  progress=tracker.step)
    ids = _read_band(results / "depression_id.tif")
    np.maximum(ids, 0, out=ids)  # the file's -1 (nodata, unreached) is 0 in a SpillResult
    result = SpillResult(
        elevation=dem.elevation,
        onset_stage=_read_band(results / "onset_stage.tif"),
        flood_tree=_read_band(results / "flood_tree.tif"),
        depression_id=ids,
        depressions=run.depressions,
        connectivity=run.connectivity,
        unreached_cells=run.unreached_cells,
        heap_pops=run.heap_pops,
    )
    outlets = types.SimpleNamespace(count=run.outlet_cells, sources=run.outlet_sources)
    return outlets, result
