"""GeoJSON (RFC 7946): WGS 84 lon/lat, rings oriented, positions rounded, streamed one feature
per line.
"""

from __future__ import annotations

import os
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np
import pyproj
import shapely
import shapely.geometry

from sillmark import SCREENING_CAUTION
from sillmark.errors import InvalidParameter
from sillmark.grid.crs import horizontal_crs, to_wgs84, wgs84_transformer
from sillmark.io.atomic import atomic_output
from sillmark.io.csv_tables import float_texts
from sillmark.io.geotiff import check_result_grid
from sillmark.io.json_values import json_number, json_text
from sillmark.products.outlines import depression_outlines
from sillmark.units import unit_of

if TYPE_CHECKING:  # pragma: no cover
    from sillmark.engine.flood import SpillResult
    from sillmark.grid.dem import DEM
    from sillmark.products.source import ResultSource


#: Decimal places kept in GeoJSON lon/lat: 1e-8 degree is about 1 mm on the ground,
#: well below the cell size of any site DEM, so outlines keep their areas.
COORDINATE_DECIMALS = 8


def _oriented(geom):
    """Exterior rings counterclockwise, holes clockwise (RFC 7946, section 3.1.6)."""
    if geom.geom_type not in ("Polygon", "MultiPolygon"):
        raise InvalidParameter(f"cannot write a {geom.geom_type} as a depression outline")
    return shapely.orient_polygons(geom, exterior_cw=False)


def _geojson_geometry(geom) -> dict:
    """The GeoJSON geometry of a (Multi)Polygon, positions rounded to
    :data:`COORDINATE_DECIMALS` places: every ring's coordinates taken, rounded and
    listed in one go (a survey DEM's outline may hold tens of thousands of holes)."""
    if geom.geom_type not in ("Polygon", "MultiPolygon"):
        raise InvalidParameter(f"cannot write a {geom.geom_type} as a depression outline")
    polygons = shapely.get_parts(geom)
    rings, polygon_of_ring = shapely.get_rings(polygons, return_index=True)
    xy = np.round(shapely.get_coordinates(rings), COORDINATE_DECIMALS)
    ends = np.cumsum(shapely.get_num_coordinates(rings)).tolist()
    points = xy.tolist()
    per_polygon: list[list] = [[] for _ in range(len(polygons))]
    start = 0
    for k, end in zip(polygon_of_ring.tolist(), ends):
        per_polygon[k].append(points[start:end])
        start = end
    if geom.geom_type == "Polygon":
        return {"type": "Polygon", "coordinates": per_polygon[0]}
    return {"type": "MultiPolygon", "coordinates": per_polygon}


def write_feature_collection(path: str | os.PathLike, members: dict, features) -> Path:
    """Write a GeoJSON FeatureCollection atomically, one feature per line.

    ``members`` are extra top-level members (RFC 7946 section 6.1 foreign members,
    e.g. ``name`` and ``caution``); ``features`` is an iterable of Feature dicts,
    consumed once, so the whole text is never held in memory. NaN is refused
    (write None).
    """
    path = Path(path)
    with atomic_output(path) as tmp:
        with open(tmp, "x", encoding="utf-8") as f:
            head = json_text({"type": "FeatureCollection", **members})
            f.write(head[:-1] + ',"features":[')
            for k, feature in enumerate(features):
                f.write(",\n" if k else "\n")
                f.write(json_text(feature))
            f.write("\n]}\n")
    return path


def write_depressions_geojson(source: "ResultSource", path: str | os.PathLike, *,
                              window: int | None = None, rows: np.ndarray | None = None,
                              extra: dict[str, np.ndarray] | None = None,
                              map: Callable | None = None) -> Path:
    """Write ``depressions.geojson``: one Feature per depression, WGS84 lon/lat.

    Follows RFC 7946: no ``crs`` member (section 4), positions are longitude,
    latitude (section 3.1.1), exterior rings counterclockwise and holes clockwise
    (section 3.1.6); lon/lat rounded to :data:`COORDINATE_DECIMALS` places
    (section 11.2). Properties are the depression's row of ``depressions.csv``
    (:func:`sillmark.products.inventory.depression_columns`) plus
    ``vertical_unit`` and ``caution``. Outlines come from
    :func:`sillmark.products.outlines.depression_outlines`, window by window
    (``window`` cells a side; by default the whole grid in memory).

    Notes
    -----
    Outline vertices are reprojected one by one; the cell edges between them are
    not densified, which on a site-sized DEM moves an edge by far less than a cell.
    A site crossing the antimeridian is not split (section 3.1.9).

    ``rows`` (boolean per depression, None for all) picks the depressions
    written; ``extra`` adds properties (one value per depression); ``map``
    traces the windows elsewhere, as for
    :func:`~sillmark.products.outlines.depression_outlines`.
    """
    grid = source.grid
    unit = unit_of(grid)
    transformer = wgs84_transformer(grid)  # fails before reading if there is no CRS
    keep = None if rows is None else np.asarray(rows, dtype=bool)
    outlines = depression_outlines(source, window=window, only=keep, map=map)
    columns = {name: np.asarray(values)
               for name, values in {**source.depression_columns, **(extra or {})}.items()}

    def features() -> Iterator[dict]:
        for k, outline in enumerate(outlines):
            if keep is not None and not keep[k]:
                continue
            properties = {name: bool(values[k]) if values.dtype == bool else json_number(values[k])
                          for name, values in columns.items()}
            properties["vertical_unit"] = unit.value
            properties["caution"] = SCREENING_CAUTION
            yield {
                "type": "Feature",
                "id": properties["id"],
                "geometry": wgs84_geometry(outline, grid, transformer=transformer),
                "properties": properties,
            }

    # "name", "caution" and "vertical_unit" are foreign members (RFC 7946, section 6.1).
    members = {"name": "depressions", "caution": SCREENING_CAUTION, "vertical_unit": unit.value}
    return write_feature_collection(path, members, features())


def write_spill_points_geojson(result: "SpillResult", dem: "DEM", path: str | os.PathLike) -> Path:
    """Write ``spill_points.geojson``: a Point per depression at its spill cell centre.

    Properties: ``id``, ``spill_elevation`` (in ``unit``), ``unit``, ``spills_to``
    (0 = an outlet) and ``caution``. WGS84 lon/lat as in RFC 7946.
    """
    check_result_grid(result, dem)
    return write_spill_points_table(result.depressions, dem, path)


def write_spill_points_table(table, dem: "DEM", path: str | os.PathLike, *,
                             rows: np.ndarray | None = None) -> Path:
    """:func:`write_spill_points_geojson` from a :class:`~sillmark.engine.flood.DepressionTable` itself.

    ``rows`` (boolean per depression, None for all) picks the spill points written.
    """
    final = Path(path)
    t = table
    unit = unit_of(dem)
    crs = horizontal_crs(dem)
    # Only the rows written are reprojected and formatted (a significance minimum
    # may keep a few hundred of 10^5 depressions).
    picked = np.arange(len(t)) if rows is None else np.flatnonzero(np.asarray(rows, dtype=bool))
    x = np.asarray(t.spill_x, dtype=np.float64)[picked]  # copies: the table stays as it is
    y = np.asarray(t.spill_y, dtype=np.float64)[picked]
    missing = ~(np.isfinite(x) & np.isfinite(y))
    if missing.any():
        # No coordinates from the engine: use the cell centres from the DEM's transform.
        tr = dem.transform
        cc = np.asarray(t.spill_col)[picked][missing] + 0.5
        rr = np.asarray(t.spill_row)[picked][missing] + 0.5
        x[missing] = tr.a * cc + tr.b * rr + tr.c
        y[missing] = tr.d * cc + tr.e * rr + tr.f
    lon, lat = to_wgs84(crs).transform(x, y) if len(picked) else (x, y)

    # Plain Python values up front: indexing numpy arrays value by value is slow.
    ids = np.asarray(t.id)[picked].tolist()
    to = np.asarray(t.spills_to)[picked].tolist()
    spill = [float(v) if v else None
             for v in float_texts(np.asarray(t.spill_elevation, dtype=np.float32)[picked])]
    lons = np.asarray(lon, dtype=np.float64).tolist()
    lats = np.asarray(lat, dtype=np.float64).tolist()

    def features() -> Iterator[dict]:
        for k in range(len(picked)):
            yield {
                "type": "Feature",
                "id": ids[k],
                "geometry": {
                    "type": "Point",
                    "coordinates": [
                        round(lons[k], COORDINATE_DECIMALS),
                        round(lats[k], COORDINATE_DECIMALS),
                    ],
                },
                "properties": {
                    "id": ids[k],
                    "spill_elevation": spill[k],
                    "unit": unit.value,
                    "spills_to": to[k],
                    "caution": SCREENING_CAUTION,
                },
            }

    members = {"name": "spill_points", "caution": SCREENING_CAUTION, "vertical_unit": unit.value}
    return write_feature_collection(final, members, features())


def wgs84_geometry(geom, dem: "DEM", *, transformer: pyproj.Transformer | None = None) -> dict:
    """A shapely (Multi)Polygon in the DEM's CRS as an RFC 7946 GeoJSON geometry.

    Reprojected vertex by vertex to WGS84 lon/lat, exterior rings counterclockwise
    and holes clockwise, positions rounded to :data:`COORDINATE_DECIMALS` places,
    as in ``depressions.geojson``. Pass ``transformer`` (from the DEM's CRS to
    WGS84, ``always_xy=True``) to reuse one across many geometries.
    """
    if transformer is None:
        transformer = to_wgs84(horizontal_crs(dem))

    def to_lonlat(xy: np.ndarray) -> np.ndarray:
        x, y = transformer.transform(xy[:, 0], xy[:, 1])
        return np.column_stack([x, y])

    return _geojson_geometry(_oriented(shapely.transform(geom, to_lonlat)))
