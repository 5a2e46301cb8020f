"""The tiled engine inside a web analysis run, for DEMs above a size threshold.

:func:`sillmark.web.worker._run` asks :func:`is_large` whether a DEM has more
than ``TILED_ABOVE_CELLS`` cells (see :mod:`sillmark.web.config`; the value
travels with the run's settings). If so, :func:`analyse_tiled` runs
:func:`sillmark.run.analyse` on the DEM file, tile by tile with the tiles in
scratch files (the DEM is read by windows, never whole), and
:func:`result_rows` reads the written GeoTIFFs back block by block for the
arrays the map server maps (:class:`sillmark.web.arrays.ArrayWriter`). The
run's phase shows the tiles done (``flooding tiles: 3 of 12 tiles done``) and
then the hierarchy's batches.

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
from pathlib import Path

import numpy as np

from sillmark.engine.executors import SerialExecutor
from sillmark.io.geotiff import read_window
from sillmark.run import Analysis, analyse
from sillmark.web import db
from sillmark.web.config import DEFAULTS

__all__ = ["analyse_tiled", "engine_settings", "is_large", "result_rows"]

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
    "hierarchy": ("building the depression hierarchy", 57.0, 59.0),
    "hierarchy_files": ("formatting the depression hierarchy", 59.0, 59.5),
    "hierarchy_write": ("writing the depression hierarchy files", 59.5, 60.0),
    "outlines": ("outlining depressions window by window", 60.0, 62.0),
}
#: What the done / total of a step counts (steps not named here show no count).
_COUNTED = {"flood": "tiles", "finish": "tiles", "write": "files", "hierarchy": "batches",
            "hierarchy_files": "batches", "hierarchy_write": "files"}


def engine_settings(config) -> dict:
    """The run settings that choose the engine, from the app's configuration."""
    return {"tiled_above_cells": int(config["TILED_ABOVE_CELLS"]),
            "tile_size": int(config["TILED_TILE_SIZE"]),
            "window_cells": int(config["TILED_WINDOW_CELLS"])}


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


def is_large(shape: tuple[int, int], settings: dict) -> bool:
    """Whether a DEM of ``shape`` goes to the tiled engine under the run's ``settings``."""
    threshold = settings.get("tiled_above_cells")
    threshold = int(DEFAULTS["TILED_ABOVE_CELLS"] if threshold is None else threshold)
    return int(shape[0]) * int(shape[1]) > threshold


def analyse_tiled(dem_path: Path, specs: tuple, settings: dict, results: Path,
                  progress, *, edits=None, listing: dict | None = None) -> Analysis:
    """Analyse the DEM file tile by tile into ``results``, reporting the steps.

    Parameters
    ----------
    dem_path : Path
        The DEM file, read window by window.
    specs : tuple
        Outlet sources, as for :func:`sillmark.grid.outlets.build_outlets`.
    settings : dict
        The run's settings (``connectivity``, ``vertical_unit``, ``tile_size``,
        ``window_cells``; the defaults of :data:`sillmark.web.config.DEFAULTS`
        where a run predates them).
    results : Path
        The run's ``results/`` folder.
    progress : sillmark.web.worker._Progress
    edits : path, optional
        A scenario's edits file (every kind, tile by tile; see :func:`sillmark.run.analyse`).
    listing : dict, optional, keyword-only
        The significance options (``minimum``, ``accuracy_stated``) of
        :func:`sillmark.run.analyse`: the tiled run lists the same depressions
        as the in-memory one.

    Returns
    -------
    sillmark.run.Analysis
        Its ``result`` is None: the rasters are in ``results`` (see :func:`result_rows`).
    """
    tile = int(settings.get("tile_size") or DEFAULTS["TILED_TILE_SIZE"])
    window = int(settings.get("window_cells") or DEFAULTS["TILED_WINDOW_CELLS"])
    tracker = _TileProgress(progress)
    return analyse(dem_path, specs, results, executor=tracker, store="files", tile_size=tile,
                   connectivity=int(settings["connectivity"]),
                   vertical_unit=settings["vertical_unit"], progress=tracker.step,
                   window_cells=window, edits=edits, **(listing or {}))


def _depression_ids(path: Path, cols: int, r0: int, r1: int) -> np.ndarray:
    ids = read_window(path, r0, r1, 0, cols)
    np.maximum(ids, 0, out=ids)  # the file's -1 (nodata, unreached) is 0 in a SpillResult
    return ids


def result_rows(results: Path, cols: int) -> dict:
    """Block readers of the result arrays the map server keeps, from the GeoTIFFs.

    Returns ``{field: rows}`` for the ``onset_stage``, ``flood_tree`` and
    ``depression_id`` fields of :class:`~sillmark.engine.flood.SpillResult`,
    where ``rows(r0, r1)`` reads rows ``r0:r1`` of the field as the in-memory
    engine holds it (depression id 0, not the file's -1, on nodata).
    """
    results = Path(results)

    def layer(name: str):
        path = results / f"{name}.tif"
        return lambda r0, r1: read_window(path, r0, r1, 0, cols)

    return {
        "onset_stage": layer("onset_stage"),
        "flood_tree": layer("flood_tree"),
        "depression_id": lambda r0, r1: _depression_ids(results / "depression_id.tif", cols, r0, r1),
    }
