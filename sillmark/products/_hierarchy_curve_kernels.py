"""Compiled loops of the curve rows (private; see :mod:`sillmark.products.hierarchy_curves`).

The kernels trust their inputs; :mod:`sillmark.products.hierarchy_curves` takes
them from a :class:`~sillmark.products.hierarchy.DepressionHierarchy` and checks
them. Node ids are one-based and in post-order (children before their parent),
so the children of node ``v`` are the top entries of a stack of finished nodes
when ``v`` is reached, and the subtree of ``v`` is the id range
``first[v] .. v``. Positions index the hierarchy's sorted depression cells
(depression by depression, ascending elevation within each).

Each loop is a plain Python function compiled once at the bottom of the module.
"""

from __future__ import annotations

import numpy as np
from numba import njit


def _merge_unique(a, na, b, nb, out, limit):
    """Merge two ascending runs into ``out`` without repeats; stop past ``limit``.

    Returns the length written, or -1 when the union holds more than ``limit``
    values.
    """
    i = 0
    j = 0
    k = 0
    while i < na or j < nb:
        if j >= nb or (i < na and a[i] < b[j]):
            x = a[i]
            i += 1
        elif i >= na or b[j] < a[i]:
            x = b[j]
            j += 1
        else:
            x = a[i]
            i += 1
            j += 1
        if k == 0 or out[k - 1] != x:
            if k >= limit:
                return -1
            out[k] = x
            k += 1
    return k


def _breakpoint_sets(start, positions, zs, child_start, child_ids, lo, is_leaf, limit,
                     emit_start, stride, out_level, out_index):
    """The distinct cell elevations of every node's region, kept while at most ``limit - 1``.

    A node's breakpoints are the distinct elevations of its region's cells and
    its spill elevation; its region is its own cells and its children's regions,
    so its set is the merge of its own cells' elevations (ascending) with its
    children's sets, computed children first on a stack. A node whose set would
    pass ``limit`` (spill included), or that has such a child, is marked
    incomplete (-1) and pushes nothing, so the work per node is at most about
    ``limit`` times its number of children plus its own cells.

    Returns ``count`` (breakpoints, spill included, or -1) and ``merge_index``
    (the index of the merge elevation among them for a complete internal node,
    else -1), one-based by node. When ``emit_start`` is given (length > 0),
    each node ``v`` with ``stride[v] > 0`` and a complete set also writes the
    breakpoints it keeps (see :func:`_kept`), except the spill, at
    ``out_level[emit_start[v]:]`` with their index among all its breakpoints.
    """
    n = lo.shape[0] - 1
    count = np.full(n + 1, -1, dtype=np.int64)
    merge_index = np.full(n + 1, -1, dtype=np.int64)
    pool = np.empty(max(64, 4 * limit), dtype=np.float64)
    entry_off = np.zeros(n + 1, dtype=np.int64)
    entry_len = np.zeros(n + 1, dtype=np.int64)
    acc = np.empty(limit + 1, dtype=np.float64)
    tmp = np.empty(limit + 1, dtype=np.float64)
    own = np.empty(limit + 1, dtype=np.float64)
    emit = emit_start.shape[0] > 0
    sp = 0
    pool_len = 0
    for v in range(1, n + 1):
        nc = child_start[v + 1] - child_start[v]
        first_entry = sp - nc
        complete = True
        for e in range(first_entry, sp):
            if entry_len[e] < 0:
                complete = False
        n_acc = 0
        if complete:
            n_own = 0
            for k in range(start[v], start[v + 1]):
                z = np.float64(zs[positions[k]])
                if n_own == 0 or own[n_own - 1] != z:
                    if n_own >= limit:
                        complete = False
                        break
                    own[n_own] = z
                    n_own += 1
            if complete:
                for k in range(n_own):
                    acc[k] = own[k]
                n_acc = n_own
                for e in range(first_entry, sp):
                    got = _merge_unique(acc, n_acc, pool[entry_off[e]:], entry_len[e], tmp,
                                        limit)
                    if got < 0:
                        complete = False
                        break
                    for k in range(got):
                        acc[k] = tmp[k]
                    n_acc = got
            if complete and n_acc + 1 > limit:
                complete = False
        # Pop the children, push this node.
        if nc > 0:
            pool_len = entry_off[first_entry]
        sp = first_entry
        entry_off[sp] = pool_len
        if complete:
            if pool_len + n_acc > pool.shape[0]:
                bigger = np.empty(2 * (pool_len + n_acc), dtype=np.float64)
                bigger[:pool_len] = pool[:pool_len]
                pool = bigger
            for k in range(n_acc):
                pool[pool_len + k] = acc[k]
            pool_len += n_acc
            entry_len[sp] = n_acc
            count[v] = n_acc + 1
            if not is_leaf[v]:
                m = lo[v]
                a = 0
                b = n_acc
                while a < b:  # first index with acc >= m
                    mid = (a + b) >> 1
                    if acc[mid] < m:
                        a = mid + 1
                    else:
                        b = mid
                merge_index[v] = a
            if emit and stride[v] > 0:
                total = n_acc + 1
                w = emit_start[v]
                for k in range(n_acc):
                    if _kept(k, total, merge_index[v], stride[v]):
                        out_level[w] = acc[k]
                        out_index[w] = k
                        w += 1
        else:
            entry_len[sp] = -1
        sp += 1
    return count, merge_index


def _kept(k, total, merge, stride):
    """Whether row ``k`` of ``total`` stays at ``stride``: the first and last rows,
    the merge row and every ``stride``-th row."""
    return k == 0 or k == total - 1 or k == merge or k % stride == 0


def _position_owner(start, positions, n_positions):
    """The node owning each position (0 for none)."""
    owner = np.zeros(n_positions, dtype=np.int32)
    for v in range(1, start.shape[0] - 1):
        for k in range(start[v], start[v + 1]):
            owner[positions[k]] = v
    return owner


def _evaluate(order, row_node, levels, first, dep_of_node, owner, zs, cell_area, dep_pos_start,
              dep_node_start, metres, out_area, out_storage):
    """Area and storage of every row: one sweep per depression with a segment tree.

    ``order`` runs over the rows by depression and then level. Within a
    depression, cells are added in ascending elevation while they lie strictly
    below the next row's level, each at its owner's leaf of a sum segment tree
    over the depression's node ids (area and area times height above the
    depression's lowest cell ``r``). A row of node ``v`` at level ``h`` sums
    the leaves ``first[v] .. v`` (its subtree: its region's cells below
    ``h``): area ``A`` and moment ``M``, storage ``(A (h - r) - M)`` times
    ``metres``. Each cell and each row costs a logarithm of the depression's
    node count.
    """
    n_rows = order.shape[0]
    size = 1
    for d in range(dep_node_start.shape[0] - 1):
        size = max(size, dep_node_start[d + 1] - dep_node_start[d])
    tree_a = np.zeros(2 * size, dtype=np.float64)
    tree_m = np.zeros(2 * size, dtype=np.float64)
    q = 0
    while q < n_rows:
        d = dep_of_node[row_node[order[q]]]
        q1 = q
        while q1 < n_rows and dep_of_node[row_node[order[q1]]] == d:
            q1 += 1
        na = dep_node_start[d - 1]  # first node id of the depression
        nn = dep_node_start[d] - na
        for i in range(2 * nn):
            tree_a[i] = 0.0
            tree_m[i] = 0.0
        p = dep_pos_start[d - 1]
        p1 = dep_pos_start[d]
        r = np.float64(zs[p])
        for qq in range(q, q1):
            row = order[qq]
            h = levels[row]
            while p < p1 and np.float64(zs[p]) < h:
                i = owner[p] - na + nn
                a = cell_area[p]
                mo = a * (np.float64(zs[p]) - r)
                while i >= 1:
                    tree_a[i] += a
                    tree_m[i] += mo
                    i >>= 1
                p += 1
            v = row_node[row]
            lo_i = first[v] - na + nn
            hi_i = v - na + nn + 1
            sa = 0.0
            sm = 0.0
            while lo_i < hi_i:
                if lo_i & 1:
                    sa += tree_a[lo_i]
                    sm += tree_m[lo_i]
                    lo_i += 1
                if hi_i & 1:
                    hi_i -= 1
                    sa += tree_a[hi_i]
                    sm += tree_m[hi_i]
                lo_i >>= 1
                hi_i >>= 1
            out_area[row] = sa
            out_storage[row] = (sa * (h - r) - sm) * metres
        q = q1


_merge_unique = njit(inline="always", cache=True)(_merge_unique)
_kept = njit(inline="always", cache=True)(_kept)
breakpoint_sets = njit(nogil=True, cache=True)(_breakpoint_sets)
position_owner = njit(nogil=True, cache=True)(_position_owner)
evaluate = njit(nogil=True, cache=True)(_evaluate)
