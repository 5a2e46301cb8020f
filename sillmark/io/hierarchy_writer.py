"""The depression hierarchy files, written once from a result source, in windows of depressions.

:func:`write_hierarchy_files` writes ``depression_hierarchy.csv``,
``depression_hierarchy.json`` and ``depression_curves.csv`` (the formats of
:mod:`sillmark.io.hierarchy_files`) for a result in memory
(:class:`sillmark.products.source.ArraySource`) or a results folder on disk
(:class:`sillmark.io.results_folder.ResultFolder`), with the same bytes for
both: the hierarchy (Barnes, Callaghan & Wickert 2020) is built in batches of
consecutive depressions (:mod:`sillmark.products.hierarchy_windows`), and the
site's files are the concatenation of the batches' rows.

Steps
-----
1. **Batches** (this process): bounding boxes from the source's
   ``depression_id`` blocks, cut into batches within ``window_cells``
   (:func:`sillmark.products.hierarchy_windows.hierarchy_batches`). A result in
   memory is, by default, one batch.
2. **Hierarchy of each batch** (one task per batch, through ``map(fn,
   calls)``, e.g. :func:`sillmark.engine.executors.serial_map` or a
   :class:`sillmark.engine.executors.DaskExecutor`): the task reads the batch's
   ``elevation`` and ``depression_id`` windows, builds its hierarchy
   (:func:`sillmark.products.hierarchy_windows.batch_hierarchy`) and keeps the
   node table and curve rows (:func:`sillmark.io.hierarchy_files.curve_part_columns`)
   in a scratch file. Back go counts only.
3. **Format each batch** (one task per batch): with the node and depression
   offsets of the batches before it, the batch's rows of the three files are
   written as text into scratch part files. Without ``map`` the batches run in
   order in this process, so each is formatted as soon as it is built, its
   tables never written to scratch.
   The tasks of steps 2 and 3 live in :mod:`sillmark.io.hierarchy_tasks`.
4. **Concatenate** (this process): each file is its head (the header row;
   for the JSON the node count) and the batches' parts in order, written
   atomically. The scratch folder ``.sillmark-hierarchy-*`` inside the output
   folder is removed.

A task's arguments are small: a reader of the source's windows (for a results
folder, its path and DEM grid, without the depression table), the batch's
window, its rows of the depression table and of the row areas. With ``map``
None the tasks run in this process, one after another, and nothing is pickled,
so an :class:`~sillmark.products.source.ArraySource` is read in place.

Memory
------
A batch task holds its window and its hierarchy (see
:mod:`sillmark.products.hierarchy_windows`: about 13 bytes per window cell and
130 per depression cell, 2.4 GB at worst for the default 16 Mi-cell budget of
a folder), and its curve rows. This process holds the depression table, the
bounding boxes (32 bytes a depression) and the batches' counts.

References
----------
Barnes, R., Callaghan, K. L., Wickert, A. D. (2020). Computing water flow
through complex landscapes – Part 2: Finding hierarchies in depressions and
morphological segmentations. Earth Surface Dynamics 8, 431–445.
doi:10.5194/esurf-8-431-2020
"""

from __future__ import annotations

import dataclasses
import functools
import os
import shutil
import time
import uuid
from collections.abc import Callable
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from sillmark.errors import InvalidParameter
from sillmark.grid.crs import horizontal_crs
from sillmark.io import hierarchy_files as hx
from sillmark.io.hierarchy_tasks import (
    BatchJob,
    PlacedCRS,
    curves_round,
    empty_hierarchy,
    format_task,
    hierarchy_task,
    serial_batches,
    task_layers,
    write_curve_part,
)
from sillmark.products import hierarchy_curves as hc
from sillmark.products.hierarchy_windows import (
    DEFAULT_WINDOW_CELLS,
    checked_window_cells,
    depression_rows,
    hierarchy_batches,
)
from sillmark.products.significance import SiteMinimum
from sillmark.products.source import ArraySource
from sillmark.units import VerticalUnit

if TYPE_CHECKING:  # pragma: no cover

    from sillmark.products.hierarchy import DepressionHierarchy
    from sillmark.products.source import ResultSource

__all__ = ["DEFAULT_WINDOW_CELLS", "HierarchyFiles", "curves_summary", "write_hierarchy_files"]

_SCRATCH_PREFIX = ".sillmark-hierarchy-"


@dataclasses.dataclass(frozen=True)
class HierarchyFiles:
    """What :func:`write_hierarchy_files` wrote.

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
        Wall time of each step: ``bounds``, ``batches`` (with the node rows when
        ``map`` is None), ``batch_tasks`` (summed over the tasks), ``curves``
        (with a ``map`` and ``listed``), ``format`` and ``write``.
    listed : int
        Nodes given curve rows and JSON objects (all without ``listed``).
    curve_rows, curve_rows_cap, curve_rows_natural : int
        Rows written to the curves file, the cap, and the listed nodes' rows
        before thinning.
    curve_rows_budget : int
        0 when nothing was thinned, else the most rows a node kept.
    curve_nodes_left_out : int
        Listed nodes without rows (only when three rows each pass the cap).
    significant, significant_top : int
        With a ``minimum``: the significant depressions (hierarchy nodes), and
        how many of them are nested in no other; 0 without.
    whole : bool array or None
        With a ``minimum``: per depression of the depression table (index
        ``id - 1``), whether the depression as a whole (its top node) is
        significant; the rows the tables and layers list. None without.
    """

    files: list
    nodes: int
    pits: int
    depth: int
    batches: int
    window_cells: int
    seconds: dict
    listed: int = 0
    curve_rows: int = 0
    curve_rows_cap: int = 0
    curve_rows_natural: int = 0
    curve_rows_budget: int = 0
    curve_nodes_left_out: int = 0
    significant: int = 0
    significant_top: int = 0
    whole: np.ndarray | None = None

    def __len__(self) -> int:
        return self.nodes


def curves_summary(written: HierarchyFiles) -> dict:
    """What ``summary.json`` says of the curves file: its rows, the cap and any thinning."""
    if written.curve_rows_budget == 0:
        thinning = "none"
    elif written.curve_nodes_left_out == 0:
        thinning = (f"each node keeps its pit, merge and spill rows and every 2nd, 4th, ... row, "
                    f"at most {written.curve_rows_budget}")
    else:
        thinning = ("pit, merge and spill rows only, for the listed nodes with the largest "
                    "volumes")
    return {"file": hx.CURVES_CSV, "rows": written.curve_rows, "max_rows": written.curve_rows_cap,
            "rows_before_thinning": written.curve_rows_natural, "thinning": thinning,
            "listed_nodes": written.listed, "hierarchy_nodes": written.nodes,
            "listed_nodes_without_rows": written.curve_nodes_left_out}


# --------------------------------------------------------------------------- the files


def write_hierarchy_files(
    source: "ResultSource",
    out_dir: str | os.PathLike,
    *,
    map: Callable | None = None,
    progress: Callable[[str, int, int], None] | None = None,
    window_cells: int | None = None,
    keep_scratch: bool = False,
    listed: np.ndarray | None = None,
    max_curve_rows: int = hc.DEFAULT_MAX_CURVE_ROWS,
    hierarchy: "tuple[DepressionHierarchy, np.ndarray] | None" = None,
    minimum: SiteMinimum | None = None,
    full_inventory: bool = False,
) -> HierarchyFiles:
    """Write the three depression-hierarchy files of a result into ``out_dir``.

    Parameters
    ----------
    source : ResultSource
        A result in memory (:class:`sillmark.products.source.ArraySource`) or a
        results folder (:func:`sillmark.io.results_folder.open_result_folder`).
    out_dir : path
        An existing folder; the files are replaced. Tasks run elsewhere must be
        able to write into it (scratch files).
    map : callable, optional, keyword-only
        ``map(fn, calls)`` running the batch tasks, as for
        :func:`sillmark.run.analyse` (e.g. a Dask executor). Default:
        in this process, one batch after another, nothing pickled.
    progress : callable, optional, keyword-only
        ``progress(step, done, total)``: step ``"hierarchy"`` counts batches
        (after each batch when ``map`` is None, else before and after the
        whole map), ``"hierarchy_files"`` the batches formatted (before and
        after; without ``map`` they are formatted with the ``"hierarchy"``
        step), and ``"hierarchy_write"`` the three files written.
    window_cells : int, optional, keyword-only
        Cell budget of a batch's window. Default: the whole grid for an
        :class:`~sillmark.products.source.ArraySource` (one batch), else
        :data:`DEFAULT_WINDOW_CELLS`.
    keep_scratch : bool, keyword-only
        Keep the scratch folder (for debugging).
    listed : bool array, optional, keyword-only
        One entry per node of the site's hierarchy (site ids, ``listed[v - 1]``
        for node ``v``): the nodes that get curve rows and a place in the JSON
        (e.g. the significant depressions). Default: every node. The node
        table lists every node whatever ``listed`` says. With a ``map``, each
        batch's hierarchy is built a second time for its curves (its node ids
        are known only once every batch has counted its nodes).
    max_curve_rows : int, keyword-only
        Cap on the rows of ``depression_curves.csv`` (at least 3); see
        :mod:`sillmark.products.hierarchy_curves` for how rows are thinned to fit
        it, which the file's comment lines state.
    hierarchy : (DepressionHierarchy, batch), keyword-only
        What :func:`sillmark.products.hierarchy_windows.whole_hierarchy` gave for
        this source (held in memory, default window, no ``map``), used in place
        of building the one batch's hierarchy again.
    minimum : SiteMinimum, optional, keyword-only
        A significance minimum (:func:`sillmark.products.significance.site_minimum`):
        each batch decides which of its nodes are significant
        (:func:`sillmark.products.significance.significance` on the batch's
        hierarchy: the answer depends on a node's own tree only, and a batch
        holds whole trees), and those are the listed nodes, as ``listed``
        would give them. The counts and the depressions listed as a whole
        come back in :class:`HierarchyFiles`. Not with ``listed``.
    full_inventory : bool, keyword-only
        With a ``minimum``: list every node still (the counts are made all the same).

    Returns
    -------
    HierarchyFiles

    Raises
    ------
    InvalidDEM
        The DEM has no CRS, or changed since the analysis.
    InvalidParameter
        ``out_dir`` is not a folder, ``window_cells`` is not a positive whole
        number, or the source's layers and depression table do not belong
        together.

    Notes
    -----
    The files do not depend on the batches (any budget, any engine tile size
    gives the same bytes): see :mod:`sillmark.products.hierarchy_windows`.
    Memory: see the module docstring.

    Examples
    --------
    >>> import tempfile
    >>> import numpy as np
    >>> from sillmark.engine.flood import analyse_site
    >>> from sillmark.grid.dem import dem_from_array
    >>> from sillmark.grid.outlets import build_outlets
    >>> from affine import Affine
    >>> z = np.full((3, 7), 9, np.float32); z[1] = [9, 1, 4, 2, 7, 0, 9]
    >>> dem = dem_from_array(z, transform=Affine(2, 0, 500000, 0, -2, 5000000), crs="EPSG:32633")
    >>> result = analyse_site(dem, build_outlets(dem, ("edge",)))
    >>> with tempfile.TemporaryDirectory() as out:
    ...     written = write_hierarchy_files(ArraySource(dem, result), out)
    ...     names = [p.name for p in written.files]
    >>> names
    ['depression_hierarchy.csv', 'depression_hierarchy.json', 'depression_curves.csv']
    >>> written.nodes, written.pits, written.depth, written.batches
    (5, 3, 3, 1)
    """
    times: dict[str, float] = {}
    grid = source.grid
    if window_cells is None:
        window_cells = grid.shape[0] * grid.shape[1] if isinstance(source, ArraySource) else DEFAULT_WINDOW_CELLS
    budget = checked_window_cells(window_cells)
    cap = hc._check_cap(max_curve_rows)
    if listed is not None:
        listed = np.asarray(listed)
        if listed.dtype != np.bool_ or listed.ndim != 1:
            raise InvalidParameter("listed must be a 1-D boolean array, one entry per "
                                   f"hierarchy node, not {listed.dtype} of shape {listed.shape}")
    if minimum is not None:
        if listed is not None:
            raise InvalidParameter("give either the listed nodes or a significance minimum, "
                                   "not both")
        if not isinstance(minimum, SiteMinimum):
            raise InvalidParameter(f"the minimum must come from site_minimum(), not "
                                   f"{type(minimum).__name__}")
    out = Path(out_dir)
    if not out.is_dir():
        raise InvalidParameter(f"the output folder {out} does not exist or is a file; give a folder")
    unit = source.unit
    horizontal_crs(grid)  # InvalidDEM before anything is written if there is no CRS
    connectivity = int(source.connectivity)
    table = depression_rows(source)
    spill_elevation, spill_row = table["spill_elevation"], table["spill_row"]
    spill_col, cell_count = table["spill_col"], table["cell_count"]
    count = int(cell_count.shape[0])
    row_areas = np.asarray(grid.row_areas, dtype=np.float64)

    def report(step: str, done: int, total: int) -> None:
        if progress is not None:
            progress(step, done, total)

    def run_tasks(step: str, fn, calls: list) -> list:
        report(step, 0, len(calls))
        results = list(map(fn, calls))
        report(step, len(calls), len(calls))
        return results

    def check_listed(nodes: int) -> None:
        if listed is not None and listed.shape[0] != nodes:
            raise InvalidParameter(f"listed holds {listed.shape[0]} entries but the hierarchy "
                                   f"has {nodes} nodes")

    t0 = time.perf_counter()
    batches = hierarchy_batches(source, window_cells=budget, count=count)
    times["bounds"] = time.perf_counter() - t0
    scratch = out / f"{_SCRATCH_PREFIX}{uuid.uuid4().hex[:12]}"
    scratch.mkdir()
    if listed is not None:
        listed = np.asarray(listed)
        if listed.dtype != bool or listed.ndim != 1:
            raise InvalidParameter("'listed' must be a 1-D boolean array, one value per hierarchy node")
    job = BatchJob(layers=task_layers(source), transform=grid.transform, scratch=str(scratch),
               connectivity=connectivity, unit=unit.value, max_points=hx.MAX_CURVE_POINTS,
               step_rows=hx.STEP_ROWS, max_rows=cap, minimum=minimum,
               significant_only=minimum is not None and not full_inventory)
    empty = empty_hierarchy(job)
    placed = PlacedCRS(grid.crs)
    try:
        t0 = time.perf_counter()
        calls = []
        for k, (first, last, r0, r1, c0, c1) in enumerate(batches.tolist()):
            sl = slice(first - 1, last)
            calls.append((job, k, first, last, (r0, r1, c0, c1), row_areas[r0:r1],
                          spill_elevation[sl], spill_row[sl], spill_col[sl], cell_count[sl]))
        prebuilt = None
        if hierarchy is not None:
            prebuilt, batch = hierarchy
            if map is not None or batches.shape[0] > 1 or (
                    batches.shape[0] == 1 and not np.array_equal(batches[0], batch)):
                raise InvalidParameter("the hierarchy given was not built for this source's "
                                       "one batch; leave it out")
        if map is None:
            built, kept = serial_batches(job, calls, placed, report, listed, prebuilt)
            nodes = sum(b["nodes"] for b in built)
            check_listed(nodes)
            times["batches"] = time.perf_counter() - t0
            t0 = time.perf_counter()
            offsets = np.cumsum([0] + [b["nodes"] for b in built])
            thinning = hc.plan_thinning([b["thinning"] for b in built], offsets[:-1], cap)
            report("hierarchy_files", 0, len(built))
            curve_rows = sum(
                write_curve_part(job, k, tables, depression, node_offset, dep_offset, mine,
                                  thinning)
                for k, (tables, depression, node_offset, dep_offset, mine) in enumerate(kept))
            del kept
            report("hierarchy_files", len(built), len(built))
            times["format"] = time.perf_counter() - t0
        else:
            built = run_tasks("hierarchy", functools.partial(
                hierarchy_task, curves=listed is None), calls)
            times["batches"] = time.perf_counter() - t0
            nodes = sum(b["nodes"] for b in built)
            check_listed(nodes)
            offsets = np.cumsum([0] + [b["nodes"] for b in built])
            slices = [None if listed is None else listed[offsets[k]:offsets[k + 1]]
                      for k in range(len(built))]
            if listed is not None:
                t0 = time.perf_counter()
                again = run_tasks("hierarchy_curves", curves_round,
                                  [(*c, False, True, mine) for c, mine in zip(calls, slices)])
                for b, more in zip(built, again):
                    b["thinning"] = more["thinning"]
                    b["listed_count"] = more["listed_count"]
                    b["task_s"] += more["task_s"]
                times["curves"] = time.perf_counter() - t0
            t0 = time.perf_counter()
            thinning = hc.plan_thinning([b["thinning"] for b in built], offsets[:-1], cap)
            formatted = run_tasks("hierarchy_files", format_task,
                                  [(job, k, int(offsets[k]), int(batches[k, 0]) - 1, placed,
                                    slices[k], thinning) for k in range(len(built))])
            curve_rows = sum(f["curve_rows"] for f in formatted)
            times["format"] = time.perf_counter() - t0
        times["batch_tasks"] = sum(b["task_s"] for b in built)
        listed_count = sum(b["listed_count"] for b in built)

        t0 = time.perf_counter()
        files = _concatenate(out, job, grid, len(built), listed_count, nodes, empty, thinning,
                             report)
        times["write"] = time.perf_counter() - t0
    finally:
        if not keep_scratch:
            shutil.rmtree(scratch, ignore_errors=True)
    windows = (batches[:, 3] - batches[:, 2]) * (batches[:, 5] - batches[:, 4])
    found = {}
    if minimum is not None:
        found = {"significant": sum(b["significant"] for b in built),
                 "significant_top": sum(b["significant_top"] for b in built),
                 "whole": np.concatenate([np.zeros(0, bool)] + [b["whole"] for b in built])}
    return HierarchyFiles(
        files=files, nodes=nodes, pits=sum(b["pits"] for b in built),
        depth=max((b["depth"] for b in built), default=0), batches=len(built),
        window_cells=int(windows.max(initial=0)), seconds=times, listed=listed_count,
        curve_rows=curve_rows, curve_rows_cap=cap, curve_rows_natural=thinning.natural_rows,
        curve_rows_budget=thinning.budget, curve_nodes_left_out=_left_out(thinning, built),
        **found,
    )


def _left_out(thinning: "hc.CurveThinning", built: list) -> int:
    """Listed nodes without curve rows (only when even three rows each pass the cap)."""
    if not thinning.omits_nodes:
        return 0
    listed = sum(int(b["thinning"]["weight"].sum()) for b in built)
    kept = 0
    offset = 0
    for b in built:
        s = b["thinning"]
        ids = s["top_id"] + offset
        kept += int(np.count_nonzero((s["top_volume"] > thinning.keep_volume)
                                     | ((s["top_volume"] == thinning.keep_volume)
                                        & (ids <= thinning.keep_id))))
        offset += b["nodes"]
    return listed - kept


def _concatenate(out: Path, job: BatchJob, grid: Any, batches: int, listed: int, nodes: int, empty,
                 thinning: "hc.CurveThinning", report: Callable[[str, int, int], None]) -> list[Path]:
    """Step 4: each file's head, then the batches' parts in order."""
    unit = VerticalUnit.parse(job.unit)
    connectivity = job.connectivity
    parts = range(batches)
    total = len(hx.HIERARCHY_FILE_NAMES)
    report("hierarchy_write", 0, total)
    csv_path = hx.write_csv_parts(
        out / hx.HIERARCHY_CSV,
        hx.csv_head(hx.node_table_columns(empty.nodes, unit, grid)),
        [job.part(k, "nodes.csv") for k in parts],
    )
    report("hierarchy_write", 1, total)
    json_path = hx.write_json_parts(
        out / hx.HIERARCHY_JSON,
        hx.hierarchy_json_head(unit, connectivity, grid, listed, all_nodes=nodes),
        [job.part(k, "nodes.json") for k in parts],
    )
    report("hierarchy_write", 2, total)
    empty_rows = hc.curve_rows(empty, hc.natural_counts(empty), np.zeros(0, np.int64))
    curves_path = hx.write_csv_parts(
        out / hx.CURVES_CSV,
        hx.csv_head(hx.curve_row_columns(empty_rows, empty.nodes.depression, unit)),
        [job.part(k, "curves.csv") for k in parts],
    )
    report("hierarchy_write", 3, total)
    return [csv_path, json_path, curves_path]
