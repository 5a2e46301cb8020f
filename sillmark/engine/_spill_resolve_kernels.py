"""Compiled loop of the client's half of the spill points (private).

The tiles summarise their dry areas, rim contacts and perimeters
(:func:`sillmark.engine._spill_kernels.summarise_tile`); :func:`resolve_spills`
joins those summaries into every depression's spill cell and ``spills_to``
under the rule of :mod:`sillmark.engine.flood` ("Spill points"): union-find
over dry areas that meet across tile edges (Tarjan & van Leeuwen 1984), the
way out of each, then a breadth-first search (Moore 1959) over dry areas and
depressions by hop distance from the nearest way out. The kernels trust their
inputs.

References
----------
Moore, E. F. (1959). The shortest path through a maze. Proceedings of an
International Symposium on the Theory of Switching, Harvard University Press,
285-292.
Tarjan, R. E., van Leeuwen, J. (1984). Worst-case analysis of set union
algorithms. Journal of the ACM 31(2), 245-281. doi:10.1145/62.2160
"""

from __future__ import annotations

import numpy as np
from numba import njit

from sillmark.engine._flood_kernels import _find
from sillmark.engine._spill_kernels import (
    _UNKNOWN,
    KIND_AREA,
    KIND_DEPRESSION,
    KIND_OUTLET,
    KIND_PERIMETER,
    _grown,
)
from sillmark.engine.plan import _across_tiles, _grid_perimeters, _perimeter_index


def _exit_target(a, exit_cell, exit_src, a_kind, a_val, p_dep, p_area, p_outlet, p_low_level,
                 p_low_dir, p_low_kind, p_low_val, cross_level, cross_dir, poff, tile,
                 tile_cols, rows, cols, drow, dcol):
    """Where the way out of dry area ``a`` leads: (kind, value) with global values."""
    s = exit_src[a]
    e = exit_cell[a]
    if s >= 0 and a_kind[s] != KIND_PERIMETER:
        return np.int64(a_kind[s]), a_val[s]
    _, j = _perimeter_index(e, poff, tile, tile_cols, rows, cols)
    if p_outlet[j]:
        return np.int64(KIND_OUTLET), np.int64(0)
    ll = p_low_level[j]
    ld = p_low_dir[j]
    cl = cross_level[j]
    cd = cross_dir[j]
    if cd >= 0 and (cl < ll or (cl == ll and cd < ld)):
        g = (e // cols + drow[cd]) * cols + (e % cols + dcol[cd])
        _, j2 = _perimeter_index(g, poff, tile, tile_cols, rows, cols)
        if p_dep[j2] > 0:
            return np.int64(KIND_DEPRESSION), np.int64(p_dep[j2])
        return np.int64(KIND_AREA), np.int64(p_area[j2])
    return np.int64(p_low_kind[j]), p_low_val[j]


def _resolve_spills(n_dep, a_level, a_exit, a_kind, a_val, adj_area, adj_dep, adj_cell,
                    p_level, p_dep, p_area, p_outlet, p_low_level, p_low_dir, p_low_kind,
                    p_low_val, poff, tile, tile_rows, tile_cols, rows, cols, drow, dcol, dirs):
    """Step 2 (client): spill cell and ``spills_to`` of depressions 1..n_dep.

    Inputs are the tiles' summaries (:func:`summarise_tile`) concatenated, with
    depression pieces turned into depression ids and compact areas into global
    area numbers 0..A-1 (-1 for none); perimeter arrays in the perimeter order
    of :mod:`sillmark.engine.plan`, tile ``t``'s from ``poff[t]`` (all empty
    for the in-memory engine). Returns the spill cell (global flat index) and
    ``spills_to`` of every depression, index 0 unused.
    """
    n_areas = a_level.shape[0]
    n_per = p_level.shape[0]
    n_dirs = dirs.shape[0]
    forest = np.arange(n_areas, dtype=np.int64)
    cross_level = np.full(n_per, np.inf, dtype=np.float32)
    cross_dir = np.full(n_per, -1, dtype=np.int64)
    p_cell = np.full(n_per, -1, dtype=np.int64)
    xadj = np.empty((64, 3), dtype=np.int64)
    n_xadj = 0
    if n_per > 0:
        # Across tile edges: one dry area, lower ground, or a depression at the level.
        p_cell, _ = _grid_perimeters(tile, tile_rows, tile_cols, rows, cols)
        for j in range(n_per):
            ax = p_area[j]
            if ax < 0:
                continue
            r = p_cell[j] // cols
            c = p_cell[j] - r * cols
            lx = p_level[j]
            for k in range(n_dirs):
                d = dirs[k]
                rr, cc = _across_tiles(r, c, d, tile, rows, cols, drow, dcol)
                if rr < 0:
                    continue
                _, j2 = _perimeter_index(rr * cols + cc, poff, tile, tile_cols, rows, cols)
                ly = p_level[j2]
                if ly < lx:
                    if ly < cross_level[j]:
                        cross_level[j] = ly
                        cross_dir[j] = d
                elif ly == lx:
                    ay = p_area[j2]
                    if ay >= 0:
                        x = _find(forest, ax)
                        y = _find(forest, ay)
                        if x < y:
                            forest[y] = x
                        elif y < x:
                            forest[x] = y
                    elif p_dep[j2] > 0:
                        xadj = _grown(xadj, n_xadj)
                        xadj[n_xadj, 0] = ax
                        xadj[n_xadj, 1] = p_dep[j2]
                        xadj[n_xadj, 2] = r * cols + c
                        n_xadj += 1
    root = np.empty(n_areas, dtype=np.int64)
    for a in range(n_areas):
        root[a] = _find(forest, a)

    # Each dry area's way out: its first way-out cell in raster order.
    exit_cell = np.full(n_areas, -1, dtype=np.int64)
    exit_src = np.full(n_areas, -1, dtype=np.int64)
    for i in range(n_areas):
        e = a_exit[i]
        if e >= 0:
            a = root[i]
            if exit_cell[a] < 0 or e < exit_cell[a]:
                exit_cell[a] = e
                exit_src[a] = i
    for j in range(n_per):
        if p_area[j] >= 0 and cross_level[j] < p_level[j]:
            a = root[p_area[j]]
            e = p_cell[j]
            if exit_cell[a] < 0 or e < exit_cell[a]:
                exit_cell[a] = e
                exit_src[a] = -(j + 1)

    # The graph: dry areas (roots) 0..A-1 and depressions A..A+n_dep-1.
    n_edges = adj_area.shape[0] + n_xadj
    e_area = np.empty(n_edges, dtype=np.int64)
    e_dep = np.empty(n_edges, dtype=np.int64)
    e_cell = np.empty(n_edges, dtype=np.int64)
    for e in range(adj_area.shape[0]):
        e_area[e] = root[adj_area[e]]
        e_dep[e] = adj_dep[e]
        e_cell[e] = adj_cell[e]
    for e in range(n_xadj):
        m = adj_area.shape[0] + e
        e_area[m] = root[xadj[e, 0]]
        e_dep[m] = xadj[e, 1]
        e_cell[m] = xadj[e, 2]
    n_nodes = n_areas + n_dep
    start = np.zeros(n_nodes + 1, dtype=np.int64)
    for e in range(n_edges):
        start[e_area[e] + 1] += 1
        start[n_areas + e_dep[e]] += 1
    for u in range(n_nodes):
        start[u + 1] += start[u]
    fill = start[:-1].copy()
    nbr = np.empty(2 * n_edges, dtype=np.int64)
    for e in range(n_edges):
        a = e_area[e]
        d = n_areas + e_dep[e] - 1
        nbr[fill[a]] = d
        fill[a] += 1
        nbr[fill[d]] = a
        fill[d] += 1

    # Hop distance of every node from the nearest way out (breadth-first search).
    dist = np.full(n_nodes, -1, dtype=np.int64)
    queue = np.empty(max(1, n_nodes), dtype=np.int64)
    tail = 0
    for a in range(n_areas):
        if root[a] == a and exit_cell[a] >= 0:
            dist[a] = 0
            queue[tail] = a
            tail += 1
    head = 0
    while head < tail:
        u = queue[head]
        head += 1
        for i in range(start[u], start[u + 1]):
            v = nbr[i]
            if dist[v] < 0:
                dist[v] = dist[u] + 1
                queue[tail] = v
                tail += 1

    # Spill cell: the first rim cell in an adjacent dry area one hop nearer a way out.
    spill = np.full(n_dep + 1, -1, dtype=np.int64)
    spill_area = np.full(n_dep + 1, -1, dtype=np.int64)
    for e in range(n_edges):
        dep = e_dep[e]
        a = e_area[e]
        dd = dist[n_areas + dep - 1]
        if dd > 0 and dist[a] == dd - 1:
            if spill[dep] < 0 or e_cell[e] < spill[dep]:
                spill[dep] = e_cell[e]
                spill_area[dep] = a

    # Where the water goes next: memoised per dry area.
    down = np.full(n_areas, _UNKNOWN, dtype=np.int64)
    chain = np.empty(64, dtype=np.int64)
    spills_to = np.zeros(n_dep + 1, dtype=np.int32)
    for dep in range(1, n_dep + 1):
        a = spill_area[dep]
        if a < 0:
            continue
        n_chain = 0
        v = np.int64(0)
        while True:
            if down[a] != _UNKNOWN:
                v = down[a]
                break
            chain = _grown(chain, n_chain)
            chain[n_chain] = a
            n_chain += 1
            if dist[a] != 0:
                # No way out of its own: the adjacent depression one hop nearer, lowest id.
                best = n_dep + 1
                for i in range(start[a], start[a + 1]):
                    u = nbr[i]
                    if dist[a] > 0 and dist[u] == dist[a] - 1 and u - n_areas + 1 < best:
                        best = u - n_areas + 1
                v = np.int64(best if best <= n_dep else 0)
                break
            kind, val = _exit_target(
                a, exit_cell, exit_src, a_kind, a_val, p_dep, p_area, p_outlet, p_low_level,
                p_low_dir, p_low_kind, p_low_val, cross_level, cross_dir, poff, tile,
                tile_cols, rows, cols, drow, dcol,
            )
            if kind == KIND_DEPRESSION:
                v = val
                break
            if kind == KIND_AREA and val >= 0:
                a = root[val]
                continue
            v = np.int64(0)
            break
        for i in range(n_chain):
            down[chain[i]] = v
        spills_to[dep] = np.int32(v)
    return spill, spills_to


_exit_target = njit(cache=True)(_exit_target)
resolve_spills = njit(cache=True)(_resolve_spills)
