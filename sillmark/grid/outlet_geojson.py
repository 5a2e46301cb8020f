"""Outlets drawn as GeoJSON: points, lines and polygons read in any named CRS,
reprojected onto the DEM and burned into cells.

Points and lines burn every cell they touch; a polygon burns the cells whose
centre it holds, and thin parts of it every cell they touch, so a narrow
channel drawn as a polygon still reaches the grid.
"""

from __future__ import annotations

import json
import math
import os
from collections.abc import Iterable
from typing import Any

import numpy as np
import pyproj
import shapely
from rasterio.features import rasterize
from shapely.geometry import shape as shapely_shape

from sillmark.errors import InvalidOutlets
from sillmark.grid.dem import DEM
from sillmark.grid.geojson import geojson_crs
from sillmark.grid.raster_files import (
    crs_name_refusal,
    local_file,
)

_POINT_TYPES = {"Point", "MultiPoint"}


_LINE_TYPES = {"LineString", "MultiLineString"}


_POLYGON_TYPES = {"Polygon", "MultiPolygon"}


_GEOMETRY_TYPES = _POINT_TYPES | _LINE_TYPES | _POLYGON_TYPES | {"GeometryCollection"}


_ACCEPTED_GEOJSON = "a GeoJSON FeatureCollection, Feature or geometry of points, lines or polygons"


# Most vertices a reprojected line or ring is densified to (see _densify_step).
_MAX_DENSIFIED_VERTICES = 1_000_000


def load_geojson(source: Any) -> tuple[Any, str]:
    if isinstance(source, dict):
        return source, "the GeoJSON object"
    if isinstance(source, bytes):
        source = os.fsdecode(source)
    if isinstance(source, str) and source.lstrip().startswith(("{", "[")):
        return _parse_json(source, "the GeoJSON text"), "the GeoJSON text"
    if isinstance(source, (str, os.PathLike)):
        path = local_file(source, InvalidOutlets, "the GeoJSON file")
        label = f"the GeoJSON '{os.path.basename(path)}'"
        try:
            with open(path, "rb") as fh:
                data = fh.read()
            text = data.decode("utf-8-sig")
        except UnicodeDecodeError:
            raise InvalidOutlets(
                f"{label} is not UTF-8 text; give {_ACCEPTED_GEOJSON} (RFC 7946 files are UTF-8)"
            ) from None
        except OSError as exc:
            raise InvalidOutlets(f"{label} cannot be read ({exc.strerror}); check the file") from None
        return _parse_json(text, label), label
    raise InvalidOutlets(
        f"GeoJSON outlets must be a file path, GeoJSON text or a dict, got {type(source).__name__}"
    )


def _parse_json(text: str, label: str) -> Any:
    try:
        return json.loads(text)
    except json.JSONDecodeError as exc:
        raise InvalidOutlets(
            f"{label} is not valid JSON ({exc.msg} at line {exc.lineno} column {exc.colno}); "
            f"give {_ACCEPTED_GEOJSON}"
        ) from None
    except RecursionError:
        raise InvalidOutlets(f"{label} is nested too deeply to read; give {_ACCEPTED_GEOJSON}") from None


def collect_geometries(obj: Any, label: str) -> list[Any]:
    """Shapely geometries (2-D, non-empty, single parts) from a GeoJSON object."""
    if not isinstance(obj, dict):
        raise InvalidOutlets(
            f"{label} is JSON but not a GeoJSON object (found a {type(obj).__name__}); give {_ACCEPTED_GEOJSON}"
        )
    kind = obj.get("type")
    if kind == "FeatureCollection":
        features = obj.get("features")
        if not isinstance(features, list):
            raise InvalidOutlets(f"{label} is a FeatureCollection without a 'features' list")
        geoms = [_feature_geometry(f, label, i) for i, f in enumerate(features)]
    elif kind == "Feature":
        geoms = [_feature_geometry(obj, label, 0)]
    elif kind in _GEOMETRY_TYPES:
        geoms = [_geometry(obj, label, "its geometry")]
    elif isinstance(kind, str):
        raise InvalidOutlets(
            f"{label} has unsupported type '{kind}'; accepted: FeatureCollection, Feature, "
            "Point, MultiPoint, LineString, MultiLineString, Polygon, MultiPolygon, "
            "GeometryCollection"
        )
    else:
        raise InvalidOutlets(f"{label} has no 'type' member; give {_ACCEPTED_GEOJSON}")
    parts = [p for g in geoms if g is not None for p in _single_parts(g)]
    if not parts:
        raise InvalidOutlets(
            f"{label} has no geometries; draw at least one point, line or polygon of the water body"
        )
    return parts


def _feature_geometry(feature: Any, label: str, index: int) -> Any:
    if not isinstance(feature, dict) or feature.get("type") != "Feature":
        raise InvalidOutlets(f"{label}: item {index} of 'features' is not a GeoJSON Feature")
    geometry = feature.get("geometry")
    if geometry is None:
        return None  # RFC 7946 allows unlocated features; they mark nothing
    return _geometry(geometry, label, f"feature {index}")


def _geometry(obj: Any, label: str, where: str) -> Any:
    if not isinstance(obj, dict):
        raise InvalidOutlets(f"{label}: the geometry of {where} is not a GeoJSON object")
    kind = obj.get("type")
    if kind not in _GEOMETRY_TYPES:
        raise InvalidOutlets(
            f"{label}: {where} has unsupported geometry type {kind!r}; accepted: Point, "
            "MultiPoint, LineString, MultiLineString, Polygon, MultiPolygon, GeometryCollection"
        )
    try:
        geom = shapely_shape(obj)
    except (ValueError, TypeError, KeyError, IndexError, AttributeError, shapely.errors.ShapelyError) as exc:
        raise InvalidOutlets(
            f"{label}: the {kind} of {where} has malformed coordinates ({exc}); "
            "give [x, y] number pairs as RFC 7946 describes"
        ) from None
    return shapely.force_2d(geom)


def _single_parts(geom: Any) -> list[Any]:
    if geom.is_empty:
        return []
    if isinstance(geom, shapely.GeometryCollection) or geom.geom_type.startswith("Multi"):
        return [p for sub in shapely.get_parts(geom) for p in _single_parts(sub)]
    return [geom]


def outlets_crs(obj: dict, label: str) -> pyproj.CRS:
    refusal = crs_name_refusal(obj, label)
    if refusal is not None:
        raise InvalidOutlets(refusal)
    return geojson_crs(obj, label, InvalidOutlets)


def reproject(geoms: list[Any], src: pyproj.CRS, dem: DEM, label: str) -> list[Any]:
    dst = dem.horizontal_crs
    if src.equals(dst, ignore_axis_order=True):
        return geoms
    try:
        forward = pyproj.Transformer.from_crs(src, dst, always_xy=True)
        backward = pyproj.Transformer.from_crs(dst, src, always_xy=True)
    except pyproj.exceptions.ProjError as exc:
        raise InvalidOutlets(
            f"{label} cannot be transformed from {src.name!r} to the DEM's CRS ({exc})"
        ) from None
    step = _densify_step(backward, dem)

    def move(xy: np.ndarray) -> np.ndarray:
        x, y = forward.transform(xy[:, 0], xy[:, 1], errcheck=False)
        return np.column_stack([x, y])

    out = []
    for k, g in enumerate(geoms):
        # A line or ring of coincident vertices has no length to split (GEOS refuses it).
        if step is not None and g.geom_type != "Point" and g.length > 0:
            vertices = g.length / step
            local = step if vertices <= _MAX_DENSIFIED_VERTICES else g.length / _MAX_DENSIFIED_VERTICES
            g = shapely.segmentize(g, local)
        moved = shapely.transform(g, move)
        finite = np.isfinite(shapely.get_coordinates(moved)).all(axis=1)
        if finite.all():
            out.append(moved)
        elif finite.any():
            raise InvalidOutlets(
                f"{label}: part of geometry {k} lies where the DEM's CRS "
                f"({dst.name}) is not defined; clip the geometry to the site"
            )
        # else: no vertex can be placed in the DEM's CRS, so it lies far off the grid
    return out


def _densify_step(backward: pyproj.Transformer, dem: DEM) -> float | None:
    """Half a DEM cell, measured in the source CRS at the DEM's centre."""
    left, bottom, right, top = dem.bounds
    cx, cy = (left + right) / 2, (bottom + top) / 2
    dx, dy = dem.cell_size
    x, y = backward.transform(np.array([cx, cx + dx, cx]), np.array([cy, cy, cy + dy]), errcheck=False)
    d1 = math.hypot(x[1] - x[0], y[1] - y[0])
    d2 = math.hypot(x[2] - x[0], y[2] - y[0])
    step = 0.5 * min(d1, d2)
    return step if math.isfinite(step) and step > 0 else None


def burn(geoms: Iterable[Any], dem: DEM) -> np.ndarray:
    """Rasterise: points, lines and thin polygon parts by touch, polygons by centre."""
    centred, touched = burn_parts(geoms, 0.5 * max(dem.cell_size))
    return rasterize_parts(centred, touched, dem.shape, dem.transform)


def burn_parts(geoms: Iterable[Any], half: float) -> tuple[list[Any], list[Any]]:
    """The geometries burned by cell centre and those burned by touch (see :func:`burn`)."""
    touched: list[Any] = []
    centred: list[Any] = []
    for g in geoms:
        if g.geom_type != "Polygon":
            touched.append(g)
            continue
        for part in [g] if g.is_valid else _single_parts(shapely.make_valid(g)):
            if part.geom_type != "Polygon":
                touched.append(part)  # a collapsed ring: a line or a point
                continue
            centred.append(part)
            thin = _thin_parts(part, half)
            if thin is not None:
                touched.append(thin)
    return centred, touched


def rasterize_parts(centred: list[Any], touched: list[Any], shape: tuple[int, int],
                     transform: Any) -> np.ndarray:
    """Burn the parts of :func:`burn_parts` on a grid (or a window of one)."""
    out = np.zeros(shape, dtype=np.uint8)
    common = dict(out_shape=shape, transform=transform, out=out, fill=0, dtype="uint8")
    if centred:
        rasterize(((g, 1) for g in centred), all_touched=False, **common)
    if touched:
        rasterize(((g, 1) for g in touched), all_touched=True, **common)
    return out.astype(bool)


def _thin_parts(polygon: Any, half: float) -> Any:
    """The parts of ``polygon`` narrower than ``2 * half`` (None if there are none)."""
    core = polygon.buffer(-half, join_style="mitre").buffer(half, join_style="mitre")
    thin = polygon.difference(core)
    if thin.is_empty:
        return None
    # Drop numerical slivers left along edges the opening reproduced exactly.
    if thin.buffer(-1e-6 * half).is_empty:
        return None
    return thin


def grid_difference(transform: Any, dem: DEM) -> str:
    t, d = transform, dem.transform
    dx, dy = dem.cell_size
    if abs(t.b) > 0 or abs(t.d) > 0:
        return "the mask's grid is rotated or sheared"
    if abs(t.a - d.a) > 1e-9 * dx or abs(t.e - d.e) > 1e-9 * dy:
        return f"cell size {abs(t.a):.9g} × {abs(t.e):.9g} vs the DEM's {dx:.9g} × {dy:.9g}"
    if abs(t.c - d.c) > 1e-6 * dx or abs(t.f - d.f) > 1e-6 * dy:
        return f"north-west corner ({t.c:.9g}, {t.f:.9g}) vs the DEM's ({d.c:.9g}, {d.f:.9g})"
    return ""


def extent_text(geoms: list[Any], dem: DEM) -> str:
    left, bottom, right, top = dem.bounds
    dem_text = f"the DEM covers x {left:.10g} to {right:.10g}, y {bottom:.10g} to {top:.10g}"
    if not geoms:
        return f"no geometry can be placed in the DEM's CRS; {dem_text}"
    gx0, gy0, gx1, gy1 = shapely.total_bounds(geoms)
    return f"its extent in the DEM's CRS is x {gx0:.10g} to {gx1:.10g}, y {gy0:.10g} to {gy1:.10g}; {dem_text}"
