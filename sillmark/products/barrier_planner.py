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
barrier can keep it dry and the plan says so. Culverts are not taken into
account: run the plan on the ground without them, or check the edited run.

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

import numpy as np
from scipy import ndimage, sparse
from scipy.sparse.csgraph import maximum_flow

from sillmark.engine.depressions import DIRECTION_COL, DIRECTION_ROW, directions
from sillmark.errors import InvalidParameter
from sillmark.grid.edits import Edit, Edits

__all__ = ["BarrierPlan", "plan_barrier"]


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
    def length(self) -> float:
        """Length of the barrier in ground units: its cells times the cell size."""
        return self.cells * self.cell_size

    def as_edits(self, shape: tuple[int, int]) -> Edits:
        """The barrier as an edit (cells raised to at least :attr:`level`)."""
        edit = Edit(index=0, kind="barrier", name="planned barrier", level=float(self.level),
                    one_way=False, rows=self.rows, cols=self.cols,
                    length_m=float("nan"), x=(), y=())
        return Edits(shape=tuple(shape), items=(edit,), source="the barrier planner")


def plan_barrier(elevation, outlet_mask, place_mask, level: float, *, connectivity: int = 8,
                 cell_size: float = 1.0) -> BarrierPlan:
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
    structure = np.ones((3, 3), bool) if connectivity == 8 else ndimage.generate_binary_structure(2, 1)
    labels, _ = ndimage.label(below, structure=structure)
    reach = np.isin(labels, np.unique(labels[wet_place]))
    reach &= labels > 0
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
        return plan(False, "an outlet below the level touches the place: no barrier can keep "
                           "it dry")
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
