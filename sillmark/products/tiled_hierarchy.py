"""The depression hierarchy files out of core, from a folder of the tiled engine.

:func:`write_tiled_hierarchy` writes ``depression_hierarchy.csv``,
``depression_hierarchy.json`` and ``depression_curves.csv`` (the files of
:mod:`sillmark.io.hierarchy_files`) into a folder that
:func:`sillmark.engine.tiled.analyse_tiled` wrote, from ``depression_id.tif``,
``depressions.csv`` and the DEM, without ever holding the whole grid. They are
the same bytes as the files :func:`sillmark.io.export.write_results` writes for the
in-memory result on the same DEM.

Why windows suffice
-------------------
The hierarchy (Barnes, Callaghan & Wickert 2020; built by
:func:`sillmark.products.hierarchy.depression_hierarchy`) is a forest with one tree per
depression of the spill engine, and each tree depends on that depression's
cells only: the sweep visits the cells of each depression on their own
(ascending elevation, then row-major order), the merge of two pools happens
where their cells touch (inside the depression), a tree's top takes its spill
elevation and spill cell from the depression table, and each node's area,
storage and curve are sums over its own region's cells in that same order.
Nodes are numbered in post-order tree by tree in depression order, so the
site's node table is the concatenation, in depression order, of the tables of
runs of consecutive depressions, with ids shifted.

Steps
-----
1. **Bounding boxes** (this process): one pass over ``depression_id.tif``, a
   block of :data:`sillmark.io.export.BLOCK_ROWS` rows at a time, gives each
   depression's first and last row and column (32 bytes a depression).
2. **Batches**: consecutive depression ids are grouped while the bounding box
   of the group stays within ``window_cells`` cells (a depression whose own
   box is larger is a batch of its own).
3. **Hierarchy of each batch** (one task per batch, through the same
   ``map(fn, calls)`` as the tiled engine: :func:`sillmark.engine.tiled.serial_map`
   or a :class:`sillmark.engine.tiled.DaskMap`): the task reads the batch's window of
   the DEM and of ``depression_id.tif`` (other depressions' cells set to 0,
   the batch's renumbered 1..k in order), builds the hierarchy of the window
   with the window's row areas, grid coordinates for pit and spill cells, and
   the depressions' spill points from ``depressions.csv``, checks each top's
   cell count against the table, and keeps its node table and curve rows
   (:func:`sillmark.io.hierarchy_files.curve_part_columns`) in a scratch file.
   Back go counts only.
4. **Format each batch** (one task per batch): with the node and depression
   offsets of the batches before it, the batch's rows of the three files are
   written as text into scratch part files, by the formatting code of the
   in-memory writers.
5. **Concatenate** (this process): each file is its head (comments, header;
   for the JSON the node count) and the batches' parts in order, written
   atomically; then ``summary.json`` again, listing the three files. The
   scratch folder ``.sillmark-hierarchy-*`` in the output folder is removed.

Memory
------
A batch task holds its window: about 13 bytes per window cell (elevation,
ids, a mask, the sweep's 4-byte rank per cell) plus about 130 bytes per
depression cell while the hierarchy is built (sorted cells, union-find
arrays, breakpoints; see :func:`sillmark.products.hierarchy.depression_hierarchy`),
and its curve rows. With the default budget of 16 Mi cells that is at most
about 2.4 GB when every cell of the window lies in a depression, and a few
hundred MB on ordinary terrain. A single depression whose bounding box is
larger than the budget is one batch anyway: its whole box must fit in one
process (about 143 bytes per cell of the box at worst, e.g. 14 GB for a
depression spanning 10^8 cells). This process holds the depression table,
the bounding boxes and the batches' counts.

References
----------
Barnes, R., Callaghan, K. L., Wickert, A. D. (2020). Computing water flow
through complex landscapes – Part 2: Finding hierarchies in depressions and
morphological segmentations. Earth Surface Dynamics 8, 431–445.
doi:10.5194/esurf-8-431-2020
Barnes, R. (2016). Parallel priority-flood depression filling for trillion cell
digital elevation models on desktops or clusters. Computers & Geosciences 96,
56-68. doi:10.1016/j.cageo.2016.07.001
"""

from __future__ import annotations

import dataclasses
import json
import os
import shutil
import time
import uuid
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import rasterio
import rasterio.windows

from sillmark.products import _tiled_hierarchy_kernels
from sillmark.io import export
from sillmark.io import hierarchy_files as hx
from sillmark.grid.dem import DEMGrid
from sillmark.errors import InvalidDEM, InvalidParameter
from sillmark.products.hierarchy import HierarchyTable, _hierarchy_of_cells
from sillmark.engine.executors import serial_map
from sillmark.products.tiled_stage import open_result_folder, read_depression_columns
from sillmark.units import VerticalUnit

__all__ = [
    "DEFAULT_WINDOW_CELLS",
    "TiledHierarchy",
    "hierarchy_batches",
    "write_tiled_hierarchy",
]

#: Cell budget of one batch's window (16 Mi cells; see the module docstring for memory).
DEFAULT_WINDOW_CELLS = 1 << 24
_SCRATCH_PREFIX = ".sillmark-hierarchy-"
_ID_FILE = "depression_id.tif"
_TABLE_FILE = "depressions.csv"
_SUMMARY_FILE = "summary.json"
#: Fields of HierarchyTable kept per batch in the scratch files.
_NODE_FIELDS = tuple(f.name for f in dataclasses.fields(HierarchyTable))


@dataclasses.dataclass(frozen=True)
class TiledHierarchy:
    """What :func:`write_tiled_hierarchy` wrote.

    Attributes
    ----------
    files : list of Path
        The three files, in the order of :data:`sillmark.io.hierarchy_files.HIERARCHY_FILE_NAMES`.
    nodes, pits : int
        Nodes of the hierarchy, and how many are leaves (pits).
    depth : int
        Most nesting levels of one tree (0 without depressions).
    batches : int
        Windows the depressions were cut into.
    window_cells : int
        Cells of the largest window read.
    seconds : dict
        Wall time of each step (``bounds``, ``batches``, ``format``, ``write``).
    """

    files: list
    nodes: int
    pits: int
    depth: int
    batches: int
    window_cells: int
    seconds: dict

    def __len__(self) -> int:
        return self.nodes


@dataclasses.dataclass(frozen=True)
class _Job:
    """What every batch task needs (pickled into each task: no cells)."""

    grid: DEMGrid
    id_path: str
    scratch: str
    connectivity: int
    unit: str
    max_points: int
    step_rows: int
    curve_names: tuple = ()

    def part(self, k: int, what: str) -> str:
        return os.path.join(self.scratch, f"batch{k:06d}_{what}")


# --------------------------------------------------------------------------- windows


def _checked_count(count: Any) -> int:
    if isinstance(count, (bool, np.bool_)) or not isinstance(count, (int, np.integer)) or count < 1:
        raise InvalidParameter(f"window_cells must be a positive whole number of cells, not {count!r}")
    return int(count)


def _bounding_boxes(id_path: Path, count: int, shape: tuple[int, int]):
    """Each depression's first and last row and column (arrays indexed by id, 1..count)."""
    rows, cols = shape
    row_min = np.full(count + 1, np.iinfo(np.int64).max, dtype=np.int64)
    col_min = row_min.copy()
    row_max = np.full(count + 1, -1, dtype=np.int64)
    col_max = row_max.copy()
    with rasterio.open(id_path) as ds:
        if (ds.height, ds.width) != (rows, cols):
            raise InvalidParameter(f"{id_path.name} does not match summary.json's grid; run "
                                   "'sillmark analyse' again")
        for r0 in range(0, rows, export.BLOCK_ROWS):
            r1 = min(rows, r0 + export.BLOCK_ROWS)
            block = ds.read(1, window=rasterio.windows.Window(0, r0, cols, r1 - r0))
            too_large = int(_tiled_hierarchy_kernels.add_bounds(np.ascontiguousarray(block, dtype=np.int32), np.int64(r0),
                                          row_min, row_max, col_min, col_max))
            if too_large:
                raise InvalidParameter(
                    f"{id_path.name} holds depression {too_large} but {_TABLE_FILE} has {count}; "
                    "the folder's files do not belong together: run the analysis again"
                )
    missing = np.flatnonzero(row_max[1:] < 0)
    if missing.size:
        raise InvalidParameter(
            f"depression {int(missing[0]) + 1} has no cells in {id_path.name}; the folder's "
            "files do not belong together: run the analysis again"
        )
    return row_min, row_max, col_min, col_max


def hierarchy_batches(id_path: str | os.PathLike, count: int, *,
                      window_cells: int = DEFAULT_WINDOW_CELLS) -> np.ndarray:
    """The batches of :func:`write_tiled_hierarchy` for a ``depression_id.tif``.

    Returns an ``(batches, 6)`` int64 array: first and last depression id of
    each batch, then its window, rows ``r0:r1`` and columns ``c0:c1`` (the
    bounding box of the batch's depressions). Consecutive ids are grouped while
    the window stays within ``window_cells`` cells; a depression larger than
    that is a batch of its own.
    """
    budget = _checked_count(window_cells)
    path = Path(id_path)
    with rasterio.open(path) as ds:
        shape = (ds.height, ds.width)
    if count == 0:
        return np.empty((0, 6), dtype=np.int64)
    bounds = _bounding_boxes(path, int(count), shape)
    return _tiled_hierarchy_kernels.batches(*bounds, np.int64(budget))


# --------------------------------------------------------------------------- tasks


def _read_ids(path: str, r0: int, r1: int, c0: int, c1: int) -> np.ndarray:
    with rasterio.open(path) as ds:
        return ds.read(1, window=rasterio.windows.Window(c0, r0, c1 - c0, r1 - r0))


def _tree_depth(parent: np.ndarray) -> int:
    """Most nesting levels of one tree (post-order ids: parents after children)."""
    depth = np.zeros(parent.shape[0] + 1, dtype=np.int64)
    for v in range(parent.shape[0], 0, -1):
        p = int(parent[v - 1])
        depth[v] = depth[p] + 1 if p else 1
    return int(depth.max(initial=0))


def _hierarchy_task(job: _Job, k: int, first: int, last: int, window: tuple[int, int, int, int],
                    spill_elevation: np.ndarray, spill_row: np.ndarray, spill_col: np.ndarray,
                    cell_count: np.ndarray) -> dict:
    """Step 3: the hierarchy of depressions ``first..last`` in their window, to scratch."""
    t0 = time.perf_counter()
    r0, r1, c0, c1 = window
    grid = job.grid
    ids = _read_ids(job.id_path, r0, r1, c0, c1)
    mine = (ids >= first) & (ids <= last)
    local = np.where(mine, ids - (first - 1), 0).astype(np.int32)
    del ids
    z = grid.read_window(r0, r1, c0, c1)
    if np.isnan(z[mine]).any():
        raise InvalidDEM(
            f"the DEM {grid.path} has nodata where {_ID_FILE} has depression cells, so it "
            "changed after the analysis; run 'sillmark analyse' again"
        )
    del mine
    unit = VerticalUnit.parse(job.unit)
    hierarchy = _hierarchy_of_cells(
        z, local, spill_elevation, spill_row, spill_col, connectivity=job.connectivity,
        areas=np.ascontiguousarray(grid.row_areas[r0:r1], dtype=np.float64), unit=unit,
        transform=grid.transform, origin=(r0, c0),
    )
    del z, local
    t = hierarchy.nodes
    tops = t.parent == 0
    if not np.array_equal(t.cell_count[tops], cell_count):
        raise InvalidParameter(
            f"the depressions {first}..{last} of {_ID_FILE} do not have the cell counts of "
            f"{_TABLE_FILE}; the folder's files do not belong together: run the analysis again"
        )
    curves = hx.curve_part_columns(hierarchy, unit, max_points=job.max_points,
                                   step_rows=job.step_rows)
    saved = {f"node_{name}": getattr(t, name) for name in _NODE_FIELDS}
    saved.update({f"curve_{j}": np.asarray(values, dtype=str if values.dtype == object else None)
                  for j, values in enumerate(curves.values())})
    with open(job.part(k, "tables.npz"), "wb") as f:
        np.savez(f, **saved)
    return {"nodes": len(t), "pits": int(np.count_nonzero(t.is_leaf)),
            "depth": _tree_depth(t.parent), "curve_rows": int(len(next(iter(curves.values())))),
            "cells": int(hierarchy.regions.cells.shape[0]), "task_s": time.perf_counter() - t0}


def _shifted(t: HierarchyTable, node_offset: int, depression_offset: int) -> HierarchyTable:
    """The node table with the site's node and depression ids."""
    return dataclasses.replace(
        t,
        id=(t.id + node_offset).astype(np.int32),
        parent=np.where(t.parent > 0, t.parent + node_offset, 0).astype(np.int32),
        depression=(t.depression + depression_offset).astype(np.int32),
        children_ids=(t.children_ids + node_offset).astype(np.int32),
    )


def _format_task(job: _Job, k: int, node_offset: int, depression_offset: int) -> dict:
    """Step 4: the batch's rows of the three files as text, with the site's ids."""
    t0 = time.perf_counter()
    unit = VerticalUnit.parse(job.unit)
    with np.load(job.part(k, "tables.npz"), allow_pickle=False) as saved:
        table = HierarchyTable(**{name: saved[f"node_{name}"] for name in _NODE_FIELDS})
        names = list(job.curve_names)
        curves = {name: saved[f"curve_{j}"] for j, name in enumerate(names)}
    table = _shifted(table, node_offset, depression_offset)
    curves["node_id"] = (curves["node_id"] + node_offset).astype(np.int32)
    curves["depression"] = (curves["depression"] + depression_offset).astype(np.int32)
    for what, text in (
        ("nodes.csv", hx.csv_rows(hx.node_table_columns(table, unit, job.grid))),
        ("nodes.json", ",".join(hx.json_node_texts(table))),
        ("curves.csv", hx.csv_rows(curves)),
    ):
        with open(job.part(k, what), "w", encoding="utf-8", newline="") as f:
            f.write(text)
    os.remove(job.part(k, "tables.npz"))
    return {"task_s": time.perf_counter() - t0}


def _empty_hierarchy(job: _Job):
    """The hierarchy of a window without depressions (for the files' headers)."""
    empty = np.empty(0, dtype=np.int64)
    return _hierarchy_of_cells(
        np.zeros((1, 1), np.float32), np.zeros((1, 1), np.int32), np.empty(0, np.float32),
        empty, empty, connectivity=job.connectivity, areas=np.ones(1),
        unit=VerticalUnit.parse(job.unit), transform=job.grid.transform,
    )


# --------------------------------------------------------------------------- the files


def _open_folder(folder: Path, band: int | None) -> tuple[DEMGrid, int, dict]:
    site = open_result_folder(folder, band=band)
    return site.grid, site.connectivity, site.depressions


def write_tiled_hierarchy(
    folder: str | os.PathLike,
    *,
    map: Callable | None = None,
    progress: Callable[[str, int, int], None] | None = None,
    grid: DEMGrid | None = None,
    band: int | None = None,
    window_cells: int = DEFAULT_WINDOW_CELLS,
    keep_scratch: bool = False,
) -> TiledHierarchy:
    """Write the three depression-hierarchy files into a folder of the tiled engine.

    Parameters
    ----------
    folder : path
        A folder :func:`sillmark.engine.tiled.analyse_tiled` (or ``sillmark analyse``)
        wrote: ``summary.json``, ``depression_id.tif``, ``depressions.csv`` and
        the DEM the summary names are read. Workers must be able to read these
        and write into the folder (scratch files).
    map : callable, optional, keyword-only
        ``map(fn, calls)`` as for :func:`sillmark.engine.tiled.analyse_tiled`; default
        :func:`sillmark.engine.tiled.serial_map`, one batch after another.
    progress : callable, optional, keyword-only
        ``progress(step, done, total)``: step ``"hierarchy"`` counts batches
        (after each batch when ``map`` is None, else before and after the
        whole map), ``"hierarchy_files"`` the batches formatted, the same
        way, and ``"hierarchy_write"`` the three files written.
    grid : DEMGrid, optional, keyword-only
        The DEM the folder was computed from, when the caller has it open
        (right after the analysis). Without it the DEM named in
        ``summary.json`` is opened and checked block by block against the
        folder's ``fill_depth.tif`` (:func:`sillmark.products.tiled_stage.open_result_folder`).
    band : int, optional, keyword-only
        Band of the DEM, without ``grid``.
    window_cells : int, keyword-only
        Cell budget of a batch's window (see the module docstring for memory).
    keep_scratch : bool, keyword-only
        Keep the scratch folder (for debugging).

    Returns
    -------
    TiledHierarchy

    Raises
    ------
    InvalidParameter
        The folder lacks a file, or its files do not belong together.
    InvalidDEM
        The DEM is missing or changed since the analysis.

    Notes
    -----
    The files are byte for byte those of :func:`sillmark.io.hierarchy_files.write_hierarchy_csv`,
    :func:`~sillmark.io.hierarchy_files.write_hierarchy_json` and
    :func:`~sillmark.io.hierarchy_files.write_curves_csv` for
    :func:`sillmark.products.hierarchy.site_hierarchy` of the in-memory result on the
    same DEM, outlets and connectivity (the hierarchy does not depend on any
    tile size). ``summary.json`` is written again, listing them (its other
    members kept).
    """

    times: dict[str, float] = {}
    budget = _checked_count(window_cells)
    out = Path(folder)
    summary = export.read_summary(out)
    for name in (_ID_FILE, _TABLE_FILE):
        if not (out / name).is_file():
            raise InvalidParameter(
                f"the folder {out} lacks {name}; give a folder written by 'sillmark analyse' "
                "(run it again if it was interrupted)"
            )
    if grid is None:
        grid, connectivity, table = _open_folder(out, band)
    else:
        if not summary.same_grid(grid.shape, grid.transform):
            raise InvalidDEM(f"the DEM {grid.path} does not have the grid of the analysis in {out}")

        connectivity = summary.connectivity
        table = read_depression_columns(out / _TABLE_FILE)
    unit = VerticalUnit.parse(grid.vertical_unit)
    export.horizontal_crs(grid)  # InvalidDEM before anything is written if there is no CRS
    suffix = export.unit_suffix(unit)
    count = int(table["id"].shape[0])
    if not np.array_equal(table["id"], np.arange(1, count + 1)):
        raise InvalidParameter(f"{_TABLE_FILE} in {out} does not number its depressions 1..n; "
                               "run the analysis again")
    spill_elevation = table[f"spill_elevation_{suffix}"].astype(np.float32)
    spill_row, spill_col = table["spill_row"], table["spill_col"]
    cell_count = table["cell_count"]

    def report(step: str, done: int, total: int) -> None:
        if progress is not None:
            progress(step, done, total)

    def run_tasks(step: str, fn, calls: list) -> list:
        total = len(calls)
        report(step, 0, total)
        if map is None:
            results = []
            for args in calls:
                results.append(serial_map(fn, [args])[0])
                report(step, len(results), total)
        else:
            results = map(fn, calls)
            report(step, len(calls), total)
        return results

    t0 = time.perf_counter()
    batches = hierarchy_batches(out / _ID_FILE, count, window_cells=budget)
    times["bounds"] = time.perf_counter() - t0
    scratch = out / f"{_SCRATCH_PREFIX}{uuid.uuid4().hex[:12]}"
    scratch.mkdir()
    job = _Job(grid=grid, id_path=str(out / _ID_FILE), scratch=str(scratch),
               connectivity=int(connectivity), unit=unit.value,
               max_points=hx.MAX_CURVE_POINTS, step_rows=hx.STEP_ROWS)
    empty = _empty_hierarchy(job)
    job = dataclasses.replace(job, curve_names=tuple(hx.curve_part_columns(empty, unit)))
    try:
        t0 = time.perf_counter()
        calls = []
        for k, (first, last, r0, r1, c0, c1) in enumerate(batches.tolist()):
            sl = slice(first - 1, last)
            calls.append((job, k, first, last, (r0, r1, c0, c1), spill_elevation[sl],
                          spill_row[sl], spill_col[sl], cell_count[sl]))
        built = run_tasks("hierarchy", _hierarchy_task, calls)
        times["batches"] = time.perf_counter() - t0
        times["batch_tasks"] = sum(b["task_s"] for b in built)

        t0 = time.perf_counter()
        node_offsets = np.concatenate(([0], np.cumsum([b["nodes"] for b in built]))).astype(int)
        calls = [(job, k, int(node_offsets[k]), int(batches[k, 0]) - 1) for k in range(len(built))]
        run_tasks("hierarchy_files", _format_task, calls)
        times["format"] = time.perf_counter() - t0

        t0 = time.perf_counter()
        nodes = int(node_offsets[-1])
        parts = range(len(built))
        total = len(hx.HIERARCHY_FILE_NAMES)
        report("hierarchy_write", 0, total)
        csv_path = hx.write_csv_parts(
            out / hx.HIERARCHY_CSV,
            hx.csv_head(hx.hierarchy_csv_comments(unit, connectivity, grid),
                        hx.node_table_columns(empty.nodes, unit, grid)),
            [job.part(k, "nodes.csv") for k in parts],
        )
        report("hierarchy_write", 1, total)
        json_path = hx.write_json_parts(
            out / hx.HIERARCHY_JSON, hx.hierarchy_json_head(unit, connectivity, grid, nodes),
            [job.part(k, "nodes.json") for k in parts],
        )
        report("hierarchy_write", 2, total)
        curves_path = hx.write_csv_parts(
            out / hx.CURVES_CSV,
            hx.csv_head(hx.curves_csv_comments(unit, connectivity, grid),
                        hx.curve_part_columns(empty, unit)),
            [job.part(k, "curves.csv") for k in parts],
        )
        report("hierarchy_write", 3, total)
        files = [csv_path, json_path, curves_path]
        _list_in_summary(out, [p.name for p in files])
        times["write"] = time.perf_counter() - t0
    finally:
        if not keep_scratch:
            shutil.rmtree(scratch, ignore_errors=True)
    windows = (batches[:, 3] - batches[:, 2]) * (batches[:, 5] - batches[:, 4])
    return TiledHierarchy(
        files=files, nodes=nodes, pits=sum(b["pits"] for b in built),
        depth=max((b["depth"] for b in built), default=0), batches=len(built),
        window_cells=int(windows.max(initial=0)), seconds=times,
    )


def _list_in_summary(out: Path, names: list[str]) -> None:
    """Write ``summary.json`` again with ``names`` among its files, in the order of
    :data:`sillmark.io.export.FILE_NAMES`; every other member is kept as it was."""
    path = out / _SUMMARY_FILE
    summary = json.loads(path.read_text(encoding="utf-8"))
    listed = set(summary.get("files", [])) | set(names)
    order = {name: k for k, name in enumerate(export.FILE_NAMES)}
    summary["files"] = sorted(listed, key=lambda n: (order.get(n, len(order)), n))
    export._write_json(path, summary)
