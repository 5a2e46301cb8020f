"""Rows of the stage–area and stage–storage curves of a depression hierarchy, in linear time.

Each node of the depression hierarchy (Barnes, Callaghan & Wickert 2020) has
an exact, piecewise-linear stage–storage curve from its pit to its spill
elevation; its *breakpoints* are the distinct cell elevations of its region and
its spill elevation (see :class:`sillmark.products.hierarchy.StageCurve`). The
curves file gives each node's curve at its breakpoints when it has at most
``max_points`` of them, else at a fixed step spanning its depth (plus its pit,
merge and spill elevations). This module computes those rows in three steps,
each linear in the depression cells and the rows, whatever the nesting depth:

1. :func:`natural_counts`: how many rows each node has. The breakpoint sets
   are merged children first on a stack and dropped as soon as they pass
   ``max_points``, so a node costs at most about ``max_points`` per child plus
   its own cells.
2. :func:`choose_strides`: which rows are written. Only the *listed* nodes
   (e.g. the significant depressions) get rows, and at most ``max_rows`` in all:
   when the listed nodes' rows pass the cap, every node keeps its pit, merge
   and spill rows and every ``stride``-th row, ``stride`` the smallest power of
   two that brings it within one row budget shared by all nodes (the largest
   budget that fits the cap). Should even three rows a node pass the cap, the
   nodes with the largest volume keep theirs and the others are left out.
   Thinning at a larger stride keeps a subset of the rows of a smaller one, so
   rows thinned in pieces and thinned again give the rows thinned at once.
3. :func:`curve_rows`: the values. The rows of a depression are swept in
   ascending level together with its cells: each cell is added to a sum
   segment tree over the depression's node ids (post-order, so a node's
   subtree is an id range) once the level passes it, and a row of node ``v``
   at level ``h`` is the sum over ``v``'s subtree: the area of its region's
   cells below ``h`` and their area-weighted height. Cost ``O((cells + rows)
   log nodes)``, where summing each row's pools one by one would cost the
   nesting depth per row (about ``D²`` on a chain of ``D`` nested pools).

The values equal those of :meth:`sillmark.products.hierarchy.DepressionHierarchy.curves_at`
up to the rounding of a different order of summation (areas of equal cells
are exact; storage agrees to about 1e-12 of itself).

References
----------
Barnes, R., Callaghan, K. L., Wickert, A. D. (2020). Computing water flow
through complex landscapes – Part 2: Finding hierarchies in depressions and
morphological segmentations. Earth Surface Dynamics 8, 431–445.
doi:10.5194/esurf-8-431-2020
Bentley, J. L. (1977). Solutions to Klee's rectangle problems. Carnegie-Mellon
University, Department of Computer Science (the segment tree).
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np

from sillmark.errors import InvalidParameter
from sillmark.products import _hierarchy_curve_kernels as _kernels
from sillmark.products.hierarchy import DepressionHierarchy, csr_start, one_based

__all__ = [
    "CurveCounts",
    "CurveRows",
    "DEFAULT_MAX_CURVE_ROWS",
    "POINT_NAMES",
    "CurveThinning",
    "choose_strides",
    "curve_rows",
    "kept_mask",
    "kept_rows",
    "natural_counts",
    "plan_thinning",
    "stepped_levels",
    "strides",
    "thinning_summary",
]

#: Default cap on the rows of a site's curves file.
DEFAULT_MAX_CURVE_ROWS = 200_000
#: Names of the ``code`` values of :class:`CurveRows`.
POINT_NAMES = ("breakpoint", "step", "merge", "pit", "spill")
#: A stride past every row: only the pit, merge and spill rows stay.
_ONLY_FIXED = 1 << 40
_STRIDES = np.array([1 << j for j in range(10)] + [_ONLY_FIXED], dtype=np.int64)
#: Stepped nodes handled at once (bounds the memory of their levels).
_CHUNK = 1 << 12


@dataclasses.dataclass(frozen=True)
class CurveCounts:
    """Rows each node's curve has before any thinning (index ``v - 1`` for node ``v``).

    Attributes
    ----------
    rows : int64
        Breakpoints, or stepped levels for a node with more than the limit.
    merge_index : int64
        Index of the merge elevation among the node's rows, -1 for a leaf.
    stepped : bool
        True where the node is sampled at a step.
    """

    rows: np.ndarray
    merge_index: np.ndarray
    stepped: np.ndarray


@dataclasses.dataclass(frozen=True)
class CurveRows:
    """The rows of the curves, node by node (ascending id), each from pit to spill.

    Attributes
    ----------
    node : int32
        Node id (one-based, in the hierarchy given).
    index : int64
        Index of the row among the node's rows before thinning.
    level : float64
        Elevation in the vertical unit (a float32 value).
    area_m2 : float64
        Area of the node's region strictly below the level.
    storage_m3 : float64
        Water held with its surface at the level.
    code : int8
        Index into :data:`POINT_NAMES`.
    """

    node: np.ndarray
    index: np.ndarray
    level: np.ndarray
    area_m2: np.ndarray
    storage_m3: np.ndarray
    code: np.ndarray

    def __len__(self) -> int:
        return int(self.node.shape[0])


def _check_limits(max_points, step_rows) -> None:
    if isinstance(max_points, bool) or not isinstance(max_points, (int, np.integer)) \
            or max_points < 2:
        raise InvalidParameter(f"max_points must be a whole number of at least 2, not {max_points!r}")
    if isinstance(step_rows, bool) or not isinstance(step_rows, (int, np.integer)) or step_rows < 1:
        raise InvalidParameter(f"step_rows must be a positive whole number, not {step_rows!r}")


def _check_hierarchy(hierarchy) -> None:
    if not isinstance(hierarchy, DepressionHierarchy):
        raise InvalidParameter(f"expected a DepressionHierarchy, not {type(hierarchy).__name__}")


def _tree(hierarchy: DepressionHierarchy):
    t = hierarchy.nodes
    lo = np.where(t.is_leaf, t.pit_elevation, t.merge_elevation).astype(np.float64)
    return (one_based(lo), one_based(t.is_leaf.astype(np.bool_)), csr_start(t.children_start),
            t.children_ids)


def _breakpoints(hierarchy, max_points, emit_start, stride, out_level, out_index):
    lo, is_leaf, child_start, child_ids = _tree(hierarchy)
    r = hierarchy.regions
    return _kernels.breakpoint_sets(
        r.start, r.positions, r.elevation, child_start, child_ids, lo, is_leaf,
        np.int64(max_points), emit_start, stride, out_level, out_index)


# --------------------------------------------------------------------------- stepped nodes


def _nice_step(depth: float, steps: int) -> float:
    """Smallest of 1, 2, 5 times a power of ten that covers ``depth`` in at most ``steps``."""
    raw = depth / steps
    power = 10.0 ** math.floor(math.log10(raw))
    for factor in (1.0, 2.0, 5.0, 10.0):
        if factor * power >= raw:
            return factor * power
    return 10.0 * power  # pragma: no cover - the loop always returns


def stepped_levels(pit: np.ndarray, merge: np.ndarray, spill: np.ndarray,
                   steps: int) -> tuple[np.ndarray, np.ndarray]:
    """Levels of nodes sampled at a step: pit, spill, merge (if any) and the
    multiples of a round step strictly between pit and spill.

    The step is the smallest of 1, 2, 5 times a power of ten that spans the
    node's depth in at most ``steps`` steps; each multiple is rounded to the
    step's decimals plus one and to float32, so it prints as a round number.

    Parameters
    ----------
    pit, merge, spill : float arrays of one length
        Per node; ``merge`` NaN for a leaf.
    steps : int

    Returns
    -------
    (start, levels)
        Node ``k``'s levels are ``levels[start[k]:start[k + 1]]``, ascending,
        without repeats.
    """
    pit = np.asarray(pit, dtype=np.float64)
    spill = np.asarray(spill, dtype=np.float64)
    merge = np.asarray(merge, dtype=np.float64)
    n = pit.shape[0]
    step = np.empty(n)
    decimals = np.empty(n, dtype=np.int64)
    for k, (p, s) in enumerate(zip(pit.tolist(), spill.tolist())):
        st = _nice_step(s - p, steps)
        step[k] = st
        decimals[k] = max(0, -math.floor(math.log10(st)) + 1)
    k0 = np.ceil(pit / step)
    k1 = np.floor(spill / step)
    counts = np.maximum(k1 - k0 + 1, 0).astype(np.int64)
    owner = np.repeat(np.arange(n), counts)
    first = np.concatenate(([0], np.cumsum(counts)))[:-1]
    k = (k0[owner] + (np.arange(owner.shape[0]) - first[owner])).astype(np.float64)
    x = k * step[owner]
    rounded = np.empty_like(x)
    for d in np.unique(decimals).tolist():
        sel = decimals[owner] == d
        rounded[sel] = np.round(x[sel], d)
    level = np.float32(rounded).astype(np.float64)
    inside = (level > pit[owner]) & (level < spill[owner])
    owner, level = owner[inside], level[inside]
    has_merge = np.isfinite(merge)
    idx = np.arange(n)
    owner = np.concatenate((owner, idx, idx, idx[has_merge]))
    level = np.concatenate((level, pit, spill, merge[has_merge]))
    order = np.lexsort((level, owner))
    owner, level = owner[order], level[order]
    keep = np.ones(owner.shape[0], dtype=bool)
    keep[1:] = (owner[1:] != owner[:-1]) | (level[1:] != level[:-1])
    owner, level = owner[keep], level[keep]
    start = np.zeros(n + 1, dtype=np.int64)
    np.cumsum(np.bincount(owner, minlength=n), out=start[1:])
    return start, level


def _stepped_chunks(t, nodes: np.ndarray, steps: int):
    """:func:`stepped_levels` of ``nodes`` (zero-based), a chunk of nodes at a time."""
    for a in range(0, nodes.shape[0], _CHUNK):
        chunk = nodes[a:a + _CHUNK]
        start, levels = stepped_levels(t.pit_elevation[chunk], t.merge_elevation[chunk],
                                       t.spill_elevation[chunk], steps)
        yield chunk, start, levels


# --------------------------------------------------------------------------- the three steps


def natural_counts(hierarchy: DepressionHierarchy, *, max_points: int = 250,
                   step_rows: int = 100, listed: np.ndarray | None = None) -> CurveCounts:
    """Rows of every node's curve before thinning (step 1 of the module docstring).

    Parameters
    ----------
    hierarchy : DepressionHierarchy
    max_points : int, keyword-only
        A node with at most this many breakpoints gets them all.
    step_rows : int, keyword-only
        Most steps a node with more is sampled at.
    listed : bool array, optional, keyword-only
        The nodes that may get rows (one entry per node). A stepped node outside
        it is not sampled: its ``rows`` is 0 and its ``merge_index`` -1, which
        every later step reads as "no rows" (its stride is 0 anyway). On a survey
        DEM most stepped nodes are noise pits below the significance minimum,
        and sampling them cost most of this function's time. Default: every node.

    Returns
    -------
    CurveCounts

    Notes
    -----
    Time linear in the depression cells plus ``max_points`` per node; memory
    about 16 bytes per node and ``max_points`` per level of nesting.
    """
    _check_hierarchy(hierarchy)
    _check_limits(max_points, step_rows)
    chosen = None if listed is None else _listed_mask(listed, len(hierarchy.nodes))
    empty_i = np.empty(0, dtype=np.int64)
    count, merge_index = _breakpoints(hierarchy, max_points, empty_i, empty_i,
                                      np.empty(0), empty_i)
    rows, merge_index = count[1:].copy(), merge_index[1:].copy()
    stepped = rows < 0
    t = hierarchy.nodes
    sampled = stepped
    if chosen is not None:
        skipped = stepped & ~chosen
        rows[skipped], merge_index[skipped] = 0, -1
        sampled = stepped & chosen
    for chunk, start, levels in _stepped_chunks(t, np.flatnonzero(sampled), step_rows):
        rows[chunk] = np.diff(start)
        merge = t.merge_elevation[chunk].astype(np.float64)
        owner = np.repeat(np.arange(chunk.shape[0]), np.diff(start))
        hit = np.flatnonzero(levels == merge[owner])
        merge_index[chunk] = -1
        merge_index[chunk[owner[hit]]] = hit - start[owner[hit]]
    return CurveCounts(rows=rows, merge_index=merge_index, stepped=stepped)


def kept_rows(rows: np.ndarray, merge_index: np.ndarray, stride: np.ndarray) -> np.ndarray:
    """Rows a node keeps at ``stride``: its first and last, its merge row and
    every ``stride``-th (0 rows for stride 0)."""
    rows = np.asarray(rows, dtype=np.int64)
    merge_index = np.asarray(merge_index, dtype=np.int64)
    s = np.maximum(np.asarray(stride, dtype=np.int64), 1)
    kept = (rows - 1) // s + 1 + ((rows - 1) % s != 0)
    kept += (merge_index > 0) & (merge_index < rows - 1) & (merge_index % s != 0)
    return np.where(np.asarray(stride) > 0, kept, 0)


@dataclasses.dataclass(frozen=True)
class CurveThinning:
    """How a site's curve rows fit the cap (step 2 of the module docstring).

    Attributes
    ----------
    max_rows : int
        The cap.
    natural_rows : int
        Rows of the listed nodes before thinning.
    budget : int
        0: nothing thinned. Else each listed node keeps at most this many
        rows (its pit, merge and spill rows and every ``stride``-th, ``stride``
        the smallest power of two that fits).
    keep_volume, keep_id : float, int
        When even the pit, merge and spill rows of every listed node pass the
        cap (``budget`` is then 3): only the nodes with a larger volume than
        ``keep_volume``, or as large and an id at most ``keep_id`` (site ids),
        get rows. ``inf`` and 0 when every listed node gets rows.
    """

    max_rows: int
    natural_rows: int
    budget: int
    keep_volume: float = math.inf
    keep_id: int = 0

    @property
    def thinned(self) -> bool:
        return self.budget > 0

    @property
    def omits_nodes(self) -> bool:
        return self.keep_volume != math.inf


def _check_cap(max_rows) -> int:
    if isinstance(max_rows, bool) or not isinstance(max_rows, (int, np.integer)) or max_rows < 3:
        raise InvalidParameter(f"the cap on curve rows must be a whole number of at least 3, "
                               f"not {max_rows!r}")
    return int(max_rows)


def _listed_mask(listed, n: int) -> np.ndarray:
    if listed is None:
        return np.ones(n, dtype=bool)
    mask = np.asarray(listed)
    if mask.dtype != np.bool_ or mask.shape != (n,):
        raise InvalidParameter(f"listed must be a boolean array with one entry per node ({n}), "
                               f"not {mask.dtype} of shape {mask.shape}")
    return mask


def thinning_summary(counts: CurveCounts, volume: np.ndarray, listed: np.ndarray | None,
                     max_rows: int) -> dict:
    """What :func:`plan_thinning` needs of one piece of a site: small whatever its size.

    The listed nodes' distinct (rows, merge index) pairs with their numbers, and
    the nodes that would keep rows were only the largest volumes kept (at most
    ``max_rows / 2`` of them), with local ids.
    """
    cap = _check_cap(max_rows)
    chosen = np.flatnonzero(_listed_mask(listed, counts.rows.shape[0]))
    m = counts.rows[chosen]
    mi = counts.merge_index[chosen]
    pairs, weight = np.unique(np.stack([m, mi]), axis=1, return_counts=True) if chosen.size \
        else (np.zeros((2, 0), np.int64), np.zeros(0, np.int64))
    fixed = kept_rows(m, mi, np.full(m.shape, _ONLY_FIXED))
    order = np.lexsort((chosen, -np.asarray(volume, dtype=np.float64)[chosen]))
    fits = np.cumsum(fixed[order]) <= cap
    top = order[fits]
    return {"rows": pairs[0].astype(np.int64), "merge_index": pairs[1].astype(np.int64),
            "weight": weight.astype(np.int64),
            "top_volume": np.asarray(volume, dtype=np.float64)[chosen[top]],
            "top_id": (chosen[top] + 1).astype(np.int64), "top_fixed": fixed[top]}


def plan_thinning(summaries: list[dict], node_offsets, max_rows: int) -> CurveThinning:
    """The site's thinning from the summaries of its pieces (:func:`thinning_summary`),
    piece ``k``'s node ids shifted by ``node_offsets[k]``."""
    cap = _check_cap(max_rows)
    if summaries:
        m = np.concatenate([s["rows"] for s in summaries])
        mi = np.concatenate([s["merge_index"] for s in summaries])
        w = np.concatenate([s["weight"] for s in summaries])
    else:
        m = mi = w = np.zeros(0, np.int64)
    natural = int(np.dot(m, w))
    if natural <= cap:
        return CurveThinning(max_rows=cap, natural_rows=natural, budget=0)
    table = np.stack([kept_rows(m, mi, np.full(m.shape, s)) for s in _STRIDES.tolist()], axis=1)
    fixed = table[:, -1]
    if int(np.dot(fixed, w)) > cap:
        vol = np.concatenate([s["top_volume"] for s in summaries])
        ids = np.concatenate([s["top_id"] + int(o) for s, o in zip(summaries, node_offsets)])
        rows = np.concatenate([s["top_fixed"] for s in summaries])
        order = np.lexsort((ids, -vol))
        fits = order[np.cumsum(rows[order]) <= cap]
        last = fits[-1] if fits.size else None
        return CurveThinning(
            max_rows=cap, natural_rows=natural, budget=3,
            keep_volume=float(vol[last]) if last is not None else -math.inf,
            keep_id=int(ids[last]) if last is not None else 0)

    def total(budget: int) -> int:
        col = np.argmax(table <= budget, axis=1)
        return int(np.dot(table[np.arange(m.shape[0]), col], w))

    low, high = 3, int(m.max())  # low fits, high does not
    while high - low > 1:
        mid = (low + high) // 2
        if total(mid) <= cap:
            low = mid
        else:
            high = mid
    return CurveThinning(max_rows=cap, natural_rows=natural, budget=low)


def strides(counts: CurveCounts, volume: np.ndarray, listed: np.ndarray | None,
            thinning: CurveThinning, *, node_offset: int = 0) -> np.ndarray:
    """Stride of every node of a piece (0: no rows), its ids shifted by ``node_offset``."""
    n = counts.rows.shape[0]
    chosen = _listed_mask(listed, n)
    out = np.zeros(n, dtype=np.int64)
    if not thinning.thinned:
        out[chosen] = 1
        return out
    if thinning.omits_nodes:
        vol = np.asarray(volume, dtype=np.float64)
        ids = np.arange(1, n + 1) + node_offset
        chosen = chosen & ((vol > thinning.keep_volume)
                           | ((vol == thinning.keep_volume) & (ids <= thinning.keep_id)))
        out[chosen] = _ONLY_FIXED
        return out
    table = np.stack([kept_rows(counts.rows, counts.merge_index, np.full(n, s))
                      for s in _STRIDES.tolist()], axis=1)
    pick = _STRIDES[np.argmax(table <= thinning.budget, axis=1)]
    out[chosen] = pick[chosen]
    return out


def choose_strides(counts: CurveCounts, volume: np.ndarray, listed: np.ndarray | None,
                   max_rows: int) -> tuple[np.ndarray, CurveThinning]:
    """:func:`strides` of a whole site held in one hierarchy, and its thinning."""
    plan = plan_thinning([thinning_summary(counts, volume, listed, max_rows)], [0], max_rows)
    return strides(counts, volume, listed, plan), plan


def kept_mask(index: np.ndarray, node: np.ndarray, counts: CurveCounts,
              stride: np.ndarray) -> np.ndarray:
    """Which of rows (their index among their node's rows, their node id) stay at ``stride``
    (e.g. rows thinned for a piece, thinned again for the whole site)."""
    k = node - 1
    s = stride[k]
    m = counts.rows[k]
    mi = counts.merge_index[k]
    return (s > 0) & ((index == 0) | (index == m - 1) | (index == mi)
                      | (index % np.maximum(s, 1) == 0))


def curve_rows(hierarchy: DepressionHierarchy, counts: CurveCounts, stride: np.ndarray, *,
               max_points: int = 250, step_rows: int = 100) -> CurveRows:
    """Rows of the nodes with a stride, with exact area and storage (step 3).

    Parameters
    ----------
    hierarchy : DepressionHierarchy
    counts : CurveCounts
        Of this hierarchy, with the same ``max_points`` and ``step_rows``.
    stride : int array
        Per node, from :func:`choose_strides` (0: no rows).
    max_points, step_rows : int, keyword-only

    Returns
    -------
    CurveRows

    Notes
    -----
    Time ``O((cells + rows) log nodes)``; memory about 12 bytes per depression
    cell and 40 per row, plus the segment tree of the largest depression
    (16 bytes per node).
    """
    _check_hierarchy(hierarchy)
    _check_limits(max_points, step_rows)
    t = hierarchy.nodes
    n = len(t)
    stride = np.asarray(stride, dtype=np.int64)
    if stride.shape != (n,) or np.any(stride < 0) or counts.rows.shape != (n,):
        raise InvalidParameter(f"stride and counts must hold one entry per node ({n})")
    kept = kept_rows(counts.rows, counts.merge_index, stride)
    start = np.zeros(n + 1, dtype=np.int64)
    np.cumsum(kept, out=start[1:])
    total = int(start[-1])
    level = np.empty(total, dtype=np.float64)
    index = np.empty(total, dtype=np.int64)

    # Breakpoint nodes: every kept row but the spill from the kernel.
    emit_stride = np.where(counts.stepped, 0, stride)
    _breakpoints(hierarchy, max_points, one_based(start[:-1]), one_based(emit_stride),
                 level, index)
    ends = start[1:] - 1
    full = (~counts.stepped) & (kept > 0)
    level[ends[full]] = t.spill_elevation[full].astype(np.float64)
    index[ends[full]] = counts.rows[full] - 1
    # Stepped nodes: their levels, thinned.
    chosen = np.flatnonzero(counts.stepped & (kept > 0))
    for chunk, cstart, clevels in _stepped_chunks(t, chosen, step_rows):
        sizes = np.diff(cstart)
        owner = np.repeat(np.arange(chunk.shape[0]), sizes)
        k = np.arange(clevels.shape[0]) - cstart[owner]
        s = stride[chunk][owner]
        keep = (k == 0) | (k == sizes[owner] - 1) | (k == counts.merge_index[chunk][owner]) \
            | (k % s == 0)
        owner, k = owner[keep], k[keep]
        dest = start[chunk][owner] + (np.arange(owner.shape[0])
                                      - np.concatenate(([0], np.cumsum(kept[chunk])))[owner])
        level[dest] = clevels[keep]
        index[dest] = k

    node = np.repeat(np.arange(1, n + 1, dtype=np.int32), kept)
    area, storage = _values(hierarchy, node, level)
    code = np.repeat(counts.stepped.astype(np.int8), kept)
    merge = np.repeat(t.merge_elevation.astype(np.float64), kept)
    code[level == merge] = 2  # NaN merges (leaves) match nothing
    code[start[:-1][kept > 0]] = 3
    code[ends[kept > 0]] = 4
    return CurveRows(node=node, index=index, level=level, area_m2=area, storage_m3=storage,
                     code=code)


def _values(hierarchy: DepressionHierarchy, node: np.ndarray, level: np.ndarray):
    """Area and storage of node ``node[k]`` at ``level[k]``, every row at once."""
    t = hierarchy.nodes
    r = hierarchy.regions
    n = len(t)
    area = np.empty(level.shape[0], dtype=np.float64)
    storage = np.empty(level.shape[0], dtype=np.float64)
    if level.shape[0] == 0:
        return area, storage
    n_dep = int(t.depression.max())
    dep_of_node = one_based(t.depression.astype(np.int64))
    owner = _kernels.position_owner(r.start, r.positions, np.int64(r.cells.shape[0]))
    dep_pos_start = np.zeros(n_dep + 1, dtype=np.int64)
    np.cumsum(np.bincount(dep_of_node[owner], minlength=n_dep + 1)[1:], out=dep_pos_start[1:])
    dep_node_start = np.ones(n_dep + 1, dtype=np.int64)
    np.cumsum(np.bincount(t.depression, minlength=n_dep + 1)[1:], out=dep_node_start[1:])
    dep_node_start[1:] += 1
    first = one_based((np.arange(1, n + 1) - t.subtree_size + 1).astype(np.int64))
    cell_area = hierarchy.row_areas[r.cells // hierarchy.shape[1]]
    order = np.lexsort((level, dep_of_node[node]))
    _kernels.evaluate(order, node, level, first, dep_of_node, owner, r.elevation, cell_area,
                      dep_pos_start, dep_node_start, np.float64(hierarchy.unit.metres),
                      area, storage)
    return area, storage
