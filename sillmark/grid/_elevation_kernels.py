"""Compiled loop behind :meth:`sillmark.grid.dem_grid.DEMGrid.read_window`.

The kernel trusts its inputs: the caller checks the dtype and shapes.
"""

from __future__ import annotations

import numpy as np
from numba import njit


def _clean_float32(raw, nodata, has_nodata, hidden, has_hidden, out):
    """``out`` = ``raw`` with every missing cell NaN and -0.0 made +0.0, in one pass.

    Missing: not finite, equal to ``nodata`` (when ``has_nodata``), or
    ``hidden`` (when ``has_hidden``; the band's mask says no data).
    """
    rows, cols = raw.shape
    for i in range(rows):
        for j in range(cols):
            v = raw[i, j]
            if (not np.isfinite(v)) or (has_nodata and v == nodata) or (has_hidden and hidden[i, j]):
                out[i, j] = np.float32(np.nan)
            elif v == 0.0:
                out[i, j] = np.float32(0.0)
            else:
                out[i, j] = v


clean_float32 = njit(nogil=True, cache=True)(_clean_float32)
