"""A place drawn as a polygon: the cells that must stay dry.

The barrier planner (:mod:`sillmark.products.barrier_planner`) keeps a place
dry up to a level; an asset or a point is one cell, a drawn polygon is every
cell it covers. The polygon comes as GeoJSON (RFC 7946 lon/lat, or a named
``crs`` member as the outlet files accept; :mod:`sillmark.grid.geojson`): a
Polygon or MultiPolygon geometry, or a Feature or FeatureCollection of them.
Its cells are burned as the outlet files burn polygons
(:func:`sillmark.grid.outlet_geojson.burn`): the cells whose centre it holds,
and every cell its thin parts touch, so a polygon smaller than a cell still
covers the cell it lies in.
"""

from __future__ import annotations

import dataclasses
from typing import Any

import numpy as np
import shapely

from sillmark.errors import InvalidOutlets, InvalidParameter
from sillmark.grid.outlet_geojson import (
    burn,
    collect_geometries,
    load_geojson,
    outlets_crs,
    reproject,
)

__all__ = ["PolygonPlace", "read_place_polygon"]


@dataclasses.dataclass(frozen=True, eq=False)
class PolygonPlace:
    """The cells of a drawn place on a DEM.

    Attributes
    ----------
    mask : (rows, cols) bool array
        True on the place's cells that hold data.
    label : str
        Names the GeoJSON in messages.
    x, y : float
        Centroid of the polygon in the DEM's CRS.
    """

    mask: np.ndarray
    label: str
    x: float
    y: float

    @property
    def cells(self) -> int:
        return int(np.count_nonzero(self.mask))


def read_place_polygon(source: Any, dem: Any) -> PolygonPlace:
    """The cells of ``dem`` (a DEM in memory) a GeoJSON polygon covers.

    Parameters
    ----------
    source : path, GeoJSON text or dict
        A Polygon or MultiPolygon, or a Feature or FeatureCollection of them.
    dem : DEM

    Raises
    ------
    InvalidParameter
        Unreadable GeoJSON, a geometry that is not a polygon, or a polygon
        that covers no cell of the DEM with data.
    """
    try:
        obj, label = load_geojson(source)
        geoms = collect_geometries(obj, label)
        moved = reproject(geoms, outlets_crs(obj, label), dem, label)
    except InvalidOutlets as exc:
        raise InvalidParameter(str(exc).replace("of the water body", "of the place")) from None
    wrong = sorted({g.geom_type for g in geoms if g.geom_type != "Polygon"})
    if wrong:
        raise InvalidParameter(f"{label} holds {', '.join(wrong)} geometries; draw the place "
                               "as a Polygon (or a MultiPolygon)")
    mask = burn(moved, dem) & dem.valid if moved else np.zeros(dem.shape, dtype=bool)
    if not mask.any():
        left, bottom, right, top = dem.bounds
        raise InvalidParameter(
            f"{label}: the polygon covers no cell of the DEM with data (the DEM covers x "
            f"{left:.2f} to {right:.2f}, y {bottom:.2f} to {top:.2f} in its CRS); check its "
            "coordinates and CRS")
    centre = shapely.union_all(moved).centroid
    return PolygonPlace(mask=mask, label=label, x=float(centre.x), y=float(centre.y))
