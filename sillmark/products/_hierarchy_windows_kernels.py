"""Compiled loops of the depression hierarchy in windows (private; see
:mod:`sillmark.products.hierarchy_windows`).

The kernels trust their inputs: :func:`sillmark.products.hierarchy_windows.hierarchy_batches`
reads the blocks, sizes the arrays and checks the results. Each loop is a plain
Python function compiled once at the bottom of the module, so the same code
runs with ``NUMBA_DISABLE_JIT=1`` (or through ``.py_func``).
"""

from __future__ import annotations

import numpy as np
from numba import njit


def _add_bounds(block, row0, row_min, row_max, col_min, col_max):
    """Grow each depression's bounding box by its cells in ``block``.

    ``block`` holds rows ``row0 ...`` of the depression-id raster, all columns;
    the four arrays are indexed by id (0..n, entry 0 unused) and start at
    (large, -1, large, -1). Returns the largest id met that has no entry
    (0 when every id fits), for the caller's check.
    """
    n = row_min.shape[0] - 1
    too_large = 0
    rows, cols = block.shape
    for r in range(rows):
        gr = row0 + r
        for c in range(cols):
            d = block[r, c]
            if d <= 0:
                continue
            if d > n:
                if d > too_large:
                    too_large = d
                continue
            if gr < row_min[d]:
                row_min[d] = gr
            if gr > row_max[d]:
                row_max[d] = gr
            if c < col_min[d]:
                col_min[d] = c
            if c > col_max[d]:
                col_max[d] = c
    return too_large


def _batches(row_min, row_max, col_min, col_max, budget):
    """Cut ids 1..n into runs of consecutive ids whose joint bounding box has at
    most ``budget`` cells (a run of one id may have more).

    Returns, per run, its first and last id and its window (rows ``r0:r1``,
    columns ``c0:c1``), as an (runs, 6) int64 array.
    """
    n = row_min.shape[0] - 1
    out = np.empty((max(n, 1), 6), dtype=np.int64)
    runs = 0
    a = 1
    while a <= n:
        r0 = row_min[a]
        r1 = row_max[a] + 1
        c0 = col_min[a]
        c1 = col_max[a] + 1
        b = a
        while b < n:
            d = b + 1
            nr0 = min(r0, row_min[d])
            nr1 = max(r1, row_max[d] + 1)
            nc0 = min(c0, col_min[d])
            nc1 = max(c1, col_max[d] + 1)
            if (nr1 - nr0) * (nc1 - nc0) > budget:
                break
            r0, r1, c0, c1 = nr0, nr1, nc0, nc1
            b = d
        out[runs, 0] = a
        out[runs, 1] = b
        out[runs, 2] = r0
        out[runs, 3] = r1
        out[runs, 4] = c0
        out[runs, 5] = c1
        runs += 1
        a = b + 1
    return out[:runs]


def _tree_depth(parent):
    """Most nesting levels of a forest in post-order (see hierarchy_windows.tree_depth)."""
    n = parent.shape[0]
    depth = np.zeros(n + 1, dtype=np.int64)
    most = 0
    for v in range(n, 0, -1):  # parents come after their children: settled first
        p = parent[v - 1]
        d = depth[p] + 1 if p > 0 else 1
        depth[v] = d
        if d > most:
            most = d
    return most


add_bounds = njit(nogil=True, cache=True)(_add_bounds)
tree_depth = njit(nogil=True, cache=True)(_tree_depth)
batches = njit(nogil=True, cache=True)(_batches)
