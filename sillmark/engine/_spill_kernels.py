"""Compiled loops of the canonical spill points (private; see :mod:`sillmark.engine.flood`).

The spill point of a depression, the depression it spills to and the
controlling sill of a route are defined from the onset stage ``s``, the
depression ids and the outlets alone, never from the flood tree, so that every
tiling of the flood gives the same answer. The rule is stated in full in the
module docstring of :mod:`sillmark.engine.flood` ("Spill points"). In short, at a
depression's spill elevation ``S`` the cells with ``s == S`` form a small graph
of *dry areas* (connected cells with ``s == z == S``) and *depressions* (at
spill elevation ``S``), joined by adjacency; dry areas holding an outlet or a
cell next to lower ground are *ways out*, every node gets its hop distance from
the nearest way out by breadth-first search, and a depression spills over its
first rim cell (raster order) in an adjacent dry area one hop nearer a way out.

Two steps, so that the out-of-core engine can split the work:

1. :func:`summarise_tile`, per tile (the in-memory engine passes the whole grid
   as one tile): labels the dry areas that matter (those next to a depression
   at their level, and for tiles those touching the tile's perimeter), finds
   each one's first *local* way-out cell, its first rim cell next to each
   depression piece, and where the canonical descent from its way out leads
   inside the tile. Per perimeter cell it reports its dry area and its lowest
   neighbour inside the tile. All of it is a few numbers per dry area, per
   rim contact and per perimeter cell.
2. :func:`sillmark.engine._spill_resolve_kernels.resolve_spills`, on the client: joins dry areas across tile edges
   (union-find over the perimeters), completes the way-out tests across tile
   edges, runs the breadth-first search over the graph of all levels at once,
   and picks every depression's spill cell and ``spills_to``.

:func:`sillmark.engine._route_kernels.route_through_sill` builds a route that
passes through that spill cell.

Layout: as in :mod:`sillmark.engine._tile_kernels`, a tile's arrays are padded by one
cell, width ``lw = w + 2``, local index ``(lr + 1) * lw + lc + 1``; cells
outside the tile (the ring) have a NaN level. Results leave the tile as global
flat indices ``row * cols + col``, whose order is raster order. The kernels
trust their inputs.

References
----------
Moore, E. F. (1959). The shortest path through a maze. Proceedings of an
International Symposium on the Theory of Switching, Harvard University Press,
285-292 (breadth-first search).
Tarjan, R. E., van Leeuwen, J. (1984). Worst-case analysis of set union
algorithms. Journal of the ACM 31(2), 245-281. doi:10.1145/62.2160
Barnes, R. (2016). Parallel priority-flood depression filling for trillion cell
digital elevation models on desktops or clusters. Computers & Geosciences 96,
56-68. doi:10.1016/j.cageo.2016.07.001 (the tile-and-perimeter scheme).
"""

from __future__ import annotations

import numpy as np
from numba import njit

from sillmark.engine._flood_kernels import OUTLET

#: Where a way out leads (kinds of a descent's end).
KIND_NONE = -1
KIND_OUTLET = 0
KIND_DEPRESSION = 1
KIND_AREA = 2
#: The way-out cell is on the tile's perimeter: the client decides with the
#: neighbours across the tile edge.
KIND_PERIMETER = 3

_UNKNOWN = -2
_TOUCHES = 1
_ADJACENT = 2
# Columns of the per-piece table inside summarise_tile.
_SEED = 0
_EXIT = 1
_FLAGS = 2
_COMPACT = 3
_MEMO_KIND = 4
_MEMO_VAL = 5
_PIECE_COLUMNS = 6


def _grown(values, count):
    """``values`` with room for item ``count`` (doubled when full), 1-D or rows of 2-D."""
    if count < values.shape[0]:
        return values
    bigger = np.empty((values.shape[0] * 2,) + values.shape[1:], dtype=values.dtype)
    bigger[:count] = values[:count]
    return bigger


def _on_perimeter(x, lw, h, w):
    lr = x // lw
    lc = x - lr * lw
    return lr == 1 or lr == h or lc == 1 or lc == w


def _lowest(x, level, offs):
    """Lowest neighbour of ``x``: (its level, index into ``offs``), first in order on ties.

    (+inf, -1) when no neighbour has a level (NaN never compares lower).
    """
    best = np.float32(np.inf)
    best_k = -1
    for k in range(offs.shape[0]):
        v = level[x + offs[k]]
        if v < best:
            best = v
            best_k = k
    return best, best_k


def _rim_row(level, label, base, w, offs, near, found):
    """Unlabelled dry cells of the row from ``base`` touching a depression cell at their level.

    Writes them into ``found`` (in order) and returns their number; ``near``
    is boolean scratch of ``w`` cells. The marking loops run over contiguous
    slices with no branch, so LLVM vectorises them (about five times faster
    than indexing ``base + c + o`` on every cell).
    """
    for c in range(w):
        near[c] = False
    me = level[base:base + w]
    for k in range(offs.shape[0]):
        o = offs[k]
        lab = label[base + o:base + o + w]
        lev = level[base + o:base + o + w]
        for c in range(w):
            near[c] |= (lab[c] > 0) & (lev[c] == me[c])
    mine = label[base:base + w]
    n = 0
    for c in range(w):
        if near[c] and mine[c] == 0:
            found[n] = base + c
            n += 1
    return n


def _fill_area(seed, piece, level, state, label, offs, lw, h, w, tiled, stack, mark, pos,
               adj, n_adj):
    """Label the dry area of ``seed`` (cells at its level with ``label == 0``) as ``-piece``.

    Depth-first flood fill. Returns the area's first way-out cell in local
    index order (an outlet, or a cell with a lower neighbour inside the tile;
    -1 for none) and its flags (touches the tile's perimeter; next to a
    depression piece at its level), and appends one rim contact per adjacent
    depression piece to ``adj`` (piece, depression piece, first dry cell next
    to it).
    """
    top = level[seed]
    label[seed] = -piece
    stack[0] = np.uint32(seed)
    n = 1
    exit_cell = np.int64(-1)
    touches = False
    first_adj = n_adj
    n_dirs = offs.shape[0]
    while n > 0:
        n -= 1
        x = np.int64(stack[n])
        way = state[x] == OUTLET
        for k in range(n_dirs):
            nb = x + offs[k]
            v = level[nb]
            if v < top:
                way = True
            elif v == top:
                lab = label[nb]
                if lab == 0:
                    label[nb] = -piece
                    stack = _grown(stack, n)
                    stack[n] = np.uint32(nb)
                    n += 1
                elif lab > 0:
                    if mark[lab] != piece:
                        mark[lab] = piece
                        adj = _grown(adj, n_adj)
                        pos[lab] = n_adj
                        adj[n_adj, 0] = piece
                        adj[n_adj, 1] = lab
                        adj[n_adj, 2] = x
                        n_adj += 1
                    elif x < adj[pos[lab], 2]:
                        adj[pos[lab], 2] = x
        if way and (exit_cell < 0 or x < exit_cell):
            exit_cell = x
        if tiled and not touches and _on_perimeter(x, lw, h, w):
            touches = True
    flags = (_TOUCHES if touches else 0) | (_ADJACENT if n_adj > first_adj else 0)
    return exit_cell, flags, stack, adj, n_adj


def _new_area(seed, pieces, n_pieces, level, state, label, offs, lw, h, w, tiled, stack, mark,
              pos, adj, n_adj):
    n_pieces += 1
    pieces = _grown(pieces, n_pieces)
    exit_cell, flags, stack, adj, n_adj = _fill_area(
        seed, n_pieces, level, state, label, offs, lw, h, w, tiled, stack, mark, pos, adj, n_adj
    )
    pieces[n_pieces, _SEED] = seed
    pieces[n_pieces, _EXIT] = exit_cell
    pieces[n_pieces, _FLAGS] = flags
    pieces[n_pieces, _COMPACT] = 0
    pieces[n_pieces, _MEMO_KIND] = _UNKNOWN
    pieces[n_pieces, _MEMO_VAL] = 0
    return pieces, n_pieces, stack, adj, n_adj


def _descend(cell, pieces, n_pieces, level, state, label, offs, lw, h, w, tiled, stack, mark,
             pos, adj, n_adj, chain):
    """Where the canonical descent entering ``cell`` leads, as far as the tile can tell.

    ``cell`` in a depression piece: that piece. A dry cell: its dry area; an
    area the client must see (reported, compact index) ends the descent there;
    any other area lies inside the tile and is a way out (an area with no way
    out lies next to a depression at its level and so is reported), so the
    descent goes on from its first way-out cell: an outlet ends it, otherwise
    the cell's lowest neighbour (first in direction order) is entered. Levels
    fall at every step, so the descent ends. Memoised per area.
    """
    n_chain = 0
    kind = KIND_NONE
    val = np.int64(0)
    while True:
        lab = label[cell]
        if lab > 0:
            kind = KIND_DEPRESSION
            val = np.int64(lab)
            break
        if lab == 0:
            pieces, n_pieces, stack, adj, n_adj = _new_area(
                cell, pieces, n_pieces, level, state, label, offs, lw, h, w, tiled, stack,
                mark, pos, adj, n_adj,
            )
            lab = label[cell]
        p = -lab
        if pieces[p, _COMPACT] > 0:
            kind = KIND_AREA
            val = pieces[p, _COMPACT]
            break
        if pieces[p, _MEMO_KIND] != _UNKNOWN:
            kind = pieces[p, _MEMO_KIND]
            val = pieces[p, _MEMO_VAL]
            break
        chain = _grown(chain, n_chain)
        chain[n_chain] = p
        n_chain += 1
        e = pieces[p, _EXIT]
        if e < 0:
            kind = KIND_NONE
            break
        if state[e] == OUTLET:
            kind = KIND_OUTLET
            val = np.int64(0)
            break
        _, k = _lowest(e, level, offs)
        cell = e + offs[k]
    for i in range(n_chain):
        pieces[chain[i], _MEMO_KIND] = kind
        pieces[chain[i], _MEMO_VAL] = val
    return kind, val, pieces, n_pieces, stack, adj, n_adj, chain


def _summarise_tile(level, state, label, h, w, offs, dirs, n_dep, tiled, perimeter, r0, c0,
                    cols):
    """Step 1 for one tile: the dry areas that matter and where their ways out lead.

    Parameters
    ----------
    level, state, label : padded flat arrays of the finished tile
        Onset stage (NaN on the ring, nodata, unreached), flood-tree state
        (:data:`OUTLET` on outlets) and depression pieces (1..n_dep, 0
        elsewhere). ``label`` is overwritten: dry areas labelled here get
        negative numbers (callers restore or discard it).
    offs, dirs : neighbour offsets (width ``w + 2``) and their direction codes
        0..7, in direction order.
    tiled : bool
        True for a tile of the out-of-core engine: dry areas touching the
        perimeter are reported too, and way outs on the perimeter are left to
        the client. False for the whole grid of the in-memory engine.
    perimeter : local indices of the tile's perimeter cells (empty if not tiled).
    r0, c0, cols : the tile's origin and the grid's width, for global indices.

    Returns
    -------
    Reported dry areas (compact 1..m, arrays indexed 0..m-1): level, first
    local way-out cell (global, -1 for none), where it leads (kind, value:
    depression piece, compact area, or :data:`KIND_PERIMETER`). Rim contacts:
    compact area, depression piece, first dry cell (global). Per perimeter
    cell: compact area (0 if not dry), lowest neighbour inside the tile (level,
    +inf for none; direction code, -1) and where entering it leads (kind, value).
    """
    lw = w + 2
    pieces = np.empty((64, _PIECE_COLUMNS), dtype=np.int64)
    n_pieces = 0
    stack = np.empty(256, dtype=np.uint32)
    chain = np.empty(64, dtype=np.int64)
    mark = np.zeros(n_dep + 1, dtype=np.int64)
    pos = np.zeros(n_dep + 1, dtype=np.int64)
    adj = np.empty((64, 3), dtype=np.int64)
    n_adj = 0

    # Every dry cell next to a depression cell at its level seeds its dry area.
    # Row by row: first mark such cells (a branch-free loop), then fill.
    # (No call inside the per-cell loops: numba would then count references to
    # the growing arrays on every cell.)
    near = np.zeros(w, dtype=np.bool_)
    found = np.empty(w, dtype=np.int64)
    for lr in range(1, h + 1):
        base = lr * lw + 1
        n_found = _rim_row(level, label, base, w, offs, near, found)
        for j in range(n_found):
            if label[found[j]] == 0:  # not filled from an earlier seed of this row
                pieces, n_pieces, stack, adj, n_adj = _new_area(
                    found[j], pieces, n_pieces, level, state, label, offs, lw, h, w, tiled,
                    stack, mark, pos, adj, n_adj,
                )
    # On a tile, so does every dry perimeter cell.
    if tiled:
        for j in range(perimeter.shape[0]):
            x = perimeter[j]
            if label[x] == 0 and level[x] == level[x]:
                pieces, n_pieces, stack, adj, n_adj = _new_area(
                    x, pieces, n_pieces, level, state, label, offs, lw, h, w, tiled, stack,
                    mark, pos, adj, n_adj,
                )
    n_reported = n_pieces
    m = 0
    for p in range(1, n_reported + 1):
        if pieces[p, _FLAGS] != 0:
            m += 1
            pieces[p, _COMPACT] = m

    a_level = np.empty(m, dtype=np.float32)
    a_exit = np.full(m, -1, dtype=np.int64)
    a_kind = np.full(m, KIND_NONE, dtype=np.int8)
    a_val = np.zeros(m, dtype=np.int64)
    for p in range(1, n_reported + 1):
        q = pieces[p, _COMPACT] - 1
        if q < 0:
            continue
        a_level[q] = level[pieces[p, _SEED]]
        e = pieces[p, _EXIT]
        if e < 0:
            continue
        a_exit[q] = (r0 + e // lw - 1) * cols + (c0 + e % lw - 1)
        if tiled and _on_perimeter(e, lw, h, w):
            a_kind[q] = KIND_PERIMETER
        elif state[e] == OUTLET:
            a_kind[q] = KIND_OUTLET
        else:
            _, k = _lowest(e, level, offs)
            kind, val, pieces, n_pieces, stack, adj, n_adj, chain = _descend(
                e + offs[k], pieces, n_pieces, level, state, label, offs, lw, h, w, tiled,
                stack, mark, pos, adj, n_adj, chain,
            )
            a_kind[q] = kind
            a_val[q] = val

    n_per = perimeter.shape[0]
    p_area = np.zeros(n_per, dtype=np.int32)
    p_low_level = np.full(n_per, np.inf, dtype=np.float32)
    p_low_dir = np.full(n_per, -1, dtype=np.int8)
    p_low_kind = np.full(n_per, KIND_NONE, dtype=np.int8)
    p_low_val = np.zeros(n_per, dtype=np.int64)
    for j in range(n_per):
        x = perimeter[j]
        if label[x] >= 0:
            continue
        p_area[j] = pieces[-label[x], _COMPACT]
        v, k = _lowest(x, level, offs)
        if k < 0:
            continue
        p_low_level[j] = v
        p_low_dir[j] = dirs[k]
        if v < level[x]:
            kind, val, pieces, n_pieces, stack, adj, n_adj, chain = _descend(
                x + offs[k], pieces, n_pieces, level, state, label, offs, lw, h, w, tiled,
                stack, mark, pos, adj, n_adj, chain,
            )
            p_low_kind[j] = kind
            p_low_val[j] = val

    n_out = 0
    for e in range(n_adj):
        if pieces[adj[e, 0], _COMPACT] > 0:
            n_out += 1
    adj_area = np.empty(n_out, dtype=np.int32)
    adj_dep = np.empty(n_out, dtype=np.int32)
    adj_cell = np.empty(n_out, dtype=np.int64)
    n_out = 0
    for e in range(n_adj):
        q = pieces[adj[e, 0], _COMPACT]
        if q == 0:
            continue  # (every area next to a depression is reported; kept safe)
        adj_area[n_out] = q
        adj_dep[n_out] = adj[e, 1]
        x = adj[e, 2]
        adj_cell[n_out] = (r0 + x // lw - 1) * cols + (c0 + x % lw - 1)
        n_out += 1
    return (a_level, a_exit, a_kind, a_val, adj_area, adj_dep, adj_cell,
            p_area, p_low_level, p_low_dir, p_low_kind, p_low_val)


_grown = njit(cache=True)(_grown)
_on_perimeter = njit(inline="always", cache=True)(_on_perimeter)
_lowest = njit(inline="always", cache=True)(_lowest)
_rim_row = njit(cache=True)(_rim_row)
_fill_area = njit(cache=True)(_fill_area)
_new_area = njit(cache=True)(_new_area)
_descend = njit(cache=True)(_descend)
summarise_tile = njit(nogil=True, cache=True)(_summarise_tile)
