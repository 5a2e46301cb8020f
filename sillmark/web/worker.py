"""The body of one analysis run, as executed by the background worker.

:func:`run_job` reads the DEM, draws the hillshade, runs
:func:`sillmark.run.analyse` (the same files as ``sillmark analyse``; a DEM
above the tiled threshold tile by tile, see :mod:`sillmark.web.tiled_run`) and
writes the memory-mappable arrays the map server reads, recording its phase and
percent in SQLite as it goes. Every grid-sized array is written block by block
(:class:`sillmark.web.arrays.ArrayWriter`, :mod:`sillmark.web.relief`); a large
DEM is read by windows, so no whole-grid array exists in the worker. It runs in a separate process (see :mod:`sillmark.web.jobs`), so it imports no
Flask and talks to the server only through the database and the files.

A run never touches the results of an earlier run: it writes into its own
folder (each file under a temporary name, renamed when complete), and only
when everything is written does one transaction mark it done and make it the
site's current run. A run that fails removes what it had half written
(:func:`discard_partial_output`), which gives the space back on a full disk.
Every write to the run's row is made only while the run is still ``running``:
a run the server has taken back (see :class:`RunTakenBack`) is never recorded
as done or failed by its worker, and never becomes current.
"""

from __future__ import annotations

import errno
import logging
import math
import os
import shutil
import sqlite3
import sys
import time
import traceback
from pathlib import Path

import numpy as np
import pyproj

from sillmark.errors import InvalidDEM, SillmarkError
from sillmark.grid.dem import read_dem
from sillmark.grid.dem_grid import read_dem_grid
from sillmark.grid.outlets import build_outlets
from sillmark.io.export import FILE_NAMES
from sillmark.io.geotiff import BLOCK_ROWS
from sillmark.products.significance import site_minimum
from sillmark.run import analyse
from sillmark.web import (
    arrays,
    db,
    layout,
    reach_inputs,
    relief,
    scenario_run,
    site_data,
    tiled_run,
)

log = logging.getLogger("sillmark.worker")

# Where each phase starts, in percent of the whole run.
PHASES = (
    ("reading the DEM", 0),
    ("drawing the hillshade", 4),
    ("marking outlets", 8),
    ("flooding from the outlets", 12),
    ("writing result files", 62),
    ("storing arrays for the map", 92),
    ("finishing", 98),
)
_START = dict(PHASES)
_NEXT = {name: (PHASES[k + 1][1] if k + 1 < len(PHASES) else 100) for k, (name, _) in enumerate(PHASES)}


#: Steps an in-memory analysis reports while writing: the significance of its
#: depressions (the web runs always have a minimum), every result file and the
#: folder's README.txt.
_FILES_WRITTEN = len(FILE_NAMES) + 2

#: Least time between two progress writes within a phase, in seconds.
PROGRESS_INTERVAL = 0.25


class RunTakenBack(Exception):
    """The server took this run back (queued it again on stopping, or recorded its end).

    The worker stops at its next progress write and records nothing: the run's
    row belongs to the server now, and its results must not become current.
    """


class _Progress:
    """Writes phase and percent to the run's row, at most a few times a second."""

    def __init__(self, conn, run_id: int, min_interval: float | None = None) -> None:
        self.conn = conn
        self.run_id = run_id
        self.min_interval = PROGRESS_INTERVAL if min_interval is None else min_interval
        self.phase = ""
        self._last = 0.0

    def start(self, phase: str) -> None:
        self.phase = phase
        self._write(_START[phase], force=True)

    def within(self, fraction: float) -> None:
        lo, hi = _START[self.phase], _NEXT[self.phase]
        self._write(lo + (hi - lo) * min(max(fraction, 0.0), 1.0))

    def _write(self, percent: float, force: bool = False) -> None:
        now = time.monotonic()
        if not force and now - self._last < self.min_interval:
            return
        self._last = now
        if not db.update_run(self.conn, self.run_id, while_status=db.RUNNING, phase=self.phase,
                             percent=round(float(percent), 1)):
            raise RunTakenBack(f"run {self.run_id} is no longer running")


def _specs(site_folder: Path, outlets: list[dict]) -> tuple:
    specs = []
    for o in outlets:
        if o["kind"] in ("edge", "nodata"):
            specs.append(o["kind"])
        else:
            specs.append(str(site_folder / o["file"]))
    return tuple(specs)


def lonlat_bounds(dem) -> list[float]:
    """[west, south, east, north] in WGS 84 degrees of the DEM's outline."""

    left, bottom, right, top = dem.bounds
    n = 32
    xs = np.concatenate([np.linspace(left, right, n), np.full(n, right),
                         np.linspace(right, left, n), np.full(n, left)])
    ys = np.concatenate([np.full(n, top), np.linspace(top, bottom, n),
                         np.full(n, bottom), np.linspace(bottom, top, n)])
    tr = pyproj.Transformer.from_crs(dem.horizontal_crs, pyproj.CRS("OGC:CRS84"), always_xy=True)
    lon, lat = tr.transform(xs, ys)
    lon, lat = np.asarray(lon), np.asarray(lat)
    ok = np.isfinite(lon) & np.isfinite(lat)
    return [float(lon[ok].min()), float(lat[ok].min()), float(lon[ok].max()), float(lat[ok].max())]


def _cell_metres(dem) -> tuple:
    """Cell width per row (array) and height, in metres, for the hillshade."""

    dx, dy = dem.cell_size
    if dem.is_geographic:
        # Spherical metres per degree: enough for shading (not for areas).
        t = dem.transform
        lat = t.f + (np.arange(dem.rows) + 0.5) * t.e
        per_deg = 111_320.0
        return dx * per_deg * np.cos(np.radians(lat)), dy * per_deg
    metres = float(dem.horizontal_crs.axis_info[0].unit_conversion_factor)
    return dx * metres, dy * metres


def run_job(db_path: str, data_dir: str, run_id: int) -> None:
    """Run analysis ``run_id`` to the end, recording progress, success or the reason it failed."""
    data = Path(data_dir)
    conn = db.connect(db_path)
    try:
        run = db.get_run(conn, run_id)
        if run is None:
            return
        folder = layout.run_dir(data, run["site_id"], run_id)
        handler = None
        try:
            # Inside the try: a data folder that cannot be written is a failure with a reason.
            folder.mkdir(parents=True, exist_ok=True)
            handler = logging.FileHandler(folder / "worker.log", encoding="utf-8")
            handler.setFormatter(logging.Formatter("%(asctime)s %(levelname)s %(message)s"))
            log.addHandler(handler)
            log.setLevel(logging.INFO)
            _run(conn, data, run, folder)
        except RunTakenBack:
            log.warning("run %s was taken back by the server; this worker stops", run_id)
            discard_partial_output(folder)
        except BaseException as exc:  # every failure is recorded; the message is for the user
            message = _user_names(conn, run, failure_message(exc, folder))
            log.error("run %s failed: %s\n%s", run_id, message, traceback.format_exc())
            discard_partial_output(folder)
            try:
                db.update_run(conn, run_id, while_status=db.RUNNING, status=db.FAILED,
                              message=message, finished_utc=db.utc_now())
            except Exception:  # pragma: no cover - the database itself is gone
                log.exception("could not record the failure of run %s", run_id)
            if isinstance(exc, (KeyboardInterrupt, SystemExit)):
                raise
        finally:
            if handler is not None:
                log.removeHandler(handler)
                handler.close()
    finally:
        conn.close()


#: What a failed run leaves in its folder: only its log.
_PARTIAL = ("results", "arrays", "arrays.tmp", "arrays.old", "levels", "stage_table.csv",
            site_data.STAGE_TABLE_FILE, site_data.STAGE_TABLE_FILE + ".tmp.npz")


def discard_partial_output(folder: Path, *, note: str | None = None) -> None:
    """Remove what a run that did not finish wrote into ``folder``, keeping ``worker.log``.

    Called for failed runs only (never for a site's current run). ``note`` is
    appended to the log (the supervisor's account of a worker it saw killed).
    """
    folder = Path(folder)
    for name in _PARTIAL:
        path = folder / name
        try:
            if path.is_dir():
                shutil.rmtree(path, ignore_errors=True)
            elif path.exists():
                path.unlink()
        except OSError:  # pragma: no cover - best effort; nothing here is ever served
            pass
    if note:
        try:
            with open(folder / "worker.log", "a", encoding="utf-8") as fh:
                fh.write(f"{db.utc_now()} ERROR {note}\n")
        except OSError:
            pass


def _user_names(conn, run, message: str) -> str:
    """Name files as the user knows them, not by their server-made names."""
    try:
        site = db.get_site(conn, run["site_id"])
        settings = db.loads(run["settings"], {})
        pairs = [(settings.get("dem_file"), site["original_name"] if site else None)]
        pairs += [(o.get("file"), o.get("name")) for o in settings.get("outlets", []) if o.get("file")]
        scenario = settings.get("scenario") or {}
        pairs.append((scenario.get("edits_file"), scenario.get("edits_name")))
        for stored, shown in pairs:
            if stored and shown:
                message = message.replace(Path(stored).name, shown)
    except Exception:  # pragma: no cover - the message is still worth recording
        pass
    return message


#: errno values that mean the disk (or the user's quota on it) is full.
_NO_SPACE = {errno.ENOSPC, errno.EDQUOT, errno.EFBIG}
#: errno values that mean the data folder may not be written.
_DENIED = {errno.EACCES, errno.EPERM}
#: Below this many free bytes in the run's folder, a write error is blamed on space.
LOW_SPACE_BYTES = 4 * 2**20


def _chain(exc: BaseException):
    while exc is not None:
        yield exc
        exc = exc.__cause__ or exc.__context__


def _storage_trouble(exc: BaseException, folder: Path | None) -> str | None:
    """"space", "read-only", "denied" or None: whether a failure came from the disk, not the data.

    GDAL (through rasterio) and SQLite report a full disk in their own words,
    not as an OSError, so their messages are read too, and the free space left
    in the run's folder decides a write error that says nothing.
    """

    for e in _chain(exc):
        if isinstance(e, OSError) and e.errno in _NO_SPACE:
            return "space"
        if isinstance(e, OSError) and e.errno == errno.EROFS:
            return "read-only"
        if isinstance(e, OSError) and e.errno in _DENIED:
            return "denied"
        text = str(e).lower()
        if "no space left" in text or "disk is full" in text or "disk quota" in text:
            return "space"
        if "read-only file system" in text or "readonly database" in text:
            return "read-only"

    chain = list(_chain(exc))
    if any(isinstance(e, (SillmarkError, FileNotFoundError, MemoryError)) for e in chain):
        return None  # the engine's or the file's own reason says more
    if folder is not None and any(isinstance(e, (OSError, sqlite3.Error)) or
                                  e.__class__.__module__.startswith("rasterio") for e in chain):
        try:
            if shutil.disk_usage(next(p for p in (folder, *folder.parents) if p.exists())).free \
                    < LOW_SPACE_BYTES:
                return "space"
        except (OSError, StopIteration):  # pragma: no cover
            pass
    return None


def failure_message(exc: BaseException, folder: Path | None = None) -> str:
    """What the page says when a run fails: the engine's own words for its errors, and
    plain words for a full disk or a data folder that cannot be written."""

    trouble = _storage_trouble(exc, folder)
    if trouble == "space":
        return ("the disk holding the data folder is full (no space left to write the "
                "results); free some space and start the analysis again. The earlier "
                "results, if any, are unchanged")
    if trouble == "read-only":
        return ("the data folder is on a read-only file system, so the results cannot be "
                "written; make it writable and start the analysis again. The earlier "
                "results, if any, are unchanged")
    if trouble == "denied":
        return ("Sillmark is not allowed to write (or read) files in the data folder "
                "(permission denied); fix the folder's permissions and start the analysis "
                "again. The earlier results, if any, are unchanged")
    if isinstance(exc, SillmarkError):
        return " ".join(str(exc).split())
    if isinstance(exc, MemoryError):
        return ("not enough memory for this DEM; crop it to the site or resample it to "
                "coarser cells")
    if isinstance(exc, OSError):
        return f"a file could not be read or written ({exc.strerror or exc.__class__.__name__})"
    if isinstance(exc, KeyboardInterrupt):
        return "the analysis was interrupted; start it again"
    return (f"internal error ({exc.__class__.__name__}); the details are in the run's "
            "worker.log in the data folder")


def _read_grid(path: Path, settings: dict):
    """The DEM's grid from its header, refused when it has more cells than the run allows."""
    grid = read_dem_grid(path, vertical_unit=settings["vertical_unit"])
    limit = int(settings.get("max_cells") or 400_000_000)
    cells = grid.rows * grid.cols
    if cells > limit:
        raise InvalidDEM(
            f"'{path.name}' has {grid.rows:,} × {grid.cols:,} = {cells:,} cells, more than "
            f"the limit of {limit:,}; crop it to the site or resample it to coarser cells")
    return grid


def _finite_range(values: np.ndarray, lo_hi: list) -> None:
    """Widen ``lo_hi`` ([low, high, count]) by the finite values of one block."""
    v = values[np.isfinite(values)]
    if v.size:
        lo_hi[0] = min(lo_hi[0], float(v.min()))
        lo_hi[1] = max(lo_hi[1], float(v.max()))
        lo_hi[2] += int(v.size)


def _run(conn, data: Path, run, folder: Path) -> None:
    run_id = run["id"]
    settings = db.loads(run["settings"])
    site_folder = layout.site_dir(data, run["site_id"])
    progress = _Progress(conn, run_id)
    if not db.update_run(conn, run_id, while_status=db.RUNNING, started_utc=db.utc_now(),
                         worker_pid=os.getpid()):
        raise RunTakenBack(f"run {run_id} is not running (it was never claimed, or taken back)")
    log.info("run %s started in process %s", run_id, os.getpid())
    t0 = time.perf_counter()

    # A DEM above the tiled threshold is never read whole: its cells are read by
    # windows, here for the map's arrays and by the engine tile by tile.
    progress.start("reading the DEM")
    dem_path = site_folder / settings["dem_file"]
    grid = _read_grid(dem_path, settings)
    connectivity = int(settings["connectivity"])
    large = tiled_run.is_large(grid.shape, settings)
    dem = None
    if not large:
        dem = read_dem(dem_path, vertical_unit=settings["vertical_unit"],
                       max_cells=int(settings.get("max_cells") or 400_000_000))
        grid = dem
    rows, cols = grid.shape
    if settings.get("scenario"):
        # The base run's significance minimum (its settings are the base's): the same
        # depressions listed, and no file written for every noise-made pit.
        summary = scenario_run.analyse_scenario(site_folder, settings, folder, progress, grid,
                                                _specs(site_folder, settings["outlets"]),
                                                listing=significance_options(settings, grid.vertical_unit))
        progress.start("finishing")
        summary["seconds"] = round(time.perf_counter() - t0, 2)
        _finish(conn, run, summary, current=False)
        return

    writer = arrays.ArrayWriter(folder / "arrays")
    # The elevations for the map, then the relief drawn from them: both need
    # only the DEM, so they come first and the engine run and the writing of
    # its files follow each other as one call.
    progress.start("drawing the hillshade")
    z_range = [math.inf, -math.inf, 0]

    def elevation_rows(r0: int, r1: int) -> np.ndarray:
        block = dem.elevation[r0:r1] if dem is not None else grid.read_window(r0, r1, 0, cols)
        _finite_range(block, z_range)
        return block

    writer.write_rows("elevation", grid.shape, elevation_rows,
                      rows=arrays.block_rows(cols, limit=BLOCK_ROWS),
                      progress=lambda f: progress.within(0.3 * f))
    if not z_range[2]:
        raise InvalidDEM(f"'{dem_path.name}' holds only nodata cells; give a DEM with elevations")
    elevation = writer.read("elevation")
    dx_m, dy_m = _cell_metres(grid)
    levels = relief.write_relief(
        writer, lambda r0, r1: np.asarray(elevation[r0:r1]), grid.shape, dx_m=dx_m, dy_m=dy_m,
        z_metres=grid.vertical_unit.metres, z_range=(z_range[0], z_range[1]),
        progress=lambda f: progress.within(0.3 + 0.7 * f))

    results = folder / "results"
    specs = _specs(site_folder, settings["outlets"])
    listing = significance_options(settings, grid.vertical_unit)
    if large:
        analysis = tiled_run.analyse_tiled(dem_path, specs, settings, results, progress,
                                           listing=listing)
        progress.start("writing result files")  # written already, tile by tile
        sources = tiled_run.result_rows(results, cols)
    else:
        progress.start("marking outlets")
        outlets = build_outlets(dem, specs, connectivity=connectivity)
        progress.start("flooding from the outlets")
        shares: dict[str, float] = {}

        def file_progress(name: str, done: int, total: int) -> None:
            # The rasters are written on a thread beside the other files, so the
            # steps overlap: the phase's share is the sum of each step's own share.
            if not shares:
                progress.start("writing result files")
            shares[name] = max(shares.get(name, 0.0), done / total if total else 1.0)
            progress.within(min(1.0, sum(shares.values()) / _FILES_WRITTEN))

        # The engine, then every result file, moved into place together.
        analysis = analyse(dem, outlets, results, connectivity=connectivity,
                           progress=file_progress, **listing,
                           **reach_inputs.analyse_inputs(site_folder, settings))
        result = analysis.result
        sources = {name: (lambda r0, r1, a=getattr(result, name): a[r0:r1])
                   for name in ("onset_stage", "flood_tree", "depression_id")}
    log.info("flood and result files done in %.2f s", time.perf_counter() - t0)

    progress.start("storing arrays for the map")
    onset_range = [math.inf, -math.inf, 0]
    read_onset = sources["onset_stage"]

    def onset_rows(r0: int, r1: int) -> np.ndarray:
        block = read_onset(r0, r1)
        _finite_range(block, onset_range)
        return block

    sources["onset_stage"] = onset_rows
    step = arrays.block_rows(cols, limit=BLOCK_ROWS)
    for k, (name, source) in enumerate(sources.items()):
        writer.write_rows(name, grid.shape, source, rows=step,
                          progress=lambda f, k=k: progress.within((k + f) / len(sources)))
    t = analysis.depressions
    summary = {
        "rows": rows,
        "cols": cols,
        "valid_cells": int(analysis.valid_cells),
        "outlet_cells": int(analysis.outlet_cells),
        "outlet_sources": [o.get("name", o["kind"]) for o in settings["outlets"]],
        "connectivity": connectivity,
        "vertical_unit": grid.vertical_unit.value,
        "elevation_min": z_range[0],
        "elevation_max": z_range[1],
        "onset_min": onset_range[0] if onset_range[2] else None,
        "onset_max": onset_range[1] if onset_range[2] else None,
        "depressions": len(t),
        "highest_spill": float(t.spill_elevation.max()) if len(t) else None,
        "unreached_cells": int(analysis.unreached_cells),
        "lonlat_bounds": lonlat_bounds(grid),
        "cell_metres": float(min(np.min(dx_m), dy_m)),
        "seconds": None,
        # The minimum, where it comes from and the counts (sillmark.io.summary).
        "significance": analysis.significance,
    }
    for key in ("elevation_min", "elevation_max", "onset_min", "onset_max", "highest_spill"):
        if summary[key] is not None and not math.isfinite(summary[key]):
            summary[key] = None
    writer.commit(grid, depressions=t, pyramid_levels=levels, extra={"summary": summary},
                  scalars={"connectivity": analysis.connectivity,
                           "unreached_cells": analysis.unreached_cells,
                           "heap_pops": analysis.heap_pops,
                           # The web app gives no edits, so no culverts; any would be refused.
                           "culverts": getattr(analysis, "culverts", None)})

    progress.start("finishing")
    # The site stage table the page's chart shows, computed here once rather than
    # by the server while the first map of the site waits for it.
    site_data.SiteData(run["site_id"], run_id, folder).store_stage_table()
    summary["seconds"] = round(time.perf_counter() - t0, 2)
    _finish(conn, run, summary, current=True)


def _finish(conn, run, summary: dict, *, current: bool) -> None:
    """Mark the run done; a site's own run (``current``) also becomes the site's current run."""
    run_id = run["id"]
    with db.transaction(conn):
        # Only a run still ours becomes current: one the server queued again while this
        # worker was finishing is run afresh, and its folder is cleared.
        done = conn.execute(
            "UPDATE runs SET status = ?, phase = ?, percent = 100, finished_utc = ?, summary = ? "
            "WHERE id = ? AND status = ?",
            (db.DONE, "done", db.utc_now(), db.dumps(summary), run_id, db.RUNNING),
        ).rowcount
        if done != 1:
            raise RunTakenBack(f"run {run_id} was taken back before it could finish")
        if current:
            conn.execute("UPDATE sites SET current_run = ? WHERE id = ?", (run_id, run["site_id"]))
    log.info("run %s done in %.2f s", run_id, summary["seconds"])


def significance_options(settings: dict, unit) -> dict:
    """The significance options of :func:`sillmark.run.analyse` for a run's settings: the
    minimum from the vertical accuracy the user stated, else the default (as the
    command line's ``--vertical-accuracy``)."""
    accuracy = settings.get("vertical_accuracy")
    return {"minimum": site_minimum(vertical_accuracy=accuracy, unit=unit),
            "accuracy_stated": accuracy is not None}


def main(argv: list[str] | None = None) -> int:  # pragma: no cover - manual use
    """``python -m sillmark.web.worker DB DATA RUN``: run one analysis in the foreground."""
    args = sys.argv[1:] if argv is None else argv
    conn = db.connect(args[0])
    try:  # claim it as the job runner would
        db.update_run(conn, int(args[2]), while_status=db.QUEUED, status=db.RUNNING,
                      phase="starting", started_utc=db.utc_now())
    finally:
        conn.close()
    run_job(args[0], args[1], int(args[2]))
    return 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
