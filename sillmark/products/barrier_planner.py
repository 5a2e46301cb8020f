"""The barrier planner: the fewest cells to raise so that a place stays dry up to a level.

For a place (one or more cells) and a target outlet water level ``L``, water
can reach the place at ``L`` only through cells whose ground lies below ``L``.
Raising a set of those cells to ``L`` keeps the place dry up to ``L`` exactly
when the set separates the place from the outlets in the graph of cells below
``L`` (neighbours under the engine's connectivity). The fewest such cells are
a minimum vertex cut, found as a maximum flow (Ford & Fulkerson 1956) on the
graph with every cell split into an entry and an exit node joined by an edge
of capacity 1 (Even 1975); the cells whose entry the residual graph still
reaches from the outlets but whose exit it does not form the cut. The flow is
computed by :func:`scipy.sparse.csgraph.maximum_flow` (Dinic's algorithm).

Outlet cells and the place's own cells are never part of the barrier. Where
an outlet cell below ``L`` touches the place, or the place holds an outlet, no
barrier can keep it dry and the plan says so.

Culverts (:mod:`sillmark.engine.culverts`) are further edges of the same
graph: a culvert whose invert lies below ``L`` joins its two end cells (when
both lie below ``L``), so a wall that leaves one end outside and the other
inside is no wall. A flap valve is an edge one way only, from its first end
to its last, so the graph is directed (the cut of a directed graph is found
the same way, Even 1975): water enters the place's side only through a
culvert that leads into it. A culvert end may itself be raised, which closes
the culvert at ``L``.

References
----------
Ford, L. R., Fulkerson, D. R. (1956). Maximal flow through a network.
Canadian Journal of Mathematics 8, 399-404. doi:10.4153/CJM-1956-045-5
Even, S. (1975). An algorithm for determining whether the connectivity of a
graph is at least k. SIAM Journal on Computing 4(3), 393-396.
doi:10.1137/0204034
Dinic, E. A. (1970). Algorithm for solution of a problem of maximum flow in a
network with power estimation. Soviet Mathematics Doklady 11, 1277-1280.
"""

from __future__ import annotations

import dataclasses
from typing import Any

import numpy as np
from scipy import ndimage, sparse
from scipy.sparse.csgraph import maximum_flow

from sillmark.engine.culverts import CulvertEdges
from sillmark.engine.depressions import DIRECTION_COL, DIRECTION_ROW, directions
from sillmark.errors import InvalidParameter
from sillmark.grid.edits import Edit, Edits
from sillmark.grid.ground import GroundLength, ground_unit, path_length

__all__ = ["BarrierPlan", "barrier_pieces", "plan_barrier"]


@dataclasses.dataclass(frozen=True)
class BarrierPlan:
    """The shortest barrier keeping a place dry up to ``level``, or why there is none.

    Attributes
    ----------
    level : float
        Target outlet water level, in the DEM's vertical unit.
    possible : bool
    reason : str
        Why no barrier is needed or none can work ("" when one was found).
    rows, cols : int64 arrays
        The cells to raise to ``level`` (empty when none are needed or possible).
    cell_size : float
        Side of one cell in ground units, for :attr:`length`.
    """

    level: float
    possible: bool
    reason: str
    rows: np.ndarray
    cols: np.ndarray
    cell_size: float

    @property
    def cells(self) -> int:
        return int(self.rows.shape[0])

    @property
    def pieces(self) -> tuple[tuple[np.ndarray, np.ndarray], ...]:
        """The barrier's cells as lines: see :func:`barrier_pieces`."""
        return barrier_pieces(self.rows, self.cols)

    @property
    def length(self) -> float:
        """Length of the barrier in ground units on square cells of :attr:`cell_size`.

        Each piece is the line through its cell centres, a side step one cell
        and a corner step √2 cells long, carried on half a step at each end so
        that the wall spans its end cells (a one-cell plug is one cell long).
        A straight run of ``n`` cells is therefore ``n`` cells long. For a
        georeferenced grid (lon/lat or cells that are not square) use
        :meth:`ground_length`.
        """
        total = 0.0
        for r, c in self.pieces:
            steps = np.hypot(np.diff(r), np.diff(c))
            total += 1.0 if steps.size == 0 else float(steps.sum() + 0.5 * (steps[0] + steps[-1]))
        return total * self.cell_size

    def ground_length(self, grid: Any) -> GroundLength:
        """Length of the barrier on the ground of ``grid`` (a DEM or DEM grid).

        The same line as :attr:`length`, measured step by step with
        :func:`sillmark.grid.ground.path_length` (planar in the CRS's linear
        unit, geodesic on a lon/lat grid); a one-cell piece counts one cell
        width, measured west to east.
        """
        total = 0.0
        symbol, metres = ground_unit(grid)
        for r, c in self.pieces:
            if r.size == 1:
                nb = c[0] + 1 if c[0] + 1 < grid.shape[1] else c[0] - 1
                total += path_length(grid, [r[0], r[0]], [c[0], nb]).value
                continue
            total += path_length(grid, r, c).value
            total += 0.5 * path_length(grid, r[:2], c[:2]).value
            total += 0.5 * path_length(grid, r[-2:], c[-2:]).value
        return GroundLength(total, symbol, total * metres)

    def as_edits(self, shape: tuple[int, int]) -> Edits:
        """The barrier as an edit (cells raised to at least :attr:`level`)."""
        edit = Edit(index=0, kind="barrier", name="planned barrier", level=float(self.level),
                    one_way=False, rows=self.rows, cols=self.cols,
                    length_m=float("nan"), x=(), y=())
        return Edits(shape=tuple(shape), items=(edit,), source="the barrier planner")


def plan_barrier(elevation, outlet_mask, place_mask, level: float, *, connectivity: int = 8,
                 cell_size: float = 1.0, culverts: CulvertEdges | None = None) -> BarrierPlan:
    """Fewest cells to raise to ``level`` so that no surface path at ``level`` reaches the place.

    Parameters
    ----------
    elevation : (rows, cols) float array
        NaN is nodata (water does not cross it).
    outlet_mask, place_mask : (rows, cols) bool arrays
    level : float
        Target outlet water level.
    connectivity : {8, 4}
    cell_size : float
        Side of a cell in ground units (for the length).
    culverts : CulvertEdges, optional
        The site's culverts and flap valves on this grid: further edges of
        the graph below ``level`` (those with an invert below it).

    Returns
    -------
    BarrierPlan

    Notes
    -----
    Memory and time grow with the cells below ``level`` connected to the
    place: two nodes and up to ``connectivity + 1`` edges per cell.

    Examples
    --------
    A 1-cell corridor between an outlet (west) and a place (east), ground at
    0 and walls at 9: one cell closes it.

    >>> import numpy as np
    >>> z = np.full((3, 5), 9.0, np.float32); z[1, :] = 0.0
    >>> out = np.zeros(z.shape, bool); out[1, 0] = True
    >>> place = np.zeros(z.shape, bool); place[1, 4] = True
    >>> plan_barrier(z, out, place, 1.0).cells
    1
    """
    z = np.asarray(elevation, dtype=np.float64)
    outlets = np.asarray(outlet_mask, dtype=bool)
    place = np.asarray(place_mask, dtype=bool)
    if z.ndim != 2 or outlets.shape != z.shape or place.shape != z.shape:
        raise InvalidParameter("the elevation, outlet and place grids must be 2-D and alike")
    if not place.any():
        raise InvalidParameter("the place covers no cell of the DEM")
    if not np.isfinite(level):
        raise InvalidParameter("the target level must be a finite number")
    dirs = directions(connectivity)
    empty = np.zeros(0, dtype=np.int64)

    def plan(possible: bool, reason: str, rows=empty, cols=empty) -> BarrierPlan:
        return BarrierPlan(level=float(level), possible=possible, reason=reason, rows=rows,
                           cols=cols, cell_size=float(cell_size))

    with np.errstate(invalid="ignore"):
        below = np.isfinite(z) & (z < level)
    wet_place = place & below
    if not wet_place.any():
        return plan(True, "the place stands at or above the level: no barrier is needed")
    if culverts is not None and tuple(culverts.shape) != z.shape:
        raise InvalidParameter("the culverts were placed on a grid of another shape")
    flat_below = below.ravel()
    ca = cb = np.zeros(0, dtype=np.int64)
    two_way = np.zeros(0, dtype=bool)
    if culverts is not None and len(culverts):
        # A culvert is open at the level when its invert and both ends lie below it.
        open_ = (culverts.invert < level) & flat_below[culverts.a] & flat_below[culverts.b]
        ca, cb, two_way = culverts.a[open_], culverts.b[open_], ~culverts.one_way[open_]
    structure = np.ones((3, 3), bool) if connectivity == 8 else ndimage.generate_binary_structure(2, 1)
    labels, count = ndimage.label(below, structure=structure)
    if ca.size:
        # Regions joined by an open culvert are one region (either way, for this filter).
        la, lb = labels.ravel()[ca], labels.ravel()[cb]
        joined = sparse.coo_matrix((np.ones(la.size), (la, lb)), shape=(count + 1, count + 1))
        _, merged = sparse.csgraph.connected_components(joined, directed=False)
        merged[0] = -1  # the cells at or above the level stay out
        labels = merged[labels]
    reach = np.isin(labels, np.unique(labels[wet_place]))
    reach &= labels >= 0 if ca.size else labels > 0
    if not (reach & outlets).any():
        return plan(True, "no outlet reaches the place below the level: no barrier is needed")
    if (place & outlets & below).any():
        return plan(False, "the place holds an outlet below the level: no barrier can keep it dry")

    rows, cols = z.shape
    index = np.full(z.shape, -1, dtype=np.int64)
    cells = np.flatnonzero(reach.ravel())
    n = cells.shape[0]
    index.ravel()[cells] = np.arange(n)
    r, c = cells // cols, cells % cols
    big = n + 1  # more than any cut can cost
    source, sink = 2 * n, 2 * n + 1
    heads, tails, caps = [], [], []
    # Cell entry 2i -> exit 2i + 1: 1 for a cell that may be raised, big otherwise.
    fixed = outlets.ravel()[cells] | place.ravel()[cells]
    heads.append(2 * np.arange(n))
    tails.append(2 * np.arange(n) + 1)
    caps.append(np.where(fixed, big, 1))
    # Neighbours: exit of one -> entry of the other.
    for d in dirs:
        rr, cc = r + DIRECTION_ROW[d], c + DIRECTION_COL[d]
        ok = (rr >= 0) & (rr < rows) & (cc >= 0) & (cc < cols)
        j = np.full(n, -1, dtype=np.int64)
        j[ok] = index[rr[ok], cc[ok]]
        ok = j >= 0
        heads.append(2 * np.flatnonzero(ok) + 1)
        tails.append(2 * j[ok])
        caps.append(np.full(int(ok.sum()), big))
    # Culverts: exit of one end -> entry of the other, in the direction water may pass.
    if ca.size:
        ia, ib = index.ravel()[ca], index.ravel()[cb]
        keep = (ia >= 0) & (ib >= 0)
        heads += [2 * ia[keep] + 1, 2 * ib[keep & two_way] + 1]
        tails += [2 * ib[keep], 2 * ia[keep & two_way]]
        caps += [np.full(int(keep.sum()), big), np.full(int((keep & two_way).sum()), big)]
    outlet_nodes = np.flatnonzero(outlets.ravel()[cells])
    place_nodes = np.flatnonzero(place.ravel()[cells])
    heads += [np.full(outlet_nodes.shape[0], source), 2 * place_nodes + 1]
    tails += [2 * outlet_nodes, np.full(place_nodes.shape[0], sink)]
    caps += [np.full(outlet_nodes.shape[0], big), np.full(place_nodes.shape[0], big)]
    u, v, w = (np.concatenate(a).astype(np.int64) for a in (heads, tails, caps))
    graph = sparse.csr_matrix((w.astype(np.int32), (u, v)), shape=(2 * n + 2, 2 * n + 2))
    graph.sum_duplicates()
    flow = maximum_flow(graph, source, sink, method="dinic")
    if flow.flow_value >= big:
        joined = " or is joined to it by a culvert" if ca.size else ""
        return plan(False, f"an outlet below the level touches the place{joined}: no barrier "
                           "can keep it dry")
    if flow.flow_value == 0:  # only through a flap valve that lets no water in
        return plan(True, "no outlet reaches the place below the level: no barrier is needed")
    # Residual reachability from the source gives the source side of the cut.
    residual = graph - flow.flow
    residual.data = np.where(residual.data > 0, 1, 0)
    residual.eliminate_zeros()
    seen = sparse.csgraph.breadth_first_order(residual, source, return_predecessors=False)
    side = np.zeros(2 * n + 2, dtype=bool)
    side[seen] = True
    cut = np.flatnonzero(side[2 * np.arange(n)] & ~side[2 * np.arange(n) + 1])
    order = np.argsort(cells[cut], kind="stable")
    return plan(True, "", r[cut][order].astype(np.int64), c[cut][order].astype(np.int64))


def barrier_pieces(rows, cols) -> tuple[tuple[np.ndarray, np.ndarray], ...]:
    """Order a set of cells into lines of neighbouring cells (8-neighbour steps).

    A barrier's cells form one or more chains (a wall across each gap). Each
    piece starts at a cell with the fewest neighbours left in the set (an end
    of a chain; among those, the fewest side neighbours, so that a corner is
    walked round by its side steps) and walks on to an unvisited neighbour, a
    side neighbour before a corner one, until none is left; cells a walk leaves behind (a branch)
    start further pieces. Every cell lands in exactly one piece.

    Parameters
    ----------
    rows, cols : array_like of int

    Returns
    -------
    tuple of (rows, cols) int64 array pairs, in walking order.

    Examples
    --------
    >>> [(r.tolist(), c.tolist()) for r, c in barrier_pieces([2, 0, 1], [2, 0, 1])]
    [([0, 1, 2], [0, 1, 2])]
    """
    r = np.asarray(rows, dtype=np.int64).reshape(-1)
    c = np.asarray(cols, dtype=np.int64).reshape(-1)
    left = {(int(a), int(b)) for a, b in zip(r, c)}
    side = ((0, 1), (1, 0), (0, -1), (-1, 0))
    corner = ((1, 1), (1, -1), (-1, 1), (-1, -1))

    def neighbours(cell, steps=side + corner):
        return [(cell[0] + dr, cell[1] + dc) for dr, dc in steps
                if (cell[0] + dr, cell[1] + dc) in left]

    pieces = []
    while left:
        start = min(left, key=lambda cell: (len(neighbours(cell)), len(neighbours(cell, side)),
                                            cell))
        walk = [start]
        left.discard(start)
        while True:
            nxt = neighbours(walk[-1], side) or neighbours(walk[-1], corner)
            if not nxt:
                break
            # The neighbour with the fewest onward neighbours keeps the walk on the chain.
            step = min(nxt, key=lambda cell: (len(neighbours(cell)), cell))
            walk.append(step)
            left.discard(step)
        a = np.array(walk, dtype=np.int64).reshape(-1, 2)
        pieces.append((a[:, 0].copy(), a[:, 1].copy()))
    return tuple(pieces)
