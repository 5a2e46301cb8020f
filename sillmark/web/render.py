"""Map tiles drawn from a site's own rasters: hillshade and water-level maps.

Tiles follow the Web Mercator XYZ scheme Leaflet asks for (256 × 256 pixels,
``z/x/y``). A tile is drawn by looking up, for each pixel centre, the DEM cell
under it: the pixel centres are transformed from Web Mercator to the DEM's CRS
with pyproj and floored to a row and column (nearest neighbour). That lookup
is the only costly step; :class:`TileIndexCache` keeps it per site grid and
tile, so redrawing a tile at another water level costs one gather and one
comparison per pixel, plus the PNG encoding. :class:`ImageCache` keeps the
encoded tiles themselves, so a tile many viewers ask for is drawn once.

Water-level tiles threshold the onset stage ``s`` at the level ``h`` (flooded
where ``s <= h``, coloured by depth ``h - z``; shielded low ground where
``z < h < s``, hatched in amber). The depth ramp and the hatching are
Sillmark's own. Images are written as 8-bit palette PNGs with a
transparency table, encoded here with :mod:`zlib` (no imaging library).

No Flask in this module: the analysis worker imports it for the hillshade.
"""

from __future__ import annotations

import math
import struct
import threading
import zlib
from dataclasses import dataclass

import numpy as np
import pyproj

from sillmark.products.map_style import (  # the names below stay reachable as render.X
    DEPTH_ALPHA,
    DEPTH_BOUNDS_FT,  # noqa: F401
    DEPTH_BOUNDS_M,  # noqa: F401
    DEPTH_COLOURS,
    SHIELDED_STRIPE,
    SHIELDED_WASH,
    TINT_STOPS,
    depth_bounds,  # noqa: F401  (re-exported: render.depth_bounds)
    depth_classes,
    hex_colour,
    point_symbols,
)
from sillmark.web.caches import LockedLRU

TILE = 256
#: Half the side of the Web Mercator square, in metres (EPSG:3857).
MERCATOR_HALF = math.pi * 6378137.0
WEB_MERCATOR = pyproj.CRS.from_epsg(3857)
#: Deepest zoom the tile endpoint serves.
MAX_ZOOM = 22
#: Part of every tile's ETag: raise it whenever tiles are drawn differently, so
#: browsers do not keep tiles in an older style.
STYLE_REVISION = 1

# --------------------------------------------------------------------------- palettes

# The depth classes, colours and symbols live in sillmark.products.map_style,
# shared with the SLD styles written beside the result files.

#: Stripe period and width in pixels (diagonal, screen-aligned).
HATCH_PERIOD = 8
HATCH_WIDTH = 3

# Palette indices of the water tiles.
W_CLEAR = 0
W_STRIPE = 1
W_WASH = 2
W_DEPTH0 = 3


#: What shows through where a tile has no DEM cell (nodata): the map's own
#: background (``.leaflet-container`` in static/css/sillmark.css).
NODATA_BACKGROUND = "#e9ecea"


def legend(unit_value: str, unit_symbol: str, *, ground: tuple | None = None) -> dict:
    """What the legend shows: depth classes with colours, the shielded style, the
    relief tint under the hillshade (with the site's lowest and highest ground,
    ``ground``, when known), the colour of the nodata gaps and the point symbols
    (all from :mod:`sillmark.products.map_style`, shared with the SLD styles)."""
    classes = [{"label": c.label(unit_symbol), "colour": c.hex, "from": c.lower, "to": c.upper}
               for c in depth_classes(unit_value)]
    return {
        "unit": unit_value,
        "unit_symbol": unit_symbol,
        "depth_classes": classes,
        "depth_alpha": DEPTH_ALPHA / 255,
        "shielded": {
            "label": "Shielded low ground (below the level, no surface path yet)",
            "stripe": hex_colour(SHIELDED_STRIPE),
            "wash": hex_colour(SHIELDED_WASH),
        },
        "relief": {
            "stops": [[p, hex_colour(c)] for p, c in TINT_STOPS],
            "low": None if ground is None else ground[0],
            "high": None if ground is None else ground[1],
        },
        "nodata_colour": NODATA_BACKGROUND,
        "symbols": point_symbols(),
    }


def _water_palette() -> tuple[bytes, bytes]:
    entries = [(0, 0, 0, 0), SHIELDED_STRIPE, SHIELDED_WASH]
    entries += [(*c, DEPTH_ALPHA) for c in DEPTH_COLOURS]
    plte = b"".join(bytes(e[:3]) for e in entries)
    trns = bytes(e[3] for e in entries)
    return plte, trns


WATER_PLTE, WATER_TRNS = _water_palette()

#: Classes of the elevation tint under the hillshade (site's lowest to highest ground).
TINT_CLASSES = 64


def _relief_lut() -> np.ndarray:
    """RGBA (256 shades, TINT_CLASSES tints): the tint, lit by the hillshade.

    Shade 0 is nodata (transparent). Flat ground (lit = sin 45°) shows the tint
    itself; slopes towards the light are brighter, slopes away darker.
    """
    t = np.linspace(0.0, 1.0, TINT_CLASSES)
    pos = np.array([p for p, _ in TINT_STOPS])
    rgb = np.array([c for _, c in TINT_STOPS], dtype=np.float64)
    tint = np.column_stack([np.interp(t, pos, rgb[:, k]) for k in range(3)])
    lit = (np.arange(256) - 1).clip(0) / 254.0
    flat = math.sin(math.radians(SUN_ALTITUDE_DEG))
    gain = (0.28 + 0.72 * lit ** 0.85) / (0.28 + 0.72 * flat ** 0.85)
    out = np.empty((256, TINT_CLASSES, 4), dtype=np.uint8)
    out[..., :3] = np.clip(gain[:, None, None] * tint[None, :, :], 0, 255).round().astype(np.uint8)
    out[..., 3] = 255
    out[0, :, 3] = 0
    out[0, :, :3] = 0
    return out


def hatch_mask() -> np.ndarray:
    """bool (256, 256): True on the pixels of the diagonal stripes."""
    i, j = np.indices((TILE, TILE))
    return ((i + j) % HATCH_PERIOD) < HATCH_WIDTH


_HATCH = hatch_mask().ravel()


# --------------------------------------------------------------------------- PNG


def _chunk(kind: bytes, data: bytes) -> bytes:
    return struct.pack(">I", len(data)) + kind + data + struct.pack(">I", zlib.crc32(kind + data) & 0xFFFFFFFF)


def encode_palette_png(indices: np.ndarray, plte: bytes, trns: bytes, *, level: int = 2) -> bytes:
    """An 8-bit palette PNG of ``indices`` (uint8, 2-D) with a transparency table."""
    h, w = indices.shape
    raw = np.empty((h, w + 1), dtype=np.uint8)
    raw[:, 0] = 0  # filter type "None" on every scanline
    raw[:, 1:] = indices
    ihdr = struct.pack(">IIBBBBB", w, h, 8, 3, 0, 0, 0)
    return b"".join((
        b"\x89PNG\r\n\x1a\n",
        _chunk(b"IHDR", ihdr),
        _chunk(b"PLTE", plte),
        _chunk(b"tRNS", trns),
        _chunk(b"IDAT", zlib.compress(raw.tobytes(), level)),
        _chunk(b"IEND", b""),
    ))


def encode_rgba_png(rgba: np.ndarray, *, level: int = 2) -> bytes:
    """An 8-bit RGBA PNG of ``rgba`` (uint8, shape (h, w, 4))."""
    h, w, _ = rgba.shape
    raw = np.empty((h, w * 4 + 1), dtype=np.uint8)
    raw[:, 0] = 0
    raw[:, 1:] = rgba.reshape(h, w * 4)
    ihdr = struct.pack(">IIBBBBB", w, h, 8, 6, 0, 0, 0)
    return b"".join((
        b"\x89PNG\r\n\x1a\n",
        _chunk(b"IHDR", ihdr),
        _chunk(b"IDAT", zlib.compress(raw.tobytes(), level)),
        _chunk(b"IEND", b""),
    ))


BLANK_PNG = encode_palette_png(np.zeros((TILE, TILE), np.uint8), b"\x00\x00\x00", b"\x00")


# --------------------------------------------------------------------------- tile geometry


def tile_bounds_mercator(z: int, x: int, y: int) -> tuple[float, float, float, float]:
    """(west, south, east, north) of tile z/x/y in Web Mercator metres."""
    size = 2 * MERCATOR_HALF / (1 << z)
    west = -MERCATOR_HALF + x * size
    north = MERCATOR_HALF - y * size
    return west, north - size, west + size, north


def valid_tile(z: int, x: int, y: int) -> bool:
    return 0 <= z <= MAX_ZOOM and 0 <= x < (1 << z) and 0 <= y < (1 << z)


def lonlat_to_tile(lon: float, lat: float, z: int) -> tuple[int, int]:
    n = 1 << z
    x = int((lon + 180.0) / 360.0 * n)
    lat_r = math.radians(lat)
    y = int((1.0 - math.asinh(math.tan(lat_r)) / math.pi) / 2.0 * n)
    return min(max(x, 0), n - 1), min(max(y, 0), n - 1)


@dataclass(frozen=True)
class Grid:
    """Where a site's cells lie: what the tile lookup needs to know of a DEM."""

    crs_wkt: str
    transform: tuple[float, float, float, float, float, float]  # a, b, c, d, e, f
    rows: int
    cols: int

    @property
    def key(self) -> tuple:
        return (self.crs_wkt, self.transform, self.rows, self.cols)


class GridProjector:
    """Web Mercator pixel centres to flat cell indices of one grid (pyproj, nearest cell)."""

    def __init__(self, grid: Grid) -> None:
        self.grid = grid
        crs = pyproj.CRS.from_wkt(grid.crs_wkt)
        if crs.is_compound or len(crs.axis_info) > 2:
            crs = crs.to_2d()
        self._to_grid = pyproj.Transformer.from_crs(WEB_MERCATOR, crs, always_xy=True)
        self._to_merc = pyproj.Transformer.from_crs(crs, WEB_MERCATOR, always_xy=True)
        self._lock = threading.Lock()
        self.extent = self._mercator_extent()

    def _mercator_extent(self) -> tuple[float, float, float, float]:
        a, _, c, _, e, f = self.grid.transform
        left, top = c, f
        right, bottom = c + a * self.grid.cols, f + e * self.grid.rows
        n = 64
        xs = np.concatenate([np.linspace(left, right, n), np.full(n, right),
                             np.linspace(right, left, n), np.full(n, left)])
        ys = np.concatenate([np.full(n, top), np.linspace(top, bottom, n),
                             np.full(n, bottom), np.linspace(bottom, top, n)])
        with self._lock:
            mx, my = self._to_merc.transform(xs, ys)
        mx, my = np.asarray(mx), np.asarray(my)
        ok = np.isfinite(mx) & np.isfinite(my)
        if not ok.any():
            return (-MERCATOR_HALF, -MERCATOR_HALF, MERCATOR_HALF, MERCATOR_HALF)
        # A small margin: the edges of a projected grid are curved in Mercator.
        w, s, e_, n_ = mx[ok].min(), my[ok].min(), mx[ok].max(), my[ok].max()
        pad = 0.02 * max(e_ - w, n_ - s) + 1.0
        return (w - pad, s - pad, e_ + pad, n_ + pad)

    def touches(self, z: int, x: int, y: int) -> bool:
        w, s, e, n = tile_bounds_mercator(z, x, y)
        gw, gs, ge, gn = self.extent
        return not (e < gw or w > ge or n < gs or s > gn)

    def tile_index(self, z: int, x: int, y: int) -> np.ndarray | None:
        """int32 (65536,) flat cell index of each pixel (-1 off the grid), or None if
        the tile misses the grid."""
        if not self.touches(z, x, y):
            return None
        w, s, e, n = tile_bounds_mercator(z, x, y)
        res = (e - w) / TILE
        centres = (np.arange(TILE) + 0.5) * res
        mx = np.broadcast_to(w + centres, (TILE, TILE)).ravel()
        my = np.broadcast_to((n - centres)[:, None], (TILE, TILE)).ravel()
        with self._lock:  # a Transformer is not safe to share between threads
            gx, gy = self._to_grid.transform(mx, my)
        a, _, c, _, e_, f = self.grid.transform
        with np.errstate(invalid="ignore"):
            col = np.floor((np.asarray(gx) - c) / a)
            row = np.floor((np.asarray(gy) - f) / e_)
            inside = (col >= 0) & (col < self.grid.cols) & (row >= 0) & (row < self.grid.rows)
        if not inside.any():
            return None
        index = np.full(TILE * TILE, -1, dtype=np.int32)
        index[inside] = (row[inside] * self.grid.cols + col[inside]).astype(np.int32)
        return index


class TileIndexCache:
    """LRU of pixel-to-cell lookups, keyed by grid and tile; shared by all sites.

    Sites on the same grid (e.g. the same DEM analysed twice) share entries.
    Thread-safe; the lookup of a missing tile is computed outside the lock.
    """

    def __init__(self, capacity: int) -> None:
        self.capacity = max(1, int(capacity))
        self._entries = LockedLRU(self.capacity)
        self._projectors: dict = {}
        self._lock = threading.Lock()

    @property
    def hits(self) -> int:
        return self._entries.hits

    @property
    def misses(self) -> int:
        return self._entries.misses

    def projector(self, grid: Grid) -> GridProjector:
        with self._lock:
            p = self._projectors.get(grid.key)
        if p is None:
            p = GridProjector(grid)
            with self._lock:
                p = self._projectors.setdefault(grid.key, p)
        return p

    def get(self, grid: Grid, z: int, x: int, y: int) -> np.ndarray | None:
        key = (grid.key, z, x, y)
        missing = object()
        index = self._entries.get(key, missing)
        if index is not missing:
            return index
        index = self.projector(grid).tile_index(z, x, y)
        self._entries.put(key, index)
        return index

    def __contains__(self, key: tuple) -> bool:
        grid, z, x, y = key
        return (grid.key, z, x, y) in self._entries

    def __len__(self) -> int:
        return len(self._entries)


class ImageCache(LockedLRU):
    """LRU of encoded tile images (PNG bytes), bounded by their total size; thread-safe.

    One per open site run (see :class:`sillmark.web.site_data.SiteData`): the hillshade
    is the same for every viewer and every level, and a water-level tile is the
    same for everyone at that level, so each is drawn and encoded once.
    """

    def __init__(self, max_bytes: int) -> None:
        super().__init__(max(0, int(max_bytes)), getsizeof=len)
        self.max_bytes = self.maxsize

    @property
    def size_bytes(self) -> int:
        return self.currsize


# --------------------------------------------------------------------------- drawing


def water_tile(index: np.ndarray, onset_flat: np.ndarray, elevation_flat: np.ndarray,
               level: np.float32, bounds: tuple[float, ...]) -> bytes:
    """PNG of the water-level map at ``level`` for the pixels of ``index``."""
    out = np.zeros(TILE * TILE, dtype=np.uint8)
    inside = index >= 0
    cells = index[inside]
    s = onset_flat[cells]
    zc = elevation_flat[cells]
    with np.errstate(invalid="ignore"):
        flooded = s <= level  # NaN (nodata, unreached) compares False
        shielded = ~flooded & (zc < level)
    codes = np.zeros(cells.shape[0], dtype=np.uint8)
    if flooded.any():
        depth = level - zc[flooded]
        classes = np.searchsorted(np.asarray(bounds, dtype=np.float32), depth, side="right")
        codes[flooded] = (W_DEPTH0 + classes).astype(np.uint8)
    if shielded.any():
        stripe = _HATCH[inside][shielded]
        codes[shielded] = np.where(stripe, W_STRIPE, W_WASH).astype(np.uint8)
    if not codes.any():
        return BLANK_PNG  # dry ground only: the same transparent tile, not encoded again
    out[inside] = codes
    return encode_palette_png(out.reshape(TILE, TILE), WATER_PLTE, WATER_TRNS)


def shade_level_for(z: int, lat: float, cell_metres: float, levels: int) -> int:
    """Pyramid level of the hillshade whose cells best match a pixel at zoom ``z``."""
    pixel = 2 * MERCATOR_HALF / (TILE * (1 << z)) * math.cos(math.radians(lat))
    if cell_metres <= 0 or pixel <= cell_metres:
        return 0
    return int(min(levels - 1, math.floor(math.log2(pixel / cell_metres))))


def shade_tile(index: np.ndarray, shades: list[np.ndarray], tints: list[np.ndarray], level: int,
               cols: int) -> bytes:
    """PNG of the tinted hillshade, sampling pyramid ``level`` at the cells of ``index``."""
    inside = index >= 0
    cells = index[inside]
    shade, tint = shades[level], tints[level]
    if level:
        r = np.minimum((cells // cols) >> level, shade.shape[0] - 1)
        c = np.minimum((cells % cols) >> level, shade.shape[1] - 1)
        s_val, t_val = shade[r, c], tint[r, c]
    else:
        s_val, t_val = shade.reshape(-1)[cells], tint.reshape(-1)[cells]
    rgba = np.zeros((TILE * TILE, 4), dtype=np.uint8)
    rgba[inside] = RELIEF_LUT[s_val, np.maximum(t_val, 1) - 1]
    return encode_rgba_png(rgba.reshape(TILE, TILE, 4))


# --------------------------------------------------------------------------- hillshade


#: Light from the north-west, 45° above the horizon (the usual cartographic light,
#: common practice), and a vertical exaggeration that lets low banks show.
SUN_AZIMUTH_DEG = 315.0
SUN_ALTITUDE_DEG = 45.0
EXAGGERATION = 2.0


def hillshade(elevation: np.ndarray, *, dx_m: np.ndarray | float, dy_m: float,
              z_metres: float) -> np.ndarray:
    """Hillshade of a DEM as uint8: 0 on nodata, 1 (dark) .. 255 (lit).

    Parameters
    ----------
    elevation : (rows, cols) float32, NaN on nodata
    dx_m : float or (rows,) array
        Cell width in metres (per row for lon/lat grids).
    dy_m : float
        Cell height in metres.
    z_metres : float
        Metres per elevation unit.

    Notes
    -----
    Central differences (one-sided at the edges, numpy.gradient), the surface
    normal dotted with the light vector. Cells next to nodata get no gradient
    and stay transparent. Memory: about 24 bytes per cell while computing.
    """
    z = np.asarray(elevation, dtype=np.float32)
    zm = z * np.float32(z_metres * EXAGGERATION)
    d_row, d_col = np.gradient(zm)
    dx = np.asarray(dx_m, dtype=np.float32)
    if dx.ndim == 1:
        dx = dx[:, None]
    dzdx = d_col / dx
    dzdy = -d_row / np.float32(dy_m)  # rows run south
    az = math.radians(SUN_AZIMUTH_DEG)
    alt = math.radians(SUN_ALTITUDE_DEG)
    lx, ly, lz = math.sin(az) * math.cos(alt), math.cos(az) * math.cos(alt), math.sin(alt)
    norm = np.sqrt(dzdx * dzdx + dzdy * dzdy + 1.0)
    lit = (-dzdx * lx - dzdy * ly + lz) / norm
    lit = np.clip(lit, 0.0, 1.0)
    out = np.zeros(z.shape, dtype=np.uint8)
    ok = np.isfinite(lit)
    out[ok] = (1 + np.round(lit[ok] * 254)).astype(np.uint8)
    return out


def halve(level: np.ndarray) -> np.ndarray:
    """One pyramid step: the 2 × 2 averages of the non-zero values of ``level`` (uint8).

    A last odd row or column is dropped; a 2 × 2 group with no non-zero value
    (all nodata) stays 0. Rows ``2k:2k+2`` of ``level`` make row ``k`` of the
    result alone, so a level may be halved in blocks of an even number of rows
    (see :mod:`sillmark.web.relief`).
    """
    r, c = level.shape[0] // 2 * 2, level.shape[1] // 2 * 2
    block = level[:r, :c].astype(np.float32).reshape(r // 2, 2, c // 2, 2)
    valid = (block > 0).sum(axis=(1, 3))
    total = block.sum(axis=(1, 3))
    nxt = np.zeros((r // 2, c // 2), dtype=np.uint8)
    ok = valid > 0
    nxt[ok] = np.clip(np.round(total[ok] / valid[ok]), 1, 255).astype(np.uint8)
    return nxt


def pyramid_continues(shape: tuple[int, int]) -> bool:
    """Whether a pyramid level of ``shape`` gets a coarser level below it."""
    return max(shape) > TILE and min(shape) >= 2


def shade_pyramid(shade: np.ndarray) -> list[np.ndarray]:
    """``shade`` and its 2 × 2 averages down to one tile's size (nodata kept as 0).

    The whole pyramid in memory; :func:`sillmark.web.relief.write_relief`
    writes the same levels block by block.
    """
    levels = [shade]
    cur = shade
    while pyramid_continues(cur.shape):
        cur = halve(cur)
        levels.append(cur)
    return levels


def tint_classes(elevation: np.ndarray, z_min: float, z_max: float) -> np.ndarray:
    """uint8 elevation classes 1..TINT_CLASSES for the relief tint (0 on nodata)."""
    z = np.asarray(elevation, dtype=np.float32)
    span = max(float(z_max) - float(z_min), 1e-6)
    out = np.zeros(z.shape, dtype=np.uint8)
    ok = np.isfinite(z)
    k = np.floor((z[ok] - np.float32(z_min)) / np.float32(span) * TINT_CLASSES)
    out[ok] = (np.clip(k, 0, TINT_CLASSES - 1) + 1).astype(np.uint8)
    return out


RELIEF_LUT = _relief_lut()
