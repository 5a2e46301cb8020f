"""The batch tasks of the depression-hierarchy files (steps 2 and 3 of
:mod:`sillmark.io.hierarchy_writer`).

Each task builds or formats one batch of consecutive depressions: its
hierarchy in its window (:func:`sillmark.products.hierarchy_windows.batch_hierarchy`),
its node table and curve rows kept in scratch files, then its rows of the three
files as text parts. A :class:`BatchJob` carries what every task needs and is
pickled into each task when the tasks run on a cluster; without one they run
in the calling process (:func:`serial_batches`), nothing pickled.

References
----------
Barnes, R., Callaghan, K. L., Wickert, A. D. (2020). Computing water flow
through complex landscapes – Part 2: Finding hierarchies in depressions and
morphological segmentations. Earth Surface Dynamics 8, 431–445.
doi:10.5194/esurf-8-431-2020
"""

from __future__ import annotations

import dataclasses
import os
import time
from typing import TYPE_CHECKING, Any

import numpy as np

from sillmark.io import hierarchy_files as hx
from sillmark.io.csv_tables import write_rows
from sillmark.products import hierarchy_curves as hc
from sillmark.products.hierarchy import HierarchyTable
from sillmark.products.hierarchy_sweep import hierarchy_of_cells
from sillmark.products.hierarchy_windows import batch_hierarchy, tree_depth
from sillmark.products.significance import SiteMinimum, significance
from sillmark.products.source import ArraySource
from sillmark.units import VerticalUnit

if TYPE_CHECKING:  # pragma: no cover
    from affine import Affine

    from sillmark.products.source import ResultSource

#: Fields of HierarchyTable kept per batch in the scratch files.
NODE_FIELDS = tuple(f.name for f in dataclasses.fields(HierarchyTable))


@dataclasses.dataclass(frozen=True)
class BatchJob:
    """What every batch task needs; pickled into each task when ``map`` is given."""

    layers: Any
    transform: "Affine | None"
    scratch: str
    connectivity: int
    unit: str
    max_points: int
    step_rows: int
    max_rows: int
    minimum: SiteMinimum | None = None
    significant_only: bool = False

    def part(self, k: int, what: str) -> str:
        return os.path.join(self.scratch, f"batch{k:06d}_{what}")


def task_layers(source: "ResultSource") -> Any:
    """What the tasks read windows through: the source in memory, or the small
    reader of its layers that a results folder offers (``layers``)."""
    if isinstance(source, ArraySource):
        return source
    return getattr(source, "layers", source)


# --------------------------------------------------------------------------- tasks
#
# A batch's curve rows are computed where its hierarchy is built, thinned for the
# batch alone (never more rows than the cap); once every batch is counted, the
# site's thinning (a subset of each batch's, see sillmark.products.hierarchy_curves)
# picks the rows written.

CURVE_FIELDS = ("node", "index", "level", "area_m2", "storage_m3", "code")


def built_batch(job: BatchJob, first: int, last: int, window: tuple[int, int, int, int],
           areas: np.ndarray, spill_elevation: np.ndarray, spill_row: np.ndarray,
           spill_col: np.ndarray, cell_count: np.ndarray):
    """The hierarchy of depressions ``first..last`` in their window, and its counts."""
    hierarchy = batch_hierarchy(
        job.layers, first, last, window, areas=areas, spill_elevation=spill_elevation,
        spill_row=spill_row, spill_col=spill_col, cell_count=cell_count,
        connectivity=job.connectivity, unit=VerticalUnit.parse(job.unit),
        transform=job.transform, segments=False,  # the curve rows do not read them
    )
    return hierarchy, batch_counts(hierarchy, job)


def batch_counts(hierarchy, job: BatchJob) -> dict:
    """The batch's counts (and, with the job's minimum, its significant nodes)."""
    t = hierarchy.nodes
    counts = {"nodes": len(t), "pits": int(np.count_nonzero(t.is_leaf)),
              "depth": tree_depth(t.parent)}
    if job.minimum is not None:
        # Significance is decided tree by tree (each tree is one depression and a
        # batch holds whole depressions), so the batch's answer is the site's.
        sig = significance(hierarchy, job.minimum)
        counts["significant"] = len(sig)
        counts["significant_top"] = int(np.count_nonzero(sig.table.parent == 0))
        counts["whole"] = sig.depression_to_significant[1:] > 0
        if job.significant_only:
            counts["listed"] = sig.significant
    return counts


def curve_part(job: BatchJob, hierarchy, listed: np.ndarray | None) -> tuple[dict, dict]:
    """The batch's curve rows, thinned for the batch alone, and its thinning summary."""
    t = hierarchy.nodes
    natural = hc.natural_counts(hierarchy, max_points=job.max_points, step_rows=job.step_rows,
                                listed=listed)
    stride, _ = hc.choose_strides(natural, t.volume_m3, listed, job.max_rows)
    rows = hc.curve_rows(hierarchy, natural, stride, max_points=job.max_points,
                         step_rows=job.step_rows)
    tables = {f"curve_{name}": getattr(rows, name) for name in CURVE_FIELDS}
    tables.update(count_rows=natural.rows, count_merge=natural.merge_index,
                  count_stepped=natural.stepped)
    return tables, hc.thinning_summary(natural, t.volume_m3, listed, job.max_rows)


def _save(path: str, arrays: dict) -> None:
    with open(path, "wb") as f:
        np.savez(f, **arrays)


def hierarchy_task(job: BatchJob, k: int, first: int, last: int, window: tuple[int, int, int, int],
                    areas: np.ndarray, spill_elevation: np.ndarray, spill_row: np.ndarray,
                    spill_col: np.ndarray, cell_count: np.ndarray, nodes: bool = True,
                    curves: bool = True, listed: np.ndarray | None = None) -> dict:
    """Step 2 on a ``map``: the batch's hierarchy, its node table (with ``nodes``) and
    its curve rows for the ``listed`` nodes (with ``curves``) kept in scratch files.

    With ``listed`` given, the batch's node ids are known only once every batch
    has counted its nodes: the first round keeps the node table only, and a
    second round builds the hierarchy again for the curves.
    """
    t0 = time.perf_counter()
    hierarchy, counts = built_batch(job, first, last, window, areas, spill_elevation, spill_row,
                               spill_col, cell_count)
    t = hierarchy.nodes
    mine = counts.pop("listed", None)  # the batch's significant nodes, with a minimum
    if mine is not None:
        listed = mine
    if nodes:
        arrays = {f"node_{name}": getattr(t, name) for name in NODE_FIELDS}
        if mine is not None:
            arrays["listed"] = mine
        _save(job.part(k, "nodes.npz"), arrays)
    if curves:
        tables, counts["thinning"] = curve_part(job, hierarchy, listed)
        _save(job.part(k, "curves.npz"), tables)
    counts["listed_count"] = len(t) if listed is None else int(np.count_nonzero(listed))
    return {**counts, "task_s": time.perf_counter() - t0}


def curves_round(*call) -> dict:
    """:func:`hierarchy_task` with its keyword options as trailing arguments."""
    return hierarchy_task(*call)


def _shifted(t: HierarchyTable, node_offset: int, depression_offset: int) -> HierarchyTable:
    """The node table with the site's node and depression ids."""
    return dataclasses.replace(
        t,
        id=(t.id + node_offset).astype(np.int32),
        parent=np.where(t.parent > 0, t.parent + node_offset, 0).astype(np.int32),
        depression=(t.depression + depression_offset).astype(np.int32),
        children_ids=(t.children_ids + node_offset).astype(np.int32),
    )


def write_node_parts(job: BatchJob, k: int, table: HierarchyTable, node_offset: int,
                      depression_offset: int, placed: Any, listed: np.ndarray | None) -> None:
    """The batch's rows of the node table and of the JSON (listed nodes only), site ids."""
    unit = VerticalUnit.parse(job.unit)
    table = _shifted(table, node_offset, depression_offset)
    with open(job.part(k, "nodes.csv"), "w", encoding="utf-8", newline="") as f:
        write_rows(f, hx.node_table_columns(table, unit, placed, listed=listed))
    with open(job.part(k, "nodes.json"), "w", encoding="utf-8", newline="") as f:
        hx.write_json_nodes(f, table, listed)


def write_curve_part(job: BatchJob, k: int, tables: dict, depression: np.ndarray,
                      node_offset: int, depression_offset: int, listed: np.ndarray | None,
                      thinning: "hc.CurveThinning") -> int:
    """The batch's rows of the curves file, thinned for the site; returns their number."""
    natural = hc.CurveCounts(rows=tables["count_rows"], merge_index=tables["count_merge"],
                             stepped=tables["count_stepped"])
    stride = hc.strides(natural, tables["volume"], listed, thinning, node_offset=node_offset)
    keep = hc.kept_mask(tables["curve_index"], tables["curve_node"], natural, stride)
    rows = hc.CurveRows(**{name: tables[f"curve_{name}"][keep] for name in CURVE_FIELDS})
    cols = hx.curve_row_columns(rows, depression, VerticalUnit.parse(job.unit),
                                node_offset=node_offset, depression_offset=depression_offset)
    with open(job.part(k, "curves.csv"), "w", encoding="utf-8", newline="") as f:
        write_rows(f, cols)
    return len(rows)


def format_task(job: BatchJob, k: int, node_offset: int, depression_offset: int, placed: Any,
                 listed: np.ndarray | None, thinning: "hc.CurveThinning") -> dict:
    """Step 3 on a ``map``: the batch's parts from its scratch tables."""
    t0 = time.perf_counter()
    with np.load(job.part(k, "nodes.npz"), allow_pickle=False) as saved:
        table = HierarchyTable(**{name: saved[f"node_{name}"] for name in NODE_FIELDS})
        if listed is None and "listed" in saved:  # decided by the batch's own task
            listed = saved["listed"]
    with np.load(job.part(k, "curves.npz"), allow_pickle=False) as saved:
        tables = dict(saved)
    tables["volume"] = table.volume_m3
    write_node_parts(job, k, table, node_offset, depression_offset, placed, listed)
    rows = write_curve_part(job, k, tables, table.depression, node_offset, depression_offset,
                             listed, thinning)
    os.remove(job.part(k, "nodes.npz"))
    os.remove(job.part(k, "curves.npz"))
    return {"task_s": time.perf_counter() - t0, "curve_rows": rows}


def serial_batches(job: BatchJob, calls: list, placed: Any, report, listed,
                    prebuilt=None) -> tuple[list, list]:
    """Steps 2 and 3 in this process, batch after batch: each batch's node rows are
    written as soon as it is built (the node offset is known), its curve rows kept
    (at most the cap) until every batch is counted. ``prebuilt`` is the one
    batch's hierarchy, built already."""
    done, kept, nodes = [], [], 0
    report("hierarchy", 0, len(calls))
    for job_, k, first, *rest in calls:
        t0 = time.perf_counter()
        if prebuilt is not None:
            hierarchy, counts = prebuilt, batch_counts(prebuilt, job_)
            prebuilt = None
        else:
            hierarchy, counts = built_batch(job_, first, *rest)
        t = hierarchy.nodes
        mine = counts.pop("listed", None)
        if mine is None and listed is not None:
            mine = listed[nodes:nodes + len(t)]
        counts["listed_count"] = len(t) if mine is None else int(np.count_nonzero(mine))
        tables, counts["thinning"] = curve_part(job_, hierarchy, mine)
        tables["volume"] = t.volume_m3
        del hierarchy
        write_node_parts(job_, k, t, nodes, first - 1, placed, mine)
        kept.append((tables, t.depression, nodes, first - 1, mine))
        nodes += counts["nodes"]
        done.append({**counts, "task_s": time.perf_counter() - t0})
        report("hierarchy", len(done), len(calls))
    return done, kept


def empty_hierarchy(job: BatchJob):
    """The hierarchy of a window without depressions (for the files' headers)."""
    empty = np.empty(0, dtype=np.int64)
    return hierarchy_of_cells(
        np.zeros((1, 1), np.float32), np.zeros((1, 1), np.int32), np.empty(0, np.float32),
        empty, empty, connectivity=job.connectivity, areas=np.ones(1),
        unit=VerticalUnit.parse(job.unit), transform=job.transform,
    )


@dataclasses.dataclass(frozen=True)
class PlacedCRS:
    """All of the grid the format tasks read: its CRS (a DEM's cells are not shipped)."""

    crs: Any
