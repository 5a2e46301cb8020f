"""The body of a scenario's run, as the background worker executes it (no Flask).

A scenario is the site's DEM plus a set of edits. Its run carries the
settings snapshot of the base run it is compared with (same DEM file,
outlets, connectivity, river profile and refuges) and, under ``scenario``,
the edits file; :func:`analyse_scenario` runs the very same
:func:`sillmark.run.analyse` with ``edits=`` into the run's ``results/``
folder, then keeps the onset stage as ``arrays/onset_stage.npy`` for the
compare map tiles (memory-mapped by the server). No hillshade, no
depression index: the map shows the base, and the scenario only through
its comparison (:mod:`sillmark.web.scenarios`).
"""

from __future__ import annotations

import os
import shutil
from pathlib import Path

import numpy as np

from sillmark.grid.dem import read_dem
from sillmark.grid.outlets import build_outlets
from sillmark.io.export import FILE_NAMES
from sillmark.run import analyse
from sillmark.web import reach_inputs, tiled_run

#: The scenario's onset stage, inside the run folder.
ONSET_FILE = Path("arrays") / "onset_stage.npy"

#: Rows of the onset stage copied at once into its array file.
COPY_ROWS = 1024


def analyse_scenario(site_folder: Path, settings: dict, folder: Path, progress, grid,
                     specs: tuple, *, listing: dict | None = None) -> dict:
    """Analyse the scenario of a run into ``folder``; returns the run's summary.

    Parameters
    ----------
    site_folder : Path
    settings : dict
        The run's settings: the base run's, with ``scenario`` (``edits_file``
        inside the site folder, ``edits_name``, ``id``).
    folder : Path
        The run's folder.
    progress : sillmark.web.worker._Progress
    grid : DEMGrid
        The DEM's header, already checked against the cell limit.
    specs : tuple
        Outlet sources, as for :func:`sillmark.grid.outlets.build_outlets`.
    listing : dict, optional, keyword-only
        The significance options of :func:`sillmark.run.analyse` (``minimum``,
        ``accuracy_stated``; see :func:`sillmark.web.worker.significance_options`):
        the base run's, so the scenario lists the depressions the base lists and
        writes its files for those, not for every noise-made pit.
    """
    listing = dict(listing or {})
    edits = site_folder / settings["scenario"]["edits_file"]
    dem_path = site_folder / settings["dem_file"]
    connectivity = int(settings["connectivity"])
    results = folder / "results"
    rows, cols = grid.shape
    if tiled_run.is_large(grid.shape, settings):
        # Tile by tile as in memory: every kind of edit (barriers and breaches go into
        # each window read from the DEM file).
        progress.start("flooding from the outlets")
        analysis = tiled_run.analyse_tiled(dem_path, specs, settings, results, progress,
                                           edits=edits, listing=listing)
        read_rows = tiled_run.result_rows(results, cols)["onset_stage"]
    else:
        dem = read_dem(dem_path, vertical_unit=settings["vertical_unit"],
                       max_cells=int(settings.get("max_cells") or 400_000_000))
        progress.start("marking outlets")
        outlets = build_outlets(dem, specs, connectivity=connectivity)
        progress.start("flooding from the outlets")
        written: list[str] = []

        def file_progress(name: str, done: int, total: int) -> None:
            if not written:
                progress.start("writing result files")
            if name not in written:
                written.append(name)
            # Every result file, the README and the significance step.
            progress.within((len(written) - 1 + (done / total if total else 1.0))
                            / (len(FILE_NAMES) + 2))

        analysis = analyse(dem, outlets, results, connectivity=connectivity,
                           progress=file_progress, edits=edits, **listing,
                           **reach_inputs.analyse_inputs(site_folder, settings))
        onset = analysis.result.onset_stage
        read_rows = lambda r0, r1: onset[r0:r1]  # noqa: E731
    progress.start("storing arrays for the map")
    _store_onset(folder, grid.shape, read_rows, progress)
    placed = analysis.edits
    return {
        "scenario": int(settings["scenario"]["id"]),
        "rows": rows, "cols": cols,
        "connectivity": connectivity,
        "vertical_unit": grid.vertical_unit.value,
        "depressions": len(analysis.depressions),
        "unreached_cells": int(analysis.unreached_cells),
        "edits": placed.summary(analysis.edit_changes) if placed is not None else [],
    }


def _store_onset(folder: Path, shape, read_rows, progress) -> None:
    """Write the onset stage as ``arrays/onset_stage.npy`` block by block, then move it in."""
    tmp = folder / "arrays.tmp"
    shutil.rmtree(tmp, ignore_errors=True)
    tmp.mkdir(parents=True)
    out = np.lib.format.open_memmap(tmp / ONSET_FILE.name, mode="w+", dtype=np.float32,
                                    shape=tuple(shape))
    rows = int(shape[0])
    for r0 in range(0, rows, COPY_ROWS):
        r1 = min(rows, r0 + COPY_ROWS)
        out[r0:r1] = read_rows(r0, r1)
        progress.within(r1 / max(rows, 1))
    out.flush()
    del out
    final = folder / ONSET_FILE.parent
    shutil.rmtree(final, ignore_errors=True)
    os.replace(tmp, final)


def load_onset(run_folder: Path) -> np.ndarray:
    """The scenario's onset stage of a finished run, memory-mapped read-only."""
    return np.load(Path(run_folder) / ONSET_FILE, mmap_mode="r", allow_pickle=False)
