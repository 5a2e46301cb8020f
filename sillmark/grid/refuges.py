"""Refuges and roads on the DEM's grid, for the cut-off stage.

A refuge file is GeoJSON (RFC 7946 lon/lat, or a named ``crs`` member as the
outlet files accept) of points or polygons: rest centres, high ground beyond
the site. A roads file is GeoJSON of lines: when given, a route to a refuge
keeps to the cells the roads cross. Both are burned into cells as outlet files
are (:mod:`sillmark.grid.outlet_geojson`): points and lines every cell they
touch, polygons the cells whose centre they hold.
"""

from __future__ import annotations

import dataclasses
import os
from typing import Any

import numpy as np
import shapely

from sillmark.errors import InvalidOutlets, InvalidRefuges
from sillmark.grid.outlet_geojson import (
    burn_parts,
    collect_geometries,
    load_geojson,
    outlets_crs,
    reproject,
)

__all__ = ["PlacedShapes", "place_shapes", "read_refuges", "read_roads"]


@dataclasses.dataclass(frozen=True, eq=False)
class PlacedShapes:
    """Refuges or roads placed in the DEM's CRS, to burn into any window of the grid.

    Pickles small (the shapes, no cells), so cluster tasks burn their own windows.
    """

    centred: tuple
    touched: tuple
    label: str

    def window(self, r0: int, r1: int, c0: int, c1: int) -> np.ndarray:
        """The cells of rows ``r0:r1``, columns ``c0:c1`` the shapes cover (bool).

        The shapes are kept in cell units (column, row) and burned by exact
        arithmetic, not by a rasteriser clipped to the window: a line or a
        polygon's edge marks every cell whose closed square it meets (its
        supercover), a polygon also every cell whose centre it holds, a point
        the cells it touches. So every window burns a cell as the whole grid
        does, even where a line ends exactly on a cell corner.
        """
        out = np.zeros((r1 - r0, c1 - c0), dtype=bool)
        for g in _single(self.centred):
            _fill_centres(out, g, r0, c0)
        for g in _single(self.touched):
            if g.geom_type == "Polygon":
                _fill_centres(out, g, r0, c0)
                for ring in [g.exterior, *g.interiors]:
                    _supercover(out, np.asarray(ring.coords), r0, c0)
            elif g.geom_type == "Point":
                _supercover(out, np.asarray(g.coords)[[0, 0]], r0, c0)
            else:
                _supercover(out, np.asarray(g.coords), r0, c0)
        return out


def _single(shapes) -> list:
    """The single parts of shapes that may be multi-part or collections."""
    out = []
    for g in shapes:
        if g.is_empty:
            continue
        if g.geom_type.startswith("Multi") or g.geom_type == "GeometryCollection":
            out.extend(_single(shapely.get_parts(g)))
        else:
            out.append(g)
    return out


def _fill_centres(out: np.ndarray, polygon: Any, r0: int, c0: int) -> None:
    """Mark the cells of the window whose centre lies inside ``polygon`` (cell units)."""
    rows, cols = out.shape
    left, top, right, bottom = polygon.bounds  # cell units: x = column, y = row
    i0, i1 = max(0, int(np.floor(top - 0.5)) - r0), min(rows, int(np.ceil(bottom + 0.5)) - r0)
    j0, j1 = max(0, int(np.floor(left - 0.5)) - c0), min(cols, int(np.ceil(right + 0.5)) - c0)
    if i0 >= i1 or j0 >= j1:
        return
    y, x = np.mgrid[i0 + r0:i1 + r0, j0 + c0:j1 + c0] + 0.5
    out[i0:i1, j0:j1] |= shapely.contains_xy(polygon, x, y)


def _supercover(out: np.ndarray, xy: np.ndarray, r0: int, c0: int) -> None:
    """Mark the cells of the window whose closed square meets the polyline ``xy`` (cell units)."""
    rows, cols = out.shape
    for (x0, y0), (x1, y1) in zip(xy[:-1], xy[1:]):
        xmin, xmax = min(x0, x1), max(x0, x1)
        first, last = int(np.ceil(xmin)) - 1, int(np.floor(xmax))
        first, last = max(first, c0 - 1), min(last, c0 + cols)
        for c in range(first, last + 1):
            a, b = max(c, xmin), min(c + 1, xmax)
            if a > b:
                continue
            if x1 == x0:
                ya, yb = min(y0, y1), max(y0, y1)
            else:
                t = (np.array([a, b]) - x0) / (x1 - x0)
                ys = y0 + t * (y1 - y0)
                ya, yb = float(ys.min()), float(ys.max())
            lo, hi = int(np.ceil(ya)) - 1, int(np.floor(yb))
            lo, hi = max(lo, r0), min(hi, r0 + rows - 1)
            if c0 <= c < c0 + cols and lo <= hi:
                out[lo - r0:hi - r0 + 1, c - c0] = True


def place_shapes(source: Any, grid: Any, what: str) -> PlacedShapes:
    """Refuges (``what="refuges"``: points, polygons) or roads (``"roads"``: lines) of a
    GeoJSON file, placed on ``grid`` (a DEM or a DEM read by windows), unburned."""
    kinds = {"refuges": {"Point", "Polygon"}, "roads": {"LineString"}}[what]
    moved, label = _placed(source, grid, what, kinds)
    centred, touched = burn_parts(moved, 0.5 * max(grid.cell_size))
    a, b, c, d, e, f = tuple(~grid.transform)[:6]

    def cells(xy: np.ndarray) -> np.ndarray:
        return np.column_stack([a * xy[:, 0] + b * xy[:, 1] + c, d * xy[:, 0] + e * xy[:, 1] + f])

    def to_cells(shapes):
        return tuple(shapely.transform(g, cells) for g in shapes)

    return PlacedShapes(centred=to_cells(centred), touched=to_cells(touched), label=label)


def _placed(source: Any, dem: Any, what: str, kinds: set[str]) -> tuple[list, str]:
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
    return moved, label


def _read(source: Any, dem: Any, what: str) -> tuple[np.ndarray, str]:
    shapes = place_shapes(source, dem, what)
    label = shapes.label
    rows, cols = dem.shape
    cells = shapes.window(0, rows, 0, cols) & dem.valid
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
    return _read(source, dem, "refuges")


def read_roads(source: str | os.PathLike | dict, dem: Any) -> tuple[np.ndarray, str]:
    """The road cells (bool mask on ``dem``) and the file's label.

    Raises
    ------
    InvalidRefuges
        Unreadable GeoJSON, geometries other than lines, or no road on the DEM.
    """
    return _read(source, dem, "roads")
