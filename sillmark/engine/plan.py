"""The tile plan: where tiles and their perimeters lie on a grid cut into square tiles.

The Priority-Flood pipeline (:mod:`sillmark.engine.pipeline`) cuts a ``rows x cols`` grid into tiles of ``tile x tile``
cells (the last row and column of tiles may be smaller), numbered
``t = ti * tile_cols + tj`` in raster order. The tiled Priority-Flood of
Barnes (2016) joins tiles only through their *perimeters*: a tile's cells on
its edge, in *perimeter order* (its first row left to right, then the first
and last cell of every middle row, then its last row left to right; a tile one
column wide lists each middle cell once). The perimeters of all tiles are
concatenated in tile order, tile ``t``'s from ``poff[t]``.

:class:`TilePlan` answers these questions for Python code; the compiled helpers
below it answer them inside the kernels (:mod:`sillmark.engine._tile_kernels`,
:mod:`sillmark.engine._tiled_kernels`, :mod:`sillmark.engine._spill_kernels`),
so that every step walks the tile edges in the same order: the graph they
solve, and so the results, depend on that order. Global cells are addressed by
``g = row * cols + col``.

Reference: Barnes, R. (2016). Parallel priority-flood depression filling for
trillion cell digital elevation models on desktops or clusters. Computers &
Geosciences 96, 56-68. doi:10.1016/j.cageo.2016.07.001
"""

from __future__ import annotations

import dataclasses

import numpy as np
from numba import njit

from sillmark.errors import InvalidParameter

#: Largest tile side: a tile's padded cells must fit the 32-bit heap index.
MAX_TILE_SIZE = 65533


@dataclasses.dataclass(frozen=True)
class TilePlan:
    """A ``rows x cols`` grid cut into square tiles of ``tile`` cells, in raster order.

    Tile ``k = ti * tile_cols + tj`` covers rows ``ti * tile`` up to (not
    including) ``min(rows, (ti + 1) * tile)`` and the matching columns.

    Examples
    --------
    >>> plan = TilePlan(rows=5, cols=7, tile=4)
    >>> plan.tiles, plan.bounds(1)
    (4, (0, 4, 4, 7))
    """

    rows: int
    cols: int
    tile: int

    def __post_init__(self) -> None:
        tile = self.tile
        if isinstance(tile, bool) or not isinstance(tile, (int, np.integer)):
            raise InvalidParameter(f"tile_size must be a whole number of cells, not {tile!r}")
        if not 1 <= int(tile) <= MAX_TILE_SIZE:
            raise InvalidParameter(
                f"tile_size must be between 1 and {MAX_TILE_SIZE} cells, not {tile}"
            )
        object.__setattr__(self, "tile", int(tile))
        object.__setattr__(self, "rows", int(self.rows))
        object.__setattr__(self, "cols", int(self.cols))

    @property
    def shape(self) -> tuple[int, int]:
        return self.rows, self.cols

    @property
    def tile_rows(self) -> int:
        return -(-self.rows // self.tile)

    @property
    def tile_cols(self) -> int:
        return -(-self.cols // self.tile)

    @property
    def tiles(self) -> int:
        return self.tile_rows * self.tile_cols

    def bounds(self, k: int) -> tuple[int, int, int, int]:
        """``(r0, r1, c0, c1)`` of tile ``k``."""
        ti, tj = divmod(int(k), self.tile_cols)
        t = self.tile
        return ti * t, min(self.rows, (ti + 1) * t), tj * t, min(self.cols, (tj + 1) * t)

    def perimeter(self, k: int) -> np.ndarray:
        """Local padded indices (width ``w + 2``) of tile ``k``'s perimeter, in perimeter order."""
        r0, r1, c0, c1 = self.bounds(k)
        h, w = r1 - r0, c1 - c0
        pr, pc = perimeter_cells(h, w)
        return (pr + 1) * (w + 2) + pc + 1


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


def _perimeter_index(g, poff, tile, tile_cols, rows, cols):
    """Tile and position in the concatenated perimeters of global perimeter cell ``g``."""
    r = g // cols
    c = g % cols
    t, lr, lc, h, w = _tile_of(r, c, tile, tile_cols, rows, cols)
    return t, poff[t] + _perimeter_position(lr, lc, h, w)


def _grid_perimeters(tile, tile_rows, tile_cols, rows, cols):
    """Global cell and tile of every perimeter cell of every tile, in concatenated order.

    Entry ``j`` is the cell at position ``j`` of the concatenated perimeters
    (tile by tile, each in perimeter order, which is also its raster order).
    """
    n = 0
    for ti in range(tile_rows):
        h = min(rows, (ti + 1) * tile) - ti * tile
        for tj in range(tile_cols):
            n += _perimeter_count(h, min(cols, (tj + 1) * tile) - tj * tile)
    cell = np.empty(n, dtype=np.int64)
    tile_of = np.empty(n, dtype=np.int64)
    j = 0
    for ti in range(tile_rows):
        r0 = ti * tile
        h = min(rows, r0 + tile) - r0
        for tj in range(tile_cols):
            c0 = tj * tile
            w = min(cols, c0 + tile) - c0
            t = ti * tile_cols + tj
            for lr in range(h):
                step = 1 if (lr == 0 or lr == h - 1) else max(1, w - 1)
                lc = 0
                while lc < w:
                    cell[j] = (r0 + lr) * cols + c0 + lc
                    tile_of[j] = t
                    j += 1
                    lc += step
    return cell, tile_of


def _across_tiles(r, c, d, tile, rows, cols, drow, dcol):
    """Neighbour ``(rr, cc)`` of ``(r, c)`` in direction ``d`` if it lies on the grid in another tile.

    ``(-1, -1)`` otherwise.
    """
    rr = r + drow[d]
    cc = c + dcol[d]
    if rr < 0 or rr >= rows or cc < 0 or cc >= cols:
        return -1, -1
    if rr // tile == r // tile and cc // tile == c // tile:
        return -1, -1
    return rr, cc


def _push_link(m, eu, ev, elevel, ecu, ecv, u, v, level, cu, cv):
    """Store link ``m`` (nodes ``u``, ``v``, its level, its two cells) in the growing arrays.

    The arrays are doubled when full; returns them (new ones if they grew).
    """
    if m == eu.shape[0]:
        cap = 2 * m
        eu = _resize_i64(eu, cap)
        ev = _resize_i64(ev, cap)
        elevel = _resize_f32(elevel, cap)
        ecu = _resize_i64(ecu, cap)
        ecv = _resize_i64(ecv, cap)
    eu[m] = u
    ev[m] = v
    elevel[m] = level
    ecu[m] = cu
    ecv[m] = cv
    return eu, ev, elevel, ecu, ecv


def _resize_i64(values, size):
    out = np.empty(size, dtype=np.int64)
    out[: values.shape[0]] = values
    return out


def _resize_f32(values, size):
    out = np.empty(size, dtype=np.float32)
    out[: values.shape[0]] = values
    return out


_perimeter_count = njit(inline="always", cache=True)(_perimeter_count)
_perimeter_position = njit(inline="always", cache=True)(_perimeter_position)
_tile_of = njit(inline="always", cache=True)(_tile_of)
_perimeter_index = njit(cache=True)(_perimeter_index)
_grid_perimeters = njit(cache=True)(_grid_perimeters)
_across_tiles = njit(inline="always", cache=True)(_across_tiles)
_resize_i64 = njit(cache=True)(_resize_i64)
_resize_f32 = njit(cache=True)(_resize_f32)
_push_link = njit(cache=True)(_push_link)
