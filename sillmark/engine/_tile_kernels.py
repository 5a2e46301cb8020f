"""Compiled loops of the tiled Priority-Flood (private; see :mod:`sillmark.engine.flood`).

The grid is cut into tiles that are flooded independently and then joined
through a small graph over their perimeter cells, after Barnes (2016):

1. Each tile is flooded from its own perimeter cells (each a *seed* with a
   label of its own) and from any outlet inside it (label 0, the *sea*). Every
   cell gets a tile-local level ``sl`` and the label of the seed it floods from,
   and the tile records, for every pair of labels whose regions touch, the
   lowest level at which they meet (``max(sl)`` over the two touching cells).
2. A minimax Dijkstra over the graph of seeds, sea, within-tile meetings and
   links between touching perimeter cells of neighbouring tiles gives every
   seed the level ``lam`` it is held to (its onset stage).
3. Each tile is finished on its own: ``s = max(sl, lam[label])`` for every cell.
   The flood tree inside a tile already leads to the cell's seed; a seed whose
   level came through a neighbouring tile points at that tile's cell, and one
   whose level came through its own tile has the tree path from the meeting
   cell back to it reversed, so that it leads out through the meeting.

Step 1 works on tile-local arrays (:func:`_flood_tile_arrays` returns the
tile's own padded level, state and label arrays), which the pipeline
(:mod:`sillmark.engine.pipeline`) hands to its tile store. Step 3
(:func:`_finish_tile`) takes arrays with a tile's bounds and their width:
shared padded arrays of the whole grid, or a tile's own arrays with bounds
``0:h, 0:w`` and width ``w + 2``. The kernels trust their inputs. Per-tile kernels release the GIL so tiles run on several
threads.

References
----------
Barnes, R. (2016). Parallel priority-flood depression filling for trillion cell
digital elevation models on desktops or clusters. Computers & Geosciences 96,
56-68. doi:10.1016/j.cageo.2016.07.001
"""

from __future__ import annotations

import numpy as np
from numba import njit

from sillmark.engine._flood_kernels import (
    BLOCKED,
    OUTLET,
    UNVISITED,
    _grow_uint64,
    _heap_pop,
    _heap_sift_up,
    _ordered_key,
    _ring_unrolled,
)

#: Flood-tree state of a tile seed until step 3 gives it a parent.
SEED = 12
#: Flood-tree code of a culvert end reached through its culvert (the parent is
#: the culvert's other end; public through sillmark.engine.flood).
CULVERT = 10

_LOW32 = np.uint64(0xFFFFFFFF)
_EMPTY = np.uint64(0xFFFFFFFFFFFFFFFF)
_GOLDEN = np.uint64(0x9E3779B97F4A7C15)
# Flood-tree code of the step (dr, dc), indexed by (dr + 1) * 3 + (dc + 1).
_CODE_OF_STEP = np.array([1, 2, 3, 4, 0, 5, 6, 7, 8], dtype=np.uint8)


def _is_perimeter(lr, lc, h, w):
    return lr == 0 or lr == h - 1 or lc == 0 or lc == w - 1


def _flood_tile_arrays(elevation, outlet_mask, r0, r1, c0, c1, drow, dcol, dirs, extra):
    """Step 1 for one tile, on tile-local arrays: local flood with seed labels.

    Floods the cells ``[r0:r1, c0:c1]`` of ``elevation`` and ``outlet_mask``
    (which may be the whole grid or just the tile) and returns the tile's own
    arrays, padded by one cell (width ``c1 - c0 + 2``): the local level
    (float32, NaN on padding and nodata), the state (flood-tree code inside the
    tile, :data:`SEED` on seeds, :data:`OUTLET` on outlets, ``BLOCKED`` on
    padding and nodata) and the seed label (int32; 0 for cells flooded from an
    outlet, -1 on padding and nodata). Also returns the local padded index of
    every seed (index = label, entry 0 unused), the meetings (label a < label
    b, level, cell on a's side, cell on b's side, as local padded indices) and
    the number of priority-queue pops.

    ``extra`` holds local padded indices of cells that are seeds too although
    they are inside the tile: the ends of culverts, whose extra edges the seed
    graph carries (a valid cell that is neither an outlet nor on the perimeter
    gets the next label; others are left as they are).
    """
    h = r1 - r0
    w = c1 - c0
    lw = w + 2
    n_local = (h + 2) * lw
    n_dirs = dirs.shape[0]
    offs = np.empty(n_dirs, dtype=np.uint64)  # two's-complement wrap: cell + step
    back = np.empty(n_dirs, dtype=np.uint8)
    for k in range(n_dirs):
        d = dirs[k]
        offs[k] = np.uint64(drow[d] * lw + dcol[d])
        back[k] = 7 - d + 1

    lz = np.full(n_local, np.nan, dtype=np.float32)
    lstate = np.full(n_local, BLOCKED, dtype=np.uint8)
    llab = np.full(n_local, -1, dtype=np.int32)
    n_seeds = 0
    for lr in range(h):
        for lc in range(w):
            z = elevation[r0 + lr, c0 + lc]
            if np.isnan(z):
                continue
            li = (lr + 1) * lw + lc + 1
            lz[li] = z
            if outlet_mask[r0 + lr, c0 + lc]:
                lstate[li] = OUTLET
                llab[li] = 0
            elif _is_perimeter(lr, lc, h, w):
                n_seeds += 1
                lstate[li] = SEED
                llab[li] = n_seeds
            else:
                lstate[li] = UNVISITED
    for j in range(extra.shape[0]):
        li = extra[j]
        if lstate[li] == UNVISITED:
            n_seeds += 1
            lstate[li] = SEED
            llab[li] = n_seeds
    bits = lz.view(np.uint32)

    seeds = np.zeros(n_seeds + 1, dtype=np.int64)
    heap = np.empty(max(64, 2 * (n_seeds + 1)), dtype=np.uint64)
    heap_size = 0
    for lr in range(h):
        for lc in range(w):
            li = (lr + 1) * lw + lc + 1
            t = lstate[li]
            if t == OUTLET or t == SEED:
                if t == SEED:
                    seeds[llab[li]] = li
                if heap_size == heap.shape[0]:
                    heap = _grow_uint64(heap, heap_size)
                _heap_sift_up(heap, heap_size, _ordered_key(bits[li], np.uint64(li)))
                heap_size += 1

    # Meetings: open-addressing table keyed by the label pair, lowest level kept.
    table_bits = 10
    hkey = np.full(1 << table_bits, _EMPTY, dtype=np.uint64)
    hlevel = np.empty(1 << table_bits, dtype=np.float32)
    hcell_a = np.empty(1 << table_bits, dtype=np.int64)
    hcell_b = np.empty(1 << table_bits, dtype=np.int64)
    n_pairs = 0

    ring = np.empty(1024, dtype=np.uint64)
    ring_mask = ring.shape[0] - 1
    head = 0
    queued = 0
    heap_pops = 0
    while heap_size > 0:
        key, heap_size = _heap_pop(heap, heap_size)
        heap_pops += 1
        cell = key & _LOW32
        current = lz[cell]
        while True:
            here = lz[cell]
            mine = llab[cell]
            deferred = False
            for k in range(n_dirs):
                nb = cell + offs[k]
                t = lstate[nb]
                if t != UNVISITED:
                    if t == BLOCKED:
                        continue
                    other = llab[nb]
                    if other == mine:
                        continue
                    meet = here if here > lz[nb] else lz[nb]
                    if mine < other:
                        a = mine
                        b = other
                        ca = cell
                        cb = nb
                    else:
                        a = other
                        b = mine
                        ca = nb
                        cb = cell
                    pair = (np.uint64(a) << np.uint64(32)) | np.uint64(b)
                    mask = (1 << table_bits) - 1
                    slot = np.int64((pair * _GOLDEN) >> np.uint64(64 - table_bits))
                    while hkey[slot] != _EMPTY and hkey[slot] != pair:
                        slot = (slot + 1) & mask
                    if hkey[slot] == _EMPTY:
                        hkey[slot] = pair
                        hlevel[slot] = meet
                        hcell_a[slot] = np.int64(ca)
                        hcell_b[slot] = np.int64(cb)
                        n_pairs += 1
                        if 2 * n_pairs > (1 << table_bits):
                            table_bits += 1
                            hkey, hlevel, hcell_a, hcell_b = _rehash(
                                hkey, hlevel, hcell_a, hcell_b, table_bits
                            )
                    elif meet < hlevel[slot]:
                        hlevel[slot] = meet
                        hcell_a[slot] = np.int64(ca)
                        hcell_b[slot] = np.int64(cb)
                    continue
                if lz[nb] < here:
                    if here > current:
                        deferred = True
                        continue
                    lz[nb] = here
                lstate[nb] = back[k]
                llab[nb] = mine
                if queued > ring_mask:
                    ring = _ring_unrolled(ring, head, queued)
                    ring_mask = ring.shape[0] - 1
                    head = 0
                ring[(head + queued) & ring_mask] = nb
                queued += 1
            if deferred:
                if heap_size == heap.shape[0]:
                    heap = _grow_uint64(heap, heap_size)
                _heap_sift_up(heap, heap_size, _ordered_key(bits[cell], cell))
                heap_size += 1
            if queued == 0:
                break
            cell = ring[head]
            head = (head + 1) & ring_mask
            queued -= 1

    ea = np.empty(n_pairs, dtype=np.int32)
    eb = np.empty(n_pairs, dtype=np.int32)
    elevel = np.empty(n_pairs, dtype=np.float32)
    ecell_a = np.empty(n_pairs, dtype=np.int64)
    ecell_b = np.empty(n_pairs, dtype=np.int64)
    m = 0
    for slot in range(hkey.shape[0]):
        if hkey[slot] == _EMPTY:
            continue
        ea[m] = np.int32(hkey[slot] >> np.uint64(32))
        eb[m] = np.int32(hkey[slot] & _LOW32)
        elevel[m] = hlevel[slot]
        ecell_a[m] = hcell_a[slot]
        ecell_b[m] = hcell_b[slot]
        m += 1
    return lz, lstate, llab, seeds, ea, eb, elevel, ecell_a, ecell_b, heap_pops


def _rehash(hkey, hlevel, hcell_a, hcell_b, table_bits):
    size = 1 << table_bits
    mask = size - 1
    nkey = np.full(size, _EMPTY, dtype=np.uint64)
    nlevel = np.empty(size, dtype=np.float32)
    na = np.empty(size, dtype=np.int64)
    nb = np.empty(size, dtype=np.int64)
    for s in range(hkey.shape[0]):
        if hkey[s] == _EMPTY:
            continue
        slot = np.int64((hkey[s] * _GOLDEN) >> np.uint64(64 - table_bits))
        while nkey[slot] != _EMPTY:
            slot = (slot + 1) & mask
        nkey[slot] = hkey[s]
        nlevel[slot] = hlevel[s]
        na[slot] = hcell_a[s]
        nb[slot] = hcell_b[s]
    return nkey, nlevel, na, nb


def _solve_graph(n_nodes, eu, ev, elevel, ecu, ecv, one_way):
    """Step 2: minimax Dijkstra from the sea (node 0) over the seed graph.

    An edge with ``one_way`` set is crossed from ``eu`` to ``ev`` only (a
    flap valve); the others both ways. Returns every node's level (``+inf``
    where no outlet reaches it) and, per node, the meeting it was reached
    through: the cell on its own side, the cell on the other side (-1 for the
    sea and unreached nodes) and the edge (-1 likewise).
    """
    n_edges = eu.shape[0]
    degree = np.zeros(n_nodes + 1, dtype=np.int64)
    for e in range(n_edges):
        degree[eu[e] + 1] += 1
        if not one_way[e]:
            degree[ev[e] + 1] += 1
    start = np.cumsum(degree)
    fill = start[:-1].copy()
    adj_edge = np.empty(start[-1], dtype=np.int64)
    for e in range(n_edges):
        adj_edge[fill[eu[e]]] = e
        fill[eu[e]] += 1
        if not one_way[e]:
            adj_edge[fill[ev[e]]] = e
            fill[ev[e]] += 1

    lam = np.full(n_nodes, np.inf, dtype=np.float32)
    own_cell = np.full(n_nodes, -1, dtype=np.int64)
    other_cell = np.full(n_nodes, -1, dtype=np.int64)
    via = np.full(n_nodes, -1, dtype=np.int64)
    done = np.zeros(n_nodes, dtype=np.bool_)
    lam_bits = lam.view(np.uint32)
    heap = np.empty(1024, dtype=np.uint64)
    heap_size = 0
    lam[0] = -np.inf
    _heap_sift_up(heap, heap_size, _ordered_key(lam_bits[0], np.uint64(0)))
    heap_size += 1
    while heap_size > 0:
        key, heap_size = _heap_pop(heap, heap_size)
        u = np.int64(key & _LOW32)
        if done[u]:
            continue
        done[u] = True
        for j in range(start[u], start[u + 1]):
            e = adj_edge[j]
            if eu[e] == u:
                v = ev[e]
                cu = ecu[e]
                cv = ecv[e]
            else:
                v = eu[e]
                cu = ecv[e]
                cv = ecu[e]
            if done[v]:
                continue
            cand = elevel[e] if elevel[e] > lam[u] else lam[u]
            if cand < lam[v]:
                lam[v] = cand
                own_cell[v] = cv
                other_cell[v] = cu
                via[v] = e
                if heap_size == heap.shape[0]:
                    heap = _grow_uint64(heap, heap_size)
                _heap_sift_up(heap, heap_size, _ordered_key(lam_bits[v], np.uint64(v)))
                heap_size += 1
    return lam, own_cell, other_cell, via


def _finish_tile(r0, r1, c0, c1, level, state, label, base, lam, seeds, own_cell,
                 other_cell, drow, dcol, width, by_culvert):
    """Step 3 for one tile: final onset stage and the seeds' way out.

    A seed whose level came through a culvert (``by_culvert[label]``) gets the
    flood-tree code :data:`CULVERT`: its parent is the culvert's other end.
    Also clears the tile's labels, so the label array can take depression ids.
    """
    for r in range(r0, r1):
        gbase = (r + 1) * width + c0 + 1
        for i in range(gbase, gbase + (c1 - c0)):
            t = state[i]
            lab = label[i]
            label[i] = 0  # the array is reused for depression ids
            if t == BLOCKED:
                continue
            if t == UNVISITED:
                level[i] = np.nan
                continue
            if lab == 0:
                continue
            held = lam[base + lab]
            if held == np.inf:
                level[i] = np.nan
                state[i] = UNVISITED
            elif held > level[i]:
                level[i] = held
    for lab in range(1, seeds.shape[0]):
        node = base + lab
        if lam[node] == np.inf:
            continue
        seed = seeds[lab]
        if by_culvert[lab]:
            state[seed] = CULVERT
            continue
        prev = other_cell[node]
        cur = own_cell[node]
        while True:
            t = state[cur]
            nxt = -1
            if cur != seed:
                nxt = cur + drow[t - 1] * width + dcol[t - 1]
            delta = prev - cur
            dr = (delta + width // 2) // width
            dc = delta - dr * width
            state[cur] = _CODE_OF_STEP[(dr + 1) * 3 + (dc + 1)]
            if cur == seed:
                break
            prev = cur
            cur = nxt


_is_perimeter = njit(inline="always", cache=True)(_is_perimeter)
_rehash = njit(cache=True)(_rehash)
flood_tile_arrays = njit(nogil=True, cache=True)(_flood_tile_arrays)
_flood_tile_arrays = flood_tile_arrays
solve_graph = njit(cache=True)(_solve_graph)
finish_tile = njit(nogil=True, cache=True)(_finish_tile)
