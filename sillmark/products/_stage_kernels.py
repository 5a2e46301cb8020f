"""Compiled loops of the stage analysis (private; see :mod:`sillmark.products.stage`).

The kernels trust their inputs: :mod:`sillmark.products.stage` checks shapes, dtypes and
levels before calling them.
"""

from __future__ import annotations

import numpy as np
from numba import njit, prange

NODATA = 0
DRY = 1
FLOODED = 2
SHIELDED = 3


def _water_level_map(onset, elevation, row_areas, level, depth, state, sums):
    """Classify every cell at one outlet water level and total the classes.

    ``sums[r]`` receives, for row ``r``: flooded area, flooded area x depth,
    shielded area, shielded area x depth-below-level.
    """
    rows, cols = onset.shape
    for r in prange(rows):
        a = row_areas[r]
        fa = 0.0
        fv = 0.0
        sa = 0.0
        sv = 0.0
        for c in range(cols):
            s = onset[r, c]
            z = elevation[r, c]
            if np.isnan(s):
                state[r, c] = NODATA
                depth[r, c] = np.nan
            elif s <= level:
                state[r, c] = FLOODED
                d = level - z
                depth[r, c] = d
                fa += a
                fv += a * d
            elif z < level:
                state[r, c] = SHIELDED
                depth[r, c] = np.nan
                sa += a
                sv += a * (np.float64(level) - np.float64(z))
            else:
                state[r, c] = DRY
                depth[r, c] = np.nan
        sums[r, 0] = fa
        sums[r, 1] = fv
        sums[r, 2] = sa
        sums[r, 3] = sv


def _first_at_least(levels, value):
    """Index of the first level >= value (len(levels) if none): binary search."""
    lo = 0
    hi = levels.shape[0]
    while lo < hi:
        mid = (lo + hi) >> 1
        if levels[mid] < value:
            lo = mid + 1
        else:
            hi = mid
    return lo


def _first_above(levels, value):
    """Index of the first level > value (len(levels) if none): binary search."""
    lo = 0
    hi = levels.shape[0]
    while lo < hi:
        mid = (lo + hi) >> 1
        if levels[mid] <= value:
            lo = mid + 1
        else:
            hi = mid
    return lo


def _add_stage_bins(onset, elevation, row_areas, levels, first_row, rows_per_chunk,
                    flood_a, flood_z, shield_a, shield_z):
    """Add one block of rows to the per-level increments of the stage table.

    A cell of onset stage ``s`` and elevation ``z`` is flooded at every level
    index ``k >= first_at_least(s)`` and shielded for ``first_above(z) <= k <
    first_at_least(s)``. Adding its area (and area x z) where each range starts,
    and subtracting where it ends, lets cumulative sums over the level axis give
    every level's totals from one pass over the cells.

    Row ``first_row + i`` of the grid adds into accumulator row ``(first_row +
    i) // rows_per_chunk``; inside an accumulator row cells are added in raster
    order. The accumulator rows are filled in parallel. So the sums are the
    same bits however the grid is cut into blocks, as long as the blocks come
    in raster order: one block of the whole grid in memory, or blocks read one
    by one from a file.
    """
    rows, cols = onset.shape
    first_chunk = first_row // rows_per_chunk
    last_chunk = (first_row + rows - 1) // rows_per_chunk
    for chunk in prange(first_chunk, last_chunk + 1):
        lo = max(0, chunk * rows_per_chunk - first_row)
        hi = min(rows, (chunk + 1) * rows_per_chunk - first_row)
        for i in range(lo, hi):
            a = row_areas[i]
            for c in range(cols):
                s = onset[i, c]
                if np.isnan(s):
                    continue
                z = np.float64(elevation[i, c])
                ks = _first_at_least(levels, s)
                flood_a[chunk, ks] += a
                flood_z[chunk, ks] += a * z
                kz = _first_above(levels, elevation[i, c])
                if kz < ks:
                    shield_a[chunk, kz] += a
                    shield_z[chunk, kz] += a * z
                    shield_a[chunk, ks] -= a
                    shield_z[chunk, ks] -= a * z


water_level_map = njit(parallel=True, cache=True)(_water_level_map)
_first_at_least = njit(inline="always", cache=True)(_first_at_least)
_first_above = njit(inline="always", cache=True)(_first_above)
add_stage_bins = njit(parallel=True, cache=True)(_add_stage_bins)
