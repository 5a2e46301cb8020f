"""Compiled loops shared by the spill engine (private; see :mod:`sillmark.engine.flood`).

Priority-queue and FIFO helpers, depression labelling, and route walking.
The flood itself is tiled: see :mod:`sillmark.engine._tile_kernels`; spill points:
:mod:`sillmark.engine._spill_kernels`.

The kernels trust their inputs. :func:`sillmark.engine.flood.priority_flood` pads the
grid, checks every precondition and hands flat arrays over. Each loop is a plain
Python function compiled once at the bottom of the module, so the same code runs
with ``NUMBA_DISABLE_JIT=1`` for debugging.

Layout shared by all kernels
----------------------------
The grid of ``rows x cols`` cells is stored padded by one cell on every side,
``width = cols + 2``, and addressed by flat index ``i = (r + 1) * width + c + 1``.
Flood-tree code ``d + 1`` means "the parent is the neighbour in direction
``d``" of NW, N, NE, W, E, SW, S, SE.

``level``  float32: onset stage (NaN on padding, nodata and unreached cells).
``state``  uint8: the flood tree: 1..8 parent direction, 9 outlet, 0 unreached;
           255 marks padding and nodata until the labelling pass sets it to 0.
``label``  int32: depression id (0 outside depressions).
"""

from __future__ import annotations

import numpy as np
from numba import njit, prange

#: Cell states; 1..8 are flood-tree codes (public through sillmark.engine.flood).
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


def _scan_inputs(elevation, outlet_mask):
    """Count infinite elevations and outlet cells on valid data, rows in parallel."""
    rows, cols = elevation.shape
    infinite = 0
    outlets = 0
    for r in prange(rows):
        for c in range(cols):
            v = elevation[r, c]
            if np.isinf(v):
                infinite += 1
            elif outlet_mask[r, c] and not np.isnan(v):
                outlets += 1
    return infinite, outlets


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
        if t == 0 or t > 8:  # an outlet, or a culvert end (the caller goes on)
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
scan_inputs = njit(parallel=True, cache=True)(_scan_inputs)
walk_route = njit(cache=True)(_walk_route)
