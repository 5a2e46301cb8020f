"""Outlines of labelled cells (depressions, the flooded ground at a level), window by window.

A label raster is read one square window at a time, from a result source or a
file:

1. Each window is vectorised with :func:`rasterio.features.shapes` (GDAL's
   polygonizer; 4-connected regions, cell edges as outlines) on the grid's
   *cell* coordinates (column, row), so every vertex is an exact small integer.
2. A region that crosses a window edge comes out as several pieces, one per
   window. Pieces that touch an interior window edge are joined per label with
   a polygon union (:func:`shapely.union_all`); on integer coordinates and
   axis-parallel edges the union is exact. The vertices the window edges add
   along straight runs are dropped (:func:`shapely.simplify` with tolerance 0
   removes exactly the collinear ones), so each outline has the corners GDAL
   gives the whole raster, and no others.
3. The cell coordinates are mapped to the CRS with the grid's transform,
   computed as GDAL computes it (``x = c + a*col + b*row``, ``y = f + d*col +
   e*row``), so the vertices are the same floating-point numbers whatever the
   window size: a result in memory is outlined in one window, a folder on disk
   in many, with the same outlines.

A depression whose cells meet only at corners (possible with 8-connectivity)
comes out as a MultiPolygon, the union of its pieces.

Memory: one window of the raster and its mask, plus the outlines themselves.

References
----------
GDAL ``GDALPolygonize`` (the raster-to-polygon algorithm behind
:func:`rasterio.features.shapes`), https://gdal.org/api/gdal_alg.html.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from typing import TYPE_CHECKING

import numpy as np
import rasterio.features
import shapely
import shapely.geometry
from affine import Affine

from sillmark.errors import InvalidParameter
from sillmark.products.source import ArraySource, ResultSource

if TYPE_CHECKING:  # pragma: no cover
    from sillmark.engine.flood import SpillResult
    from sillmark.grid.dem import DEM

__all__ = ["DEFAULT_WINDOW", "depression_outlines", "depression_polygons", "label_outlines"]

#: Side of the square windows read at a time, in cells: 2048 x 2048 int32 cells
#: are 16 MB, and a multiple of the result GeoTIFFs' 256-cell tiles.
DEFAULT_WINDOW = 2048

#: ``select(block) -> (mask, values)``: which cells of a window are outlined
#: (bool) and the label of each (int32), as :func:`rasterio.features.shapes` takes them.
Select = Callable[[np.ndarray], tuple[np.ndarray, np.ndarray]]


def _window_size(window) -> int:
    if isinstance(window, bool) or not isinstance(window, (int, np.integer)) or int(window) < 1:
        raise InvalidParameter(f"the outline window must be a whole number of cells, 1 or more, not {window!r}")
    return int(window)


def _windows(rows: int, cols: int, size: int) -> Iterator[tuple[int, int, int, int]]:
    for r0 in range(0, rows, size):
        for c0 in range(0, cols, size):
            yield r0, min(rows, r0 + size), c0, min(cols, c0 + size)


def _joined(interior: list, edge: list):
    """One label's outline from its pieces: edge pieces joined, collinear vertices dropped."""
    parts = list(interior)
    if len(edge) == 1:
        parts.extend(edge)
    elif edge:
        union = shapely.simplify(shapely.union_all(edge), 0.0)
        parts.extend(union.geoms if union.geom_type == "MultiPolygon" else [union])
    # The parts are distinct 4-connected regions of one label, meeting at most
    # at corners: their MultiPolygon is already their union (and valid).
    return parts[0] if len(parts) == 1 else shapely.geometry.MultiPolygon(parts)


def _pieces(shapes) -> tuple[np.ndarray, np.ndarray]:
    """The polygons of ``rasterio.features.shapes`` as shapely Polygons, made in two
    vectorised calls (rings, then polygons: the first ring of each its shell), and
    their labels. The same coordinates as ``shapely.geometry.shape`` of each, at a
    fraction of the cost on a survey DEM's thousands of pieces and holes."""
    coords: list = []
    ring_sizes: list[int] = []
    ring_counts: list[int] = []
    labels: list[int] = []
    for geom, value in shapes:
        rings = geom["coordinates"]
        for ring in rings:
            coords.extend(ring)
            ring_sizes.append(len(ring))
        ring_counts.append(len(rings))
        labels.append(int(value))
    if not labels:
        return np.empty(0, dtype=object), np.empty(0, dtype=np.int64)
    rings = shapely.linearrings(np.asarray(coords, dtype=np.float64),
                                indices=np.repeat(np.arange(len(ring_sizes)), ring_sizes))
    polygons = shapely.polygons(rings, indices=np.repeat(np.arange(len(labels)), ring_counts))
    return polygons, np.asarray(labels, dtype=np.int64)


def _cell_to_crs(transform: Affine):
    a, b, c, d, e, f = (float(v) for v in transform[:6])

    def to_crs(xy: np.ndarray) -> np.ndarray:
        col, row = xy[:, 0], xy[:, 1]
        # The order of GDAL's geotransform: the same bits as rasterio.features.shapes.
        return np.column_stack([c + a * col + b * row, f + d * col + e * row])

    return to_crs


#: ``read(r0, r1, c0, c1)``: a window of the label raster.
ReadWindow = Callable[[int, int, int, int], np.ndarray]

#: ``map(fn, calls)``: runs ``fn(*call)`` for each call, e.g. a
#: :class:`sillmark.engine.executors.DaskExecutor`.
MapCalls = Callable[[Callable, list], list]


def _window_pieces(read: ReadWindow, select: Select, r0: int, r1: int, c0: int, c1: int,
                   rows: int, cols: int) -> tuple[list, list]:
    """The pieces of one window: ``(label, polygon)`` pairs of the regions inside it,
    and of those touching an interior window edge (joined later), in cell coordinates."""
    mask, values = select(read(r0, r1, c0, c1))
    interior: list = []
    edge: list = []
    if not mask.any():
        return interior, edge
    values = np.ascontiguousarray(values, dtype=np.int32)
    cells = Affine.translation(c0, r0)  # x = column, y = row: exact integers
    pieces, labels = _pieces(rasterio.features.shapes(values, mask=mask, connectivity=4,
                                                      transform=cells))
    x0, y0, x1, y1 = shapely.bounds(pieces).T
    touches = (((x0 == c0) & (c0 > 0)) | ((x1 == c1) & (c1 < cols))
               | ((y0 == r0) & (r0 > 0)) | ((y1 == r1) & (r1 < rows)))
    for piece, value, at_edge in zip(pieces.tolist(), labels.tolist(), touches.tolist()):
        (edge if at_edge else interior).append((value, piece))
    return interior, edge


def label_outlines(read: ReadWindow, shape: tuple[int, int], transform: Affine, select: Select, *,
                   window: int = DEFAULT_WINDOW, map: MapCalls | None = None) -> dict:
    """Outline every label of a raster, window by window.

    Parameters
    ----------
    read : callable
        ``read(r0, r1, c0, c1)`` gives rows ``r0:r1`` and columns ``c0:c1`` of the raster.
    shape : (rows, cols)
    transform : affine.Affine
        The raster's grid-to-CRS transform.
    select : callable
        ``select(block) -> (mask, values)`` for each window ``block``: the cells
        to outline and their int32 labels.
    window : int, keyword-only
        Side of the windows read at a time, in cells.
    map : callable, optional, keyword-only
        ``map(fn, calls)`` tracing the windows (one call each), e.g. on a
        cluster; ``read`` and ``select`` must then pickle. The pieces come
        back as shapely polygons on exact integer cell coordinates, and are
        joined here in window order, so the outlines are the same bits as
        with the windows traced in this process (the default).

    Returns
    -------
    dict
        label -> shapely Polygon or MultiPolygon in the raster's CRS, one entry
        per label that has cells.
    """
    size = _window_size(window)
    rows, cols = shape
    calls = [(read, select, r0, r1, c0, c1, rows, cols)
             for r0, r1, c0, c1 in _windows(rows, cols, size)]
    if map is None:
        traced = (_window_pieces(*call) for call in calls)
    else:
        traced = map(_window_pieces, calls)
    interior: dict[int, list] = {}
    edge: dict[int, list] = {}
    for inside, touching in traced:
        for value, piece in inside:
            interior.setdefault(value, []).append(piece)
        for value, piece in touching:
            edge.setdefault(value, []).append(piece)
    to_crs = _cell_to_crs(transform)
    out = {}
    for label in sorted(set(interior) | set(edge)):
        outline = _joined(interior.get(label, []), edge.get(label, []))
        out[label] = shapely.transform(outline, to_crs)
    return out


class _LayerReader:
    """``read(r0, r1, c0, c1)`` of one layer through a source's small window reader
    (it pickles, for tracing windows on other processes)."""

    def __init__(self, layers, layer: str) -> None:
        self.layers = layers
        self.layer = layer

    def __call__(self, r0: int, r1: int, c0: int, c1: int) -> np.ndarray:
        return self.layers.window(self.layer, r0, r1, c0, c1)


class _DepressionCells:
    """``select(block)``: the cells of the wanted depressions (all with ``wanted`` None).

    ``wanted`` is boolean per id, entry 0 False; it is kept as bits (one byte
    per 8 depressions), as it travels with every window traced elsewhere.
    """

    def __init__(self, wanted: np.ndarray | None) -> None:
        self.count = None if wanted is None else int(wanted.shape[0])
        self.bits = None if wanted is None else np.packbits(wanted)
        self._wanted = wanted

    def __getstate__(self):
        return {"count": self.count, "bits": self.bits}

    def __setstate__(self, state) -> None:
        self.count, self.bits, self._wanted = state["count"], state["bits"], None

    def __call__(self, block: np.ndarray):
        inside = block > 0
        if self.bits is not None:
            if self._wanted is None:
                self._wanted = np.unpackbits(self.bits, count=self.count).astype(bool)
            inside &= self._wanted[np.where(inside, block, 0)]
        return inside, block


def depression_outlines(source: ResultSource, *, window: int | None = None,
                        only: np.ndarray | None = None, map: MapCalls | None = None) -> list:
    """One outline per depression of ``source``; index ``k`` is id ``k+1``.

    ``window`` defaults to the whole grid for a result in memory
    (:class:`~sillmark.products.source.ArraySource`) and to
    :data:`DEFAULT_WINDOW` otherwise. ``only`` (boolean per depression) traces
    just those depressions, the others' entries being None: on a survey DEM
    with 10^5 noise-made pits and a few significant depressions, tracing the
    listed ones alone is what keeps the outlines' cost with what is written.
    ``map`` traces the windows through ``map(fn, calls)`` (a source whose
    windows other processes can read: one with ``layers``, such as a results
    folder), as for :func:`label_outlines`.

    Raises
    ------
    InvalidParameter
        A depression of the table has no cell in the id raster.
    """
    count = len(source.spill_elevation)
    shape = tuple(source.grid.shape)
    if window is None:
        window = max(shape) if isinstance(source, ArraySource) else DEFAULT_WINDOW

    wanted = np.ones(count + 1, dtype=bool) if only is None else np.concatenate(
        [[False], np.asarray(only, dtype=bool)])
    wanted[0] = False
    select = _DepressionCells(None if only is None else wanted)
    layers = getattr(source, "layers", None)
    if map is not None and layers is None:
        map = None  # a source held in this process is read in place
    read = _LayerReader(source if map is None else layers, "depression_id")

    traced = count and wanted.any()
    outlines = (label_outlines(read, shape, source.grid.transform, select, window=window, map=map)
                if traced else {})
    missing = [k for k in range(1, count + 1) if wanted[k] and k not in outlines]
    if missing:
        raise InvalidParameter(
            f"depression {missing[0]} has no cells in the id raster; the result's "
            "files do not belong together: run the analysis again"
        )
    return [outlines.get(k) for k in range(1, count + 1)]


def depression_polygons(result: "SpillResult", dem: "DEM") -> list:
    """:func:`depression_outlines` of a result held in memory, outlined in one window."""
    return depression_outlines(ArraySource(dem, result))
