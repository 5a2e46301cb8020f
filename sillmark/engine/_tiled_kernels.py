"""Compiled loops of the tile pipeline's later steps (private; see :mod:`sillmark.engine.pipeline`).

The pipeline floods every tile with :func:`sillmark.engine._tile_kernels.flood_tile_arrays`
and finishes it with :func:`sillmark.engine._tile_kernels.finish_tile`, both on the
tile's own padded arrays (width ``lw = w + 2``, local index
``li = (lr + 1) * lw + lc + 1``). The loops here do the rest:

- (the *perimeter* of a tile, its cells in a fixed order, which is all the
  client ever sees of a tile, is laid out by :mod:`sillmark.engine.plan`);
- the links between touching perimeter cells of neighbouring tiles, in
  perimeter order (the graph solved, and so the results, depend on it);
- per tile, after finishing: the pieces of depressions inside the tile
  (connected components of ``s > z``, numbered in the tile's raster order);
- on the client: the union of pieces across tile edges and the depression
  totals accumulated in raster order.

Spill points are summarised per tile and resolved on the client by
:mod:`sillmark.engine._spill_kernels`, in the same perimeter order.

Global cells are addressed by their flat index ``g = row * cols + col``. The
kernels trust their inputs.
"""

from __future__ import annotations

import numpy as np
from numba import njit

from sillmark.engine._flood_kernels import BLOCKED, UNVISITED, _find, _grow_int32
from sillmark.engine.plan import (  # noqa: F401  (perimeter_cells: re-exported)
    _across_tiles,
    _grid_perimeters,
    _perimeter_index,
    _push_link,
    perimeter_cells,
)


def _perimeter_links(pstate, plevel, plabel, poff, node_base, tile_rows, tile_cols, tile,
                     rows, cols, width, drow, dcol, dirs):
    """Edges between touching perimeter cells of different tiles, from perimeters only.

    The same edges, in the same order, as :func:`sillmark.engine._tile_kernels._links`
    lists from the whole grid: level = the higher of the two cells' elevations,
    cells as global padded indices (width ``width``).
    """
    n_dirs = dirs.shape[0]
    eu = np.empty(1024, dtype=np.int64)
    ev = np.empty(1024, dtype=np.int64)
    elevel = np.empty(1024, dtype=np.float32)
    ecu = np.empty(1024, dtype=np.int64)
    ecv = np.empty(1024, dtype=np.int64)
    m = 0
    cells, tiles = _grid_perimeters(tile, tile_rows, tile_cols, rows, cols)
    for jp in range(cells.shape[0]):  # jp: position in the concatenated perimeters
        tp = pstate[jp]
        if tp == BLOCKED or tp == UNVISITED:
            continue
        r = cells[jp] // cols
        c = cells[jp] - r * cols
        p = (r + 1) * width + c + 1
        for k in range(n_dirs):
            d = dirs[k]
            rr, cc = _across_tiles(r, c, d, tile, rows, cols, drow, dcol)
            if rr < 0:
                continue
            q = p + drow[d] * width + dcol[d]
            if q < p:
                continue  # listed from the other side
            t2, jq = _perimeter_index(rr * cols + cc, poff, tile, tile_cols, rows, cols)
            tq = pstate[jq]
            if tq == BLOCKED or tq == UNVISITED:
                continue
            lp = plabel[jp]
            lq = plabel[jq]
            zp = plevel[jp]
            zq = plevel[jq]
            eu, ev, elevel, ecu, ecv = _push_link(
                m, eu, ev, elevel, ecu, ecv, 0 if lp == 0 else node_base[tiles[jp]] + lp,
                0 if lq == 0 else node_base[t2] + lq, zp if zp > zq else zq, p, q,
            )
            m += 1
    return eu[:m], ev[:m], elevel[:m], ecu[:m], ecv[:m]


def _label_tile(level, state, label, elevation, h, w, back):
    """Pieces of depressions in one finished tile: components of ``s > z`` inside it.

    Two-pass labelling with union-find (connected components of the cells
    whose onset stage is above their ground, 8- or 4-connected as the flood),
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


def _union_pieces(pcomp, poff, piece_off, tile_rows, tile_cols, tile, rows, cols, drow, dcol,
                  dirs, forest):
    """Join pieces of one depression that touch across tile edges (union-find on ``forest``).

    Two depression cells that touch belong to one depression (their onset
    stages are equal), so every touching pair of perimeter cells of different
    tiles that are both in a piece joins the two pieces.
    """
    n_dirs = dirs.shape[0]
    cells, tiles = _grid_perimeters(tile, tile_rows, tile_cols, rows, cols)
    for jp in range(cells.shape[0]):
        a = pcomp[jp]
        if a <= 0:
            continue
        r = cells[jp] // cols
        c = cells[jp] - r * cols
        for k in range(n_dirs):
            rr, cc = _across_tiles(r, c, dirs[k], tile, rows, cols, drow, dcol)
            if rr < 0:
                continue
            t2, jq = _perimeter_index(rr * cols + cc, poff, tile, tile_cols, rows, cols)
            b = pcomp[jq]
            if b <= 0:
                continue
            x = _find(forest, piece_off[tiles[jp]] + a - 1)
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


def _accumulate(ids, level, elevation, row_areas, count, area, volume):
    """Depression totals over a block of rows, cell by cell in raster order.

    Cells are added in raster order, so the sums are the same bits however the
    grid is cut into blocks, as long as the blocks are given top to bottom.
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


perimeter_links = njit(cache=True)(_perimeter_links)
label_tile = njit(nogil=True, cache=True)(_label_tile)
union_pieces = njit(cache=True)(_union_pieces)
roots = njit(cache=True)(_roots)
accumulate = njit(nogil=True, cache=True)(_accumulate)
