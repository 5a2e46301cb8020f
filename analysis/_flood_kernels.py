"""Compiled loops of the spill engine (private; see :mod:`analysis.flood`).

The kernels trust their inputs. :func:`analysis.flood.priority_flood` pads the
grid, checks every precondition and hands flat arrays over. Each loop is a plain
Python function compiled once at the bottom of the module, so the same code runs
with ``NUMBA_DISABLE_JIT=1`` for debugging.

Layout shared by all kernels
----------------------------
The grid of ``rows x cols`` cells is stored padded by one cell on every side,
``width = cols + 2``, and addressed by flat index ``i = (r + 1) * width + c + 1``.
Neighbour ``k`` of ``i`` is ``i + offsets[k]``; ``codes[k]`` is the flood-tree code
that the neighbour receives when it is reached from ``i`` (the code names the
direction from the neighbour back to ``i``).

``level``  float32: elevation on entry, onset stage on exit (NaN on padding/nodata).
``tree``   uint8: 0 unvisited, 1..8 parent direction, 9 outlet, 255 blocked.
``label``  int32: > 0 provisional depression label of a depression cell; <= 0 on
           other cells: minus the label of the nearest depression downstream on the
           route (0 when the route reaches an outlet without crossing one).
"""

from __future__ import annotations

import numpy as np
from numba import njit

#: Flood-tree codes (public through analysis.flood).
UNVISITED = 0
OUTLET = 9
BLOCKED = 255

_LOW32 = np.uint64(0xFFFFFFFF)
_SIGN = np.uint32(0x80000000)
_ALL = np.uint32(0xFFFFFFFF)


def _ordered_key(bits, index):
    """Heap key: order-preserving integer image of a float32 level, then the index.

    For IEEE-754 binary32, flipping the sign bit of non-negative numbers and all
    bits of negative numbers yields unsigned integers in the same order as the
    floats. The level occupies the high 32 bits and the flat index the low 32 bits,
    so one integer comparison orders by level and breaks ties by index.
    """
    if bits & _SIGN:
        ordered = bits ^ _ALL
    else:
        ordered = bits | _SIGN
    return (np.uint64(ordered) << np.uint64(32)) | np.uint64(index)


def _heap_sift_up(heap, size, key):
    """Insert ``key`` at position ``size`` (capacity already checked)."""
    i = size
    while i > 0:
        parent = (i - 1) >> 1
        if heap[parent] <= key:
            break
        heap[i] = heap[parent]
        i = parent
    heap[i] = key


def _heap_pop(heap, size):
    top = heap[0]
    size -= 1
    last = heap[size]
    i = 0
    while True:
        child = 2 * i + 1
        if child >= size:
            break
        if child + 1 < size and heap[child + 1] < heap[child]:
            child += 1
        if heap[child] >= last:
            break
        heap[i] = heap[child]
        i = child
    if size > 0:
        heap[i] = last
    return top, size


def _grow_uint64(values, count):
    bigger = np.empty(values.shape[0] * 2, dtype=values.dtype)
    bigger[:count] = values[:count]
    return bigger


def _grow_int64(values, count):
    if count == values.shape[0]:
        bigger = np.empty(values.shape[0] * 2, dtype=values.dtype)
        bigger[:count] = values[:count]
        return bigger
    return values


def _grow_int32(values, count):
    if count == values.shape[0]:
        bigger = np.empty(values.shape[0] * 2, dtype=values.dtype)
        bigger[:count] = values[:count]
        return bigger
    return values


def _ring_unrolled(ring, head, count):
    """A FIFO ring buffer of twice the capacity, its items moved to the front."""
    capacity = ring.shape[0]
    bigger = np.empty(capacity * 2, dtype=ring.dtype)
    for k in range(count):
        bigger[k] = ring[(head + k) & (capacity - 1)]
    return bigger


def _find(parent, a):
    """Union-find root with path halving (Tarjan & van Leeuwen 1984)."""
    while parent[a] != a:
        parent[a] = parent[parent[a]]
        a = parent[a]
    return a


def _mark_blocked(level, tree):
    """Block padding and nodata (NaN) cells so the flood never enters them."""
    for i in range(level.shape[0]):
        if np.isnan(level[i]):
            tree[i] = BLOCKED


def _flood(level, bits, tree, label, outlets, offsets, codes):
    """Priority-Flood from the outlets, recording the flood tree and labels.

    A variant of the improved Priority-Flood of Barnes, Lehman & Mulla (2014):
    cells are settled in non-decreasing order of onset stage through a priority
    queue of packed integer keys. Cells reached below the current level (inside a
    depression or on a flat at that level) are settled at once through a FIFO
    queue. Cells reached above the current level are settled at their own
    elevation, which is final, and their higher neighbours are settled by the same
    FIFO queue; only cells that still have a lower unsettled neighbour are deferred
    to the priority queue (the slope shortcut of Zhou, Sun & Fu 2016).

    Returns the number of provisional labels and, per label (1-based), the entry
    cell (rim cell the depression was entered from), the label value the entry
    carried (nearest depression downstream, <= 0), and the union-find forest that
    joins labels of the same depression, plus counters.
    """
    n_offsets = offsets.shape[0]
    steps = offsets.astype(np.uint64)  # two's-complement wrap: cell + step

    heap = np.empty(max(1024, 2 * outlets.shape[0]), dtype=np.uint64)
    heap_size = 0
    for k in range(outlets.shape[0]):
        o = outlets[k]
        _heap_sift_up(heap, heap_size, _ordered_key(bits[o], o))
        heap_size += 1

    ring = np.empty(4096, dtype=np.uint64)
    ring_mask = np.uint64(ring.shape[0] - 1)
    head = np.uint64(0)
    queued = np.uint64(0)
    one = np.uint64(1)

    entry = np.empty(1024, dtype=np.int64)
    downstream = np.empty(1024, dtype=np.int32)
    forest = np.empty(1024, dtype=np.int32)
    entry[0] = -1
    downstream[0] = 0
    forest[0] = 0
    labels = 0

    heap_pops = 0
    while heap_size > 0:
        key, heap_size = _heap_pop(heap, heap_size)
        heap_pops += 1
        cell = key & _LOW32
        current = level[cell]
        while True:
            here = level[cell]
            mine = label[cell]
            in_depression = mine > 0
            deferred = False
            for k in range(n_offsets):
                nb = cell + steps[k]
                t = tree[nb]
                if t != UNVISITED:
                    if in_depression and t != BLOCKED:
                        other = label[nb]
                        if other > 0 and other != mine:
                            ra = _find(forest, mine)
                            rb = _find(forest, other)
                            if ra != rb:
                                if ra < rb:
                                    forest[rb] = ra
                                else:
                                    forest[ra] = rb
                    continue
                if level[nb] < here:
                    if here > current:
                        deferred = True
                        continue
                    level[nb] = here
                    if in_depression:
                        label[nb] = mine
                    else:
                        # A new provisional label per cell entered from the rim:
                        # two lower neighbours of one rim cell need not touch.
                        # Labels that do touch are joined when expanded.
                        labels += 1
                        entry = _grow_int64(entry, labels)
                        downstream = _grow_int32(downstream, labels)
                        forest = _grow_int32(forest, labels)
                        entry[labels] = np.int64(cell)
                        downstream[labels] = mine
                        forest[labels] = labels
                        label[nb] = labels
                else:
                    label[nb] = -mine if in_depression else mine
                tree[nb] = codes[k]
                if queued > ring_mask:
                    ring = _ring_unrolled(ring, head, queued)
                    ring_mask = np.uint64(ring.shape[0] - 1)
                    head = np.uint64(0)
                ring[(head + queued) & ring_mask] = nb
                queued += one
            if deferred:
                if heap_size == heap.shape[0]:
                    heap = _grow_uint64(heap, heap_size)
                _heap_sift_up(heap, heap_size, _ordered_key(bits[cell], cell))
                heap_size += 1
            if queued == 0:
                break
            cell = ring[head]
            head = (head + one) & ring_mask
            queued -= one

    return labels, entry[: labels + 1], downstream[: labels + 1], forest[: labels + 1], heap_pops


def _finalise(level, tree, label, elevation, row_areas, forest, width):
    """Compact depression labels in raster order and total each depression.

    One pass over the grid: unreached valid cells get a NaN onset stage, nodata
    cells flood-tree code 0, depression cells their final id (1..n in order of
    first appearance in row-major order) and every other cell 0. Per depression
    it accumulates cell count, area, volume below the spill level (cell area
    times depth, summed) and the pit (lowest cell; first in raster order on ties).
    """
    rows, cols = elevation.shape
    n_prov = forest.shape[0]
    final_of = np.zeros(n_prov, dtype=np.int32)
    cap = 64
    count = np.zeros(cap, dtype=np.int64)
    area = np.zeros(cap, dtype=np.float64)
    volume = np.zeros(cap, dtype=np.float64)
    pit_elevation = np.zeros(cap, dtype=np.float32)
    pit_cell = np.zeros(cap, dtype=np.int64)
    pit_label = np.zeros(cap, dtype=np.int32)
    n_final = 0
    unreached = 0
    last_label = np.int32(0)
    last_final = np.int32(0)
    for r in range(rows):
        a = row_areas[r]
        base = (r + 1) * width + 1
        for c in range(cols):
            i = base + c
            t = tree[i]
            if t == UNVISITED:
                level[i] = np.nan
                unreached += 1
            elif t == BLOCKED:
                tree[i] = 0
            lab = label[i]
            if lab <= 0:
                label[i] = 0
                continue
            if lab == last_label:
                f = last_final
            else:
                root = _find(forest, lab)
                f = final_of[root]
                if f == 0:
                    n_final += 1
                    f = n_final
                    final_of[root] = f
                    if f == cap:
                        cap *= 2
                        count = _resize_i64(count, cap)
                        area = _resize_f64(area, cap)
                        volume = _resize_f64(volume, cap)
                        pit_elevation = _resize_f32(pit_elevation, cap)
                        pit_cell = _resize_i64(pit_cell, cap)
                        pit_label = _resize_i32(pit_label, cap)
                    pit_elevation[f] = np.inf
                last_label = lab
                last_final = f
            z = elevation[r, c]
            count[f] += 1
            area[f] += a
            volume[f] += (np.float64(level[i]) - np.float64(z)) * a
            if z < pit_elevation[f]:
                pit_elevation[f] = z
                pit_cell[f] = i
                pit_label[f] = lab
            label[i] = f
    m = n_final + 1
    return (
        final_of,
        count[:m],
        area[:m],
        volume[:m],
        pit_elevation[:m],
        pit_cell[:m],
        pit_label[:m],
        unreached,
    )


def _resize_i64(values, size):
    out = np.zeros(size, dtype=np.int64)
    out[: values.shape[0]] = values
    return out


def _resize_i32(values, size):
    out = np.zeros(size, dtype=np.int32)
    out[: values.shape[0]] = values
    return out


def _resize_f64(values, size):
    out = np.zeros(size, dtype=np.float64)
    out[: values.shape[0]] = values
    return out


def _resize_f32(values, size):
    out = np.zeros(size, dtype=np.float32)
    out[: values.shape[0]] = values
    return out


def _spill_cells(pit_label, entry, downstream, forest, final_of):
    """Spill cell and receiving depression of every final depression.

    The route from a depression's pit leaves the depression through the entry
    cell of the pit's provisional label, unless that entry's own route re-enters
    the same depression (ties at the spill level): then the walk continues from
    the entry of the label it re-enters, until the route leaves for good.
    """
    n = pit_label.shape[0]
    spill_cell = np.full(n, -1, dtype=np.int64)
    spills_to = np.zeros(n, dtype=np.int32)
    for f in range(1, n):
        p = pit_label[f]
        while True:
            d = downstream[p]
            if d < 0:
                target = final_of[_find(forest, -d)]
                if target == f:
                    p = -d
                    continue
                spills_to[f] = target
            else:
                spills_to[f] = 0
            spill_cell[f] = entry[p]
            break
    return spill_cell, spills_to


def _walk_route(tree, row, col, drow, dcol, limit):
    """Follow flood-tree codes from (row, col) to an outlet; return the cells."""
    rows = np.empty(64, dtype=np.int64)
    cols = np.empty(64, dtype=np.int64)
    n = 0
    r = row
    c = col
    while n < limit:
        rows = _grow_int64(rows, n)
        cols = _grow_int64(cols, n)
        rows[n] = r
        cols[n] = c
        n += 1
        t = tree[r, c]
        if t == OUTLET or t == 0:
            break
        r += drow[t - 1]
        c += dcol[t - 1]
    return rows[:n], cols[:n]


_ordered_key = njit(inline="always", cache=True)(_ordered_key)
_heap_sift_up = njit(inline="always", cache=True)(_heap_sift_up)
_grow_uint64 = njit(cache=True)(_grow_uint64)
_heap_pop = njit(inline="always", cache=True)(_heap_pop)
_grow_int64 = njit(cache=True)(_grow_int64)
_grow_int32 = njit(cache=True)(_grow_int32)
_ring_unrolled = njit(cache=True)(_ring_unrolled)
_find = njit(cache=True)(_find)
_resize_i64 = njit(cache=True)(_resize_i64)
_resize_i32 = njit(cache=True)(_resize_i32)
_resize_f64 = njit(cache=True)(_resize_f64)
_resize_f32 = njit(cache=True)(_resize_f32)
mark_blocked = njit(cache=True)(_mark_blocked)
flood = njit(cache=True)(_flood)
finalise = njit(cache=True)(_finalise)
spill_cells = njit(cache=True)(_spill_cells)
walk_route = njit(cache=True)(_walk_route)
