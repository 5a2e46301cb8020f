"""Outlines of labelled cells from a GeoTIFF on disk, built window by window.

The in-memory writers vectorise a whole label raster at once
(:func:`sillmark.io.export.depression_polygons`, :func:`sillmark.io.stage_files.class_polygon`).
For rasters larger than memory (the files of :func:`sillmark.engine.tiled.analyse_tiled`)
this module gives the same outlines without holding the raster:

1. Read the raster one square window at a time and vectorise the window with
   :func:`rasterio.features.shapes` (GDAL's polygonizer; 4-connected regions,
   cell edges as outlines), on the grid's *cell* coordinates (column, row), so
   every vertex is an exact small integer.
2. A region that crosses a window edge comes out as several pieces, one per
   window. Pieces that touch an interior window edge are joined per label with
   a polygon union (:func:`shapely.union_all`); on integer coordinates and
   axis-parallel edges the union is exact. The vertices the window edges add
   along straight runs are dropped (:func:`shapely.simplify` with tolerance 0
   removes exactly the collinear ones), so each outline has the corners GDAL
   gives the whole raster, and no others.
3. The cell coordinates are mapped to the CRS with the grid's transform,
   computed as GDAL computes it (``x = c + a*col + b*row``, ``y = f + d*col +
   e*row``), so the vertices are the same floating-point numbers as the
   in-memory outlines'.

The result is the same region as the in-memory outline (shapely ``equals``),
with the same vertices; only where a ring starts may differ.

:func:`write_depressions_geojson_tiled` writes ``depressions.geojson`` from
``depression_id.tif`` with the properties of
:func:`sillmark.io.export.write_depressions_geojson`;
:func:`add_depression_outlines` does so for a folder :func:`sillmark.engine.tiled.analyse_tiled`
wrote and brings its ``summary.json`` up to date.

Memory: one window of the raster (4 bytes a cell for ``depression_id.tif``) and
its mask, plus the outlines themselves (all of them, as the in-memory writer).

References
----------
GDAL ``GDALPolygonize`` (the raster-to-polygon algorithm behind
:func:`rasterio.features.shapes`), https://gdal.org/api/gdal_alg.html.
"""

from __future__ import annotations

import json
import os
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np
import rasterio
import rasterio.features
import rasterio.windows
import shapely
import shapely.geometry
from affine import Affine

from sillmark import SCREENING_CAUTION
from sillmark.errors import InvalidParameter
from sillmark.io.export import (
    FILE_NAMES,
    json_number,
    table_columns,
    wgs84_geometry,
    wgs84_transformer,
    write_feature_collection,
    write_table_summary,
)
from sillmark.units import VerticalUnit

if TYPE_CHECKING:  # pragma: no cover
    from sillmark.grid.dem import DEMGrid
    from sillmark.engine.flood import DepressionTable

__all__ = [
    "DEFAULT_WINDOW",
    "add_depression_outlines",
    "depression_outlines",
    "label_outlines",
    "write_depressions_geojson_tiled",
]

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


def _cell_to_crs(transform: Affine):
    a, b, c, d, e, f = (float(v) for v in transform[:6])

    def to_crs(xy: np.ndarray) -> np.ndarray:
        col, row = xy[:, 0], xy[:, 1]
        # The order of GDAL's geotransform: the same bits as rasterio.features.shapes.
        return np.column_stack([c + a * col + b * row, f + d * col + e * row])

    return to_crs


def label_outlines(path: str | os.PathLike, select: Select, *, window: int = DEFAULT_WINDOW) -> dict:
    """Outline every label of a single-band raster file, window by window.

    Parameters
    ----------
    path : path
        A raster file (e.g. ``depression_id.tif`` or ``water_state_{h}.tif``).
    select : callable
        ``select(block) -> (mask, values)`` for each window ``block`` (as read
        from band 1): the cells to outline and their int32 labels.
    window : int, keyword-only
        Side of the windows read at a time, in cells.

    Returns
    -------
    dict
        label -> shapely Polygon or MultiPolygon in the raster's CRS, one entry
        per label that has cells.

    Notes
    -----
    Memory: one window and its mask, plus every outline.
    """
    size = _window_size(window)
    interior: dict[int, list] = {}
    edge: dict[int, list] = {}
    with rasterio.open(path) as ds:
        rows, cols = ds.height, ds.width
        transform = ds.transform
        for r0, r1, c0, c1 in _windows(rows, cols, size):
            block = ds.read(1, window=rasterio.windows.Window(c0, r0, c1 - c0, r1 - r0))
            mask, values = select(block)
            if not mask.any():
                continue
            values = np.ascontiguousarray(values, dtype=np.int32)
            cells = Affine.translation(c0, r0)  # x = column, y = row: exact integers
            for geom, value in rasterio.features.shapes(values, mask=mask, connectivity=4,
                                                        transform=cells):
                piece = shapely.geometry.shape(geom)
                x0, y0, x1, y1 = piece.bounds
                touches = ((x0 == c0 and c0 > 0) or (x1 == c1 and c1 < cols)
                           or (y0 == r0 and r0 > 0) or (y1 == r1 and r1 < rows))
                (edge if touches else interior).setdefault(int(value), []).append(piece)
    to_crs = _cell_to_crs(transform)
    out = {}
    for label in sorted(set(interior) | set(edge)):
        outline = _joined(interior.get(label, []), edge.get(label, []))
        out[label] = shapely.transform(outline, to_crs)
    return out


def depression_outlines(id_path: str | os.PathLike, count: int, *, window: int = DEFAULT_WINDOW) -> list:
    """One outline per depression from ``depression_id.tif``; index ``k`` is id ``k+1``.

    The same regions, with the same vertices, as
    :func:`sillmark.io.export.depression_polygons` of the in-memory result.

    Raises
    ------
    InvalidParameter
        A depression of ``1..count`` has no cell in the file.
    """

    def select(block: np.ndarray):
        return block > 0, block

    outlines = label_outlines(id_path, select, window=window) if count else {}
    missing = [k for k in range(1, count + 1) if k not in outlines]
    if missing:
        raise InvalidParameter(
            f"depression {missing[0]} has no cells in {Path(id_path).name}; the folder's "
            "files do not belong together: run the analysis again"
        )
    return [outlines[k] for k in range(1, count + 1)]


def write_depressions_geojson_tiled(
    table: "DepressionTable",
    grid: "DEMGrid",
    id_path: str | os.PathLike,
    path: str | os.PathLike,
    *,
    window: int = DEFAULT_WINDOW,
) -> Path:
    """Write ``depressions.geojson`` from ``depression_id.tif``, window by window.

    Feature for feature the file of :func:`sillmark.io.export.write_depressions_geojson`
    (RFC 7946, WGS84, the same ``id`` and properties: the depression table's
    row, ``vertical_unit`` and ``caution``), with outlines from
    :func:`depression_outlines`.
    """
    unit = VerticalUnit.parse(grid.vertical_unit)
    transformer = wgs84_transformer(grid)  # fails before reading if there is no CRS
    outlines = depression_outlines(id_path, len(table), window=window)
    columns = table_columns(table, grid)

    def features() -> Iterator[dict]:
        for k, outline in enumerate(outlines):
            properties = {name: json_number(values[k]) for name, values in columns.items()}
            properties["vertical_unit"] = unit.value
            properties["caution"] = SCREENING_CAUTION
            yield {
                "type": "Feature",
                "id": properties["id"],
                "geometry": wgs84_geometry(outline, grid, transformer=transformer),
                "properties": properties,
            }

    members = {"name": "depressions", "caution": SCREENING_CAUTION, "vertical_unit": unit.value}
    return write_feature_collection(path, members, features())


def add_depression_outlines(run, grid: "DEMGrid", out_dir: str | os.PathLike, *,
                            window: int = DEFAULT_WINDOW) -> list[Path]:
    """Write ``depressions.geojson`` into a folder of a tiled :func:`sillmark.run.analyse`.

    ``run`` is the run's :class:`sillmark.run.Analysis` (its table, counts and files).

    Then writes ``summary.json`` again, last, listing the outlines among the
    files (its ``engine`` member kept). Returns every file of the folder's run
    in the order of :data:`sillmark.io.export.FILE_NAMES`.
    """
    out = Path(out_dir)
    name = "depressions.geojson"
    outlines = write_depressions_geojson_tiled(run.depressions, grid, out / "depression_id.tif",
                                               out / name, window=window)
    by_name = {p.name: Path(p) for p in run.files}
    by_name[name] = outlines
    summary_path = out / "summary.json"
    engine = json.loads(summary_path.read_text(encoding="utf-8")).get("engine")
    files = [by_name[n] for n in FILE_NAMES if n in by_name and n != summary_path.name]
    summary = write_table_summary(
        run.depressions, grid, summary_path, connectivity=run.connectivity,
        unreached_cells=run.unreached_cells, valid_cells=run.valid_cells,
        outlet_sources=run.outlet_sources, outlet_count=run.outlet_cells,
        files=[p.name for p in files], engine=engine,
    )
    return files + [summary]
