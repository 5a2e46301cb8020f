"""The depression hierarchy in windows of consecutive depressions, read from a result source.

The hierarchy (Barnes, Callaghan & Wickert 2020; built by
:func:`sillmark.products.hierarchy_sweep.depression_hierarchy`) is a forest with one
tree per depression of the spill engine, and each tree depends on that
depression's cells only: the sweep visits the cells of each depression on
their own (ascending elevation, then row-major order), two pools merge where
their cells touch (inside the depression), a tree's top takes its spill
elevation and spill cell from the depression table, and each node's area,
storage and curve are sums over its own region's cells in that same order.
Nodes are numbered in post-order tree by tree in depression order, so the
site's node table is the concatenation, in depression order, of the tables of
runs of consecutive depressions, with ids shifted.

So the hierarchy of a site is built in *batches*:

1. :func:`bounding_boxes`: one pass over the source's ``depression_id``
   blocks gives each depression's first and last row and column.
2. :func:`hierarchy_batches`: consecutive depression ids are grouped while
   the bounding box of the group stays within a cell budget (a depression
   whose own box is larger is a batch of its own).
3. :func:`batch_hierarchy`: the hierarchy of one batch, from the source's
   ``elevation`` and ``depression_id`` windows over the batch's box (other
   depressions' cells set to 0, the batch's renumbered 1..k in order).

A result in memory whose depressions fit the budget is one batch: one window,
the same arrays the whole-grid :func:`~sillmark.products.hierarchy_sweep.site_hierarchy`
reads. :mod:`sillmark.io.hierarchy_writer` writes the files from the batches.

Memory
------
A batch holds its window: about 13 bytes per window cell (elevation, ids, a
mask, the sweep's 4-byte rank per cell) plus about 130 bytes per depression
cell while its hierarchy is built (see
:func:`sillmark.products.hierarchy_sweep.depression_hierarchy`). A single
depression whose bounding box is larger than the budget is one batch anyway:
its whole box must fit in one process (about 143 bytes per cell of the box at
worst). The bounding boxes take 32 bytes a depression.

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

from typing import TYPE_CHECKING, Any

import numpy as np

from sillmark.errors import InvalidDEM, InvalidParameter
from sillmark.products import _hierarchy_windows_kernels
from sillmark.products.hierarchy import DepressionHierarchy
from sillmark.products.hierarchy_sweep import hierarchy_of_cells
from sillmark.units import VerticalUnit, unit_suffix

if TYPE_CHECKING:  # pragma: no cover
    from affine import Affine

    from sillmark.products.source import ResultSource

__all__ = [
    "DEFAULT_WINDOW_CELLS",
    "batch_hierarchy",
    "bounding_boxes",
    "checked_window_cells",
    "hierarchy_batches",
    "depression_rows",
    "tree_depth",
    "whole_hierarchy",
]

#: Cell budget of one batch's window for a source on disk (16 Mi cells; see the
#: module docstring for memory).
DEFAULT_WINDOW_CELLS = 1 << 24


def checked_window_cells(count: Any) -> int:
    """``count`` as a cell budget, or :class:`InvalidParameter`."""
    if isinstance(count, (bool, np.bool_)) or not isinstance(count, (int, np.integer)) or count < 1:
        raise InvalidParameter(f"window_cells must be a positive whole number of cells, not {count!r}")
    return int(count)


def bounding_boxes(source: "ResultSource", count: int):
    """Each depression's first and last row and column, from the source's ``depression_id``.

    Returns four int64 arrays indexed by depression id (entry 0 unused):
    ``row_min, row_max, col_min, col_max``.

    Raises
    ------
    InvalidParameter
        The raster holds an id above ``count``, or an id 1..count has no cell.
    """
    rows, cols = source.grid.shape
    row_min = np.full(count + 1, np.iinfo(np.int64).max, dtype=np.int64)
    col_min = row_min.copy()
    row_max = np.full(count + 1, -1, dtype=np.int64)
    col_max = row_max.copy()
    for r0, r1 in source.blocks():
        block = np.ascontiguousarray(source.window("depression_id", r0, r1, 0, cols), dtype=np.int32)
        if block.shape != (r1 - r0, cols):
            raise InvalidParameter("the depression ids do not have the DEM's grid; run the analysis again")
        too_large = int(_hierarchy_windows_kernels.add_bounds(block, np.int64(r0), row_min, row_max,
                                                              col_min, col_max))
        if too_large:
            raise InvalidParameter(
                f"the depression ids hold depression {too_large} but the depression table has "
                f"{count}; the result's files do not belong together: run the analysis again"
            )
    missing = np.flatnonzero(row_max[1:] < 0)
    if missing.size:
        raise InvalidParameter(
            f"depression {int(missing[0]) + 1} has no cells among the depression ids; the "
            "result's files do not belong together: run the analysis again"
        )
    return row_min, row_max, col_min, col_max


def hierarchy_batches(source: "ResultSource", *, window_cells: int = DEFAULT_WINDOW_CELLS,
                      count: int | None = None) -> np.ndarray:
    """The batches of consecutive depressions the hierarchy is built in.

    Parameters
    ----------
    source : ResultSource
    window_cells : int, keyword-only
        Cell budget of a batch's window.
    count : int, optional, keyword-only
        Depressions of the result (default: the source's depression table).

    Returns
    -------
    (batches, 6) int64 array
        First and last depression id of each batch, then its window, rows
        ``r0:r1`` and columns ``c0:c1`` (the bounding box of the batch's
        depressions). Consecutive ids are grouped while the window stays
        within ``window_cells`` cells; a depression larger than that is a
        batch of its own.

    Examples
    --------
    >>> import numpy as np
    >>> from sillmark.engine.flood import priority_flood
    >>> from sillmark.grid.dem import dem_from_array
    >>> from sillmark.products.source import ArraySource
    >>> z = np.full((3, 7), 9, np.float32); z[1] = [9, 1, 9, 2, 9, 0, 9]
    >>> edge = np.zeros(z.shape, bool); edge[1, 5] = True
    >>> source = ArraySource(dem_from_array(z), priority_flood(z, edge))
    >>> hierarchy_batches(source).tolist()
    [[1, 2, 1, 2, 1, 4]]
    >>> hierarchy_batches(source, window_cells=2).tolist()
    [[1, 1, 1, 2, 1, 2], [2, 2, 1, 2, 3, 4]]
    """
    budget = checked_window_cells(window_cells)
    if count is None:
        count = int(source.spill_elevation.shape[0])
    if count == 0:
        return np.empty((0, 6), dtype=np.int64)
    bounds = bounding_boxes(source, int(count))
    return _hierarchy_windows_kernels.batches(*bounds, np.int64(budget))


def batch_hierarchy(
    layers: Any,
    first: int,
    last: int,
    window: tuple[int, int, int, int],
    *,
    areas: np.ndarray,
    spill_elevation: np.ndarray,
    spill_row: np.ndarray,
    spill_col: np.ndarray,
    cell_count: np.ndarray,
    connectivity: int,
    unit: VerticalUnit,
    transform: "Affine | None",
    segments: bool = True,
) -> DepressionHierarchy:
    """The hierarchy of depressions ``first..last``, read in their window.

    ``layers`` is anything with the source's ``window(layer, r0, r1, c0, c1)``
    (a result source, or the small reader of a results folder that a task on
    another process gets). ``areas`` are the window's row areas and the
    ``spill_*`` and ``cell_count`` arrays the batch's rows of the depression
    table. Pit and spill cells come out in grid coordinates; depression
    numbers run 1..k within the batch, node ids 1..n. ``segments`` as for
    :func:`sillmark.products.hierarchy_sweep.hierarchy_of_cells`.

    Raises
    ------
    InvalidDEM
        The elevation has nodata on a depression cell (the DEM changed).
    InvalidParameter
        A depression's cell count differs from the table's.
    """
    r0, r1, c0, c1 = window
    ids = layers.window("depression_id", r0, r1, c0, c1)
    mine = (ids >= first) & (ids <= last)
    # Whole-window passes: a select (np.where) or a gather (z[mine]) on the
    # window's scattered depression cells cost several times more.
    local = np.subtract(ids, first - 1, dtype=np.int32)
    local *= mine
    del ids
    z = layers.window("elevation", r0, r1, c0, c1)
    nan_cells = np.isnan(z)
    nan_cells &= mine
    if nan_cells.any():
        raise InvalidDEM(
            "the DEM has nodata where the result has depression cells, so it changed after "
            "the analysis; run the analysis again"
        )
    del mine, nan_cells
    hierarchy = hierarchy_of_cells(
        z, local, np.asarray(spill_elevation, dtype=np.float32), spill_row, spill_col,
        connectivity=int(connectivity), areas=np.ascontiguousarray(areas, dtype=np.float64),
        unit=unit, transform=transform, origin=(r0, c0), segments=segments,
    )
    t = hierarchy.nodes
    if not np.array_equal(t.cell_count[t.parent == 0], cell_count):
        raise InvalidParameter(
            f"the depressions {first}..{last} do not have the cell counts of the depression "
            "table; the result's files do not belong together: run the analysis again"
        )
    return hierarchy


def depression_rows(source: "ResultSource") -> dict[str, np.ndarray]:
    """The columns of the source's depression table a batch reads: ``spill_elevation``
    (float32, the site's unit), ``spill_row``, ``spill_col`` and ``cell_count``.

    Raises
    ------
    InvalidParameter
        The table does not number its depressions 1..n.
    """
    table = source.depression_columns
    count = int(table["id"].shape[0])
    if not np.array_equal(table["id"], np.arange(1, count + 1)):
        raise InvalidParameter("the depression table does not number its depressions 1..n; "
                               "run the analysis again")
    return {
        "spill_elevation": np.asarray(table[f"spill_elevation_{unit_suffix(source.unit)}"],
                                      dtype=np.float32),
        "spill_row": table["spill_row"], "spill_col": table["spill_col"],
        "cell_count": table["cell_count"],
    }


def whole_hierarchy(source: "ResultSource") -> tuple[DepressionHierarchy, np.ndarray]:
    """The hierarchy of every depression of a source as one batch, and that batch.

    The same build, bit for bit, as the one batch that
    :func:`sillmark.io.hierarchy_writer.write_hierarchy_files` makes of a result
    held in memory (its default window is the whole grid), without the curve
    segments. Built once, it serves both the significance of the depressions
    and the writer (its ``hierarchy`` argument), so the run builds it once.

    Returns
    -------
    hierarchy : DepressionHierarchy
        Pit and spill cells in grid coordinates; regions and ``shape`` of the
        batch's window (the bounding box of every depression).
    batch : (6,) int64 array
        As a row of :func:`hierarchy_batches`; all zero without depressions.

    Examples
    --------
    >>> from sillmark.engine.flood import priority_flood
    >>> from sillmark.grid.dem import dem_from_array
    >>> from sillmark.products.source import ArraySource
    >>> z = np.full((3, 7), 9, np.float32); z[1] = [9, 1, 4, 2, 7, 0, 9]
    >>> edge = np.zeros(z.shape, bool); edge[1, 5] = True
    >>> h, batch = whole_hierarchy(ArraySource(dem_from_array(z), priority_flood(z, edge)))
    >>> len(h.nodes), batch.tolist()
    (3, [1, 1, 1, 2, 1, 4])
    """
    rows, cols = source.grid.shape
    table = depression_rows(source)
    count = int(table["cell_count"].shape[0])
    batches = hierarchy_batches(source, window_cells=rows * cols, count=count)
    if batches.shape[0] > 1:  # pragma: no cover - a whole-grid budget makes one batch
        raise AssertionError("a whole-grid window made more than one batch")
    if batches.shape[0] == 0:
        batch = np.zeros(6, dtype=np.int64)
        first, last, r0, r1, c0, c1 = 1, 0, 0, 1, 0, 1
    else:
        batch = batches[0]
        first, last, r0, r1, c0, c1 = (int(v) for v in batch)
    hierarchy = batch_hierarchy(
        source, first, last, (r0, r1, c0, c1),
        areas=np.asarray(source.grid.row_areas, dtype=np.float64)[r0:r1],
        **{name: column[first - 1:last] for name, column in table.items()},
        connectivity=int(source.connectivity), unit=source.unit,
        transform=source.grid.transform, segments=False,
    )
    return hierarchy, batch


def tree_depth(parent: np.ndarray) -> int:
    """Most nesting levels of a forest given by its parents (post-order ids: parents
    after children; 0 for a top). 0 for no nodes.

    >>> tree_depth(np.array([3, 3, 0, 0]))
    2
    """
    parent = np.ascontiguousarray(parent, dtype=np.int64)
    if parent.ndim != 1 or np.any((parent < 0) | (parent > parent.shape[0])):
        raise InvalidParameter("parents must be node ids 0..n of a 1-D forest")
    if np.any((parent > 0) & (parent <= np.arange(1, parent.shape[0] + 1))):
        raise InvalidParameter("the node ids are not in post-order (a parent before its child)")
    return int(_hierarchy_windows_kernels.tree_depth(parent))
