"""Compiled loop of a route through a depression's spill point (private).

The spill point of a depression is chosen by the rule in the module docstring
of :mod:`sillmark.engine.flood` ("Spill points"), from the onset stage, the
depression ids and the outlets (:mod:`sillmark.engine._spill_kernels`). The
route from a cell inside the depression must pass through that cell, which the
flood tree need not do where rim cells tie; :func:`route_through_sill` builds
it by breadth-first search (Moore 1959) inside the depression and over the
cells at the spill elevation, then follows the flood tree. The kernel trusts
its inputs.

References
----------
Moore, E. F. (1959). The shortest path through a maze. Proceedings of an
International Symposium on the Theory of Switching, Harvard University Press,
285-292.
"""

from __future__ import annotations

import numpy as np
from numba import njit, types
from numba.typed import Dict

from sillmark.engine._flood_kernels import OUTLET
from sillmark.engine._spill_kernels import _grown


def _route_through_sill(stage, ids, tree, row, col, sill_row, sill_col, drow, dcol, dirs,
                        limit):
    """Cells of the route from ``(row, col)``, inside a depression, through its spill cell.

    Breadth-first inside the depression from the start to a cell next to the
    spill cell; the spill cell; breadth-first over the cells at the spill
    elevation outside the depression to the nearest way out (an outlet, or a
    cell with a lower neighbour); its lowest neighbour (first in direction
    order); then the flood tree to an outlet. The searches remember the cells
    they reach (and the direction they came from) in a hash map, so a route
    costs in proportion to the cells searched, not to the grid. Returns rows,
    cols and the index of the spill cell on the route, or empty arrays if the
    spill cell does not touch the depression.
    """
    rows, cols = stage.shape
    n_dirs = dirs.shape[0]
    dep = ids[row, col]
    top = stage[row, col]
    queue = np.empty(64, dtype=np.int64)
    seen = Dict.empty(key_type=types.int64, value_type=types.uint8)

    # 1. Inside the depression to a cell next to the spill cell.
    start = row * cols + col
    seen[start] = np.uint8(255)
    queue[0] = start
    head = 0
    tail = 1
    found = -1
    while head < tail:
        x = queue[head]
        head += 1
        r = x // cols
        c = x - r * cols
        for k in range(n_dirs):
            d = dirs[k]
            if r + drow[d] == sill_row and c + dcol[d] == sill_col:
                found = x
                break
        if found >= 0:
            break
        for k in range(n_dirs):
            d = dirs[k]
            rr = r + drow[d]
            cc = c + dcol[d]
            if rr < 0 or rr >= rows or cc < 0 or cc >= cols:
                continue
            y = rr * cols + cc
            if y not in seen and ids[rr, cc] == dep:
                seen[y] = np.uint8(k + 1)
                queue = _grown(queue, tail)
                queue[tail] = y
                tail += 1
    if found < 0:
        return np.empty(0, dtype=np.int64), np.empty(0, dtype=np.int64), -1
    inside = _path_to(found, seen, drow, dcol, dirs, cols)

    # 2. At the spill elevation, outside the depression, to the nearest way out.
    sill = sill_row * cols + sill_col
    seen[sill] = np.uint8(255)
    queue[0] = sill
    head = 0
    tail = 1
    way = -1
    while head < tail and way < 0:
        x = queue[head]
        head += 1
        r = x // cols
        c = x - r * cols
        if tree[r, c] == OUTLET:
            way = x
            break
        for k in range(n_dirs):
            d = dirs[k]
            rr = r + drow[d]
            cc = c + dcol[d]
            if rr < 0 or rr >= rows or cc < 0 or cc >= cols:
                continue
            if stage[rr, cc] < top:
                way = x
                break
        if way >= 0:
            break
        for k in range(n_dirs):
            d = dirs[k]
            rr = r + drow[d]
            cc = c + dcol[d]
            if rr < 0 or rr >= rows or cc < 0 or cc >= cols:
                continue
            y = rr * cols + cc
            if y not in seen and stage[rr, cc] == top and ids[rr, cc] != dep:
                seen[y] = np.uint8(k + 1)
                queue = _grown(queue, tail)
                queue[tail] = y
                tail += 1
    if way < 0:
        return np.empty(0, dtype=np.int64), np.empty(0, dtype=np.int64), -1
    outside = _path_to(way, seen, drow, dcol, dirs, cols)

    # 3. Down the flood tree from the way out's lowest neighbour.
    n_in = inside.shape[0]
    n_out = outside.shape[0]
    out_r = np.empty(n_in + n_out + 64, dtype=np.int64)
    out_c = np.empty(n_in + n_out + 64, dtype=np.int64)
    n = 0
    for i in range(n_in):
        out_r[n] = inside[i] // cols
        out_c[n] = inside[i] % cols
        n += 1
    for i in range(n_out):
        out_r[n] = outside[i] // cols
        out_c[n] = outside[i] % cols
        n += 1
    r = way // cols
    c = way % cols
    if tree[r, c] != OUTLET:
        best = np.float32(np.inf)
        br = -1
        bc = -1
        for k in range(n_dirs):
            d = dirs[k]
            rr = r + drow[d]
            cc = c + dcol[d]
            if rr < 0 or rr >= rows or cc < 0 or cc >= cols:
                continue
            if stage[rr, cc] < best:
                best = stage[rr, cc]
                br = rr
                bc = cc
        r = br
        c = bc
        steps = 0
        while steps < limit:
            out_r = _grown(out_r, n)
            out_c = _grown(out_c, n)
            out_r[n] = r
            out_c[n] = c
            n += 1
            steps += 1
            t = tree[r, c]
            if t == 0 or t > 8:  # an outlet, or a culvert end (the caller goes on)
                break
            r += drow[t - 1]
            c += dcol[t - 1]
    return out_r[:n].copy(), out_c[:n].copy(), n_in


def _path_to(x, seen, drow, dcol, dirs, cols):
    """Flat cells from the breadth-first search's start (``seen == 255``) to ``x``."""
    n = 1
    y = x
    while seen[y] != 255:
        d = dirs[seen[y] - 1]
        y -= drow[d] * cols + dcol[d]
        n += 1
    path = np.empty(n, dtype=np.int64)
    y = x
    for i in range(n - 1, -1, -1):
        path[i] = y
        if seen[y] != 255:
            d = dirs[seen[y] - 1]
            y -= drow[d] * cols + dcol[d]
    return path


_path_to = njit(cache=True)(_path_to)
route_through_sill = njit(cache=True)(_route_through_sill)
