"""Compiled loop of the out-of-core stage table (private; see :mod:`sillmark.products.tiled_stage`).

The kernel trusts its inputs: :mod:`sillmark.products.tiled_stage` checks shapes, dtypes
and levels before calling it.
"""

from __future__ import annotations

import numpy as np
from numba import njit

from sillmark.products._stage_kernels import _first_above, _first_at_least


def _add_stage_bins(onset, elevation, row_areas, levels, first_row, rows_per_chunk,
                    flood_a, flood_z, shield_a, shield_z):
    """Add one block of rows to the per-level increments of the stage table.

    The same additions, in the same order, as the in-memory binning pass
    (:func:`sillmark.products._stage_kernels.stage_bins`): row ``first_row + i`` of the
    grid goes to accumulator row ``(first_row + i) // rows_per_chunk``, and
    inside an accumulator row cells are added in raster order. Blocks must come
    in raster order, so that each accumulator sees its cells as the in-memory
    pass does and the sums are the same bits.
    """
    rows, cols = onset.shape
    for i in range(rows):
        chunk = (first_row + i) // rows_per_chunk
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


add_stage_bins = njit(cache=True)(_add_stage_bins)
