"""Compiled loop of depression significance (private; see :mod:`sillmark.products.significance`).

The kernel trusts its inputs: :func:`sillmark.products.significance.significance`
takes them from a :class:`~sillmark.products.hierarchy.DepressionHierarchy`,
whose ids are in post-order (every parent after its children), and checks the
shapes first. It is a plain Python function compiled once at the bottom of the
module, so the same code runs with ``NUMBA_DISABLE_JIT=1`` (or through
``.py_func``).
"""

from __future__ import annotations

import numpy as np
from numba import njit


def _smallest_significant(parent, significant):
    """For every node, the smallest significant node containing it (itself included).

    ``parent`` (int32, n) and ``significant`` (bool, n) are indexed by id - 1;
    parent ids are larger than their children's (post-order), 0 for a top.
    Returns int32 (n + 1,) indexed by id, entry 0 is 0, and 0 where no
    significant node contains the node. One pass from the last id down:
    every parent is settled before its children.
    """
    n = parent.shape[0]
    out = np.zeros(n + 1, dtype=np.int32)
    for v in range(n, 0, -1):
        if significant[v - 1]:
            out[v] = v
        else:
            out[v] = out[parent[v - 1]]
    return out


smallest_significant = njit(nogil=True, cache=True)(_smallest_significant)
