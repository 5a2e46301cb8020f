"""Compiled loop of the label extents (private; see :mod:`sillmark.products.extents`).

The kernel trusts its inputs: :mod:`sillmark.products.extents` checks the raster's
shape and dtype and the label count before calling it.
"""

from __future__ import annotations

from numba import njit


def _label_extents(labels, n, r0, r1, c0, c1):
    """Widen the row and column bounds of each label 1..n by the cells holding it.

    ``r0``/``c0`` arrive filled with a value above every row and column, ``r1``/``c1``
    with -1; index ``k`` holds label ``k + 1``. Labels outside 1..n are skipped.
    """
    rows, cols = labels.shape
    for r in range(rows):
        for c in range(cols):
            v = labels[r, c]
            if v < 1 or v > n:
                continue
            k = v - 1
            if r < r0[k]:
                r0[k] = r
            if r + 1 > r1[k]:
                r1[k] = r + 1
            if c < c0[k]:
                c0[k] = c
            if c + 1 > c1[k]:
                c1[k] = c + 1


label_extents = njit(nogil=True, cache=True)(_label_extents)
