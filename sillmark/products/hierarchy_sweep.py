"""Building the depression hierarchy: one sweep over the cells of each depression in
ascending elevation, merging pools where they meet (Barnes, Callaghan & Wickert 2020).

:func:`depression_hierarchy` (and :func:`site_hierarchy` for a DEM) builds a
:class:`sillmark.products.hierarchy.DepressionHierarchy` from a flood result;
:func:`hierarchy_of_cells` is the same sweep on a window of the grid, which the
windowed writer of the hierarchy files runs batch by batch.

References
----------
Barnes, R., Callaghan, K. L., Wickert, A. D. (2020). Computing water flow
through complex landscapes - Part 2: Finding hierarchies in depressions and
morphological segmentations. Earth Surface Dynamics 8, 431-445.
doi:10.5194/esurf-8-431-2020
"""

from __future__ import annotations

import concurrent.futures
import os
from typing import TYPE_CHECKING

import numpy as np

from sillmark.engine.flood import DIRECTION_COL, DIRECTION_ROW, SpillResult
from sillmark.errors import InvalidParameter
from sillmark.products import _hierarchy_kernels
from sillmark.products.hierarchy import (
    CurveSegments,
    DepressionHierarchy,
    HierarchyTable,
    RegionCells,
    csr_start,
    one_based,
)
from sillmark.units import VerticalUnit

if TYPE_CHECKING:  # pragma: no cover
    from affine import Affine

    from sillmark.grid.dem import DEM


_FOUR = np.array([1, 3, 4, 6])  # N, W, E, S among the eight flood-tree directions


def depression_hierarchy(
    result: SpillResult,
    *,
    row_areas=None,
    unit: VerticalUnit | str = VerticalUnit.METRE,
    transform: "Affine | None" = None,
) -> DepressionHierarchy:
    """Depression hierarchy of a site, with exact stage curves for every node.

    Parameters
    ----------
    result : SpillResult
        The spill engine's result for the site (:func:`sillmark.engine.flood.priority_flood`).
    row_areas : (rows,) array, optional, keyword-only
        True area of one cell in each row, in m² (:attr:`sillmark.grid.dem.DEM.row_areas`).
        Default 1 m², so that areas count cells.
    unit : VerticalUnit or str, keyword-only
        Vertical unit of the elevations; volumes are reported in m³.
    transform : affine.Affine, optional, keyword-only
        Grid-to-CRS transform, for the spill points' x, y.

    Returns
    -------
    DepressionHierarchy

    Raises
    ------
    InvalidParameter
        If ``result`` is not a SpillResult, or ``row_areas``, ``unit`` or
        ``transform`` is unusable.

    Notes
    -----
    *Leaves* are the pits: connected sets of equal-elevation cells (plateaus)
    none of whose neighbours is lower and that hold no outlet, each with the
    region of the pool that grows from it until it meets another. Every pit lies
    inside a SpillResult depression (all its neighbours are higher, so water
    stands on it), hence holds water: no leaf has zero depth. Flat ground that
    is not a pit (a plateau with a lower neighbour, including flats at exactly a
    merge level) never forms a node; its cells join the pool that reaches them.
    Cells that no outlet reaches (walled in by nodata) lie in no depression and
    in no tree.

    Each *internal node* is created where pools that hold water meet: all the
    pools that meet at one elevation become the children of one node (usually
    two; more when several meet at exactly the same level), so the tree does
    not depend on the order ties are visited in. Its region is the union of its
    children's and the cells of its pits' ground between its merge and spill
    elevations. A *top* is a tree's root: its region is exactly one
    SpillResult depression, with the same spill elevation and spill point.

    Memory: about 16 bytes per depression cell kept in the result (sorted cell
    indices and elevations, and the owner positions) plus 24 bytes per stored
    breakpoint (at most one per depression cell and two per node); while it
    runs, the sweep also needs a 4-byte rank per cell of the padded grid and
    about 32 bytes per depression cell. Time: a sort of the depression cells
    and near-linear union-find work.

    Examples
    --------
    Two pits (1 and 2) meeting over a saddle at 4, in a trench that spills at 7
    into a low outlet at the right end:

    >>> import numpy as np
    >>> from sillmark.engine.flood import priority_flood
    >>> z = np.full((3, 7), 9, np.float32); z[1] = [9, 1, 4, 2, 7, 0, 9]
    >>> edge = np.zeros(z.shape, bool); edge[1, 5] = True
    >>> h = depression_hierarchy(priority_flood(z, edge))
    >>> [h.nodes.row(v)["spill_elevation"] for v in (1, 2, 3)]
    [4.0, 4.0, 7.0]
    >>> h.children(3).tolist(), float(h.nodes.volume_m3[2])
    ([1, 2], 14.0)
    """
    if not isinstance(result, SpillResult):
        raise InvalidParameter(
            f"expected the spill engine's SpillResult, not {type(result).__name__}; "
            "run sillmark.engine.flood.priority_flood first"
        )
    unit = VerticalUnit.parse(unit)
    z = result.elevation
    areas = _checked_row_areas(row_areas, z.shape[0])
    _check_transform(transform)
    table = result.depressions
    return hierarchy_of_cells(
        z, result.depression_id, table.spill_elevation, table.spill_row, table.spill_col,
        connectivity=int(result.connectivity), areas=areas, unit=unit, transform=transform,
    )


def hierarchy_of_cells(
    z: np.ndarray,
    dep: np.ndarray,
    spill_elevation: np.ndarray,
    spill_row: np.ndarray,
    spill_col: np.ndarray,
    *,
    connectivity: int,
    areas: np.ndarray,
    unit: VerticalUnit,
    transform: "Affine | None",
    origin: tuple[int, int] = (0, 0),
    segments: bool = True,
) -> DepressionHierarchy:
    """The body of :func:`depression_hierarchy`, on plain arrays of one window of a grid.

    ``z`` and ``dep`` are the window's elevations and depression ids (1..n,
    every cell of each of those depressions inside the window), ``spill_*`` the
    n depressions' spill elevations and spill cells in grid coordinates,
    ``areas`` the window's row areas (checked). ``origin`` is the window's first
    row and column in the grid: pit and spill cells and their x, y are given in
    grid coordinates (the same numbers as for the whole grid); the regions,
    ``shape`` and ``row_areas`` stay the window's. For
    :mod:`sillmark.products.hierarchy_windows`, which runs it window by window.

    ``segments=False`` leaves out the per-node curve segments (24 bytes a
    depression cell), which only :meth:`~sillmark.products.hierarchy.DepressionHierarchy.curve_at`
    and ``curves_at`` read; the node table's areas and volumes are the same bits.
    """
    rows, cols = z.shape
    row0, col0 = int(origin[0]), int(origin[1])
    n_dep = int(spill_elevation.shape[0])

    # Depression cells in ascending (elevation, row-major index) order.
    # One contiguous copy: the engine's id raster is a view into a padded grid,
    # and reshaping a view copies it each time.
    dep_flat = np.ascontiguousarray(dep).reshape(-1)
    flat = np.flatnonzero(dep_flat > 0)
    z_sel = z.reshape(-1)[flat]
    if not np.all(np.isfinite(z_sel)):
        raise InvalidParameter("the SpillResult marks nodata cells as depression cells")
    dep_sel = dep_flat[flat]
    if flat.size and int(dep_sel.max()) > n_dep:
        raise InvalidParameter("the SpillResult's depression ids do not match its table")
    # Depression by depression (they never touch, and each is compact, which
    # keeps the sweep's memory accesses local), ascending elevation within each.
    grouped = _hierarchy_kernels.group_stable(dep_sel, np.int64(n_dep))
    group_start = np.zeros(n_dep + 2, dtype=np.int64)
    np.cumsum(np.bincount(dep_sel, minlength=n_dep + 1), out=group_start[1:])
    zbits = (z_sel + np.float32(0.0)).view(np.uint32)  # -0.0 -> +0.0 so equal values tie
    order = _hierarchy_kernels.sort_within_groups(zbits, grouped, group_start)
    del grouped, zbits
    cells = flat[order]
    zs = np.ascontiguousarray(z_sel[order])
    dep_sorted = np.ascontiguousarray(dep_sel[order], dtype=np.int32)
    del flat, z_sel, dep_sel, order
    m = cells.shape[0]

    width = cols + 2
    padded = (cells // cols + 1) * width + (cells % cols + 1)
    rank = np.full((rows + 2) * width, -1, dtype=np.int32)
    rank[padded] = np.arange(m, dtype=np.int32)
    offsets = _neighbour_offsets(connectivity, width)

    (owner, lo_old, internal_old, parent_old, alias_old, pit_pos_old, spill_cell_old,
     n_old, top_of_dep) = _swept(padded, zs, rank, offsets, dep_sorted, n_dep, group_start)
    del rank, padded

    # Renumber the live nodes in post-order, children lowest pit first.
    ids = np.arange(n_old, dtype=np.int32)
    live = alias_old == ids
    kids = ids[live & (parent_old >= 0)]
    kids = kids[np.lexsort((pit_pos_old[kids], parent_old[kids]))]
    child_start_old = np.zeros(n_old + 1, dtype=np.int64)
    np.cumsum(np.bincount(parent_old[kids], minlength=n_old), out=child_start_old[1:])
    tops_old = top_of_dep[1:].astype(np.int32)
    new_id, size_old = _hierarchy_kernels.postorder(tops_old, child_start_old, kids, np.int64(n_old))
    n = int(live.sum())
    if int(new_id.max(initial=0)) != n or np.any(new_id[live] == 0):
        raise AssertionError("depression hierarchy: a node lies in no tree")  # pragma: no cover
    old_of = np.zeros(n + 1, dtype=np.int64)
    old_of[new_id[live]] = ids[live]
    old = old_of[1:]

    parent = np.where(parent_old[old] >= 0, new_id[np.maximum(parent_old[old], 0)], 0)
    parent = parent.astype(np.int32)
    is_top = parent == 0
    lo = lo_old[old]
    is_leaf = internal_old[old] == 0
    spill = np.empty(n, dtype=np.float32)
    spill[~is_top] = lo[parent[~is_top] - 1]
    top_ids = new_id[tops_old]  # top node of each depression, in depression order
    spill[top_ids - 1] = spill_elevation
    pit_cell = cells[pit_pos_old[old]]
    pit_elevation = zs[pit_pos_old[old]]
    spill_flat_pad = spill_cell_old[old]
    spill_row_all = spill_flat_pad // width - 1 + row0
    spill_col_all = spill_flat_pad % width - 1 + col0
    spill_row_all[top_ids - 1] = spill_row
    spill_col_all[top_ids - 1] = spill_col
    spill_row, spill_col = spill_row_all, spill_col_all
    subtree_size = size_old[old].astype(np.int32)
    # Each depression's nodes are one run of post-order ids ending at its top:
    # the runs, in id order, repeat their depression number.
    run_start = top_ids - subtree_size[top_ids - 1]
    in_id_order = np.argsort(run_start, kind="stable")
    depression = np.repeat((in_id_order + 1).astype(np.int32),
                           subtree_size[top_ids - 1][in_id_order])
    if depression.shape[0] != n:
        raise AssertionError("depression hierarchy: the trees do not cover the nodes")  # pragma: no cover

    # Children lists in new ids: post-order numbers siblings in pit order.
    by_parent = np.argsort(parent, kind="stable")
    children_ids = (by_parent[parent[by_parent] > 0] + 1).astype(np.int32)
    children_start = np.zeros(n + 1, dtype=np.int64)
    np.cumsum(np.bincount(parent, minlength=n + 1)[1:], out=children_start[1:])

    # Own cells of each node, ascending elevation, then every node's segment.
    owner_new = new_id[owner]
    del owner
    cell_start, positions = _hierarchy_kernels.bucket(owner_new, np.int64(n))
    del owner_new
    cell_area = areas[cells // cols]
    if segments:
        seg_start, seg_elev, seg_area, seg_storage, area_at_spill, storage_at_spill = \
            _hierarchy_kernels.segments(cell_start, positions, zs, cell_area, one_based(lo),
                                        one_based(spill), csr_start(children_start), children_ids)
    else:
        area_at_spill, storage_at_spill = _hierarchy_kernels.totals(
            cell_start, positions, zs, cell_area, one_based(lo), one_based(spill),
            csr_start(children_start), children_ids)
        seg_start = np.zeros(n + 2, dtype=np.int64)
        seg_elev = seg_area = seg_storage = np.zeros(0, dtype=np.float64)
    del cell_area
    own = np.diff(cell_start)[1 : n + 1]
    csum = np.concatenate(([0], np.cumsum(own)))
    first = np.arange(1, n + 1) - subtree_size + 1
    cell_count = (csum[np.arange(1, n + 1)] - csum[first - 1]).astype(np.int64)

    if transform is not None:
        t = transform
        cx, cy = spill_col + 0.5, spill_row + 0.5
        spill_x = (t.a * cx + t.b * cy + t.c).astype(np.float64)
        spill_y = (t.d * cx + t.e * cy + t.f).astype(np.float64)
    else:
        spill_x = np.full(n, np.nan)
        spill_y = np.full(n, np.nan)
    metres = unit.metres
    nodes = HierarchyTable(
        id=np.arange(1, n + 1, dtype=np.int32),
        parent=parent,
        depression=depression,
        is_leaf=is_leaf,
        subtree_size=subtree_size,
        pit_row=(pit_cell // cols + row0).astype(np.int64),
        pit_col=(pit_cell % cols + col0).astype(np.int64),
        pit_elevation=pit_elevation.astype(np.float32),
        merge_elevation=np.where(is_leaf, np.float32(np.nan), lo).astype(np.float32),
        spill_elevation=spill,
        spill_row=spill_row.astype(np.int64),
        spill_col=spill_col.astype(np.int64),
        spill_x=spill_x,
        spill_y=spill_y,
        max_depth=(spill - pit_elevation).astype(np.float32),
        cell_count=cell_count,
        area_m2=area_at_spill[1:].copy(),
        volume_m3=storage_at_spill[1:] * metres,
        children_start=children_start,
        children_ids=children_ids,
    )
    return DepressionHierarchy(
        nodes=nodes,
        unit=unit,
        connectivity=int(connectivity),
        shape=(rows, cols),
        row_areas=areas,
        segments=CurveSegments(
            start=seg_start, elevation=seg_elev, area_m2=seg_area,
            storage_m3=seg_storage * metres,
        ),
        regions=RegionCells(
            cells=cells, elevation=zs, positions=positions.astype(np.int32), start=cell_start,
        ),
    )


#: Depression cells per part of the sweep run on threads of their own (at most
#: one part per CPU); fewer cells are swept in one part.
SWEEP_PART_CELLS = 1 << 20


def _sweep_bounds(group_start: np.ndarray, m: int) -> list[int]:
    """Cut positions ``0..m`` into parts of whole depressions, about even in cells."""
    parts = min(os.cpu_count() or 1, m // SWEEP_PART_CELLS)
    if parts < 2:
        return [0, m]
    wanted = np.arange(1, parts) * (m / parts)
    at = np.minimum(np.searchsorted(group_start, wanted), group_start.shape[0] - 1)
    cuts = group_start[at]
    return sorted({0, m, *(int(c) for c in cuts)})


def _swept(cells, zs, rank, offsets, dep_sorted, n_dep: int, group_start):
    """:func:`~sillmark.products._hierarchy_kernels.sweep` over every position, in
    parts of whole depressions on threads (the kernel releases the GIL), the parts'
    nodes numbered one after another. The parts are independent (depressions never
    touch), and the nodes are renumbered in post-order afterwards, so any cut gives
    the same hierarchy."""
    m = cells.shape[0]
    uf = np.arange(m, dtype=np.int32)
    comp_node = np.full(m, -1, dtype=np.int32)
    owner = np.empty(m, dtype=np.int32)
    bounds = _sweep_bounds(group_start, m)

    def part(k: int):
        return _hierarchy_kernels.sweep(cells, zs, rank, offsets, dep_sorted, np.int64(n_dep),
                                        np.int64(bounds[k]), np.int64(bounds[k + 1]),
                                        uf, comp_node, owner)

    if len(bounds) == 2:
        parts = [part(0)]
    else:
        with concurrent.futures.ThreadPoolExecutor(len(bounds) - 1) as pool:
            parts = list(pool.map(part, range(len(bounds) - 1)))
    if len(parts) == 1:
        return (owner, *parts[0])
    lo, internal, parent, alias, pit_pos, spill_cell = ([] for _ in range(6))
    top_of_dep = np.full(n_dep + 1, -1, dtype=np.int32)
    offset = 0
    for k, (p_lo, p_internal, p_parent, p_alias, p_pit, p_spill, p_n, p_top) in enumerate(parts):
        lo.append(p_lo)
        internal.append(p_internal)
        parent.append(np.where(p_parent >= 0, p_parent + offset, -1).astype(np.int32))
        alias.append((p_alias + offset).astype(np.int32))
        pit_pos.append(p_pit)
        spill_cell.append(p_spill)
        owner[bounds[k]:bounds[k + 1]] += np.int32(offset)
        mine = p_top >= 0
        top_of_dep[mine] = p_top[mine] + offset
        offset += int(p_n)
    return (owner, np.concatenate(lo), np.concatenate(internal), np.concatenate(parent),
            np.concatenate(alias), np.concatenate(pit_pos), np.concatenate(spill_cell),
            offset, top_of_dep)


def site_hierarchy(dem: "DEM", result: SpillResult) -> DepressionHierarchy:
    """:func:`depression_hierarchy` with the DEM's true cell areas, unit and transform."""
    if tuple(dem.shape) != tuple(result.elevation.shape):
        raise InvalidParameter(
            f"the result is for a {result.elevation.shape[0]} x {result.elevation.shape[1]} "
            f"grid but the DEM is {dem.rows} x {dem.cols}; run the engine on this DEM"
        )
    return depression_hierarchy(
        result, row_areas=dem.row_areas, unit=dem.vertical_unit, transform=dem.transform
    )


def _neighbour_offsets(connectivity: int, width: int) -> np.ndarray:
    if connectivity == 8:
        chosen = np.arange(8)
    elif connectivity == 4:
        chosen = _FOUR
    else:
        raise InvalidParameter(f"connectivity must be 4 or 8, not {connectivity!r}")
    return (DIRECTION_ROW[chosen] * width + DIRECTION_COL[chosen]).astype(np.int64)


def _checked_row_areas(row_areas, rows: int) -> np.ndarray:
    if row_areas is None:
        return np.ones(rows, dtype=np.float64)
    try:
        areas = np.ascontiguousarray(row_areas, dtype=np.float64)
    except (TypeError, ValueError):
        raise InvalidParameter(
            f"row_areas must hold {rows} positive finite cell areas (m²), one per row"
        ) from None
    if areas.shape != (rows,) or not np.all(np.isfinite(areas) & (areas > 0)):
        raise InvalidParameter(
            f"row_areas must hold {rows} positive finite cell areas (m²), one per row"
        )
    return areas


def _check_transform(transform) -> None:
    if transform is None:
        return
    if not all(hasattr(transform, name) for name in "abcdef"):
        raise InvalidParameter(
            f"transform must be an affine.Affine (or None), not {type(transform).__name__}"
        )
