"""The spill engine out of core: a DEM file analysed tile by tile, on Dask or in one process.

:func:`analyse_tiled` gives the results of :func:`sillmark.engine.flood.analyse_site`
and :func:`sillmark.io.export.write_results` for DEMs larger than memory. It
follows the tiled Priority-Flood of Barnes (2016), with the same kernels as the
in-memory engine (:mod:`sillmark.engine._tile_kernels`), and runs its per-tile steps
through a *map* callable: :func:`serial_map` in this process, or
:class:`DaskMap` on a dask.distributed cluster (:func:`dask_map` starts a
``LocalCluster`` or connects to a running scheduler).

Steps
-----
1. **Flood each tile** (one task per tile). The task reads its window of the
   DEM (with a one-cell halo, for outlets next to nodata), marks the window's
   outlets (:class:`sillmark.grid.outlets.OutletPlan`) and floods the tile from its
   own perimeter, every perimeter cell a seed with a label of its own. Its
   local level, flood-tree codes and labels go to scratch files; back to the
   client go only the seed count, the label meetings and the tile's perimeter
   (state, elevation, label of each perimeter cell).
2. **Solve the seed graph** (client). The links between touching perimeter
   cells of neighbouring tiles are built from the perimeters, in the order the
   in-memory engine lists them, and one minimax Dijkstra over seeds, meetings
   and links gives every seed the level it is held to.
3. **Finish each tile** (one task per tile). ``s = max(sl, lam[label])``, the
   seeds' parents, then the tile's pieces of depressions (components of
   ``s > z`` inside it, with first cell and pit) and its spill summary
   (:func:`sillmark.engine._spill_kernels.summarise_tile`): every dry area piece
   next to a depression piece at its level or touching the perimeter, with
   its first local way-out cell, where that way out leads inside the tile,
   and its first rim cell next to each depression piece; per perimeter cell
   its dry area and lowest neighbour inside the tile. The final onset stage,
   flood tree and piece labels replace the scratch files; back go the
   perimeter (final level, piece, outlet flag of each cell), the pieces and
   the spill summary.
4. **Join the pieces** (client). Pieces touching across tile edges are one
   depression (union-find over the perimeters). Depressions are numbered in
   raster order of their first cell, as the in-memory labelling numbers them;
   the pit is the lowest cell, first in raster order. Dry area pieces that
   touch across tile edges at one level are joined the same way, way-out
   tests are completed across the edges, and the graph of dry areas and
   depressions is solved once for all levels
   (:func:`sillmark.engine._spill_kernels.resolve_spills`), giving every spill cell
   and ``spills_to`` by the rule of :mod:`sillmark.engine.flood` ("Spill points").
5. **Write** (one task per file). Each GeoTIFF is written block by block by
   one process from the tiles' scratch files; the depression-id writer also
   totals every depression's cell count, area and volume cell by cell in
   raster order, the very additions of the in-memory engine, so the totals are
   the same bits, and then writes ``depressions.csv``; another task writes
   ``spill_points.geojson``. Last the client writes ``summary.json`` and
   removes the scratch.

What moves: task arguments and results are perimeters, meetings, seed levels,
pieces and spill summaries (a few numbers per perimeter cell, per depression
piece and per dry area next to one); no raster passes through the scheduler. Tile rasters go
through files in the output folder, which every worker must be able to read
and write.

Exactness
---------
The onset stage, the depression ids, every column of the depression table
(spill points and ``spills_to`` included, by the canonical rule of
:mod:`sillmark.engine.flood`) and so every route's controlling sill equal the
in-memory engine's for any tile size of either engine. With the same tile
size the flood tree, and so every route's cells, are the same bits too.

Memory: a task holds one tile, at most about 22 bytes per cell of a tile
(elevation, the outlet mask, the flood's working arrays; the finish task's
spill summary adds a stack of 4 bytes per cell of the dry areas it labels
only: 0.36 GB per worker with 2048-cell tiles, 0.6 GB with 4096); a writer one
block of :data:`sillmark.io.geotiff.BLOCK_ROWS` rows across the grid; the client
the perimeters (about 100 bytes per perimeter cell), the spill summaries and
the depression table.
Scratch on disk: 13 bytes per cell, removed at the end.

References
----------
Barnes, R. (2016). Parallel priority-flood depression filling for trillion cell
digital elevation models on desktops or clusters. Computers & Geosciences 96,
56-68. doi:10.1016/j.cageo.2016.07.001
"""

from __future__ import annotations

import contextlib
import dataclasses
import os
import pickle
import shutil
import time
import uuid
import warnings
from collections.abc import Callable, Iterator, Sequence
from pathlib import Path
from typing import Any

import numpy as np

from sillmark.engine import _spill_kernels as _s
from sillmark.engine import _tile_kernels as _t
from sillmark.engine import _tiled_kernels
from sillmark.engine.flood import (
    DIRECTION_COL,
    DIRECTION_ROW,
    DepressionTable,
    _directions,
    _resolve_spill_parts,
    _spill_parts,
    depression_table,
)
from sillmark.errors import InvalidDEM, InvalidParameter
from sillmark.grid.dem import DEMGrid, read_dem_grid
from sillmark.grid.outlets import OutletPlan, plan_outlets
from sillmark.io.csv_tables import write_depression_table_csv
from sillmark.io.geojson import write_spill_points_table
from sillmark.io.geotiff import DEPRESSION_ID_NODATA, RESULT_LAYERS, write_result_layer
from sillmark.io.summary import FILE_NAMES, write_table_summary

__all__ = [
    "DEFAULT_TILE_SIZE",
    "TILED_FILE_NAMES",
    "DaskMap",
    "TiledRun",
    "analyse_tiled",
    "dask_map",
    "serial_map",
]

#: Side of the tiles, in cells. A 2048 x 2048 tile keeps a task near 100 MB, and
#: its flood runs about 1.4 times faster per cell than a 4096 x 4096 tile's
#: (the working arrays stay closer to the caches; measured on the benchmark
#: terrain of bench/bench_tiled.py).
DEFAULT_TILE_SIZE = 2048
#: Largest tile side: a tile's padded cells must fit the 32-bit heap index.
MAX_TILE_SIZE = 65533
#: Files :func:`analyse_tiled` writes, in the order it writes them.
TILED_FILE_NAMES = (
    "onset_stage.tif",
    "fill_depth.tif",
    "depression_id.tif",
    "flood_tree.tif",
    "depressions.csv",
    "spill_points.geojson",
    "summary.json",
)
_SCRATCH_PREFIX = ".sillmark-tiles-"
_LAYER_FILES = dict(zip(RESULT_LAYERS, FILE_NAMES[:4]))

#: ``map(fn, calls)`` runs ``fn(*args)`` for every tuple in ``calls`` and returns
#: the results in order; see :func:`serial_map` and :class:`DaskMap`.
MapCallable = Callable[[Callable[..., Any], Sequence[tuple]], list]
#: ``progress(step, done, total)``; steps are "flood", "graph", "finish", "join", "write".
Progress = Callable[[str, int, int], None]


def serial_map(fn: Callable[..., Any], calls: Sequence[tuple]) -> list:
    """Run the tasks one after another in this process (tests, small DEMs)."""
    return [fn(*args) for args in calls]


class DaskMap:
    """Run the tasks on a dask.distributed cluster through ``client``.

    Counts the bytes of the task arguments sent and of the results gathered
    (pickled sizes) in :attr:`sent_bytes` and :attr:`received_bytes`.
    """

    def __init__(self, client: Any) -> None:
        self.client = client
        self.sent_bytes = 0
        self.received_bytes = 0

    def __call__(self, fn: Callable[..., Any], calls: Sequence[tuple]) -> list:
        calls = list(calls)
        if not calls:
            return []
        columns = [list(c) for c in zip(*calls)]
        shared = []
        for k, column in enumerate(columns):
            # An argument every call shares (the job) goes to the workers once.
            if len(column) > 1 and all(a is column[0] for a in column):
                self.sent_bytes += len(pickle.dumps(column[0], protocol=5))
                future = self.client.scatter(column[0], broadcast=True, hash=False)
                shared.append(future)
                columns[k] = [future] * len(column)
            else:
                self.sent_bytes += sum(len(pickle.dumps(a, protocol=5)) for a in column)
        with warnings.catch_warnings():
            # Per-tile arguments (seed levels) are expected to add up to megabytes.
            warnings.filterwarnings("ignore", message="Sending large graph", category=UserWarning)
            futures = self.client.map(fn, *columns, pure=False)
        try:
            results = self.client.gather(futures)
        finally:
            for f in futures + shared:
                f.release()
        self.received_bytes += sum(len(pickle.dumps(r, protocol=5)) for r in results)
        return list(results)

    def worker_outgoing_bytes(self) -> int:
        """Bytes the workers have sent, to each other and to the client, so far."""
        totals = self.client.run(lambda dask_worker: dask_worker.transfer_outgoing_bytes_total)
        return int(sum(totals.values()))


@contextlib.contextmanager
def dask_map(*, scheduler: str | None = None, workers: int | None = None,
             memory_limit: str | int | None = "auto") -> Iterator[DaskMap]:
    """A :class:`DaskMap` on a cluster, closed on exit.

    Parameters
    ----------
    scheduler : str, optional
        Address of a running scheduler (``tcp://HOST:PORT``) to use as it is.
    workers : int, optional
        Without ``scheduler``: start a ``LocalCluster`` on 127.0.0.1 with this
        many worker processes (default 2) of one thread each, stopped on exit.
    memory_limit : optional
        Per worker of the local cluster (dask's notation, e.g. ``"2GB"``).
    """
    try:
        from distributed import Client, LocalCluster
    except ImportError:  # pragma: no cover - depends on the installation
        raise InvalidParameter(
            "the tiled engine on a cluster needs dask.distributed; install it with "
            "'pip install dask distributed', or run without --scheduler/--workers"
        ) from None
    if scheduler is not None:
        try:
            client = Client(scheduler, timeout=30)
        except (OSError, TimeoutError) as exc:
            raise InvalidParameter(
                f"cannot reach the Dask scheduler at {scheduler} ({exc}); give the address "
                "it prints on start, e.g. tcp://10.0.0.5:8786"
            ) from None
        try:
            yield DaskMap(client)
        finally:
            client.close()
        return
    n = 2 if workers is None else int(workers)
    if n < 1:
        raise InvalidParameter(f"workers must be 1 or more, not {workers!r}")
    cluster = LocalCluster(n_workers=n, threads_per_worker=1, processes=True, host="127.0.0.1",
                           dashboard_address=None, memory_limit=memory_limit)
    try:
        client = Client(cluster)
        try:
            yield DaskMap(client)
        finally:
            client.close()
    finally:
        cluster.close()


@dataclasses.dataclass(frozen=True)
class TiledRun:
    """What :func:`analyse_tiled` computed and wrote.

    Attributes
    ----------
    depressions : DepressionTable
        The depression table, as in :class:`sillmark.engine.flood.SpillResult`.
    connectivity : int
    shape : (int, int)
    tile_size : int
    tiles : int
        Number of tiles.
    valid_cells, unreached_cells, outlet_cells : int
    outlet_sources : tuple of str
    heap_pops : int
        Priority-queue pops of the tile floods.
    files : list of Path
        In the order of :data:`TILED_FILE_NAMES`.
    seconds : dict
        Wall time of each step, and the time its tasks took in all
        (``flood_tasks``, ``finish_tasks``; ``write_tasks`` per raster).
    """

    depressions: DepressionTable
    connectivity: int
    shape: tuple[int, int]
    tile_size: int
    tiles: int
    valid_cells: int
    unreached_cells: int
    outlet_cells: int
    outlet_sources: tuple[str, ...]
    heap_pops: int
    files: list
    seconds: dict


@dataclasses.dataclass(frozen=True)
class _Job:
    """What every task needs to know (pickled into each task: no cells)."""

    grid: DEMGrid
    plan: OutletPlan
    connectivity: int
    tile: int
    scratch: str

    @property
    def tile_rows(self) -> int:
        return -(-self.grid.rows // self.tile)

    @property
    def tile_cols(self) -> int:
        return -(-self.grid.cols // self.tile)

    @property
    def tiles(self) -> int:
        return self.tile_rows * self.tile_cols

    def bounds(self, k: int) -> tuple[int, int, int, int]:
        ti, tj = divmod(k, self.tile_cols)
        rows, cols = self.grid.shape
        t = self.tile
        return ti * t, min(rows, (ti + 1) * t), tj * t, min(cols, (tj + 1) * t)

    def path(self, k: int, name: str) -> str:
        return os.path.join(self.scratch, f"tile{k:06d}_{name}.npy")


# --------------------------------------------------------------------------- tasks


def _save(path: str, array: np.ndarray) -> None:
    with open(path, "wb") as f:
        np.save(f, array, allow_pickle=False)


def _load(path: str) -> np.ndarray:
    return np.load(path, allow_pickle=False)


def _perimeter_index(h: int, w: int) -> np.ndarray:
    """Local padded indices of a tile's perimeter cells, in perimeter order."""
    pr, pc = _tiled_kernels.perimeter_cells(h, w)
    return (pr + 1) * (w + 2) + pc + 1


def _flood_task(job: _Job, k: int) -> dict:
    """Step 1 for tile ``k``: read, mark outlets, flood from the perimeter; perimeter back."""
    started = time.perf_counter()
    r0, r1, c0, c1 = job.bounds(k)
    h, w = r1 - r0, c1 - c0
    halo = job.grid.read_window(r0 - 1, r1 + 1, c0 - 1, c1 + 1)
    z = np.ascontiguousarray(halo[1:-1, 1:-1])
    mask, counts = job.plan.window(job.grid, halo, r0, r1, c0, c1)
    del halo
    dirs = _directions(job.connectivity)
    lz, lstate, llab, seeds, ea, eb, elevel, la, lb, pops = _t.flood_tile_arrays(
        z, mask, np.int64(0), np.int64(h), np.int64(0), np.int64(w),
        DIRECTION_ROW, DIRECTION_COL, dirs,
    )
    _save(job.path(k, "z"), z)
    _save(job.path(k, "level"), lz)
    _save(job.path(k, "state"), lstate)
    _save(job.path(k, "label"), llab)
    lw = w + 2
    width = job.grid.cols + 2
    pidx = _perimeter_index(h, w)
    return {
        "n_seeds": int(seeds.shape[0] - 1),
        "ea": ea, "eb": eb, "elevel": elevel,
        "ecell_a": (r0 + la // lw) * width + c0 + la % lw,
        "ecell_b": (r0 + lb // lw) * width + c0 + lb % lw,
        "pstate": lstate[pidx], "plevel": lz[pidx], "plabel": llab[pidx],
        "heap_pops": int(pops),
        "outlet_counts": counts,
        "outlet_cells": int(np.count_nonzero(mask)),
        "valid": int(np.count_nonzero(~np.isnan(z))),
        "task_s": time.perf_counter() - started,
    }


def _finish_task(job: _Job, k: int, lam: np.ndarray, own: np.ndarray, other: np.ndarray) -> dict:
    """Step 3 for tile ``k``: final level and tree, pieces of depressions, spill summary."""
    started = time.perf_counter()
    r0, r1, c0, c1 = job.bounds(k)
    h, w = r1 - r0, c1 - c0
    lw = w + 2
    cols = job.grid.cols
    z = _load(job.path(k, "z"))
    lz = _load(job.path(k, "level"))
    lstate = _load(job.path(k, "state"))
    llab = _load(job.path(k, "label"))
    pidx = _perimeter_index(h, w)
    on_seed = lstate[pidx] == _t.SEED
    seeds = np.zeros(lam.shape[0], dtype=np.int64)
    seeds[llab[pidx[on_seed]]] = pidx[on_seed]
    _t.finish_tile(
        np.int64(0), np.int64(h), np.int64(0), np.int64(w), lz, lstate, llab, np.int64(0),
        lam, seeds, own, other, DIRECTION_ROW, DIRECTION_COL, np.int64(lw),
    )
    dirs = _directions(job.connectivity)
    steps = DIRECTION_ROW[dirs] * lw + DIRECTION_COL[dirs]
    back = steps[steps < 0].astype(np.int64)
    first, pit_cell, pit_z, piece_level, _count, valid, unreached = _tiled_kernels.label_tile(
        lz, lstate, llab, z, np.int64(h), np.int64(w), back
    )
    _save(job.path(k, "level"), lz)
    _save(job.path(k, "state"), lstate)
    _save(job.path(k, "label"), llab)
    p_piece = llab[pidx]
    p_outlet = lstate[pidx] == _t.OUTLET
    # The spill summary labels dry areas in llab (negative); it is saved already.
    offs = (DIRECTION_ROW[dirs] * lw + DIRECTION_COL[dirs]).astype(np.int64)
    spill = _s.summarise_tile(lz, lstate, llab, np.int64(h), np.int64(w), offs, dirs,
                              np.int64(len(first) - 1), True, pidx.astype(np.int64),
                              np.int64(r0), np.int64(c0), np.int64(cols))

    def to_global(li: np.ndarray) -> np.ndarray:
        return (r0 + li // lw - 1) * cols + (c0 + li % lw - 1)

    return {
        "first": to_global(first[1:]),
        "pit": to_global(pit_cell[1:]),
        "pit_z": pit_z[1:],
        "level": piece_level[1:],
        "p_level": lz[pidx],
        "p_piece": p_piece,
        "p_outlet": p_outlet,
        "spill": spill,
        "valid": int(valid),
        "unreached": int(unreached),
        "task_s": time.perf_counter() - started,
    }


class _TileReader:
    """Rows of the tiles' scratch rasters, across the whole grid.

    Reads just the rows asked for from each tile's file (plain reads, no memory
    map, so the pages stay in the page cache and out of the writer's resident
    memory).
    """

    def __init__(self, job: _Job) -> None:
        self.job = job
        self._layout: dict[tuple[int, str], tuple[int, np.dtype, int]] = {}

    def _rows_of(self, k: int, name: str, a0: int, a1: int) -> np.ndarray:
        """Tile rows ``a0:a1`` (tile-local) of scratch ``name`` of tile ``k``, unpadded."""
        path = self.job.path(k, name)
        r0, r1, c0, c1 = self.job.bounds(k)
        h, w = r1 - r0, c1 - c0
        key = (k, name)
        if key not in self._layout:
            with open(path, "rb") as f:
                version = np.lib.format.read_magic(f)
                read_header = (np.lib.format.read_array_header_1_0 if version == (1, 0)
                               else np.lib.format.read_array_header_2_0)
                _, _, dtype = read_header(f)
                self._layout[key] = (f.tell(), np.dtype(dtype), 0)
        offset, dtype, _ = self._layout[key]
        padded = name != "z"
        lw = w + 2 if padded else w
        first = a0 + 1 if padded else a0
        count = (a1 - a0) * lw
        with open(path, "rb") as f:
            f.seek(offset + first * lw * dtype.itemsize)
            data = np.fromfile(f, dtype=dtype, count=count).reshape(a1 - a0, lw)
        return data[:, 1:-1] if padded else data

    def rows(self, r0: int, r1: int, name: str, dtype, convert=None) -> np.ndarray:
        job = self.job
        out = np.empty((r1 - r0, job.grid.cols), dtype=dtype)
        t = job.tile
        for ti in range(r0 // t, (r1 - 1) // t + 1):
            a0 = max(r0, ti * t)
            a1 = min(r1, (ti + 1) * t)
            for tj in range(job.tile_cols):
                k = ti * job.tile_cols + tj
                _, _, c0, c1 = job.bounds(k)
                part = self._rows_of(k, name, a0 - ti * t, a1 - ti * t)
                if convert is not None:
                    part = convert(k, part)
                out[a0 - r0 : a1 - r0, c0:c1] = part
        return out


def _table(parts: dict, totals: dict | None, transform) -> DepressionTable:
    """The depression table from the joined columns and the writer's totals."""
    n = parts["pit"].shape[0] - 1
    zero = {"count": np.zeros(n + 1, np.int64), "area": np.zeros(n + 1), "volume": np.zeros(n + 1)}
    totals = zero if totals is None else totals
    cols = parts["cols"]
    spill = parts["spill"][1:]
    return depression_table(
        pit_row=parts["pit"][1:] // cols, pit_col=parts["pit"][1:] % cols,
        pit_elevation=parts["pit_z"][1:],
        spill_row=spill // cols, spill_col=spill % cols,
        spill_elevation=parts["level"][1:],
        spills_to=parts["spills_to"][1:],
        cell_count=totals["count"][1:], area_m2=totals["area"][1:],
        volume_m2_vu=totals["volume"][1:],
        transform=transform,
    )


def _write_task(job: _Job, layer: str, path: str, parts: dict | None) -> dict:
    """Step 5: write one result file.

    A raster block by block; the depression-id writer also totals every
    depression in raster order and then writes ``depressions.csv`` (``path`` is
    the raster's; the table goes beside it). ``layer="spill_points"`` writes
    ``spill_points.geojson`` (it needs no totals).
    """
    started = time.perf_counter()
    grid = job.grid
    if layer == "spill_points":
        written = write_spill_points_table(_table(parts, None, grid.transform), grid, path)
        return {"paths": [str(written)], "task_s": time.perf_counter() - started}
    reader = _TileReader(job)
    totals = {}
    n_depressions = None if parts is None else int(parts["pit"].shape[0] - 1)
    if layer == "onset_stage":
        def block(r0, r1):
            return reader.rows(r0, r1, "level", np.float32)
    elif layer == "fill_depth":
        def block(r0, r1):
            s = reader.rows(r0, r1, "level", np.float32)
            return np.subtract(s, reader.rows(r0, r1, "z", np.float32), dtype=np.float32)
    elif layer == "flood_tree":
        def block(r0, r1):
            tree = reader.rows(r0, r1, "state", np.uint8)
            tree[tree == _t.BLOCKED] = 0
            return tree
    else:
        piece_off, piece_id = parts["piece_off"], parts["piece_id"]
        count = np.zeros(n_depressions + 1, dtype=np.int64)
        area = np.zeros(n_depressions + 1, dtype=np.float64)
        volume = np.zeros(n_depressions + 1, dtype=np.float64)
        luts = {}

        def to_id(k, piece):
            if k not in luts:
                luts[k] = np.concatenate(
                    [[0], piece_id[piece_off[k] : piece_off[k + 1]]]).astype(np.int32)
            return luts[k][piece]

        areas = grid.row_areas

        def block(r0, r1):
            ids = reader.rows(r0, r1, "label", np.int32, to_id)
            s = reader.rows(r0, r1, "level", np.float32)
            z = reader.rows(r0, r1, "z", np.float32)
            _tiled_kernels.accumulate(ids, s, z, areas[r0:r1], count, area, volume)
            ids[np.isnan(s)] = DEPRESSION_ID_NODATA
            return ids

        totals = {"count": count, "area": area, "volume": volume}
    written = [str(write_result_layer(layer, grid, path, block=block,
                                      connectivity=job.connectivity,
                                      depression_count=n_depressions))]
    if totals:
        table = _table(parts, totals, grid.transform)
        written.append(str(write_depression_table_csv(
            table, grid, Path(path).with_name("depressions.csv"), connectivity=job.connectivity)))
    return {"paths": written, "task_s": time.perf_counter() - started, **totals}


# --------------------------------------------------------------------------- the run


def analyse_tiled(
    dem_path: str | os.PathLike,
    out_dir: str | os.PathLike,
    *,
    outlets: Any = ("edge",),
    connectivity: int = 8,
    tile_size: int = DEFAULT_TILE_SIZE,
    map: MapCallable | None = None,
    band: int | None = None,
    vertical_unit: Any = None,
    crs: Any = None,
    progress: Progress | None = None,
    keep_scratch: bool = False,
) -> TiledRun:
    """Analyse a DEM file tile by tile and write the result files into ``out_dir``.

    Parameters
    ----------
    dem_path : path
        The DEM, a raster file every worker can read (see :func:`sillmark.grid.dem.read_dem_grid`).
    out_dir : path
        Output folder, created if missing; every worker must be able to write
        into it (tile scratch files live there during the run).
    outlets : sequence, keyword-only
        Outlet sources as for :func:`sillmark.grid.outlets.build_outlets`.
    connectivity : {8, 4}
    tile_size : int
        Side of the square tiles, in cells (the last row and column of tiles
        may be smaller).
    map : callable, optional
        ``map(fn, calls)``; default :func:`serial_map`. Use a :class:`DaskMap`
        (e.g. from :func:`dask_map`) to run the tasks on a cluster.
    band, vertical_unit, crs
        As for :func:`sillmark.grid.dem.read_dem`.
    progress : callable, optional
        ``progress(step, done, total)``.
    keep_scratch : bool
        Keep the tile scratch folder (for debugging).

    Returns
    -------
    TiledRun

    Raises
    ------
    InvalidDEM, InvalidOutlets, InvalidParameter
        As the in-memory engine, for the same input.

    Notes
    -----
    Files: those of :data:`TILED_FILE_NAMES`, each the same file (bar the
    creation time and the ``engine`` member of ``summary.json``) as
    :func:`sillmark.io.export.write_results` writes for the in-memory result with
    the same tile size. The depression outlines (``depressions.geojson``) and
    the three hierarchy files are written afterwards from the folder, window
    by window, by :func:`sillmark.io.results_folder.add_depression_outlines` and
    :func:`sillmark.products.tiled_hierarchy.write_tiled_hierarchy` (which the command
    line and the web app call); they too equal the in-memory files.
    """
    times: dict[str, float] = {}
    run_map = serial_map if map is None else map
    tile = _tile_size(tile_size)
    dirs = _directions(connectivity)
    grid = read_dem_grid(dem_path, band=band, vertical_unit=vertical_unit, crs=crs)
    plan = plan_outlets(grid, outlets, connectivity=connectivity)
    out = Path(out_dir)
    if out.exists() and not out.is_dir():
        raise InvalidParameter(f"the output path {out} is a file; give a folder (new or existing)")
    out.mkdir(parents=True, exist_ok=True)
    scratch = out / f"{_SCRATCH_PREFIX}{uuid.uuid4().hex[:12]}"
    scratch.mkdir()
    job = _Job(grid=grid, plan=plan, connectivity=int(connectivity), tile=tile,
               scratch=str(scratch))
    rows, cols = grid.shape

    def report(step: str, done: int, total: int) -> None:
        if progress is not None:
            progress(step, done, total)

    try:
        # Step 1: flood every tile from its perimeter.
        t0 = time.perf_counter()
        report("flood", 0, job.tiles)
        floods = run_map(_flood_task, [(job, k) for k in range(job.tiles)])
        report("flood", job.tiles, job.tiles)
        times["flood"] = time.perf_counter() - t0
        times["flood_tasks"] = sum(f["task_s"] for f in floods)
        valid_cells = sum(f["valid"] for f in floods)
        if valid_cells == 0:
            raise InvalidDEM(
                f"every cell of '{os.path.basename(grid.path)}' is nodata; give a DEM with at "
                "least one elevation (check the declared nodata value)"
            )
        counts = np.sum([f["outlet_counts"] for f in floods], axis=0)
        plan.check(counts, all_valid=valid_cells == rows * cols)

        # Step 2: the graph of seeds, meetings and links, solved on the client.
        t0 = time.perf_counter()
        report("graph", 0, 1)
        lam, own, other, base = _solve(job, floods, dirs)
        report("graph", 1, 1)
        times["graph"] = time.perf_counter() - t0

        # Step 3: finish every tile.
        t0 = time.perf_counter()
        width = cols + 2
        calls = []
        for k, f in enumerate(floods):
            r0, r1, c0, c1 = job.bounds(k)
            n = f["n_seeds"]
            lw = c1 - c0 + 2
            sl = slice(base[k], base[k] + n + 1)
            calls.append((job, k, lam[sl].copy(), _to_local(own[sl], r0, c0, width, lw),
                          _to_local(other[sl], r0, c0, width, lw)))
        heap_pops = sum(f["heap_pops"] for f in floods)
        outlet_cells = sum(f["outlet_cells"] for f in floods)
        del floods, lam, own, other
        report("finish", 0, job.tiles)
        finished = run_map(_finish_task, calls)
        del calls
        report("finish", job.tiles, job.tiles)
        times["finish"] = time.perf_counter() - t0
        times["finish_tasks"] = sum(f["task_s"] for f in finished)

        # Step 4: pieces into depressions, pits, spill cells.
        t0 = time.perf_counter()
        report("join", 0, 1)
        joined = _join(job, finished, dirs)
        unreached = sum(f["unreached"] for f in finished)
        del finished
        report("join", 1, 1)
        times["join"] = time.perf_counter() - t0

        # Step 5: the rasters, one writer each (the id writer also writes the
        # table), and the spill points, all at once; then the summary.
        t0 = time.perf_counter()
        parts = {key: joined[key] for key in ("pit", "pit_z", "level", "spill", "spills_to",
                                              "piece_off", "piece_id")}
        parts["cols"] = cols
        small = {key: parts[key] for key in ("pit", "pit_z", "level", "spill", "spills_to", "cols")}
        order = ("depression_id", "onset_stage", "fill_depth", "spill_points", "flood_tree")
        report("write", 0, len(order))
        writes = run_map(_write_task, [
            (job, what, str(out / ("spill_points.geojson" if what == "spill_points"
                                   else _LAYER_FILES[what])),
             parts if what == "depression_id" else small if what == "spill_points" else None)
            for what in order
        ])
        report("write", len(order), len(order))
        by_what = dict(zip(order, writes))
        times["write_tasks"] = {what: w["task_s"] for what, w in by_what.items()}
        totals = by_what["depression_id"]
        table = _table(parts, totals, grid.transform)
        written = {Path(p).name: Path(p) for w in writes for p in w["paths"]}
        files = [written[name] for name in TILED_FILE_NAMES[:-1]]
        engine = {"kind": "tiled", "tile_size": tile, "tiles": job.tiles}
        files.append(write_table_summary(
            table, grid, out / "summary.json", connectivity=connectivity,
            unreached_cells=unreached, valid_cells=valid_cells,
            outlet_sources=plan.sources, outlet_count=outlet_cells,
            files=[p.name for p in files], engine=engine,
        ))
        times["write"] = time.perf_counter() - t0
    finally:
        if not keep_scratch:
            shutil.rmtree(scratch, ignore_errors=True)
    return TiledRun(
        depressions=table, connectivity=int(connectivity), shape=(rows, cols), tile_size=tile,
        tiles=job.tiles, valid_cells=valid_cells, unreached_cells=unreached,
        outlet_cells=outlet_cells, outlet_sources=plan.sources, heap_pops=heap_pops,
        files=files, seconds=times,
    )


def _tile_size(tile_size: Any) -> int:
    if isinstance(tile_size, bool) or not isinstance(tile_size, (int, np.integer)):
        raise InvalidParameter(f"tile_size must be a whole number of cells, not {tile_size!r}")
    if not 1 <= int(tile_size) <= MAX_TILE_SIZE:
        raise InvalidParameter(
            f"tile_size must be between 1 and {MAX_TILE_SIZE} cells, not {tile_size}; "
            f"{DEFAULT_TILE_SIZE} suits most machines"
        )
    return int(tile_size)


def _to_local(cells: np.ndarray, r0: int, c0: int, width: int, lw: int) -> np.ndarray:
    """Global padded indices to a tile's local padded indices (-1 stays -1)."""
    out = (cells // width - r0) * lw + (cells % width - c0)
    return np.where(cells < 0, -1, out).astype(np.int64)


def _solve(job: _Job, floods: list[dict], dirs: np.ndarray):
    """Step 2: links from the perimeters, then the minimax Dijkstra over the seed graph."""
    rows, cols = job.grid.shape
    seed_counts = np.array([f["n_seeds"] for f in floods], dtype=np.int64)
    base = np.concatenate([[0], np.cumsum(seed_counts)[:-1]]).astype(np.int64)
    n_nodes = int(seed_counts.sum()) + 1
    poff = np.concatenate([[0], np.cumsum([len(f["pstate"]) for f in floods])]).astype(np.int64)
    pstate = np.concatenate([f["pstate"] for f in floods])
    plevel = np.concatenate([f["plevel"] for f in floods])
    plabel = np.concatenate([f["plabel"] for f in floods])
    parts = [_tiled_kernels.perimeter_links(
        pstate, plevel, plabel, poff, base, np.int64(job.tile_rows), np.int64(job.tile_cols),
        np.int64(job.tile), np.int64(rows), np.int64(cols), np.int64(cols + 2),
        DIRECTION_ROW, DIRECTION_COL, dirs,
    )]
    for t, f in enumerate(floods):
        ea, eb = f["ea"], f["eb"]
        eu = np.where(ea == 0, 0, base[t] + ea)
        ev = np.where(eb == 0, 0, base[t] + eb)
        parts.append((eu, ev, f["elevel"], f["ecell_a"], f["ecell_b"]))
    eu, ev, elevel, ecu, ecv = (np.concatenate([p[k] for p in parts]) for k in range(5))
    lam, own, other = _t.solve_graph(
        np.int64(n_nodes), eu.astype(np.int64), ev.astype(np.int64),
        elevel.astype(np.float32), ecu.astype(np.int64), ecv.astype(np.int64),
    )
    return lam, own, other, base


def _join(job: _Job, finished: list[dict], dirs: np.ndarray) -> dict:
    """Step 4: depressions from pieces, numbered in raster order; pits; spill points."""
    rows, cols = job.grid.shape
    n_pieces = np.array([len(f["first"]) for f in finished], dtype=np.int64)
    piece_off = np.concatenate([[0], np.cumsum(n_pieces)]).astype(np.int64)
    total = int(piece_off[-1])
    poff = np.concatenate([[0], np.cumsum([len(f["p_piece"]) for f in finished])]).astype(np.int64)
    p_piece = np.concatenate([f["p_piece"] for f in finished]).astype(np.int32)
    forest = np.arange(total, dtype=np.int64)
    _tiled_kernels.union_pieces(p_piece, poff, piece_off, np.int64(job.tile_rows), np.int64(job.tile_cols),
                    np.int64(job.tile), np.int64(rows), np.int64(cols), DIRECTION_ROW,
                    DIRECTION_COL, dirs, forest)
    root = _tiled_kernels.roots(forest)
    first = np.concatenate([f["first"] for f in finished]).astype(np.int64)
    pit = np.concatenate([f["pit"] for f in finished]).astype(np.int64)
    pit_z = np.concatenate([f["pit_z"] for f in finished]).astype(np.float32)
    level = np.concatenate([f["level"] for f in finished]).astype(np.float32)

    # Number depressions by their first cell in raster order (as the in-memory labelling).
    first_of_root = np.full(total, np.iinfo(np.int64).max, dtype=np.int64)
    np.minimum.at(first_of_root, root, first)
    roots_ = np.flatnonzero(root == np.arange(total))
    n = int(roots_.shape[0])
    id_of_root = np.zeros(total, dtype=np.int32)
    id_of_root[roots_[np.argsort(first_of_root[roots_], kind="stable")]] = np.arange(
        1, n + 1, dtype=np.int32)
    piece_id = id_of_root[root] if total else np.zeros(0, dtype=np.int32)

    # Pit: the lowest cell, first in raster order on ties.
    order = np.lexsort((pit, pit_z, piece_id))
    head = np.ones(total, dtype=bool)
    head[1:] = piece_id[order][1:] != piece_id[order][:-1]
    best = order[head]  # one piece per depression, ids ascending
    dep_pit = np.zeros(n + 1, dtype=np.int64)
    dep_pit_z = np.zeros(n + 1, dtype=np.float32)
    dep_level = np.zeros(n + 1, dtype=np.float32)
    dep_pit[1:] = pit[best]
    dep_pit_z[1:] = pit_z[best]
    dep_level[1:] = level[best]

    # Spill points and spills_to, from the tiles' spill summaries (canonical rule).
    parts = []
    p_dep = []
    area_base = 0
    for t, f in enumerate(finished):
        ids_t = np.concatenate([[0], piece_id[piece_off[t]:piece_off[t + 1]]]).astype(np.int32)
        parts.append(_spill_parts(f["spill"], ids_t, area_base))
        area_base += len(f["spill"][0])
        p_dep.append(ids_t[f["p_piece"]])
    joined_parts = {key: np.concatenate([p[key] for p in parts]) for key in parts[0]}
    spill, spills_to = _resolve_spill_parts(
        n, joined_parts,
        p_level=np.concatenate([f["p_level"] for f in finished]),
        p_dep=np.concatenate(p_dep),
        p_outlet=np.concatenate([f["p_outlet"] for f in finished]),
        poff=poff, tile=job.tile, rows=rows, cols=cols, dirs=dirs,
    )
    return {"n": n, "piece_off": piece_off, "piece_id": piece_id.astype(np.int32),
            "pit": dep_pit, "pit_z": dep_pit_z, "level": dep_level, "spill": spill,
            "spills_to": spills_to}
