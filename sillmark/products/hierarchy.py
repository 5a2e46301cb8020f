"""The depression hierarchy and exact stage–area / stage–storage curves of its nodes.

Depressions nest: as the water level rises inside a depression, the pools in
its separate pits grow, meet at saddles and merge, until the whole depression
spills to the outlets. The *depression hierarchy* (Barnes, Callaghan & Wickert
2020) records this as a forest: the leaves are the pits, each internal node is
the pool formed when its children meet at a saddle, and the top of each tree is
one depression of :class:`sillmark.engine.flood.SpillResult`, spilling at its spill
elevation.

It is computed from the spill engine's result by one union-find sweep over the
depression cells in ascending elevation (Kruskal's algorithm on the grid graph
whose edge weight is the higher elevation of the two cells it joins, which is
the minimum spanning tree of the paper's basin graph with every cell kept), and
the same sorted order gives every node's stage–area and stage–storage curve,
exact for the DEM, in one more pass.

Definitions
-----------
For a node ``N`` with spill elevation ``S`` (the level at which it meets a
sibling, or the depression's spill elevation for a top), its *region* is the
connected set of cells with elevation ``z < S`` that holds its pits (the
connectivity of the spill engine). A top's region is exactly its SpillResult
depression. At level ``h`` in ``[pit, S]``, ``area(h)`` is the area of the
region's cells with ``z < h`` and ``storage(h)`` is the sum over those cells of
``area * (h - z)``: storage is continuous, piecewise linear between the cell
elevations (slope ``area``), non-decreasing and convex.

References
----------
Barnes, R., Callaghan, K. L., Wickert, A. D. (2020). Computing water flow
through complex landscapes – Part 2: Finding hierarchies in depressions and
morphological segmentations. Earth Surface Dynamics 8, 431–445.
doi:10.5194/esurf-8-431-2020
Barnes, R., Lehman, C., Mulla, D. (2014). Priority-flood: An optimal
depression-filling and watershed-labeling algorithm for digital elevation
models. Computers & Geosciences 62, 117–127. doi:10.1016/j.cageo.2013.04.024
Kruskal, J. B. (1956). On the shortest spanning subtree of a graph and the
traveling salesman problem. Proceedings of the American Mathematical Society
7(1), 48–50.
"""

from __future__ import annotations

import dataclasses
import functools
import json
import math
from typing import TYPE_CHECKING

import numpy as np

from sillmark import SCREENING_CAUTION
from sillmark.products import _hierarchy_kernels
from sillmark.errors import InvalidParameter
from sillmark.engine.flood import DIRECTION_COL, DIRECTION_ROW, SpillResult
from sillmark.units import VerticalUnit

if TYPE_CHECKING:  # pragma: no cover
    from affine import Affine

    from sillmark.grid.dem import DEM

__all__ = [
    "DepressionHierarchy",
    "HierarchyTable",
    "StageCurve",
    "depression_hierarchy",
    "site_hierarchy",
]

_FOUR = np.array([1, 3, 4, 6])  # N, W, E, S among the eight flood-tree directions
#: Deepest tree :meth:`DepressionHierarchy.to_json` writes as nested objects.
MAX_NESTED_DEPTH = 400


@dataclasses.dataclass(frozen=True)
class HierarchyTable:
    """One row per node of the depression hierarchy (ids 1..n); columns are arrays.

    Ids run in post-order tree by tree, trees in the order of their SpillResult
    depression ids: children come before their parent, and the subtree of node
    ``v`` is the id range ``v - subtree_size[v] + 1 .. v``.

    Attributes
    ----------
    id : int32
    parent : int32
        Parent node, 0 for a top (a whole SpillResult depression).
    depression : int32
        SpillResult depression id the node lies in.
    is_leaf : bool
        True for a pit.
    subtree_size : int32
        Nodes in the subtree, the node included.
    pit_row, pit_col : int64
        Lowest cell of the node's region (first in row-major order on ties);
        for a leaf, the first cell of its pit.
    pit_elevation : float32
        Its elevation, in the site's vertical unit.
    merge_elevation : float32
        Level at which the children meet (the children's spill elevation);
        NaN for a leaf.
    spill_elevation : float32
        Level at which the node meets a sibling (merges into its parent), or,
        for a top, the depression's spill elevation.
    spill_row, spill_col : int64
        A cell at the spill elevation where the node's ground at or below that
        level first touches a sibling's; for a top, the SpillResult spill point.
    spill_x, spill_y : float64
        That cell's centre in the DEM's CRS (NaN without a transform).
    max_depth : float32
        ``spill_elevation - pit_elevation`` (always positive).
    cell_count : int64
        Cells of the region.
    area_m2 : float64
        Plan area of the region (the area at the spill elevation).
    volume_m3 : float64
        Storage at the spill elevation.
    children_start, children_ids
        Children of node ``v``: ``children_ids[children_start[v - 1]:children_start[v]]``,
        lowest pit first. Use :meth:`children`.
    """

    id: np.ndarray
    parent: np.ndarray
    depression: np.ndarray
    is_leaf: np.ndarray
    subtree_size: np.ndarray
    pit_row: np.ndarray
    pit_col: np.ndarray
    pit_elevation: np.ndarray
    merge_elevation: np.ndarray
    spill_elevation: np.ndarray
    spill_row: np.ndarray
    spill_col: np.ndarray
    spill_x: np.ndarray
    spill_y: np.ndarray
    max_depth: np.ndarray
    cell_count: np.ndarray
    area_m2: np.ndarray
    volume_m3: np.ndarray
    children_start: np.ndarray
    children_ids: np.ndarray

    def __len__(self) -> int:
        return int(self.id.shape[0])

    @property
    def columns(self) -> tuple[str, ...]:
        """Names of the per-node columns (the children lists excluded)."""
        return tuple(
            f.name for f in dataclasses.fields(self)
            if f.name not in ("children_start", "children_ids")
        )

    def children(self, node: int) -> np.ndarray:
        """Ids of the children of ``node`` (empty for a leaf), lowest pit first."""
        k = _node_index(node, len(self))
        return self.children_ids[self.children_start[k] : self.children_start[k + 1]].copy()

    def row(self, node: int) -> dict:
        """All columns of one node, and its children, as plain Python values.

        NaN (a leaf's merge elevation, a spill point without a transform) is
        given as ``None``.
        """
        k = _node_index(node, len(self))
        out = {name: _plain(getattr(self, name)[k]) for name in self.columns}
        out["children"] = [int(c) for c in self.children(node)]
        return out


@dataclasses.dataclass(frozen=True)
class StageCurve:
    """Stage–area and stage–storage of one node.

    From :meth:`DepressionHierarchy.curve` the elevations are the breakpoints:
    the node's pit, every distinct cell elevation of its region above it, and
    its spill elevation. ``area_m2[k]`` is the area of the region's cells
    strictly below ``elevation[k]`` and ``storage_m3[k]`` the storage at that
    level. Between breakpoints the curve is exact by linear interpolation of
    storage: for ``elevation[k] < h <= elevation[k + 1]``, the area is
    ``area_m2[k + 1]`` and the storage ``storage_m3[k] + area_m2[k + 1] * (h -
    elevation[k]) * metres`` (``metres`` converts the vertical unit).

    From :meth:`DepressionHierarchy.curve_at` the elevations are the levels
    asked for, with the exact area and storage there.
    """

    node: int
    elevation: np.ndarray
    area_m2: np.ndarray
    storage_m3: np.ndarray
    unit: VerticalUnit

    def __len__(self) -> int:
        return int(self.elevation.shape[0])


@dataclasses.dataclass(frozen=True)
class CurveSegments:
    """Every node's own piece of its curve, from which all curves are evaluated.

    Node ``v`` keeps breakpoints ``start[v]:start[v + 1]`` from its merge
    elevation (its pit for a leaf) to its spill elevation; its area and storage
    there include its children's totals. Below its merge elevation a node's
    curve is the sum of its children's. Each cell of a region appears in the
    segment of exactly one node, so the whole forest's curves take memory
    proportional to the depression cells, whatever the nesting depth.
    """

    start: np.ndarray
    elevation: np.ndarray
    area_m2: np.ndarray
    storage_m3: np.ndarray


@dataclasses.dataclass(frozen=True)
class RegionCells:
    """The depression cells sorted by elevation, and which node owns each.

    ``cells`` (flat row-major indices) and ``elevation`` run depression by
    depression, each in ascending elevation (row-major on ties). The positions
    (into ``cells``) owned by node ``v`` are ``positions[start[v]:start[v + 1]]``,
    ascending; those of a subtree are contiguous.
    """

    cells: np.ndarray
    elevation: np.ndarray
    positions: np.ndarray
    start: np.ndarray


@dataclasses.dataclass(frozen=True, eq=False)
class DepressionHierarchy:
    """The depression hierarchy of a site, with every node's stage curves.

    Attributes
    ----------
    nodes : HierarchyTable
    unit : VerticalUnit
        Vertical unit of the elevations.
    connectivity : int
        4 or 8, as in the spill engine's result.
    shape : (int, int)
        Grid shape.
    row_areas : float64 array
        Cell area per row, in m².
    segments : CurveSegments
    regions : RegionCells

    Notes
    -----
    Instances compare by identity.
    """

    nodes: HierarchyTable
    unit: VerticalUnit
    connectivity: int
    shape: tuple[int, int]
    row_areas: np.ndarray
    segments: CurveSegments
    regions: RegionCells

    def __len__(self) -> int:
        return len(self.nodes)

    @property
    def tops(self) -> np.ndarray:
        """Ids of the top nodes, in SpillResult depression order."""
        return self.nodes.id[self.nodes.parent == 0]

    @property
    def leaves(self) -> np.ndarray:
        """Ids of the leaves (pits)."""
        return self.nodes.id[self.nodes.is_leaf]

    def children(self, node: int) -> np.ndarray:
        """Ids of the children of ``node``, lowest pit first."""
        return self.nodes.children(node)

    def subtree(self, node: int) -> np.ndarray:
        """Ids of ``node`` and all nodes below it (ascending: children first)."""
        k = _node_index(node, len(self))
        return np.arange(k + 2 - self.nodes.subtree_size[k], k + 2, dtype=np.int32)

    def top_node(self, depression_id: int) -> int:
        """Id of the top node of SpillResult depression ``depression_id``."""
        tops = self.tops
        d = _integer(depression_id, "depression id")
        if not 1 <= d <= tops.shape[0]:
            raise InvalidParameter(
                f"no depression with id {depression_id}; ids run from 1 to {tops.shape[0]}"
            )
        return int(tops[d - 1])

    def _positions(self, node: int) -> np.ndarray:
        k = _node_index(node, len(self))
        first = k + 1 - int(self.nodes.subtree_size[k]) + 1
        r = self.regions
        return r.positions[r.start[first] : r.start[k + 2]]

    def region(self, node: int) -> tuple[np.ndarray, np.ndarray]:
        """Rows and columns of the cells of ``node``'s region, in row-major order."""
        flat = np.sort(self.regions.cells[self._positions(node)])
        cols = self.shape[1]
        return flat // cols, flat % cols

    def region_mask(self, node: int) -> np.ndarray:
        """Boolean grid, True on the cells of ``node``'s region."""
        mask = np.zeros(self.shape[0] * self.shape[1], dtype=bool)
        mask[self.regions.cells[self._positions(node)]] = True
        return mask.reshape(self.shape)

    def curve(self, node: int) -> StageCurve:
        """Breakpoints of ``node``'s stage–area and stage–storage curves.

        From the pit to the spill elevation; see :class:`StageCurve` for how to
        read them between breakpoints. Costs a sort of the region's cells.
        """
        k = _node_index(node, len(self))
        pos = np.sort(self._positions(node))
        r = self.regions
        areas = self.row_areas[r.cells[pos] // self.shape[1]]
        elev, area, storage = _hierarchy_kernels.full_curve(
            r.elevation[pos], areas, np.float32(self.nodes.pit_elevation[k]),
            np.float32(self.nodes.spill_elevation[k]),
        )
        return StageCurve(
            node=int(node), elevation=elev, area_m2=area,
            storage_m3=storage * self.unit.metres, unit=self.unit,
        )

    def curve_at(self, node: int, levels) -> StageCurve:
        """Exact area and storage of ``node`` at each of ``levels``.

        Parameters
        ----------
        node : int
        levels : float or array of float
            Water levels in the site's vertical unit, in any order.

        Returns
        -------
        StageCurve
            ``elevation`` holds the levels. Area and storage are 0 at and below
            the pit and NaN above the spill elevation (the node overflows there
            and is no longer a pool of its own).

        Notes
        -----
        Exact: storage is piecewise linear in the level between consecutive
        cell elevations, ``V(h) = V(z_k) + A_k (h - z_k)`` with ``A_k`` the area
        of the cells at or below ``z_k``. Evaluated from the stored segments, by
        a binary search in the segment of each node met on the way down.
        """
        k = _node_index(node, len(self))
        h = np.atleast_1d(np.asarray(levels, dtype=np.float64)) if _numeric(levels) else None
        if h is None or h.ndim != 1 or not np.all(np.isfinite(h)):
            raise InvalidParameter(
                f"levels must be finite numbers (a number or a 1-D list), not {levels!r}"
            )
        s = self.segments
        lo, spill, pit, child_start = self._tree_arrays
        area, storage = _hierarchy_kernels.curve_at(
            np.int32(k + 1), h, s.start, s.elevation, s.area_m2, s.storage_m3,
            lo, spill, pit, child_start, self.nodes.children_ids, np.float64(self.unit.metres),
        )
        return StageCurve(node=int(node), elevation=h, area_m2=area, storage_m3=storage,
                          unit=self.unit)

    def curves_at(self, level_start, levels) -> tuple[np.ndarray, np.ndarray]:
        """:meth:`curve_at` of every node at once, each node at its own levels.

        Parameters
        ----------
        level_start : array of int, length ``len(self) + 1``
            Node ``v``'s levels are ``levels[level_start[v - 1]:level_start[v]]``;
            starts at 0, never decreases, ends at ``len(levels)``.
        levels : 1-D array of float
            Finite water levels in the site's vertical unit.

        Returns
        -------
        (area_m2, storage_m3) : two float64 arrays as long as ``levels``
            The same values, bit for bit, as :meth:`curve_at` gives node by
            node; one compiled loop instead of one call per node.
        """
        start = np.asarray(level_start)
        h = np.asarray(levels, dtype=np.float64) if _numeric(levels) or np.size(levels) == 0 \
            else None
        if h is None or h.ndim != 1 or not np.all(np.isfinite(h)):
            raise InvalidParameter(f"levels must be a 1-D array of finite numbers, not {levels!r}")
        if (start.dtype.kind not in "iu" or start.shape != (len(self) + 1,) or start[0] != 0
                or start[-1] != h.shape[0] or np.any(np.diff(start) < 0)):
            raise InvalidParameter(
                f"level_start must be {len(self) + 1} non-decreasing whole numbers from 0 to "
                f"the number of levels ({h.shape[0]})")
        s = self.segments
        lo, spill, pit, child_start = self._tree_arrays
        return _hierarchy_kernels.curves_at(
            start.astype(np.int64), h, s.start, s.elevation, s.area_m2, s.storage_m3,
            lo, spill, pit, child_start, self.nodes.children_ids, np.float64(self.unit.metres),
        )

    @functools.cached_property
    def _tree_arrays(self) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """Per-node arrays indexed by one-based id, as the curve kernel takes them
        (computed once; the frozen dataclass keeps them in its ``__dict__``)."""
        t = self.nodes
        lo = np.where(t.is_leaf, t.pit_elevation, t.merge_elevation).astype(np.float64)
        return (
            _one_based(lo),
            _one_based(t.spill_elevation.astype(np.float64)),
            _one_based(t.pit_elevation.astype(np.float64)),
            _csr_start(t.children_start),
        )

    def to_json(self, *, nested: bool = False, indent: int | None = None) -> str:
        """The hierarchy as JSON text.

        Parameters
        ----------
        nested : bool, keyword-only
            False (default): ``"nodes"`` is a flat list, each node naming its
            ``parent`` and ``children`` by id. True: ``"depressions"`` lists the
            tops, each holding its children as objects, recursively.
        indent : int, optional
            Passed to :func:`json.dumps`.

        Notes
        -----
        Every node carries the columns of :class:`HierarchyTable` (numbers as
        plain ints and floats, NaN as null) and its list of children ids. The
        document opens with the screening caution, the units and the
        connectivity.
        """
        t = self.nodes
        flat = [t.row(v) for v in range(1, len(t) + 1)]
        doc = {
            "caution": SCREENING_CAUTION,
            "vertical_unit": self.unit.value,
            "area_unit": "m2",
            "volume_unit": "m3",
            "connectivity": self.connectivity,
            "node_count": len(t),
        }
        if not nested:
            doc["nodes"] = flat
        else:
            height = _tree_heights(t)
            if height.size and int(height.max()) > MAX_NESTED_DEPTH:
                raise InvalidParameter(
                    f"the hierarchy is {int(height.max())} levels deep, too deep for nested "
                    f"JSON (at most {MAX_NESTED_DEPTH}); use nested=False"
                )
            objects = [dict(row) for row in flat]
            for obj in objects:  # children before parents: ids are post-order
                obj["children"] = [objects[c - 1] for c in obj["children"]]
            doc["depressions"] = [objects[v - 1] for v in self.tops]
        return json.dumps(doc, indent=indent, allow_nan=False)


# --------------------------------------------------------------------------
# Building the hierarchy
# --------------------------------------------------------------------------


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
    return _hierarchy_of_cells(
        z, result.depression_id, table.spill_elevation, table.spill_row, table.spill_col,
        connectivity=int(result.connectivity), areas=areas, unit=unit, transform=transform,
    )


def _hierarchy_of_cells(
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
     n_old, top_of_dep) = _hierarchy_kernels.sweep(padded, zs, rank, offsets, dep_sorted, np.int64(n_dep))
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
    depression = np.zeros(n, dtype=np.int32)
    for d, top in enumerate(top_ids, start=1):
        depression[top - subtree_size[top - 1] : top] = d

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
    seg_start, seg_elev, seg_area, seg_storage, area_at_spill, storage_at_spill = _hierarchy_kernels.segments(
        cell_start, positions, zs, cell_area, _one_based(lo), _one_based(spill),
        _csr_start(children_start), children_ids,
    )
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


# --------------------------------------------------------------------------
# Helpers
# --------------------------------------------------------------------------


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


def _node_index(node, count: int) -> int:
    v = _integer(node, "node id")
    if not 1 <= v <= count:
        if count == 0:
            raise InvalidParameter(f"no node with id {node}; the hierarchy is empty")
        raise InvalidParameter(f"no node with id {node}; ids run from 1 to {count}")
    return v - 1


def _integer(value, what: str) -> int:
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, (int, np.integer)):
        raise InvalidParameter(f"the {what} must be a whole number, not {value!r}")
    return int(value)


def _numeric(levels) -> bool:
    try:
        arr = np.asarray(levels)
    except Exception:  # pragma: no cover - numpy accepts nearly anything
        return False
    return arr.dtype.kind in "iuf" and arr.size > 0


def _one_based(values: np.ndarray) -> np.ndarray:
    """Prepend a dummy entry so that node ``v`` is at index ``v``."""
    out = np.empty(values.shape[0] + 1, dtype=values.dtype)
    out[0] = 0
    out[1:] = values
    return out


def _csr_start(children_start: np.ndarray) -> np.ndarray:
    """``children_start`` re-indexed by one-based node id: node ``v``'s children
    are ``children_ids[out[v]:out[v + 1]]``."""
    return np.concatenate(([0], children_start)).astype(np.int64)


def _tree_heights(t: HierarchyTable) -> np.ndarray:
    height = np.zeros(len(t) + 1, dtype=np.int64)
    for v in range(1, len(t) + 1):  # post-order: children first
        p = int(t.parent[v - 1])
        if p:
            height[p] = max(height[p], height[v] + 1)
    return height[1:]


def _plain(value):
    v = value.item() if hasattr(value, "item") else value
    if isinstance(v, float) and math.isnan(v):
        return None
    return v
