"""The depression hierarchy and exact stage–area / stage–storage curves of its nodes.

Depressions nest: as the water level rises inside a depression, the pools in
its separate pits grow, meet at saddles and merge, until the whole depression
spills to the outlets. The *depression hierarchy* (Barnes, Callaghan & Wickert
2020) records this as a forest: the leaves are the pits, each internal node is
the pool formed when its children meet at a saddle, and the top of each tree is
one depression of :class:`sillmark.engine.flood.SpillResult`, spilling at its spill
elevation.

This module holds the hierarchy and its queries; :mod:`sillmark.products.hierarchy_sweep`
builds it. It is computed from the spill engine's result by one union-find sweep over the
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

import numpy as np

from sillmark import SCREENING_CAUTION
from sillmark.errors import InvalidParameter
from sillmark.products import _hierarchy_kernels
from sillmark.units import VerticalUnit

__all__ = [
    "DepressionHierarchy",
    "HierarchyTable",
    "StageCurve",
]

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
        self._check_segments()
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
        self._check_segments()
        s = self.segments
        lo, spill, pit, child_start = self._tree_arrays
        return _hierarchy_kernels.curves_at(
            start.astype(np.int64), h, s.start, s.elevation, s.area_m2, s.storage_m3,
            lo, spill, pit, child_start, self.nodes.children_ids, np.float64(self.unit.metres),
        )

    def _check_segments(self) -> None:
        if len(self) and self.segments.elevation.shape[0] == 0:
            raise InvalidParameter("this hierarchy was built without its curve segments "
                                   "(segments=False); build it with them to evaluate curves")

    @functools.cached_property
    def _tree_arrays(self) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """Per-node arrays indexed by one-based id, as the curve kernel takes them
        (computed once; the frozen dataclass keeps them in its ``__dict__``)."""
        t = self.nodes
        lo = np.where(t.is_leaf, t.pit_elevation, t.merge_elevation).astype(np.float64)
        return (
            one_based(lo),
            one_based(t.spill_elevation.astype(np.float64)),
            one_based(t.pit_elevation.astype(np.float64)),
            csr_start(t.children_start),
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
# Helpers
# --------------------------------------------------------------------------


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


def one_based(values: np.ndarray) -> np.ndarray:
    """Prepend a dummy entry so that node ``v`` is at index ``v``."""
    out = np.empty(values.shape[0] + 1, dtype=values.dtype)
    out[0] = 0
    out[1:] = values
    return out


def csr_start(children_start: np.ndarray) -> np.ndarray:
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
