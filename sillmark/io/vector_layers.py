"""The vector layers of a results folder, as GeoJSON or GeoPackage by their size.

Small layers are written as GeoJSON (RFC 7946, WGS 84 lon/lat), which a web map
or a text editor opens as it is; large ones as GeoPackage in the DEM's CRS,
with a spatial index (:mod:`sillmark.io.geopackage`), which a GIS draws a part of
without reading the whole. ``"auto"`` picks GeoJSON up to
:data:`GEOJSON_MAX_FEATURES` features and GeoPackage above; ``"geojson"`` and
``"gpkg"`` force one. The caution is in both (the GeoJSON's ``caution`` member,
the GeoPackage's metadata tables).
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import shapely

from sillmark.errors import InvalidParameter
from sillmark.grid.crs import horizontal_crs
from sillmark.io.geojson import write_depressions_geojson, write_spill_points_table
from sillmark.io.geopackage import write_geopackage_layer
from sillmark.products.inventory import table_columns
from sillmark.products.outlines import depression_outlines
from sillmark.units import unit_of, unit_suffix

if TYPE_CHECKING:  # pragma: no cover
    from sillmark.products.source import ResultSource

__all__ = [
    "GEOJSON_MAX_FEATURES",
    "VECTOR_FORMATS",
    "vector_suffix",
    "write_depression_layer",
    "write_spill_point_layer",
]

#: Choices of the vector format option.
VECTOR_FORMATS = ("auto", "geojson", "gpkg")
#: Most features ``"auto"`` still writes as GeoJSON: a few thousand outlines keep a
#: GeoJSON to a few MB, which a browser map loads at once. Common practice for
#: web maps, not a standard.
GEOJSON_MAX_FEATURES = 2000


def vector_suffix(vector_format: str, features: int) -> str:
    """``".geojson"`` or ``".gpkg"`` for a layer of ``features`` features.

    Examples
    --------
    >>> vector_suffix("auto", 12), vector_suffix("auto", 50_000), vector_suffix("gpkg", 1)
    ('.geojson', '.gpkg', '.gpkg')
    """
    if vector_format not in VECTOR_FORMATS:
        raise InvalidParameter(
            f"the vector format must be one of {', '.join(VECTOR_FORMATS)}, not {vector_format!r}")
    if vector_format == "auto":
        return ".geojson" if int(features) <= GEOJSON_MAX_FEATURES else ".gpkg"
    return "." + vector_format


def _rows(rows: np.ndarray | None, count: int) -> np.ndarray:
    if rows is None:
        return np.ones(count, dtype=bool)
    rows = np.asarray(rows)
    if rows.dtype != bool or rows.shape != (count,):
        raise InvalidParameter(f"rows must be one boolean per depression ({count}), "
                               f"not {rows.dtype} {rows.shape}")
    return rows


def write_depression_layer(source: "ResultSource", folder: str | os.PathLike, *,
                           rows: np.ndarray | None = None, vector_format: str = "geojson",
                           extra: dict[str, np.ndarray] | None = None,
                           window: int | None = None, map: Any = None) -> Path:
    """Write ``depressions.geojson`` or ``depressions.gpkg``: the outline of each depression
    picked by ``rows`` (boolean per depression; None = all), with its table row.

    ``extra`` adds columns (one value per depression of the table); ``window``
    and ``map`` trace the outlines window by window, elsewhere, as for
    :func:`~sillmark.products.outlines.depression_outlines`.
    """
    table = source.depression_columns
    count = len(table["id"])
    keep = _rows(rows, count)
    suffix = vector_suffix(vector_format, int(np.count_nonzero(keep)))
    path = Path(folder) / f"depressions{suffix}"
    if suffix == ".geojson":
        return write_depressions_geojson(source, path, window=window, rows=keep, extra=extra,
                                         map=map)
    outlines = depression_outlines(source, window=window, only=keep, map=map)
    columns = {**table, **(extra or {})}
    picked = np.flatnonzero(keep)
    return write_geopackage_layer(
        path, [outlines[k] for k in picked.tolist()],
        {name: np.asarray(values)[picked] for name, values in columns.items()},
        crs=source.grid, layer="depressions", geometry_type="MultiPolygon",
        description="Outline of each listed depression with its row of depressions.csv; "
                    f"elevations in {unit_of(source.grid).value}.",
    )


def write_spill_point_layer(table, grid: Any, folder: str | os.PathLike, *,
                            rows: np.ndarray | None = None, vector_format: str = "geojson") -> Path:
    """Write ``spill_points.geojson`` or ``spill_points.gpkg``: the spill point of each
    depression of ``table`` (a DepressionTable) picked by ``rows``."""
    keep = _rows(rows, len(table))
    suffix = vector_suffix(vector_format, int(np.count_nonzero(keep)))
    path = Path(folder) / f"spill_points{suffix}"
    if suffix == ".geojson":
        return write_spill_points_table(table, grid, path, rows=keep)
    horizontal_crs(grid)  # no CRS: fail before writing
    unit = unit_of(grid)
    v = unit_suffix(unit)
    columns = table_columns(table, grid)
    x = np.array(table.spill_x, dtype=np.float64)
    y = np.array(table.spill_y, dtype=np.float64)
    missing = ~(np.isfinite(x) & np.isfinite(y))
    if missing.any():
        # The engine gave no coordinates: the spill cell's centre from the transform.
        tr = grid.transform
        cc = np.asarray(table.spill_col)[missing] + 0.5
        rr = np.asarray(table.spill_row)[missing] + 0.5
        x[missing] = tr.a * cc + tr.b * rr + tr.c
        y[missing] = tr.d * cc + tr.e * rr + tr.f
    picked = np.flatnonzero(keep)
    points = shapely.points(x[picked], y[picked]) if len(picked) else []
    attributes = {
        "id": np.asarray(table.id)[picked],
        f"spill_elevation_{v}": np.asarray(table.spill_elevation)[picked],
        "spills_to": np.asarray(table.spills_to)[picked],
        "spill_lon_deg": columns["spill_lon_deg"][picked],
        "spill_lat_deg": columns["spill_lat_deg"][picked],
    }
    return write_geopackage_layer(
        path, points, attributes, crs=grid, layer="spill_points", geometry_type="Point",
        description=f"Spill point of each listed depression; elevations in {unit.value}.",
    )
