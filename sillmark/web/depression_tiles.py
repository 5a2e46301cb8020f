"""Depressions and spill points drawn as map tiles, so a site with 10^5 of them
costs the browser no more than its water-level map.

Two layers, both 256 × 256 palette PNGs on the Web Mercator XYZ scheme (see
:mod:`sillmark.web.render`, whose pixel-to-cell lookup they reuse), and both the
same at every water level, so a level change redraws only the water-level map
(which already shows each depression's state: flooded once overtopped, hatched
as shielded low ground while cut off):

- **depressions**: each pixel takes the depression id of the cell under it;
  depressions are washed in a light slate tint and edged where the id changes
  between neighbouring pixels;
- **spill points**: a small diamond at each spill point.

Only the depressions the site lists are drawn: those that reach its
significance minimum (:mod:`sillmark.products.significance`), the same rows as
the depression table (``DepressionIndex.listed``); a noise-made pit below the
minimum is neither tinted nor given a spill point. A listed depression is
drawn only once it covers at least :data:`VISIBLE_PIXELS`
pixels at the tile's zoom, and a spill point likewise: the thousands of
centimetre-deep pits of a survey DEM do not speckle the whole map at low zoom
and appear as one zooms in. The rule is Sillmark's own. At most
:data:`MAX_GLYPHS` spill points per tile, the largest depressions first.

No Flask in this module.
"""

from __future__ import annotations

import math
import threading

import numpy as np
import pyproj

from sillmark.web import render
from sillmark.web.caches import LockedLRU

#: Pixels a depression must cover at a zoom to be drawn (and its spill point).
VISIBLE_PIXELS = 4.0
#: Spill-point diamonds drawn on one tile at most.
MAX_GLYPHS = 300
#: Half-width of a spill-point diamond, in pixels (the border ring included).
GLYPH_RADIUS = 4

# Palette of the depression layer: 0 clear, 1 tint, 2 edge (a slate of Sillmark's own).
DEPRESSION_PLTE = bytes([0, 0, 0, 74, 86, 104, 52, 62, 80])
DEPRESSION_TRNS = bytes([0, 40, 230])
TINT, EDGE = 1, 2
# Palette of the spill-point layer: 0 clear, 1 diamond fill, 2 its border.
SPILL_PLTE = bytes([0, 0, 0, 224, 176, 67, 43, 33, 24])
SPILL_TRNS = bytes([0, 255, 255])
#: The diamond stamp: 2 border, 1 fill, 0 clear.
_Y, _X = np.mgrid[-GLYPH_RADIUS:GLYPH_RADIUS + 1, -GLYPH_RADIUS:GLYPH_RADIUS + 1]
_D = np.abs(_Y) + np.abs(_X)
GLYPH = np.where(_D <= GLYPH_RADIUS - 2, 1, np.where(_D <= GLYPH_RADIUS, 2, 0)).astype(np.uint8)


def pixel_metres(z: int, y: int) -> float:
    """Ground size of one pixel of tile row ``y`` at zoom ``z``, in metres (at the tile's
    middle latitude: the Mercator scale factor is 1 / cos(latitude))."""
    n = 1 << z
    lat = math.atan(math.sinh(math.pi * (1 - 2 * (y + 0.5) / n)))
    return 2 * render.MERCATOR_HALF / (render.TILE * n) * math.cos(lat)


class DepressionTiles:
    """Draws the depression and spill-point map tiles of one open site run.

    Parameters
    ----------
    index : sillmark.web.depression_index.DepressionIndex
        The site's depressions (areas, states, spill points); only those it
        lists (``index.listed``, every one when None) are drawn.
    ids_flat : (rows * cols,) integer array
        The depression id raster, flattened (may be memory-mapped).
    crs : pyproj.CRS
        The DEM's horizontal CRS (spill points are given in it).
    """

    def __init__(self, index, ids_flat: np.ndarray, crs: pyproj.CRS) -> None:
        self.index = index
        self.ids_flat = ids_flat
        to_merc = pyproj.Transformer.from_crs(crs, render.WEB_MERCATOR, always_xy=True)
        sx, sy = to_merc.transform(np.asarray(index.table.spill_x, dtype=np.float64),
                                   np.asarray(index.table.spill_y, dtype=np.float64))
        self.spill_mx, self.spill_my = np.asarray(sx, dtype=np.float64), np.asarray(sy, dtype=np.float64)
        ok = np.isfinite(self.spill_mx) & np.isfinite(self.spill_my)
        self._listed = (np.ones(index.count, dtype=bool) if index.listed is None
                        else np.asarray(index.listed, dtype=bool))
        ok &= self._listed
        # Spill points, largest depression first: a tile's cap keeps the largest.
        order = np.lexsort((index.id, -index.area_m2))
        self._glyph_order = order[ok[order]]
        self._luts = LockedLRU(64)
        self._lock = threading.Lock()

    def _lut(self, min_area_m2: float) -> np.ndarray:
        """Palette code per depression id (0: none) of the depressions drawn: the listed
        ones with at least ``min_area_m2`` of area."""
        key = round(min_area_m2, 6)
        hit = self._luts.get(key)
        if hit is None:
            hit = np.zeros(self.index.count + 1, dtype=np.uint8)
            hit[1:][self._listed & (self.index.area_m2 >= min_area_m2)] = TINT
            self._luts.put(key, hit)
        return hit

    def depression_tile(self, pixel_cells: np.ndarray, z: int, y: int) -> bytes:
        """PNG of the depressions for the pixels of ``pixel_cells`` (the flat cell index
        of each pixel, -1 off the grid; see render.TileIndexCache) on a tile of zoom
        ``z`` and row ``y``."""
        if self.index.count == 0:
            return render.BLANK_PNG
        inside = pixel_cells >= 0
        ids = np.zeros(render.TILE * render.TILE, dtype=np.int32)
        ids[inside] = self.ids_flat[pixel_cells[inside]]
        if not ids.any():
            return render.BLANK_PNG
        ids = ids.reshape(render.TILE, render.TILE)
        codes = self._lut(VISIBLE_PIXELS * pixel_metres(z, y) ** 2)[ids]
        if not codes.any():
            return render.BLANK_PNG
        edge = np.zeros(ids.shape, dtype=bool)
        step = ids[1:, :] != ids[:-1, :]
        edge[1:, :] |= step
        edge[:-1, :] |= step
        step = ids[:, 1:] != ids[:, :-1]
        edge[:, 1:] |= step
        edge[:, :-1] |= step
        codes[edge & (codes > 0)] = EDGE
        return render.encode_palette_png(codes, DEPRESSION_PLTE, DEPRESSION_TRNS)

    def spill_points_in(self, z: int, x: int, y: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """(index, pixel column, pixel row) of the spill points drawn on tile z/x/y."""
        w, s, e, n = render.tile_bounds_mercator(z, x, y)
        res = (e - w) / render.TILE
        pad = (GLYPH_RADIUS + 1) * res
        k = self._glyph_order
        mx, my = self.spill_mx[k], self.spill_my[k]
        near = (mx >= w - pad) & (mx <= e + pad) & (my >= s - pad) & (my <= n + pad)
        near &= self.index.area_m2[k] >= VISIBLE_PIXELS * pixel_metres(z, y) ** 2
        k = k[near][:MAX_GLYPHS]
        px = np.floor((self.spill_mx[k] - w) / res).astype(np.int64)
        py = np.floor((n - self.spill_my[k]) / res).astype(np.int64)
        return k, px, py

    def spill_tile(self, z: int, x: int, y: int) -> bytes:
        """PNG of the spill-point diamonds on tile z/x/y (the same at every level)."""
        k, px, py = self.spill_points_in(z, x, y)
        if k.shape[0] == 0:
            return render.BLANK_PNG
        r = GLYPH_RADIUS
        canvas = np.zeros((render.TILE + 2 * r, render.TILE + 2 * r), dtype=np.uint8)
        stamp = GLYPH > 0
        # Smallest first, so the largest depressions' diamonds lie on top.
        for c, rr in zip(px[::-1] + r, py[::-1] + r):
            if 0 <= rr - r and rr + r < canvas.shape[0] and 0 <= c - r and c + r < canvas.shape[1]:
                view = canvas[rr - r:rr + r + 1, c - r:c + r + 1]
                view[stamp] = GLYPH[stamp]
        codes = np.ascontiguousarray(canvas[r:-r, r:-r])
        return render.encode_palette_png(codes, SPILL_PLTE, SPILL_TRNS)
