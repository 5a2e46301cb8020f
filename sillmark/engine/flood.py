"""The spill engine: onset stage, flood tree, depressions and spill points.

For every cell ``c`` of a DEM ``z`` and a set of outlet cells ``O``, the *onset
stage* is the minimax (bottleneck) path elevation from the outlets,

    s(c) = min over paths P from O to c of max over p on P of z(p),

the outlet water level at which surface water first reaches ``c``. It equals the
depression-filled surface. It is computed by a Priority-Flood (Barnes, Lehman &
Mulla 2014), which is Dijkstra's algorithm with ``max`` in place of ``+``: cells
are settled in the order Prim's algorithm adds them to a minimum spanning tree of
the grid graph weighted by elevation. Recording the neighbour each cell was
settled from gives that spanning tree, the *flood tree*; following it from any
cell leads to an outlet along a path whose highest cell sits at ``s(c)``.

Each connected region of ``s > z`` is a *depression*; all its cells share one
onset stage, its *spill elevation* ``S``.

Spill points
------------
Where several rim cells tie at ``S`` (a flat saddle, two equal notches) the
flood tree's choice depends on the order of the flood, and so on the tiles.
The spill point, ``spills_to`` and a route's controlling sill are therefore
defined from ``s``, ``z``, the depression ids and the outlets alone, under the
engine's connectivity, and both engines compute this definition:

- At a level ``L``, a *dry area* is a connected set of cells with
  ``s == z == L``, as large as it goes. It is a *way out* if one of its cells is
  an outlet or has a neighbour with ``s < L``; its *exit* is its first such
  cell in raster order (smallest ``row * cols + col``).
- The dry areas at ``L`` and the depressions with spill elevation ``L`` are the
  nodes of a graph whose edges join touching nodes (two depressions never
  touch, nor two dry areas). Every node gets its hop distance from the
  nearest way out by breadth-first search (Moore 1959). Every depression has
  one: the cells at ``L`` around it hold a way out, where its flood-tree
  route drops below ``L`` or reaches an outlet.
- The **spill point** of a depression at distance ``d`` is, among its rim
  cells (dry cells at ``S`` touching it) that lie in a dry area at distance
  ``d - 1``, the first in raster order.
- **Where water goes from a dry area** ``A`` at ``L``: if ``A`` is a way out
  and its exit is an outlet, off the site (0); otherwise into the exit's
  lowest neighbour (smallest ``s``, first in the direction order NW, N, NE, W,
  E, SW, S, SE on ties): that neighbour's depression, or, for a dry cell, on
  from its dry area (lower, so this ends). If ``A`` is no way out: the
  touching depression at distance one less, the lowest id on ties.
- **spills_to** of a depression is where water goes from the dry area of its
  spill point: another depression at ``S`` nearer the way out, the first
  depression further down, or 0 for an outlet.
- The **controlling sill** of a route from a cell in a depression is the
  depression's spill point; from any other cell, the cell itself. The route
  runs inside the depression to the spill point (breadth-first, fewest
  steps), on over cells at ``S`` outside it to the nearest way-out cell, to
  that cell's lowest neighbour and then down the flood tree to an outlet.

The onset stage, the depression ids and every column of the depression table
are thus the same for every tile size, in this engine and in
:mod:`sillmark.engine.tiled`; only the flood tree (and route cells below the spill
elevation) may differ where routes tie.

References
----------
Barnes, R., Lehman, C., Mulla, D. (2014). Priority-flood: An optimal
depression-filling and watershed-labeling algorithm for digital elevation
models. Computers & Geosciences 62, 117-127. doi:10.1016/j.cageo.2013.04.024
Zhou, G., Sun, Z., Fu, S. (2016). An efficient variant of the Priority-Flood
algorithm for filling depressions in raster digital elevation models.
Computers & Geosciences 90, 87-96. doi:10.1016/j.cageo.2016.02.021
Moore, E. F. (1959). The shortest path through a maze. Proceedings of an
International Symposium on the Theory of Switching, Harvard University Press,
285-292.
"""

from __future__ import annotations

import dataclasses
import os
import threading
from typing import TYPE_CHECKING

import numpy as np

from sillmark.engine import _flood_kernels
from sillmark.engine import _spill_kernels as _s
from sillmark.engine import _tile_kernels as _t
from sillmark.errors import (
    InvalidDEM,
    InvalidOutlets,
    InvalidParameter,
    LocationOutsideDEM,
)

if TYPE_CHECKING:  # pragma: no cover
    from affine import Affine

    from sillmark.grid.dem import DEM
    from sillmark.grid.outlets import Outlets

#: Flood-tree code of an outlet cell (the root of the tree).
OUTLET_CODE = _flood_kernels.OUTLET
#: Flood-tree code of a nodata cell or of a cell no outlet reaches.
NO_PARENT_CODE = 0
#: Row and column steps of flood-tree codes 1..8 (NW, N, NE, W, E, SW, S, SE).
DIRECTION_ROW = np.array([-1, -1, -1, 0, 0, 1, 1, 1], dtype=np.int64)
DIRECTION_COL = np.array([-1, 0, 1, -1, 1, -1, 0, 1], dtype=np.int64)
_FOUR = np.array([1, 3, 4, 6])  # N, W, E, S among the eight directions

#: Largest padded grid the packed 32-bit heap index can address.
MAX_PADDED_CELLS = 2**32 - 1
#: Side of the square tiles the flood is cut into, in cells. Tiles of this size
#: keep a tile's working arrays within the processor caches and give the
#: threads enough tiles to share.
DEFAULT_TILE_SIZE = 512


@dataclasses.dataclass(frozen=True)
class DepressionTable:
    """One row per depression (ids 1..n); columns are numpy arrays.

    Attributes
    ----------
    id : int32
        Depression id, as in :attr:`SpillResult.depression_id`.
    pit_row, pit_col : int64
        Lowest cell (first in row-major order on ties).
    pit_elevation : float32
        Its elevation, in the site's vertical unit.
    spill_row, spill_col : int64
        Spill point: the rim cell at the spill elevation the overflow leaves
        through (first in raster order among those one hop nearer a way out;
        see the module docstring).
    spill_x, spill_y : float64
        Spill point cell centre in the DEM's CRS (NaN without a transform).
    spill_elevation : float32
        Water level at which the depression starts to overflow.
    spills_to : int32
        Id of the depression the overflow reaches next, or 0 for an outlet (see
        the module docstring).
    max_depth : float32
        ``spill_elevation - pit_elevation``.
    cell_count : int64
    area_m2 : float64
        Plan area of the depression's cells.
    volume_m2_vu : float64
        Storage at the spill elevation, in m² times the vertical unit (sum over
        cells of area times depth). Convert with the vertical unit to m³.
    """

    id: np.ndarray
    pit_row: np.ndarray
    pit_col: np.ndarray
    pit_elevation: np.ndarray
    spill_row: np.ndarray
    spill_col: np.ndarray
    spill_x: np.ndarray
    spill_y: np.ndarray
    spill_elevation: np.ndarray
    spills_to: np.ndarray
    max_depth: np.ndarray
    cell_count: np.ndarray
    area_m2: np.ndarray
    volume_m2_vu: np.ndarray

    def __len__(self) -> int:
        return int(self.id.shape[0])

    @property
    def columns(self) -> tuple[str, ...]:
        return tuple(f.name for f in dataclasses.fields(self))

    def row(self, depression_id: int) -> dict:
        """All columns of one depression as plain Python values."""
        k = int(depression_id) - 1
        if not 0 <= k < len(self):
            raise InvalidParameter(
                f"no depression with id {depression_id}; ids run from 1 to {len(self)}"
            )
        return {name: getattr(self, name)[k].item() for name in self.columns}


@dataclasses.dataclass(frozen=True)
class Route:
    """The path from a location back to an outlet, and its controlling sill.

    ``rows``/``cols`` start at the location and end at an outlet cell. The
    controlling sill is a highest cell on the route: for a location inside a
    depression, the depression's spill point (the route runs through it, see
    the module docstring); for any other location, the location itself, and
    the route follows the flood tree. Its elevation equals the onset stage of
    the location.
    """

    rows: np.ndarray
    cols: np.ndarray
    sill_row: int
    sill_col: int
    sill_elevation: float
    reaches_outlet: bool

    def __len__(self) -> int:
        return int(self.rows.shape[0])


@dataclasses.dataclass(frozen=True)
class SpillResult:
    """Everything the spill engine computes for one DEM and outlet set.

    Attributes
    ----------
    elevation : float32 array
        The DEM (NaN on nodata), as given.
    onset_stage : float32 array
        Outlet water level at which each cell is first reached; equal to the
        depression-filled surface. NaN on nodata and on cells no outlet reaches.
    flood_tree : uint8 array
        Direction to the neighbour each cell was reached from (codes 1..8, see
        :data:`DIRECTION_ROW`), :data:`OUTLET_CODE` on outlets, 0 on nodata and
        unreached cells.
    depression_id : int32 array
        Depression of each cell, 1..n, and 0 where ``onset_stage == elevation``.
    depressions : DepressionTable
    connectivity : int
        4 or 8.
    unreached_cells : int
        Valid cells that no outlet reaches (walled in by nodata).
    heap_pops : int
        Priority-queue pops the flood needed (a measure of its work).
    """

    elevation: np.ndarray
    onset_stage: np.ndarray
    flood_tree: np.ndarray
    depression_id: np.ndarray
    depressions: DepressionTable
    connectivity: int
    unreached_cells: int
    heap_pops: int

    @property
    def fill_depth(self) -> np.ndarray:
        """``onset_stage - elevation`` (0 outside depressions, NaN on nodata)."""
        return self.onset_stage - self.elevation

    def route(self, row: int, col: int) -> Route:
        """Route from cell ``(row, col)`` back to the outlets and its controlling sill.

        Raises
        ------
        LocationOutsideDEM
            If the cell is outside the grid, on nodata, or reached by no outlet.
        """
        rows, cols = self.onset_stage.shape
        if not (0 <= row < rows and 0 <= col < cols):
            raise LocationOutsideDEM(
                f"cell ({row}, {col}) is outside the DEM; rows run 0..{rows - 1}, "
                f"columns 0..{cols - 1}"
            )
        if self.flood_tree[row, col] == NO_PARENT_CODE:
            what = "nodata" if np.isnan(self.elevation[row, col]) else "not reached by any outlet"
            raise LocationOutsideDEM(f"cell ({row}, {col}) is {what}; pick a cell with data")
        dep = int(self.depression_id[row, col])
        if dep > 0:
            t = self.depressions
            if not 0 < dep <= len(t):
                raise InvalidParameter(
                    f"cell ({row}, {col}) carries depression id {dep} but the table has "
                    f"{len(t)} rows; pass the table computed with these rasters"
                )
            path_r, path_c, k = _s.route_through_sill(
                self.onset_stage, self.depression_id, self.flood_tree, np.int64(row),
                np.int64(col), np.int64(t.spill_row[dep - 1]), np.int64(t.spill_col[dep - 1]),
                DIRECTION_ROW, DIRECTION_COL, _directions(self.connectivity),
                np.int64(rows * cols + 1),
            )
            if k < 0:
                raise InvalidParameter(
                    f"the spill point of depression {dep} does not lead out of it at its "
                    "spill elevation; pass the table computed with these rasters"
                )
            k = int(k)
        else:
            path_r, path_c = _flood_kernels.walk_route(
                self.flood_tree, np.int64(row), np.int64(col), DIRECTION_ROW, DIRECTION_COL,
                np.int64(rows * cols + 1),
            )
            k = 0
        reaches = bool(self.flood_tree[path_r[-1], path_c[-1]] == OUTLET_CODE)
        return Route(
            rows=path_r,
            cols=path_c,
            sill_row=int(path_r[k]),
            sill_col=int(path_c[k]),
            sill_elevation=float(self.elevation[path_r[k], path_c[k]]),
            reaches_outlet=reaches,
        )


def _directions(connectivity: int) -> np.ndarray:
    """Indices (into NW, N, NE, W, E, SW, S, SE) of the neighbours used."""
    if connectivity == 8:
        return np.arange(8, dtype=np.int64)
    if connectivity == 4:
        return _FOUR.astype(np.int64)
    raise InvalidParameter(f"connectivity must be 4 or 8, not {connectivity!r}")


def _on_threads(fn, items, workers: int) -> list:
    """``[fn(x) for x in items]`` on ``workers`` threads (x taken in turn).

    The compiled tile kernels release the GIL, so the threads run at once.
    Plain threads rather than an executor: one hand-off per thread, not per tile.
    """
    items = list(items)
    results = [None] * len(items)
    errors = []

    def run(start):
        try:
            for k in range(start, len(items), workers):
                results[k] = fn(items[k])
        except BaseException as exc:  # re-raised in the caller's thread
            errors.append(exc)

    threads = [threading.Thread(target=run, args=(w,)) for w in range(1, workers)]
    for th in threads:
        th.start()
    run(0)
    for th in threads:
        th.join()
    if errors:
        raise errors[0]
    return results


def _tiled_flood(z, mask, dirs, tile, level, tree, label, width) -> int:
    """Onset stage and flood tree by the tiled Priority-Flood (see _tile_kernels).

    Tiles are flooded, and later finished, on several threads (the kernels
    release the GIL); the graph between tiles is solved in between.
    """
    rows, cols = z.shape
    tile_rows = -(-rows // tile)
    tile_cols = -(-cols // tile)
    bounds = [
        (ti * tile, min(rows, (ti + 1) * tile), tj * tile, min(cols, (tj + 1) * tile))
        for ti in range(tile_rows)
        for tj in range(tile_cols)
    ]

    def flood_one(b):
        return _t.flood_tile(
            z, mask, np.int64(b[0]), np.int64(b[1]), np.int64(b[2]), np.int64(b[3]),
            DIRECTION_ROW, DIRECTION_COL, dirs, level, tree, label, np.int64(width),
        )

    workers = min(len(bounds), os.cpu_count() or 1)
    floods = _on_threads(flood_one, bounds, workers)
    seed_counts = np.array([len(f[0]) - 1 for f in floods], dtype=np.int64)
    base = np.concatenate([[0], np.cumsum(seed_counts)[:-1]]).astype(np.int64)
    n_nodes = int(seed_counts.sum()) + 1
    parts = [_t.links(level, tree, label, base, np.int64(tile_rows), np.int64(tile_cols),
                      np.int64(tile), np.int64(rows), np.int64(cols), np.int64(width),
                      DIRECTION_ROW, DIRECTION_COL, dirs)]
    for t, f in enumerate(floods):
        _, ea, eb, elevel, ecell_a, ecell_b, _ = f
        eu = np.where(ea == 0, 0, base[t] + ea)
        ev = np.where(eb == 0, 0, base[t] + eb)
        parts.append((eu, ev, elevel, ecell_a, ecell_b))
    eu, ev, elevel, ecu, ecv = (np.concatenate([p[k] for p in parts]) for k in range(5))
    lam, own_cell, other_cell = _t.solve_graph(
        np.int64(n_nodes), eu.astype(np.int64), ev.astype(np.int64),
        elevel.astype(np.float32), ecu.astype(np.int64), ecv.astype(np.int64),
    )

    def finish_one(k):
        r0, r1, c0, c1 = bounds[k]
        _t.finish_tile(
            np.int64(r0), np.int64(r1), np.int64(c0), np.int64(c1), level, tree, label,
            base[k], lam, floods[k][0], own_cell, other_cell,
            DIRECTION_ROW, DIRECTION_COL, np.int64(width),
        )

    _on_threads(finish_one, range(len(bounds)), workers)
    return int(sum(f[6] for f in floods))


def _validated_elevation(elevation) -> np.ndarray:
    z = np.asarray(elevation)
    if z.ndim != 2:
        raise InvalidDEM(f"the elevation must be a 2-D grid, not {z.ndim}-D")
    if z.shape[0] < 1 or z.shape[1] < 1:
        raise InvalidDEM(f"the elevation grid is empty ({z.shape[0]} x {z.shape[1]} cells)")
    if (z.shape[0] + 2) * (z.shape[1] + 2) > MAX_PADDED_CELLS:
        raise InvalidDEM(
            f"{z.shape[0]} x {z.shape[1]} cells is too large for the in-memory engine; "
            "use the tiled engine"
        )
    if z.dtype != np.float32:
        if np.issubdtype(z.dtype, np.integer):
            z32 = z.astype(np.float32)
            if not np.array_equal(z32.astype(np.float64), z.astype(np.float64)):
                raise InvalidDEM(
                    f"elevations of type {z.dtype} exceed what float32 holds exactly "
                    f"(|z| > 2**24); rescale them (e.g. to metres) first"
                )
            z = z32
        elif np.issubdtype(z.dtype, np.floating):
            z = z.astype(np.float32)  # rounded to the nearest float32
        else:
            raise InvalidDEM(f"elevations must be numbers, not {z.dtype}")
    return np.ascontiguousarray(z)


def priority_flood(
    elevation,
    outlet_mask,
    *,
    connectivity: int = 8,
    row_areas=None,
    transform: "Affine | None" = None,
    tile_size: int | None = None,
) -> SpillResult:
    """Onset stage, flood tree and depression inventory of a DEM.

    Parameters
    ----------
    elevation : (rows, cols) array
        Elevations; NaN (and ±inf) is nodata, which water does not cross.
        Computed in float32: integers must be exact in float32, wider floats are
        rounded to the nearest float32. The array is never modified.
    outlet_mask : (rows, cols) bool array
        Cells where water enters or leaves the site. Outlets on nodata are ignored.
    connectivity : {8, 4}, keyword-only
        D8 neighbourhood (default) or 4-neighbour.
    row_areas : (rows,) array, optional
        True area of one cell in each row, in m². Default 1 m² (then areas count
        cells).
    transform : affine.Affine, optional
        Grid-to-CRS transform, used for the spill points' x, y.
    tile_size : int, optional
        Side of the tiles the flood is cut into (default
        :data:`DEFAULT_TILE_SIZE`). The onset stage, depression ids, the
        whole table and every route's controlling sill do not depend on it;
        the flood tree may differ where routes tie.

    Returns
    -------
    SpillResult

    Raises
    ------
    InvalidDEM, InvalidOutlets, InvalidParameter

    Notes
    -----
    Memory: the result holds 9 bytes per cell (float32 onset stage, uint8 flood
    tree, int32 depression id), allocated once on a grid padded by one cell; the
    queues hold only the moving frontier (8 bytes per cell on it). Runs in
    O(n log m) for n cells and a frontier of m cells.

    Examples
    --------
    A 3 x 3 bowl whose centre (1) sits below a rim at 5, outlets on the edge:

    >>> import numpy as np
    >>> z = np.array([[5, 5, 5], [5, 1, 5], [5, 5, 5]], dtype=np.float32)
    >>> edge = np.ones((3, 3), bool); edge[1, 1] = False
    >>> r = priority_flood(z, edge)
    >>> float(r.onset_stage[1, 1]), int(r.depression_id[1, 1])
    (5.0, 1)
    """
    z = _validated_elevation(elevation)
    rows, cols = z.shape
    mask = np.asarray(outlet_mask)
    if mask.shape != z.shape:
        raise InvalidOutlets(
            f"the outlet mask is {mask.shape[0]} x {mask.shape[1]} cells but the DEM is "
            f"{rows} x {cols}; build it on the same grid"
        )
    if mask.dtype != np.bool_:
        raise InvalidOutlets(f"the outlet mask must be boolean, not {mask.dtype}")
    if row_areas is None:
        areas = np.ones(rows, dtype=np.float64)
    else:
        areas = np.asarray(row_areas, dtype=np.float64)
        if areas.shape != (rows,) or not np.all(np.isfinite(areas) & (areas > 0)):
            raise InvalidParameter(
                f"row_areas must hold {rows} positive finite cell areas (m²), one per row"
            )

    tile = DEFAULT_TILE_SIZE if tile_size is None else int(tile_size)
    if tile < 1:
        raise InvalidParameter(f"tile_size must be a positive number of cells, not {tile_size!r}")
    infinite, valid_outlets = _flood_kernels.scan_inputs(z, mask)
    if infinite:
        z = np.where(np.isinf(z), np.float32(np.nan), z)
    if valid_outlets == 0:
        raise InvalidOutlets(
            "no outlet cell lies on valid data; mark at least one cell with an "
            "elevation as an outlet (the DEM edge, cells next to nodata, or a water body)"
        )
    dirs = _directions(connectivity)
    width = cols + 2
    level_pad = np.empty((rows + 2, width), dtype=np.float32)
    tree_pad = np.empty((rows + 2, width), dtype=np.uint8)
    label_pad = np.empty((rows + 2, width), dtype=np.int32)
    _flood_kernels.pad_grids(level_pad, tree_pad, label_pad)
    level, tree, label = level_pad.reshape(-1), tree_pad.reshape(-1), label_pad.reshape(-1)

    heap_pops = _tiled_flood(z, mask, dirs, tile, level, tree, label, width)

    steps = DIRECTION_ROW[dirs] * width + DIRECTION_COL[dirs]
    back = steps[steps < 0].astype(np.int64)
    count, area, volume, pit_elevation, pit_cell, unreached = _flood_kernels.label_depressions(
        level, tree, label, z, areas, back, np.int64(width)
    )
    spill_cell, spills_to = _spill_points(level, tree, label, len(count) - 1, dirs, rows, cols)

    table = _depression_table(
        level, width, cols, count, area, volume, pit_elevation, pit_cell, spill_cell,
        spills_to, transform,
    )
    return SpillResult(
        elevation=z,
        onset_stage=level_pad[1:-1, 1:-1],
        flood_tree=tree_pad[1:-1, 1:-1],
        depression_id=label_pad[1:-1, 1:-1],
        depressions=table,
        connectivity=connectivity,
        unreached_cells=int(unreached),
        heap_pops=int(heap_pops),
    )


def _spill_points(level, tree, label, n, dirs, rows, cols):
    """Canonical spill cells (flat ``row * cols + col``) and ``spills_to`` of depressions 1..n.

    The whole padded grid is summarised as one tile (no perimeter to share),
    then the graph solved (see the module docstring and
    :mod:`sillmark.engine._spill_kernels`). The summary labels dry areas with
    negative numbers in ``label``; they are cleared afterwards.
    """
    width = cols + 2
    offs = (DIRECTION_ROW[dirs] * width + DIRECTION_COL[dirs]).astype(np.int64)
    none = np.empty(0, dtype=np.int64)
    summary = _s.summarise_tile(level, tree, label, np.int64(rows), np.int64(cols), offs, dirs,
                                np.int64(n), False, none, np.int64(0), np.int64(0),
                                np.int64(cols))
    np.maximum(label, 0, out=label)
    parts = _spill_parts(summary, np.arange(n + 1, dtype=np.int32), 0)
    empty_f, empty_i, empty_b = (np.empty(0, np.float32), np.empty(0, np.int32),
                                 np.empty(0, np.bool_))
    return _resolve_spill_parts(
        n, parts, p_level=empty_f, p_dep=empty_i, p_outlet=empty_b,
        poff=np.zeros(2, np.int64), tile=max(rows, cols), rows=rows, cols=cols, dirs=dirs,
    )


def _spill_parts(summary, piece_ids: np.ndarray, area_base: int) -> dict:
    """One tile's spill summary in global numbers (for :func:`_resolve_spill_parts`).

    ``piece_ids[k]`` is the depression id of the tile's depression piece ``k``
    (``piece_ids[0] == 0``); the tile's reported dry areas 1..m become global
    areas ``area_base .. area_base + m - 1`` (-1 for none).
    """
    (a_level, a_exit, a_kind, a_val, adj_area, adj_dep, adj_cell,
     p_area, p_low_level, p_low_dir, p_low_kind, p_low_val) = summary

    def targets(kind, val):
        out = val.copy()
        dep = kind == _s.KIND_DEPRESSION
        out[dep] = piece_ids[val[dep]]
        area = kind == _s.KIND_AREA
        out[area] = area_base + val[area] - 1
        return out

    return {
        "a_level": a_level, "a_exit": a_exit, "a_kind": a_kind, "a_val": targets(a_kind, a_val),
        "adj_area": (area_base + adj_area.astype(np.int64) - 1), "adj_dep": piece_ids[adj_dep],
        "adj_cell": adj_cell,
        "p_area": np.where(p_area > 0, area_base + p_area.astype(np.int64) - 1, -1),
        "p_low_level": p_low_level, "p_low_dir": p_low_dir, "p_low_kind": p_low_kind,
        "p_low_val": targets(p_low_kind, p_low_val),
    }


def _resolve_spill_parts(n, parts, *, p_level, p_dep, p_outlet, poff, tile, rows, cols, dirs):
    """Spill cells and ``spills_to`` of depressions 1..n from the tiles' summaries.

    ``parts`` holds the :func:`_spill_parts` of every tile concatenated (same
    keys); ``p_level``, ``p_dep`` (depression id or 0) and ``p_outlet`` are the
    tiles' perimeters in perimeter order, tile ``t`` from ``poff[t]``.
    Returns two arrays indexed by id (entry 0 unused): the spill cell as
    ``row * cols + col`` and ``spills_to``.
    """
    tile_rows = -(-rows // tile)
    tile_cols = -(-cols // tile)
    return _s.resolve_spills(
        np.int64(n), parts["a_level"].astype(np.float32), parts["a_exit"].astype(np.int64),
        parts["a_kind"].astype(np.int8), parts["a_val"].astype(np.int64),
        parts["adj_area"].astype(np.int64), parts["adj_dep"].astype(np.int32),
        parts["adj_cell"].astype(np.int64), p_level.astype(np.float32), p_dep.astype(np.int32),
        parts["p_area"].astype(np.int64), p_outlet.astype(np.bool_),
        parts["p_low_level"].astype(np.float32), parts["p_low_dir"].astype(np.int64),
        parts["p_low_kind"].astype(np.int8), parts["p_low_val"].astype(np.int64),
        poff.astype(np.int64), np.int64(tile), np.int64(tile_rows), np.int64(tile_cols),
        np.int64(rows), np.int64(cols), DIRECTION_ROW, DIRECTION_COL, dirs.astype(np.int64),
    )


def _depression_table(
    level, width, cols, count, area, volume, pit_elevation, pit_cell, spill_cell, spills_to,
    transform,
) -> DepressionTable:
    spill = spill_cell[1:]
    return depression_table(
        pit_row=pit_cell[1:] // width - 1,
        pit_col=pit_cell[1:] % width - 1,
        pit_elevation=pit_elevation[1:],
        spill_row=spill // cols,
        spill_col=spill % cols,
        spill_elevation=level[pit_cell[1:]],
        spills_to=spills_to[1:],
        cell_count=count[1:],
        area_m2=area[1:],
        volume_m2_vu=volume[1:],
        transform=transform,
    )


def depression_table(
    *, pit_row, pit_col, pit_elevation, spill_row, spill_col, spill_elevation, spills_to,
    cell_count, area_m2, volume_m2_vu, transform=None,
) -> DepressionTable:
    """A :class:`DepressionTable` from its cell-level columns (ids 1..n in the given order).

    Fills in ``id``, ``spill_x``/``spill_y`` (cell centres through ``transform``,
    NaN without one) and ``max_depth`` (``spill_elevation - pit_elevation`` in
    float32), as :func:`priority_flood` does; for engines that compute the
    depressions elsewhere (:mod:`sillmark.engine.tiled`).
    """
    pit_row = np.asarray(pit_row, dtype=np.int64)
    pit_col = np.asarray(pit_col, dtype=np.int64)
    spill_row = np.asarray(spill_row, dtype=np.int64)
    spill_col = np.asarray(spill_col, dtype=np.int64)
    spill_elevation = np.asarray(spill_elevation).astype(np.float32)
    n = pit_row.shape[0]
    if transform is not None:
        t = transform
        cx, cy = spill_col + 0.5, spill_row + 0.5
        spill_x = (t.a * cx + t.b * cy + t.c).astype(np.float64)
        spill_y = (t.d * cx + t.e * cy + t.f).astype(np.float64)
    else:
        spill_x = np.full(n, np.nan)
        spill_y = np.full(n, np.nan)
    pit_z = np.asarray(pit_elevation).astype(np.float32)
    return DepressionTable(
        id=np.arange(1, n + 1, dtype=np.int32),
        pit_row=pit_row,
        pit_col=pit_col,
        pit_elevation=pit_z,
        spill_row=spill_row,
        spill_col=spill_col,
        spill_x=spill_x,
        spill_y=spill_y,
        spill_elevation=spill_elevation,
        spills_to=np.asarray(spills_to).astype(np.int32),
        max_depth=(spill_elevation - pit_z).astype(np.float32),
        cell_count=np.asarray(cell_count, dtype=np.int64),
        area_m2=np.asarray(area_m2, dtype=np.float64),
        volume_m2_vu=np.asarray(volume_m2_vu, dtype=np.float64),
    )


def analyse_site(dem: "DEM", outlets: "Outlets", *, connectivity: int = 8) -> SpillResult:
    """Run the spill engine on a site DEM with its outlets (true cell areas, CRS)."""
    return priority_flood(
        dem.elevation,
        outlets.mask,
        connectivity=connectivity,
        row_areas=dem.row_areas,
        transform=dem.transform,
    )
