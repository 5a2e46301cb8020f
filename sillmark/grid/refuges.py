"""Refuges and roads on the DEM's grid, for the cut-off stage.

A refuge file is GeoJSON (RFC 7946 lon/lat, or a named ``crs`` member as the
outlet files accept) of points or polygons: rest centres, high ground beyond
the site. A roads file is GeoJSON of lines: when given, a route to a refuge
keeps to the cells the roads cross. Both are burned into cells as outlet files
are (:mod:`sillmark.grid.outlet_geojson`): points and lines every cell they
touch, polygons the cells whose centre they hold.
"""

from __future__ import annotations

import os
from typing import Any

import numpy as np

from sillmark.errors import InvalidOutlets, InvalidRefuges
from sillmark.grid.outlet_geojson import (
    burn,
    collect_geometries,
    load_geojson,
    outlets_crs,
    reproject,
)

__all__ = ["read_refuges", "read_roads"]


def _read(source: Any, dem: Any, what: str, kinds: set[str]) -> tuple[np.ndarray, str]:
    try:
        obj, label = load_geojson(source)
        geoms = collect_geometries(obj, label)
        moved = reproject(geoms, outlets_crs(obj, label), dem, label)
    except InvalidOutlets as exc:
        raise InvalidRefuges(str(exc).replace("of the water body", f"of the {what}")) from None
    wrong = sorted({g.geom_type for g in moved if g.geom_type not in kinds})
    if wrong:
        raise InvalidRefuges(
            f"{label} holds {', '.join(wrong)} geometries; {what} are given as "
            f"{' or '.join(sorted(kinds))}")
    cells = burn(moved, dem) & dem.valid if moved else np.zeros(dem.shape, bool)
    if not cells.any():
        raise InvalidRefuges(
            f"{label}: no {what[:-1] if what.endswith('s') else what} lies on a cell of the DEM "
            "with data; check the file's CRS and that it covers the site")
    return cells, label


def read_refuges(source: str | os.PathLike | dict, dem: Any) -> tuple[np.ndarray, str]:
    """The refuge cells (bool mask on ``dem``) and the file's label.

    Raises
    ------
    InvalidRefuges
        Unreadable GeoJSON, lines instead of points or polygons, or no refuge on
        a cell with data.
    """
    return _read(source, dem, "refuges", {"Point", "Polygon"})


def read_roads(source: str | os.PathLike | dict, dem: Any) -> tuple[np.ndarray, str]:
    """The road cells (bool mask on ``dem``) and the file's label.

    Raises
    ------
    InvalidRefuges
        Unreadable GeoJSON, geometries other than lines, or no road on the DEM.
    """
    return _read(source, dem, "roads", {"LineString"})
