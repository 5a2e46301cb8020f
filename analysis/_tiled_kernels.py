"""Compiled loops of the out-of-core tiled engine (private; see :mod:`analysis.tiled`).

The tiled engine floods every tile with :func:`analysis._tile_kernels.flood_tile_arrays`
and finishes it with :func:`analysis._tile_kernels.finish_tile`, both on the
tile's own padded arrays (width ``lw = w + 2``, local index
``li = (lr + 1) * lw + lc + 1``). The loops here do the rest:

- the *perimeter* of a tile, its cells in a fixed order (first row, then the
  first and last cell of every middle row, then the last row), which is all the
  client ever sees of a tile;
- the links between touching perimeter cells of neighbouring tiles, in the very
  order the in-memory engine lists them (so both solve the same graph the same
  way);
- per tile, after finishing: the pieces of depressions inside the tile
  (connected components of ``s > z``, numbered in the tile's raster order), and
  the summaries of the flood-tree walks that find spill points (see
  :func:`_walk_tile`);
- on the client: the union of pieces across tile edges, the spill walks joined
  up from the summaries, and the depression totals accumulated in raster order.

Global cells are addressed by their flat index ``g = row * cols + col``. The
kernels trust their inputs.
"""

from __future__ import annotations

import numpy as np
from numba import njit

from analysis._flood_kernels import BLOCKED, OUTLET, UNVISITED, _find, _grow_int32, _grow_int64

#: Kinds of a walk's end (see :func:`_walk_tile`).
END_NONE = -1
END_OUTLET = 0
END_EXIT = 1
END_DROP = 2
#: Kinds of a descent's end (see :func:`_descend`).
DOWN_DEPRESSION = 0
DOWN_OUTLET = 1
DOWN_EXIT = 2


def _perimeter_count(h, w):
    """Number of perimeter cells of an ``h x w`` tile."""
    if h == 1:
        return w
    m = 1 if w == 1 else 2
    return 2 * w + (h - 2) * m


def _perimeter_position(lr, lc, h, w):
    """Position of perimeter cell ``(lr, lc)`` of an ``h x w`` tile in perimeter order."""
    if lr == 0:
        return lc
    m = 1 if w == 1 else 2
    if lr == h - 1:
        return w + (h - 2) * m + lc
    return w + (lr - 1) * m + (0 if lc == 0 else 1)


def perimeter_cells(h: int, w: int) -> tuple[np.ndarray, np.ndarray]:
    """Rows and columns (tile-local) of the perimeter of an ``h x w`` tile, in order."""
    if h == 1:
        return np.zeros(w, dtype=np.int64), np.arange(w, dtype=np.int64)
    middle = np.arange(1, h - 1, dtype=np.int64)
    if w == 1:
        mid_r, mid_c = middle, np.zeros(h - 2, dtype=np.int64)
    else:
        mid_r = np.repeat(middle, 2)
        mid_c = np.tile(np.array([0, w - 1], dtype=np.int64), h - 2)
    rr = np.concatenate([np.zeros(w, dtype=np.int64), mid_r, np.full(w, h - 1, dtype=np.int64)])
    cc = np.concatenate([np.arange(w, dtype=np.int64), mid_c, np.arange(w, dtype=np.int64)])
    return rr, cc


def _tile_of(r, c, tile, tile_cols, rows, cols):
    """Tile index, tile-local row and column, and tile shape of global cell ``(r, c)``."""
    ti = r // tile
    tj = c // tile
    h = min(rows, (ti + 1) * tile) - ti * tile
    w = min(cols, (tj + 1) * tile) - tj * tile
    return ti * tile_cols + tj, r - ti * tile, c - tj * tile, h, w


def _perimeter_links(pstate, plevel, plabel, poff, node_base, tile_rows, tile_cols, tile,
                     rows, cols, width, drow, dcol, dirs):
    """Edges between touching perimeter cells of different tiles, from perimeters only.

    The same edges, in the same order, as :func:`analysis._tile_kernels._links`
    lists from the whole grid: level = the higher of the two cells' elevations,
    cells as global padded indices (width ``width``).
    """
    n_dirs = dirs.shape[0]
    cap = 1024
    eu = np.empty(cap, dtype=np.int64)
    ev = np.empty(cap, dtype=np.int64)
    elevel = np.empty(cap, dtype=np.float32)
    ecu = np.empty(cap, dtype=np.int64)
    ecv = np.empty(cap, dtype=np.int64)
    m = 0
    for ti in range(tile_rows):
        r0 = ti * tile
        r1 = min(rows, r0 + tile)
        for tj in range(tile_cols):
            c0 = tj * tile
            c1 = min(cols, c0 + tile)
            h = r1 - r0
            w = c1 - c0
            t = ti * tile_cols + tj
            for lr in range(h):
                step = 1 if (lr == 0 or lr == h - 1) else max(1, w - 1)
                lc = 0
                while lc < w:
                    r = r0 + lr
                    c = c0 + lc
                    jp = poff[t] + _perimeter_position(lr, lc, h, w)
                    lc += step
                    tp = pstate[jp]
                    if tp == BLOCKED or tp == UNVISITED:
                        continue
                    p = (r + 1) * width + c + 1
                    for k in range(n_dirs):
                        d = dirs[k]
                        rr = r + drow[d]
                        cc = c + dcol[d]
                        if rr < 0 or rr >= rows or cc < 0 or cc >= cols:
                            continue
                        if rr // tile == ti and cc // tile == tj:
                            continue
                        q = p + drow[d] * width + dcol[d]
                        if q < p:
                            continue  # listed from the other side
                        t2, lr2, lc2, h2, w2 = _tile_of(rr, cc, tile, tile_cols, rows, cols)
                        jq = poff[t2] + _perimeter_position(lr2, lc2, h2, w2)
                        tq = pstate[jq]
                        if tq == BLOCKED or tq == UNVISITED:
                            continue
                        if m == cap:
                            cap *= 2
                            eu = _resize_i64(eu, cap)
                            ev = _resize_i64(ev, cap)
                            elevel = _resize_f32(elevel, cap)
                            ecu = _resize_i64(ecu, cap)
                            ecv = _resize_i64(ecv, cap)
                        lp = plabel[jp]
                        lq = plabel[jq]
                        eu[m] = 0 if lp == 0 else node_base[t] + lp
                        ev[m] = 0 if lq == 0 else node_base[t2] + lq
                        zp = plevel[jp]
                        zq = plevel[jq]
                        elevel[m] = zp if zp > zq else zq
                        ecu[m] = p
                        ecv[m] = q
                        m += 1
    return eu[:m], ev[:m], elevel[:m], ecu[:m], ecv[:m]


def _resize_i64(values, size):
    out = np.empty(size, dtype=np.int64)
    out[: values.shape[0]] = values
    return out


def _resize_f32(values, size):
    out = np.empty(size, dtype=np.float32)
    out[: values.shape[0]] = values
    return out


def _label_tile(level, state, label, elevation, h, w, back):
    """Pieces of depressions in one finished tile: components of ``s > z`` inside it.

    Two-pass labelling with union-find, as
    :func:`analysis._flood_kernels._label_depressions` does on the whole grid,
    numbered 1..m in order of their first cell in the tile's raster order and
    written into ``label`` (0 elsewhere). Returns per piece (index 1..m) its
    first cell, its pit (lowest cell, first in raster order on ties) and the
    pit's elevation, as local padded indices; the piece's level; its cell
    count; then the tile's valid and unreached cell counts.
    """
    lw = w + 2
    n_back = back.shape[0]
    forest = np.empty(1024, dtype=np.int32)
    forest[0] = 0
    labels = 0
    unreached = 0
    valid = 0
    for lr in range(h):
        base = (lr + 1) * lw + 1
        for lc in range(w):
            i = base + lc
            t = state[i]
            label[i] = 0
            if t == BLOCKED:
                continue
            valid += 1
            if t == UNVISITED:
                unreached += 1
                continue
            if not (level[i] > elevation[lr, lc]):
                continue
            mine = 0
            for k in range(n_back):
                other = label[i + back[k]]
                if other > 0:
                    other = _find(forest, other)
                    if mine == 0:
                        mine = other
                    elif other != mine:
                        if other < mine:
                            forest[mine] = other
                            mine = other
                        else:
                            forest[other] = mine
            if mine == 0:
                labels += 1
                forest = _grow_int32(forest, labels)
                forest[labels] = labels
                mine = labels
            label[i] = mine

    final_of = np.zeros(labels + 1, dtype=np.int32)
    first = np.zeros(labels + 1, dtype=np.int64)
    pit_cell = np.zeros(labels + 1, dtype=np.int64)
    pit_z = np.full(labels + 1, np.inf, dtype=np.float32)
    piece_level = np.zeros(labels + 1, dtype=np.float32)
    count = np.zeros(labels + 1, dtype=np.int64)
    n_final = 0
    for lr in range(h):
        base = (lr + 1) * lw + 1
        for lc in range(w):
            i = base + lc
            lab = label[i]
            if lab <= 0:
                continue
            root = _find(forest, lab)
            f = final_of[root]
            if f == 0:
                n_final += 1
                f = n_final
                final_of[root] = f
                first[f] = i
                piece_level[f] = level[i]
            z = elevation[lr, lc]
            count[f] += 1
            if z < pit_z[f]:
                pit_z[f] = z
                pit_cell[f] = i
            label[i] = f
    m = n_final + 1
    return first[:m], pit_cell[:m], pit_z[:m], piece_level[:m], count[:m], valid, unreached


def _is_ring(li, lw, h, w):
    lr = li // lw
    lc = li % lw
    return lr == 0 or lr == h + 1 or lc == 0 or lc == w + 1


def _global_of(li, lw, r0, c0, cols):
    return (r0 + li // lw - 1) * cols + (c0 + li % lw - 1)


def _descend(start, state, label, offs, lw, h, w, dkind, dval, stack):
    """Where the flood-tree route from ``start`` first meets a depression, inside the tile.

    Memoised in ``dkind`` (-1 = not known yet) and ``dval``: kind
    :data:`DOWN_DEPRESSION` (value: the piece), :data:`DOWN_OUTLET`, or
    :data:`DOWN_EXIT` (value: the local index of the cell outside the tile the
    route goes on to). ``start`` itself counts. Returns the kind and value.
    """
    n = 0
    cur = start
    kind = DOWN_OUTLET
    val = 0
    while True:
        if dkind[cur] >= 0:
            kind = dkind[cur]
            val = dval[cur]
            break
        if label[cur] > 0:
            kind = DOWN_DEPRESSION
            val = label[cur]
            break
        t = state[cur]
        if t == OUTLET:
            kind = DOWN_OUTLET
            val = 0
            break
        nxt = cur + offs[t - 1]
        if _is_ring(nxt, lw, h, w):
            kind = DOWN_EXIT
            val = nxt
            dkind[cur] = kind
            dval[cur] = val
            break
        stack = _grow_int64(stack, n)
        stack[n] = cur
        n += 1
        cur = nxt
    dkind[cur] = kind
    dval[cur] = val
    for k in range(n):
        dkind[stack[k]] = kind
        dval[stack[k]] = val
    return kind, val, stack


def _walk_tile(level, state, label, h, w, offs, starts, r0, c0, cols):
    """Summaries of the flood-tree walks that find spill points, for one finished tile.

    The in-memory engine finds a depression's spill point by walking the flood
    tree from its pit while the level stays at the depression's level, and the
    depression it spills to by walking on to the next depression or outlet (see
    :func:`analysis._flood_kernels._spill_cells`). Such a walk crosses tiles, so
    each tile summarises its part of every walk that may pass through it:

    For each cell of ``starts`` (local padded indices; -1 for none) the walk
    from it at its own level: the runs of depression cells it passes (piece,
    last cell, the cell after it), and how it ends: at an outlet, by leaving the
    tile (the cell it goes on to), or by dropping below its level (the cell it
    drops to, and where the route from there meets a depression, an outlet or
    leaves the tile). Also, for each start, where the route from the start
    itself first meets a depression (the second walk, from a perimeter cell).

    Cells are returned as global flat indices.
    """
    lw = w + 2
    n_starts = starts.shape[0]
    n_local = (h + 2) * lw
    dkind = np.full(n_local, -1, dtype=np.int8)
    dval = np.zeros(n_local, dtype=np.int64)
    stack = np.empty(1024, dtype=np.int64)
    run_start = np.zeros(n_starts + 1, dtype=np.int64)
    cap = 1024
    run_label = np.empty(cap, dtype=np.int32)
    run_last = np.empty(cap, dtype=np.int64)
    run_next = np.empty(cap, dtype=np.int64)
    end_kind = np.full(n_starts, END_NONE, dtype=np.int8)
    end_cell = np.full(n_starts, -1, dtype=np.int64)
    drop_kind = np.full(n_starts, -1, dtype=np.int8)
    drop_val = np.full(n_starts, -1, dtype=np.int64)
    down_kind = np.full(n_starts, -1, dtype=np.int8)
    down_val = np.full(n_starts, -1, dtype=np.int64)
    m = 0
    for j in range(n_starts):
        e = starts[j]
        if e < 0 or state[e] == BLOCKED or state[e] == UNVISITED:
            run_start[j + 1] = m
            continue
        kind, val, stack = _descend(e, state, label, offs, lw, h, w, dkind, dval, stack)
        down_kind[j] = kind
        down_val[j] = _global_of(val, lw, r0, c0, cols) if kind == DOWN_EXIT else val
        top = level[e]
        cell = e
        previous = 0
        while True:
            lab = label[cell]
            if lab > 0:
                if lab == previous:
                    run_last[m - 1] = cell
                else:
                    if m == cap:
                        cap *= 2
                        run_label = _resize_i32(run_label, cap)
                        run_last = _resize_i64(run_last, cap)
                        run_next = _resize_i64(run_next, cap)
                    run_label[m] = lab
                    run_last[m] = cell
                    m += 1
            previous = lab
            t = state[cell]
            if t == OUTLET:
                end_kind[j] = END_OUTLET
                break
            nxt = cell + offs[t - 1]
            if _is_ring(nxt, lw, h, w):
                end_kind[j] = END_EXIT
                end_cell[j] = _global_of(nxt, lw, r0, c0, cols)
                break
            if level[nxt] < top:
                end_kind[j] = END_DROP
                end_cell[j] = _global_of(nxt, lw, r0, c0, cols)
                kind, val, stack = _descend(nxt, state, label, offs, lw, h, w, dkind, dval, stack)
                drop_kind[j] = kind
                drop_val[j] = _global_of(val, lw, r0, c0, cols) if kind == DOWN_EXIT else val
                break
            cell = nxt
        for k in range(run_start[j], m):
            last = run_last[k]
            run_next[k] = _global_of(last + offs[state[last] - 1], lw, r0, c0, cols)
            run_last[k] = _global_of(last, lw, r0, c0, cols)
        run_start[j + 1] = m
    return (run_start, run_label[:m].copy(), run_last[:m].copy(), run_next[:m].copy(),
            end_kind, end_cell, drop_kind, drop_val, down_kind, down_val)


def _resize_i32(values, size):
    out = np.empty(size, dtype=np.int32)
    out[: values.shape[0]] = values
    return out


def _union_pieces(pcomp, poff, piece_off, tile_rows, tile_cols, tile, rows, cols, drow, dcol,
                  dirs, forest):
    """Join pieces of one depression that touch across tile edges (union-find on ``forest``).

    Two depression cells that touch belong to one depression (their onset
    stages are equal), so every touching pair of perimeter cells of different
    tiles that are both in a piece joins the two pieces.
    """
    n_dirs = dirs.shape[0]
    for ti in range(tile_rows):
        r0 = ti * tile
        r1 = min(rows, r0 + tile)
        for tj in range(tile_cols):
            c0 = tj * tile
            c1 = min(cols, c0 + tile)
            h = r1 - r0
            w = c1 - c0
            t = ti * tile_cols + tj
            for lr in range(h):
                step = 1 if (lr == 0 or lr == h - 1) else max(1, w - 1)
                lc = 0
                while lc < w:
                    r = r0 + lr
                    c = c0 + lc
                    a = pcomp[poff[t] + _perimeter_position(lr, lc, h, w)]
                    lc += step
                    if a <= 0:
                        continue
                    for k in range(n_dirs):
                        d = dirs[k]
                        rr = r + drow[d]
                        cc = c + dcol[d]
                        if rr < 0 or rr >= rows or cc < 0 or cc >= cols:
                            continue
                        if rr // tile == ti and cc // tile == tj:
                            continue
                        t2, lr2, lc2, h2, w2 = _tile_of(rr, cc, tile, tile_cols, rows, cols)
                        b = pcomp[poff[t2] + _perimeter_position(lr2, lc2, h2, w2)]
                        if b <= 0:
                            continue
                        x = _find(forest, piece_off[t] + a - 1)
                        y = _find(forest, piece_off[t2] + b - 1)
                        if x != y:
                            if x < y:
                                forest[y] = x
                            else:
                                forest[x] = y


def _roots(forest):
    out = np.empty(forest.shape[0], dtype=np.int64)
    for k in range(forest.shape[0]):
        out[k] = _find(forest, k)
    return out


def _perimeter_index(g, poff, tile, tile_cols, rows, cols):
    r = g // cols
    c = g % cols
    t, lr, lc, h, w = _tile_of(r, c, tile, tile_cols, rows, cols)
    return t, poff[t] + _perimeter_position(lr, lc, h, w)


def _follow_down(g, poff, piece_off, piece_id, p_down_kind, p_down_val, tile, tile_cols,
                 rows, cols):
    """Depression id (0 for an outlet) where the route entering perimeter cell ``g`` leads."""
    while True:
        t, j = _perimeter_index(g, poff, tile, tile_cols, rows, cols)
        kind = p_down_kind[j]
        if kind == DOWN_DEPRESSION:
            return piece_id[piece_off[t] + p_down_val[j] - 1]
        if kind == DOWN_OUTLET:
            return 0
        g = p_down_val[j]


def _spill_walks(pit_tile, pit_piece, dep_level, poff, piece_off, seg_off, piece_id,
                 run_start, run_label, run_last, run_next, end_kind, end_cell, drop_kind,
                 drop_val, p_down_kind, p_down_val, p_level, tile, tile_cols, rows, cols):
    """Spill cell and receiving depression of every depression, from the tile summaries.

    Joins the walk summaries of :func:`_walk_tile` tile after tile exactly as
    :func:`analysis._flood_kernels._spill_cells` walks the whole flood tree:
    the spill cell is the cell after the walk's last cell in the depression
    (while the walk stays at the depression's level), and the receiving
    depression the first other depression further down (0 for an outlet).
    ``seg_off[t]`` is the first summary of tile ``t``: its perimeter cells in
    perimeter order, then its pieces' pits. Depressions are 1..n (index 0 unused).
    """
    n = pit_tile.shape[0]
    spill = np.full(n, -1, dtype=np.int64)
    spills_to = np.zeros(n, dtype=np.int32)
    for f in range(1, n):
        t = pit_tile[f]
        seg = seg_off[t] + (poff[t + 1] - poff[t]) + pit_piece[f] - 1
        top = dep_level[f]
        after = -1
        target = 0
        while True:
            for k in range(run_start[seg], run_start[seg + 1]):
                g = piece_id[piece_off[t] + run_label[k] - 1]
                if g == f:
                    spill[f] = run_next[k]
                    after = -1
                elif after < 0:
                    after = g
            kind = end_kind[seg]
            if kind == END_OUTLET:
                target = 0
                break
            if kind == END_DROP:
                dk = drop_kind[seg]
                if dk == DOWN_DEPRESSION:
                    target = piece_id[piece_off[t] + drop_val[seg] - 1]
                elif dk == DOWN_OUTLET:
                    target = 0
                else:
                    target = _follow_down(drop_val[seg], poff, piece_off, piece_id, p_down_kind,
                                          p_down_val, tile, tile_cols, rows, cols)
                break
            q = end_cell[seg]
            t2, j2 = _perimeter_index(q, poff, tile, tile_cols, rows, cols)
            if p_level[j2] < top:
                target = _follow_down(q, poff, piece_off, piece_id, p_down_kind, p_down_val,
                                      tile, tile_cols, rows, cols)
                break
            t = t2
            seg = seg_off[t2] + (j2 - poff[t2])
        spills_to[f] = after if after >= 0 else target
    return spill, spills_to


def _accumulate(ids, level, elevation, row_areas, count, area, volume):
    """Depression totals over a block of rows, cell by cell in raster order.

    The same additions in the same order as the second pass of
    :func:`analysis._flood_kernels._label_depressions`, so the sums are the same
    bits when the blocks are given top to bottom.
    """
    rows, cols = ids.shape
    for r in range(rows):
        a = row_areas[r]
        for c in range(cols):
            f = ids[r, c]
            if f <= 0:
                continue
            count[f] += 1
            area[f] += a
            volume[f] += (np.float64(level[r, c]) - np.float64(elevation[r, c])) * a


_perimeter_position = njit(inline="always", cache=True)(_perimeter_position)
_tile_of = njit(inline="always", cache=True)(_tile_of)
_is_ring = njit(inline="always", cache=True)(_is_ring)
_global_of = njit(inline="always", cache=True)(_global_of)
_resize_i64 = njit(cache=True)(_resize_i64)
_resize_f32 = njit(cache=True)(_resize_f32)
_resize_i32 = njit(cache=True)(_resize_i32)
_descend = njit(cache=True)(_descend)
_perimeter_index = njit(cache=True)(_perimeter_index)
_follow_down = njit(cache=True)(_follow_down)
perimeter_links = njit(cache=True)(_perimeter_links)
label_tile = njit(nogil=True, cache=True)(_label_tile)
walk_tile = njit(nogil=True, cache=True)(_walk_tile)
union_pieces = njit(cache=True)(_union_pieces)
roots = njit(cache=True)(_roots)
spill_walks = njit(cache=True)(_spill_walks)
accumulate = njit(nogil=True, cache=True)(_accumulate)
