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
are thus the same for every tile size, executor and store (the engine is the
one pipeline of :mod:`sillmark.engine.pipeline`, tiled after Barnes 2016); only
the flood tree (and route cells below the spill elevation) may differ where
routes tie, and only between tile sizes.

References
----------
Barnes, R., Lehman, C., Mulla, D. (2014). Priority-flood: An optimal
depression-filling and watershed-labeling algorithm for digital elevation
models. Computers & Geosciences 62, 117-127. doi:10.1016/j.cageo.2013.04.024
Zhou, G., Sun, Z., Fu, S. (2016). An efficient variant of the Priority-Flood
algorithm for filling depressions in raster digital elevation models.
Computers & Geosciences 90, 87-96. doi:10.1016/j.cageo.2016.02.021
Barnes, R. (2016). Parallel priority-flood depression filling for trillion cell
digital elevation models on desktops or clusters. Computers & Geosciences 96,
56-68. doi:10.1016/j.cageo.2016.07.001
Moore, E. F. (1959). The shortest path through a maze. Proceedings of an
International Symposium on the Theory of Switching, Harvard University Press,
285-292.
"""

from __future__ import annotations

import dataclasses
from typing import TYPE_CHECKING

import numpy as np

from sillmark.engine import _flood_kernels, _route_kernels
from sillmark.engine.culverts import CULVERT_CODE, CulvertEdges
from sillmark.engine.depressions import (  # noqa: F401  (public through this module)
    DIRECTION_COL,
    DIRECTION_ROW,
    NO_PARENT_CODE,
    OUTLET_CODE,
    DepressionTable,
    depression_table,
    directions,
)
from sillmark.engine.executors import Executor, ThreadExecutor
from sillmark.engine.pipeline import run_pipeline
from sillmark.engine.plan import MAX_TILE_SIZE
from sillmark.engine.stores import MemoryStore
from sillmark.engine.tile_inputs import ArrayTiles
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

#: Largest padded grid the packed 32-bit heap index can address.
MAX_PADDED_CELLS = 2**32 - 1
#: Side of the square tiles the flood is cut into, in cells. Tiles of this size
#: keep a tile's working arrays within the processor caches and give the
#: threads enough tiles to share.
DEFAULT_TILE_SIZE = 512


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
    culverts : CulvertEdges or None
        The culverts the flood crossed; a culvert end reached through its
        culvert has flood-tree code :data:`CULVERT_CODE`.
    """

    elevation: np.ndarray
    onset_stage: np.ndarray
    flood_tree: np.ndarray
    depression_id: np.ndarray
    depressions: DepressionTable
    connectivity: int
    unreached_cells: int
    heap_pops: int
    culverts: CulvertEdges | None = None

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
        t = self.depressions
        if dep > 0 and 0 < dep <= len(t) and self._on_culvert(
                int(t.spill_row[dep - 1]), int(t.spill_col[dep - 1])):
            # Drained through a culvert: the flood tree leads through it.
            path_r, path_c = self._walk(row, col)
            sr, sc = int(t.spill_row[dep - 1]), int(t.spill_col[dep - 1])
            return Route(rows=path_r, cols=path_c, sill_row=sr, sill_col=sc,
                         sill_elevation=float(self.onset_stage[sr, sc]),
                         reaches_outlet=bool(self.flood_tree[path_r[-1], path_c[-1]]
                                             == OUTLET_CODE))
        if dep > 0:
            t = self.depressions
            if not 0 < dep <= len(t):
                raise InvalidParameter(
                    f"cell ({row}, {col}) carries depression id {dep} but the table has "
                    f"{len(t)} rows; pass the table computed with these rasters"
                )
            path_r, path_c, k = _route_kernels.route_through_sill(
                self.onset_stage, self.depression_id, self.flood_tree, np.int64(row),
                np.int64(col), np.int64(t.spill_row[dep - 1]), np.int64(t.spill_col[dep - 1]),
                DIRECTION_ROW, DIRECTION_COL, directions(self.connectivity),
                np.int64(rows * cols + 1),
            )
            if k < 0 and self.culverts is not None:
                # A depression that drains through a culvert as well as over its
                # rim: the flood tree itself leads out, through the culvert; its
                # highest cell is the controlling sill (the route is a minimax path).
                path_r, path_c = self._walk(row, col)
                k = int(np.argmax(self.elevation[path_r, path_c]))
                return Route(rows=path_r, cols=path_c, sill_row=int(path_r[k]),
                             sill_col=int(path_c[k]),
                             sill_elevation=float(self.elevation[path_r[k], path_c[k]]),
                             reaches_outlet=bool(self.flood_tree[path_r[-1], path_c[-1]]
                                                 == OUTLET_CODE))
            if k < 0:
                raise InvalidParameter(
                    f"the spill point of depression {dep} does not lead out of it at its "
                    "spill elevation; pass the table computed with these rasters"
                )
            k = int(k)
            path_r, path_c = self._through_culverts(path_r, path_c)
        else:
            path_r, path_c = self._walk(row, col)
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


    def _on_culvert(self, row: int, col: int) -> bool:
        """Whether a culvert ends at ``(row, col)``."""
        if self.culverts is None:
            return False
        return bool(np.any(self.culverts.ends == row * self.onset_stage.shape[1] + col))

    def _walk(self, row: int, col: int) -> tuple[np.ndarray, np.ndarray]:
        """The flood tree from ``(row, col)`` to an outlet, through culverts."""
        rows, cols = self.onset_stage.shape
        path_r, path_c = _flood_kernels.walk_route(
            self.flood_tree, np.int64(row), np.int64(col), DIRECTION_ROW, DIRECTION_COL,
            np.int64(rows * cols + 1),
        )
        return self._through_culverts(path_r, path_c)

    def _through_culverts(self, path_r: np.ndarray, path_c: np.ndarray):
        """A route that stops at a culvert end, continued from the culvert's other end.

        Where several culverts could have brought the water at the same level,
        each is tried in turn (lowest crossing first) until one leads on to an
        outlet without coming back to a cell of the route; the flood tree alone
        does not record which culvert it was.
        """
        if self.culverts is None:
            return path_r, path_c
        cols = self.onset_stage.shape[1]
        found = self._onward(path_r, path_c, set((path_r * cols + path_c).tolist()), 0)
        return found if found is not None else (path_r, path_c)

    def _onward(self, path_r: np.ndarray, path_c: np.ndarray, seen: set, hops: int):
        """``path`` continued through culverts to an outlet, or None if it cannot be."""
        end_r, end_c = int(path_r[-1]), int(path_c[-1])
        if self.flood_tree[end_r, end_c] == OUTLET_CODE:
            return path_r, path_c
        if self.flood_tree[end_r, end_c] != CULVERT_CODE or hops > len(self.culverts):
            return None
        rows, cols = self.onset_stage.shape
        for other in self._culvert_parents(end_r, end_c, seen):
            more_r, more_c = _flood_kernels.walk_route(
                self.flood_tree, np.int64(other[0]), np.int64(other[1]), DIRECTION_ROW,
                DIRECTION_COL, np.int64(rows * cols + 1))
            cells = (more_r * cols + more_c).tolist()
            if seen.intersection(cells):
                continue
            found = self._onward(more_r, more_c, seen | set(cells), hops + 1)
            if found is not None:
                return np.concatenate([path_r, found[0]]), np.concatenate([path_c, found[1]])
        return None

    def _culvert_parents(self, row: int, col: int, seen: set) -> list[tuple[int, int]]:
        """The culvert ends water may have come from to reach ``(row, col)`` at its onset
        stage: those whose crossing, ``max(onset stage there, invert)``, is not above
        it, lowest crossing first, leaving out cells already on the route."""
        cols = self.onset_stage.shape[1]
        flat = self.onset_stage.ravel()
        here = float(self.onset_stage[row, col])
        ranked = []
        for other, invert in self.culverts.candidates(row, col):
            level = float(flat[other])
            if other in seen or np.isnan(level):
                continue
            crossing = max(level, invert)
            if crossing <= here:
                ranked.append((crossing, level, other))
        return [divmod(other, cols) for _, _, other in sorted(ranked)]


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
    executor: Executor | None = None,
    store=None,
    culverts: CulvertEdges | None = None,
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
    executor : Executor, optional
        Runs the tile steps (:mod:`sillmark.engine.executors`); default a
        :class:`~sillmark.engine.executors.ThreadExecutor`, one thread per core.
    store : TileStore, optional
        Keeps the tiles between the steps (:mod:`sillmark.engine.stores`);
        default a :class:`~sillmark.engine.stores.MemoryStore`. It is closed
        at the end. Every executor and store gives the same bits.
    culverts : CulvertEdges, optional
        Extra edges of the flood graph (:func:`sillmark.engine.culverts.culvert_edges`):
        a culvert end is reached at ``max(L, invert, z)`` from the level
        ``L`` of its other end, a flap valve from its first end only.

    Returns
    -------
    SpillResult

    Raises
    ------
    InvalidDEM, InvalidOutlets, InvalidParameter

    Notes
    -----
    This is the pipeline of :mod:`sillmark.engine.pipeline` on the arrays
    (:class:`~sillmark.engine.pipeline.ArrayTiles`), by default on threads with
    the tiles kept in memory.

    Memory: the result holds 9 bytes per cell (float32 onset stage, uint8 flood
    tree, int32 depression id); the tiles' working arrays, 9 bytes per cell,
    are let go of layer by layer as the result is read from them, so the peak
    stays near 13 bytes per cell beyond the DEM; the queues hold only the
    moving frontier (8 bytes per cell on it). Runs in O(n log m) for n cells
    and a frontier of m cells.

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
    # A tile larger than the grid is the grid: one tile either way.
    tile = min(tile, max(rows, cols), MAX_TILE_SIZE)
    infinite, valid_outlets = _flood_kernels.scan_inputs(z, mask)
    if infinite:
        z = np.where(np.isinf(z), np.float32(np.nan), z)
    if valid_outlets == 0:
        raise InvalidOutlets(
            "no outlet cell lies on valid data; mark at least one cell with an "
            "elevation as an outlet (the DEM edge, cells next to nodata, or a water body)"
        )
    directions(connectivity)  # refuse a wrong connectivity before any work
    if culverts is not None:
        if tuple(culverts.shape) != (rows, cols):
            raise InvalidParameter(
                f"the culverts are placed on a grid of {culverts.shape[0]} x "
                f"{culverts.shape[1]} cells but the DEM is {rows} x {cols}")
        if np.any(np.isnan(z.ravel()[culverts.ends])):
            raise InvalidParameter("a culvert end lies on nodata; move it onto ground with "
                                   "an elevation")
    store = MemoryStore() if store is None else store
    try:
        flood = run_pipeline(
            ArrayTiles(z, mask), executor=ThreadExecutor() if executor is None else executor,
            store=store, tile_size=tile, connectivity=connectivity, row_areas=areas,
            transform=transform, culverts=culverts,
        )
        onset, tree, ids = (flood.read(layer, 0, rows)
                            for layer in ("onset_stage", "flood_tree", "depression_id"))
    finally:
        store.close()
    return SpillResult(
        elevation=z,
        onset_stage=onset,
        flood_tree=tree,
        depression_id=ids,
        depressions=flood.depressions,
        connectivity=connectivity,
        unreached_cells=flood.unreached_cells,
        heap_pops=flood.heap_pops,
        culverts=culverts,
    )


def analyse_site(dem: "DEM", outlets: "Outlets", *, connectivity: int = 8,
                 culverts: CulvertEdges | None = None) -> SpillResult:
    """Run the spill engine on a site DEM with its outlets (true cell areas, CRS) and,
    optionally, its culverts."""
    return priority_flood(
        dem.elevation,
        outlets.mask,
        connectivity=connectivity,
        row_areas=dem.row_areas,
        transform=dem.transform,
        culverts=culverts,
    )
