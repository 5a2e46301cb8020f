"""Compiled loops of the depression hierarchy (private; see :mod:`sillmark.products.hierarchy`).

The kernels trust their inputs: :func:`sillmark.products.hierarchy_sweep.depression_hierarchy`
selects the depression cells, sorts them, pads the grid and checks every
precondition before calling them. Each loop is a plain Python function compiled
once at the bottom of the module, so the same code runs with
``NUMBA_DISABLE_JIT=1`` (or through ``.py_func``) for debugging and coverage.

Layout shared by the kernels
----------------------------
``cells``  int64: flat indices of the depression cells in a grid padded by one
           cell on every side (``width = cols + 2``), depression by depression,
           and within each by elevation and then index (row-major on ties).
``zs``     float32: their elevations, in the same order (ascending within a
           depression).
``rank``   int32, padded grid: the position of a depression cell in ``cells``,
           -1 on every other cell (padding, nodata, cells in no depression).
Positions in ``cells`` double as union-find elements; the root of a component
is always its lowest position, so it is the component's lowest cell.

Node arrays before renumbering are indexed 0..n-1 in order of creation.
"""

from __future__ import annotations

import numpy as np
from numba import njit, prange


def _find(parent, a):
    """Union-find root with path halving (Tarjan & van Leeuwen 1984)."""
    while parent[a] != a:
        parent[a] = parent[parent[a]]
        a = parent[a]
    return a


def _grown_i32(values, count, fill):
    if count < values.shape[0]:
        return values
    bigger = np.full(values.shape[0] * 2, fill, dtype=values.dtype)
    bigger[:count] = values[:count]
    return bigger


def _grown_i64(values, count, fill):
    if count < values.shape[0]:
        return values
    bigger = np.full(values.shape[0] * 2, fill, dtype=values.dtype)
    bigger[:count] = values[:count]
    return bigger


def _grown_f32(values, count):
    if count < values.shape[0]:
        return values
    bigger = np.zeros(values.shape[0] * 2, dtype=values.dtype)
    bigger[:count] = values[:count]
    return bigger


def _grown_u8(values, count):
    if count < values.shape[0]:
        return values
    bigger = np.zeros(values.shape[0] * 2, dtype=values.dtype)
    bigger[:count] = values[:count]
    return bigger


def _sweep(cells, zs, rank, offsets, dep_sorted, n_dep, k0, k1, uf, comp_node, owner):
    """Merge tree of the depression cells ``k0:k1`` by a union-find sweep in elevation order.

    Cells are added in ascending elevation; a cell joins the components of its
    neighbours already added (Kruskal's algorithm on the grid graph whose edge
    weight is the higher elevation of its two cells). All cells of one elevation
    ``e`` form a batch. A component *holds water* at ``e`` when its lowest cell
    is below ``e``. When two or more components that hold water meet during the
    batch at ``e``, one internal node with merge elevation ``e`` takes them all
    as children (merges at the same elevation are not split into a binary
    cascade). A component that does not hold water yet (a flat at ``e``) is
    absorbed without a node. At the end of a batch, every component still
    without a node gets a leaf: that is a pit (a plateau with no lower
    neighbour), its lowest cell the first of the component.

    Fills ``owner[k0:k1]`` (the node whose own cells include each sorted cell:
    the node current for its component at the end of its batch) and returns the
    node arrays
    (``lo``: elevation from which the node is one body of water; ``internal``;
    ``parent`` (-1 none), ``alias`` (a node merged into another at the same
    elevation points to it), ``pit_pos`` (position of the lowest cell),
    ``spill_cell`` (padded flat index where the node first met another one,
    -1 for none yet)), the node count, and the top node of each depression.

    Positions ``k0:k1`` hold whole depressions, and depressions never touch,
    so ranges that split the cells at depression boundaries can be swept at
    the same time: each writes only its own entries of the shared per-cell
    arrays ``uf`` (``arange``), ``comp_node`` (-1) and ``owner``, and numbers
    its own nodes from 0 (the caller shifts them). A neighbour outside the
    range is never joined.
    """
    n_off = offsets.shape[0]

    cap = 1024
    lo = np.zeros(cap, dtype=np.float32)
    internal = np.zeros(cap, dtype=np.uint8)
    parent = np.full(cap, -1, dtype=np.int32)
    alias = np.full(cap, -1, dtype=np.int32)
    pit_pos = np.full(cap, -1, dtype=np.int32)
    spill_cell = np.full(cap, -1, dtype=np.int64)
    n_nodes = 0

    i = k0
    while i < k1:
        e = zs[i]
        j = i
        while j < k1 and zs[j] == e:
            j += 1
        for k in range(i, j):
            c = cells[k]
            rk = np.int32(k)  # root of the new cell's component, kept current
            for t in range(n_off):
                q = rank[c + offsets[t]]
                if q < k0 or q >= k:
                    continue
                rq = _find(uf, q)
                if rq == rk:
                    continue
                if rq < rk:
                    ra, rb = rq, rk
                else:
                    ra, rb = rk, rq
                rk = ra
                # ra is the older root (its lowest cell is lower or equal) and stays.
                uf[rb] = ra
                if zs[rb] < e:
                    # Both components hold water: they merge at e.
                    na = comp_node[ra]
                    nb = comp_node[rb]
                    a_new = internal[na] == 1 and lo[na] == e
                    b_new = internal[nb] == 1 and lo[nb] == e
                    if a_new and b_new:
                        alias[nb] = na
                        res = na
                    elif a_new:
                        parent[nb] = na
                        spill_cell[nb] = c
                        res = na
                    elif b_new:
                        parent[na] = nb
                        spill_cell[na] = c
                        res = nb
                    else:
                        lo = _grown_f32(lo, n_nodes)
                        internal = _grown_u8(internal, n_nodes)
                        parent = _grown_i32(parent, n_nodes, -1)
                        alias = _grown_i32(alias, n_nodes, -1)
                        pit_pos = _grown_i32(pit_pos, n_nodes, -1)
                        spill_cell = _grown_i64(spill_cell, n_nodes, -1)
                        res = np.int32(n_nodes)
                        n_nodes += 1
                        lo[res] = e
                        internal[res] = 1
                        alias[res] = res
                        parent[na] = res
                        parent[nb] = res
                        spill_cell[na] = c
                        spill_cell[nb] = c
                    pit_pos[res] = ra
                    comp_node[ra] = res
                # Otherwise rb is a flat at e (no water yet) and ra keeps its node
                # (or, when ra is a flat at e as well, neither has one).
        for k in range(i, j):
            r = _find(uf, np.int32(k))
            nd = comp_node[r]
            if nd < 0:
                lo = _grown_f32(lo, n_nodes)
                internal = _grown_u8(internal, n_nodes)
                parent = _grown_i32(parent, n_nodes, -1)
                alias = _grown_i32(alias, n_nodes, -1)
                pit_pos = _grown_i32(pit_pos, n_nodes, -1)
                spill_cell = _grown_i64(spill_cell, n_nodes, -1)
                nd = np.int32(n_nodes)
                n_nodes += 1
                lo[nd] = e
                internal[nd] = 0
                alias[nd] = nd
                pit_pos[nd] = r
                comp_node[r] = nd
            owner[k] = nd
        i = j

    top_of_dep = np.full(n_dep + 1, -1, dtype=np.int32)
    for k in range(k0, k1):
        d = dep_sorted[k]
        if top_of_dep[d] < 0:
            top_of_dep[d] = comp_node[_find(uf, np.int32(k))]
    # Resolve parents through aliases (nodes merged into a sibling born at the
    # same elevation).
    for x in range(n_nodes):
        p = parent[x]
        while p >= 0 and alias[p] != p:
            p = alias[p]
        parent[x] = p
    for k in range(k0, k1):
        nd = owner[k]
        while alias[nd] != nd:
            nd = alias[nd]
        owner[k] = nd
    return (
        lo[:n_nodes],
        internal[:n_nodes],
        parent[:n_nodes],
        alias[:n_nodes],
        pit_pos[:n_nodes],
        spill_cell[:n_nodes],
        n_nodes,
        top_of_dep,
    )


def _postorder(tops, child_start, child_ids, n_nodes):
    """New ids 1..n in post-order, tree by tree in the order of ``tops``.

    Children come before their parent, so a node's subtree is the contiguous id
    range ``[id - size + 1, id]``. ``child_ids[child_start[x]:child_start[x+1]]``
    are the children of old node ``x``, in the order they are to be numbered.
    Returns ``new_id`` (0 for nodes in no tree) and ``size`` (per old node).
    """
    new_id = np.zeros(n_nodes, dtype=np.int32)
    size = np.ones(n_nodes, dtype=np.int32)
    stack = np.empty(64, dtype=np.int32)
    nxt = np.zeros(n_nodes, dtype=np.int32)
    count = 0
    for t in range(tops.shape[0]):
        depth = 0
        stack[0] = tops[t]
        depth = 1
        while depth > 0:
            x = stack[depth - 1]
            k = child_start[x] + nxt[x]
            if k < child_start[x + 1]:
                nxt[x] += 1
                if depth == stack.shape[0]:
                    bigger = np.empty(stack.shape[0] * 2, dtype=np.int32)
                    bigger[:depth] = stack[:depth]
                    stack = bigger
                stack[depth] = child_ids[k]
                depth += 1
            else:
                count += 1
                new_id[x] = count
                depth -= 1
                if depth > 0:
                    size[stack[depth - 1]] += size[x]
    return new_id, size


def _group_stable(group, n_groups):
    """Stable order of items by group id (0..n_groups): a counting sort."""
    start = np.zeros(n_groups + 2, dtype=np.int64)
    for k in range(group.shape[0]):
        start[group[k] + 1] += 1
    for g in range(1, n_groups + 2):
        start[g] += start[g - 1]
    order = np.empty(group.shape[0], dtype=np.int64)
    for k in range(group.shape[0]):
        g = group[k]
        order[start[g]] = k
        start[g] += 1
    return order


def _ordered_bits(bits):
    """The float32 bits ``bits`` (with -0.0 made +0.0) as an unsigned integer of the
    same order as the float: negative values flipped whole, positive ones given the
    top bit."""
    if bits & np.uint32(0x80000000):
        return bits ^ np.uint32(0xFFFFFFFF)
    return bits | np.uint32(0x80000000)


#: Groups of at least this many cells are sorted by radix (:func:`_radix_group`);
#: smaller ones by comparison, in parallel.
RADIX_GROUP_CELLS = 1 << 15


def _radix_group(zbits, group_order, a, b, out):
    """Positions ``group_order[a:b]`` (ascending) into ``out[a:b]`` by elevation, ties in
    position order: a stable least-significant-digit radix sort (11-bit digits) of
    the elevations' ordered bits less the group's lowest, so a group spanning a few
    metres of relief takes two passes. One group of a survey DEM can hold half its
    depression cells, and the comparison sort took it on one thread alone.
    """
    n = b - a
    keys = np.empty(n, dtype=np.uint32)
    items = np.empty(n, dtype=np.int64)
    low = np.uint32(0xFFFFFFFF)
    high = np.uint32(0)
    for k in range(n):
        p = group_order[a + k]
        key = _ordered_bits(zbits[p])
        keys[k] = key
        items[k] = p
        low = min(low, key)
        high = max(high, key)
    for k in range(n):
        keys[k] -= low
    span = high - low
    spare_keys = np.empty(n, dtype=np.uint32)
    spare_items = np.empty(n, dtype=np.int64)
    count = np.empty(2049, dtype=np.int64)
    shift = np.uint32(0)
    while shift < np.uint32(32) and (span >> shift) > np.uint32(0):
        count[:] = 0
        for k in range(n):
            count[((keys[k] >> shift) & np.uint32(2047)) + 1] += 1
        for d in range(1, 2049):
            count[d] += count[d - 1]
        for k in range(n):
            d = (keys[k] >> shift) & np.uint32(2047)
            at = count[d]
            spare_keys[at] = keys[k]
            spare_items[at] = items[k]
            count[d] = at + 1
        keys, spare_keys = spare_keys, keys
        items, spare_items = spare_items, items
        shift += np.uint32(11)
    for k in range(n):
        out[a + k] = items[k]


def _sort_within_groups(zbits, group_order, group_start):
    """Within each group of ``group_order``, sort positions by (elevation, position).

    ``zbits`` are the float32 elevations' bits (with -0.0 made +0.0);
    ``group_order`` holds each group's positions in ascending order. Groups of
    fewer than :data:`RADIX_GROUP_CELLS` cells are sorted on their own, in
    parallel: one 64-bit key per cell, the order-preserving integer image of the
    elevation above the position. Larger groups are sorted one after another by
    :func:`_radix_group` (the same order).
    """
    n = group_order.shape[0]
    out = np.empty(n, dtype=np.int64)
    n_groups = group_start.shape[0] - 1
    for g in range(n_groups):
        if group_start[g + 1] - group_start[g] >= RADIX_GROUP_CELLS:
            _radix_group(zbits, group_order, group_start[g], group_start[g + 1], out)
    for g in prange(n_groups):
        a = group_start[g]
        b = group_start[g + 1]
        if b <= a or b - a >= RADIX_GROUP_CELLS:
            continue
        keys = np.empty(b - a, dtype=np.uint64)
        for k in range(a, b):
            p = group_order[k]
            keys[k - a] = (np.uint64(_ordered_bits(zbits[p])) << np.uint64(32)) | np.uint64(p)
        keys.sort()
        for k in range(a, b):
            out[k] = np.int64(keys[k - a] & np.uint64(0xFFFFFFFF))
    return out


def _bucket(owner, n_nodes):
    """Stable counting sort of positions by owner (ids 1..n_nodes).

    Returns ``start`` (n_nodes + 2; the cells of node ``v`` are
    ``order[start[v]:start[v + 1]]``) and ``order``; within a node the positions
    keep their ascending (elevation, index) order.
    """
    start = np.zeros(n_nodes + 2, dtype=np.int64)
    for k in range(owner.shape[0]):
        start[owner[k] + 1] += 1
    for v in range(1, n_nodes + 2):
        start[v] += start[v - 1]
    fill = start.copy()
    order = np.empty(owner.shape[0], dtype=np.int64)
    for k in range(owner.shape[0]):
        v = owner[k]
        order[fill[v]] = k
        fill[v] += 1
    return start, order


def _breakpoints(zs, areas, lo, spill, area0, storage0, elev, area, storage, out):
    """Write the breakpoints of one stage curve from ``lo`` to ``spill``.

    ``zs`` (ascending, all in ``[lo, spill)``) and ``areas`` are the cells added
    on the way; ``area0`` and ``storage0`` are the area below ``lo`` and the
    storage at ``lo`` already present (children, for an internal node). Each
    breakpoint ``b`` gets the area of cells strictly below ``b`` and the storage
    at ``b``; between breakpoints storage grows linearly with the area of the
    next breakpoint as slope. Returns the index after the last one written.
    """
    a = area0
    v = storage0
    b = np.float64(lo)
    elev[out] = b
    area[out] = a
    storage[out] = v
    out += 1
    for k in range(zs.shape[0]):
        zk = np.float64(zs[k])
        if zk > b:
            v += a * (zk - b)
            b = zk
            elev[out] = b
            area[out] = a
            storage[out] = v
            out += 1
        a += areas[k]
    top = np.float64(spill)
    v += a * (top - b)
    elev[out] = top
    area[out] = a
    storage[out] = v
    return out + 1


def _segments(cell_start, order, zs, cell_area, lo, spill, child_start, child_ids):
    """Own stage-curve segment of every node, children before parents.

    Node ``v`` (ids 1..n in post-order) owns the cells ``order[cell_start[v]:
    cell_start[v+1]]``, all with ``lo[v] <= z < spill[v]``; its segment runs from
    ``lo[v]`` (its pit for a leaf, its children's spill elevation otherwise),
    starting from the children's totals, to ``spill[v]``.

    Returns ``seg_start`` (n + 2), breakpoint ``elevation``, ``area`` (of cells
    strictly below the breakpoint) and ``storage`` (area x depth, in m² times
    the vertical unit), and per node the total area and storage at its spill.
    """
    n = lo.shape[0] - 1
    total = order.shape[0] + 2 * n
    elev = np.empty(total, dtype=np.float64)
    area = np.empty(total, dtype=np.float64)
    storage = np.empty(total, dtype=np.float64)
    seg_start = np.zeros(n + 2, dtype=np.int64)
    area_at_spill = np.zeros(n + 1, dtype=np.float64)
    storage_at_spill = np.zeros(n + 1, dtype=np.float64)
    out = 0
    for v in range(1, n + 1):
        a0 = 0.0
        v0 = 0.0
        for k in range(child_start[v], child_start[v + 1]):
            ch = child_ids[k]
            a0 += area_at_spill[ch]
            v0 += storage_at_spill[ch]
        s0 = cell_start[v]
        s1 = cell_start[v + 1]
        mine = order[s0:s1]
        seg_start[v] = out
        out = _breakpoints(
            zs[mine], cell_area[mine], lo[v], spill[v], a0, v0, elev, area, storage, out
        )
        area_at_spill[v] = area[out - 1]
        storage_at_spill[v] = storage[out - 1]
    seg_start[n + 1] = out
    return (
        seg_start,
        elev[:out],
        area[:out],
        storage[:out],
        area_at_spill,
        storage_at_spill,
    )


def _totals(cell_start, order, zs, cell_area, lo, spill, child_start, child_ids):
    """Per node, the area and storage at its spill elevation: :func:`_segments`'s
    last breakpoint of each node, by the same operations in the same order (so the
    same bits), without keeping the breakpoints."""
    n = lo.shape[0] - 1
    area_at_spill = np.zeros(n + 1, dtype=np.float64)
    storage_at_spill = np.zeros(n + 1, dtype=np.float64)
    for v in range(1, n + 1):
        a = 0.0
        w = 0.0
        for k in range(child_start[v], child_start[v + 1]):
            ch = child_ids[k]
            a += area_at_spill[ch]
            w += storage_at_spill[ch]
        b = np.float64(lo[v])
        for k in range(cell_start[v], cell_start[v + 1]):
            p = order[k]
            zk = np.float64(zs[p])
            if zk > b:
                w += a * (zk - b)
                b = zk
            a += cell_area[p]
        w += a * (np.float64(spill[v]) - b)
        area_at_spill[v] = a
        storage_at_spill[v] = w
    return area_at_spill, storage_at_spill


def _segment_value(elev, area, storage, s0, s1, h, metres):
    """Area and storage of one own segment at level ``h`` (``elev[s0] <= h <= elev[s1-1]``).

    ``metres`` converts a depth in the vertical unit to metres (storage in m³).
    """
    lo_i = s0
    hi_i = s1
    # Last breakpoint <= h.
    while hi_i - lo_i > 1:
        mid = (lo_i + hi_i) >> 1
        if elev[mid] <= h:
            lo_i = mid
        else:
            hi_i = mid
    k = lo_i
    if elev[k] == h or k + 1 >= s1:
        return area[k], storage[k]
    return area[k + 1], storage[k] + area[k + 1] * (h - elev[k]) * metres


def _curve_at(node, levels, seg_start, elev, area, storage, lo, spill, pit, child_start,
              child_ids, metres):
    """Area and storage of ``node`` at each level: exact, by its own segment and,
    below its merge elevation, the sum of its children's (recursively).

    NaN above the node's spill elevation; 0 at and below its pit.
    """
    n_levels = levels.shape[0]
    out_area = np.empty(n_levels, dtype=np.float64)
    out_storage = np.empty(n_levels, dtype=np.float64)
    stack = np.empty(64, dtype=np.int32)
    for i in range(n_levels):
        h = levels[i]
        if not (h <= spill[node]):
            out_area[i] = np.nan
            out_storage[i] = np.nan
            continue
        ta = 0.0
        tv = 0.0
        stack[0] = node
        depth = 1
        while depth > 0:
            depth -= 1
            d = stack[depth]
            if h >= lo[d]:
                a, v = _segment_value(
                    elev, area, storage, seg_start[d], seg_start[d + 1], h, metres
                )
                ta += a
                tv += v
            elif h > pit[d]:
                for k in range(child_start[d], child_start[d + 1]):
                    if depth == stack.shape[0]:
                        bigger = np.empty(stack.shape[0] * 2, dtype=np.int32)
                        bigger[:depth] = stack[:depth]
                        stack = bigger
                    stack[depth] = child_ids[k]
                    depth += 1
        out_area[i] = ta
        out_storage[i] = tv
    return out_area, out_storage


def _curves_at(level_start, levels, seg_start, elev, area, storage, lo, spill, pit,
               child_start, child_ids, metres):
    """:func:`_curve_at` of every node ``v`` (1..n) at its own levels
    ``levels[level_start[v - 1]:level_start[v]]``, into two arrays as long as
    ``levels``: one call for a whole hierarchy instead of one per node."""
    out_area = np.empty(levels.shape[0], dtype=np.float64)
    out_storage = np.empty(levels.shape[0], dtype=np.float64)
    for v in range(1, level_start.shape[0]):
        i0 = level_start[v - 1]
        i1 = level_start[v]
        a, s = curve_at(np.int32(v), levels[i0:i1], seg_start, elev, area, storage, lo, spill,
                        pit, child_start, child_ids, metres)
        out_area[i0:i1] = a
        out_storage[i0:i1] = s
    return out_area, out_storage


def _full_curve(zs, areas, lo, spill):
    """Breakpoints of a whole curve from the cells of a region (``zs`` ascending)."""
    total = zs.shape[0] + 2
    elev = np.empty(total, dtype=np.float64)
    area = np.empty(total, dtype=np.float64)
    storage = np.empty(total, dtype=np.float64)
    out = _breakpoints(zs, areas, lo, spill, 0.0, 0.0, elev, area, storage, 0)
    return elev[:out], area[:out], storage[:out]


_find = njit(inline="always", cache=True)(_find)
_grown_i32 = njit(nogil=True, cache=True)(_grown_i32)
_grown_i64 = njit(nogil=True, cache=True)(_grown_i64)
_grown_f32 = njit(nogil=True, cache=True)(_grown_f32)
_grown_u8 = njit(nogil=True, cache=True)(_grown_u8)
_breakpoints = njit(nogil=True, cache=True)(_breakpoints)
_segment_value = njit(inline="always", cache=True)(_segment_value)
sweep = njit(nogil=True, cache=True)(_sweep)
postorder = njit(nogil=True, cache=True)(_postorder)
bucket = njit(nogil=True, cache=True)(_bucket)
group_stable = njit(nogil=True, cache=True)(_group_stable)
_ordered_bits = njit(inline="always", cache=True)(_ordered_bits)
_radix_group = njit(nogil=True, cache=True)(_radix_group)
sort_within_groups = njit(parallel=True, nogil=True, cache=True)(_sort_within_groups)
segments = njit(nogil=True, cache=True)(_segments)
totals = njit(nogil=True, cache=True)(_totals)
curve_at = njit(nogil=True, cache=True)(_curve_at)
curves_at = njit(nogil=True, cache=True)(_curves_at)
full_curve = njit(nogil=True, cache=True)(_full_curve)
