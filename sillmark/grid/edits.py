"""Edits of the ground water sees: culverts, flap valves, barriers and breaches.

An edits file is a GeoJSON FeatureCollection (RFC 7946 lon/lat, or a named
``crs`` member as the outlet files accept; :mod:`sillmark.grid.geojson`).
Each feature carries a ``kind`` property:

``culvert``
    A LineString whose first and last vertices are the two ends, with an
    ``invert`` level (the site's vertical unit). The cells under the line are
    not changed: the culvert is one extra edge of the flood graph between the
    two end cells (the engine's ``culverts``). ``one_way: true`` makes
    it a flap valve, passing water from the first vertex to the last only.
``barrier``
    A LineString with a ``crest`` level. Every cell the line crosses is raised
    to at least the crest. The cells are those of a 4-connected walk along
    the line (a grid traversal after Amanatides & Woo 1987, stepping one row
    or one column at a time), so the wall has no diagonal gap water could slip
    through under 8-connectivity: a 4-connected line of cells separates
    8-connected regions (Rosenfeld 1970).
``breach``
    A LineString (the same 4-connected cells) or a Polygon (the cells whose
    centre it holds, and every cell its thin parts touch) with a ``level``:
    every cell it covers is lowered to that level.

Barriers and breaches change a copy of the elevations, in the order of the
file; the user's DEM is never changed. A feature may carry a ``name`` (or
``id``) property, or a feature ``id``, used in messages.

References
----------
Amanatides, J., Woo, A. (1987). A fast voxel traversal algorithm for ray
tracing. Eurographics '87, 3-10.
Rosenfeld, A. (1970). Connectivity in digital pictures. Journal of the ACM
17(1), 146-160. doi:10.1145/321556.321570
"""

from __future__ import annotations

import dataclasses
import math
from typing import Any

import numpy as np
import pyproj
import shapely
from shapely.geometry import shape as shapely_shape

from sillmark.errors import InvalidEdits, InvalidOutlets
from sillmark.grid.dem_grid import DEMGrid
from sillmark.grid.georeference import linear_unit_metres
from sillmark.grid.outlet_geojson import burn, load_geojson, outlets_crs, reproject
from sillmark.units import level_text

__all__ = ["EDIT_KINDS", "Edit", "EditedDEMGrid", "Edits", "edited_grid", "read_edits"]

#: Kinds of edit and the level property each needs.
EDIT_KINDS = {"culvert": "invert", "barrier": "crest", "breach": "level"}
_GEOMETRIES = {"culvert": ("LineString",), "barrier": ("LineString",),
               "breach": ("LineString", "Polygon")}


@dataclasses.dataclass(frozen=True)
class Edit:
    """One edit on the grid.

    Attributes
    ----------
    index : int
        Position of the feature in the file.
    kind : {"culvert", "barrier", "breach"}
    name : str or None
    level : float
        Invert, crest or breach level, in the DEM's vertical unit.
    one_way : bool
        A flap valve (culverts only).
    rows, cols : int64 arrays
        The cells it touches: a culvert's two ends; the cells a barrier
        raises or a breach lowers (before comparing with the ground).
    length_m : float
        Length of the line on the ground in metres (NaN for a polygon).
    x, y : tuple of float
        Coordinates (the DEM's CRS) of a culvert's two ends, or of a line's
        first and last vertices; of the centroid for a polygon.
    """

    index: int
    kind: str
    name: str | None
    level: float
    one_way: bool
    rows: np.ndarray
    cols: np.ndarray
    length_m: float
    x: tuple
    y: tuple

    @property
    def label(self) -> str:
        """``feature 2 (barrier 'Mill Lane wall')`` for messages and reports."""
        named = f" '{self.name}'" if self.name else ""
        what = "flap valve" if self.one_way else self.kind
        return f"feature {self.index} ({what}{named})"


@dataclasses.dataclass(frozen=True, eq=False)
class Edits:
    """The edits of one file, placed on a grid of ``shape``.

    ``document`` is the GeoJSON they were read from (None for edits made in
    code, such as a planned barrier): a results folder keeps a copy of it, so
    that later commands on the folder place the same edits again.
    """

    shape: tuple[int, int]
    items: tuple[Edit, ...]
    source: str
    document: dict | None = None

    def __len__(self) -> int:
        return len(self.items)

    @property
    def culverts(self) -> tuple[Edit, ...]:
        return tuple(e for e in self.items if e.kind == "culvert")

    def apply(self, elevation: np.ndarray, r0: int = 0, c0: int = 0) -> tuple[np.ndarray, list[int]]:
        """An edited copy of ``elevation`` (the grid, or its window from ``(r0, c0)``).

        Barriers raise their cells to at least the crest, breaches lower theirs
        to at most the level, in the order of the file; nodata stays nodata.
        Returns the copy and, per edit, how many cells of the window changed
        (0 for culverts).
        """
        z = np.array(elevation, dtype=np.float32, copy=True)
        h, w = z.shape
        changed = []
        for e in self.items:
            if e.kind == "culvert":
                changed.append(0)
                continue
            r, c = e.rows - r0, e.cols - c0
            inside = (r >= 0) & (r < h) & (c >= 0) & (c < w)
            r, c = r[inside], c[inside]
            old = z[r, c]
            level = np.float32(e.level)
            new = np.maximum(old, level) if e.kind == "barrier" else np.minimum(old, level)
            new = np.where(np.isnan(old), old, new)
            changed.append(int(np.count_nonzero(new != old)))
            z[r, c] = new
        return z, changed

    def changes_on(self, read_window, width: int, *, block_rows: int = 64) -> list[int]:
        """Per edit, the cells it changes on a grid read by windows (0 for a culvert).

        The same counts :meth:`apply` gives on the whole grid, from the edited
        cells only: ``read_window(r0, r1, c0, c1)`` is read in strips of
        ``block_rows`` rows, each only as wide as the edited cells in it.
        """
        ground = [e for e in self.items if e.kind != "culvert"]
        if not ground:
            return [0] * len(self)
        flat = np.unique(np.concatenate([e.rows * width + e.cols for e in ground]))
        rows, cols = flat // width, flat % width
        values = np.empty(flat.shape[0], dtype=np.float32)
        strip = rows // block_rows
        for b in np.unique(strip):
            sel = np.flatnonzero(strip == b)
            r0, c0, c1 = int(b) * block_rows, int(cols[sel].min()), int(cols[sel].max()) + 1
            window = read_window(r0, r0 + block_rows, c0, c1)
            values[sel] = window[rows[sel] - r0, cols[sel] - c0]
        changed = []
        for e in self.items:
            if e.kind == "culvert":
                changed.append(0)
                continue
            at = np.searchsorted(flat, e.rows * width + e.cols)
            old = values[at]
            level = np.float32(e.level)
            new = np.maximum(old, level) if e.kind == "barrier" else np.minimum(old, level)
            new = np.where(np.isnan(old), old, new)
            changed.append(int(np.count_nonzero(new != old)))
            values[at] = new
        return changed

    def culvert_ends(self) -> dict[str, np.ndarray]:
        """The culverts as plain arrays: both ends' rows and columns, inverts, one-way flags.

        What :func:`sillmark.engine.culverts.culvert_edges` takes (``a_rows``,
        ``a_cols``, ``b_rows``, ``b_cols``, ``invert``, ``one_way``).
        """
        found = self.culverts
        return {
            "a_rows": np.array([e.rows[0] for e in found], dtype=np.int64),
            "a_cols": np.array([e.cols[0] for e in found], dtype=np.int64),
            "b_rows": np.array([e.rows[1] for e in found], dtype=np.int64),
            "b_cols": np.array([e.cols[1] for e in found], dtype=np.int64),
            "invert": np.array([e.level for e in found], dtype=np.float64),
            "one_way": np.array([e.one_way for e in found], dtype=bool),
        }

    def describe(self, unit: Any, datum: str | None = None,
                 changed: list[int] | None = None) -> list[str]:
        """One line per edit, as the command line prints it (levels with their datum)."""
        lines = []
        for k, e in enumerate(self.items):
            level = level_text(e.level, unit, datum)
            if e.kind == "culvert":
                way = "from the first end to the last only" if e.one_way else "both ways"
                lines.append(
                    f"{e.label}: invert {level}; joins the cells at ({e.x[0]:.2f}, "
                    f"{e.y[0]:.2f}) and ({e.x[1]:.2f}, {e.y[1]:.2f}), water passing {way}")
                continue
            verb = "raised to" if e.kind == "barrier" else "lowered to"
            what = "crest" if e.kind == "barrier" else "level"
            size = "" if math.isnan(e.length_m) else f", {e.length_m:.1f} m long"
            moved = "" if changed is None else f", {changed[k]} of them {verb} the {what}"
            lines.append(f"{e.label}: {what} {level}{size}; {len(e.rows)} cells touched{moved}")
        return lines

    def summary(self, changed: list[int] | None = None) -> list[dict]:
        """The edits as ``summary.json`` records them."""
        out = []
        for k, e in enumerate(self.items):
            item: dict[str, Any] = {
                "feature": e.index, "kind": e.kind, "name": e.name,
                EDIT_KINDS[e.kind]: e.level, "cells_touched": int(len(e.rows)),
            }
            if e.kind == "culvert":
                item["one_way"] = bool(e.one_way)
                item["ends"] = [{"x": e.x[i], "y": e.y[i]} for i in range(2)]
            else:
                item["length_m"] = None if math.isnan(e.length_m) else e.length_m
                if changed is not None:
                    item["cells_changed"] = int(changed[k])
            out.append(item)
        return out


@dataclasses.dataclass(frozen=True, eq=False)
class EditedDEMGrid(DEMGrid):
    """A DEM file read window by window with its barriers and breaches in place.

    Every window :meth:`read_window` gives holds the cells the edits raise or
    lower, as :meth:`Edits.apply` changes them on the whole grid, so each tile
    of the tiled engine, and every later pass over the DEM (outlines,
    hierarchy, exports), sees the edited ground; the file is never changed.
    It pickles small, as :class:`~sillmark.grid.dem_grid.DEMGrid` does (the
    edits are lists of cells).
    """

    edits: Edits | None = None

    def read_window(self, row0: int, row1: int, col0: int, col1: int) -> np.ndarray:
        z = super().read_window(row0, row1, col0, col1)
        if self.edits is None:
            return z
        return self.edits.apply(z, row0, col0)[0]


def edited_grid(grid: DEMGrid, edits: Edits) -> EditedDEMGrid:
    """``grid`` with the barriers and breaches of ``edits`` applied to every window read."""
    if tuple(edits.shape) != tuple(grid.shape):
        raise InvalidEdits(f"the edits were placed on a grid of {edits.shape[0]} x "
                           f"{edits.shape[1]} cells, not this DEM's")
    fields = {f.name: getattr(grid, f.name) for f in dataclasses.fields(DEMGrid)}
    return EditedDEMGrid(**fields, edits=dataclasses.replace(edits, document=None))


def read_edits(source: Any, grid: Any) -> Edits:
    """Read an edits GeoJSON and place it on ``grid`` (a DEM or a DEM grid).

    Parameters
    ----------
    source : path, GeoJSON text or dict
    grid : DEM or DEMGrid
        Gives the shape, transform and CRS; culvert ends on nodata are refused
        (a DEM's elevations, or a DEM grid's windows).

    Raises
    ------
    InvalidEdits
        One line naming the feature: an unknown kind, a missing or wrong
        property, a geometry of the wrong type, a line that leaves the DEM, a
        culvert end on nodata.
    """
    try:
        obj, label = load_geojson(source)
        if not isinstance(obj, dict):
            raise InvalidEdits(f"{label} is JSON but not a GeoJSON FeatureCollection")
        crs = outlets_crs(obj, label)
    except InvalidOutlets as exc:
        raise InvalidEdits(str(exc)) from None
    if obj.get("type") == "Feature":
        features = [obj]
    elif obj.get("type") == "FeatureCollection" and isinstance(obj.get("features"), list):
        features = obj["features"]
    else:
        raise InvalidEdits(f"{label} must be a GeoJSON FeatureCollection of edits (features "
                           "with a 'kind' of culvert, barrier or breach)")
    items = tuple(_edit(f, k, label, crs, grid) for k, f in enumerate(features))
    edits = Edits(shape=tuple(grid.shape), items=items, source=label, document=obj)
    ends = [e for e in edits.culverts]
    if ends:
        for e in ends:
            for i in range(2):
                z = _elevation_at(grid, int(e.rows[i]), int(e.cols[i]))
                if not np.isfinite(z):
                    which = "first" if i == 0 else "last"
                    raise InvalidEdits(f"{label}: {e.label}: its {which} end "
                                       f"({e.x[i]:.2f}, {e.y[i]:.2f}) is on nodata; move it "
                                       "onto ground with an elevation")
    return edits


def _edit(feature: Any, index: int, label: str, crs: pyproj.CRS, grid: Any) -> Edit:
    if not isinstance(feature, dict) or feature.get("type") != "Feature":
        raise InvalidEdits(f"{label}: feature {index} is not a GeoJSON Feature")
    props = feature.get("properties") or {}
    if not isinstance(props, dict):
        raise InvalidEdits(f"{label}: feature {index} has 'properties' that are not an object")
    name = props.get("name", props.get("id", feature.get("id")))
    name = None if name is None else str(name)[:80]
    where = f"feature {index}" + (f" ('{name}')" if name else "")
    kind = props.get("kind")
    if kind not in EDIT_KINDS:
        raise InvalidEdits(f"{label}: {where} has kind {kind!r}; give 'kind' as one of "
                           "culvert, barrier, breach")
    key = EDIT_KINDS[kind]
    level = props.get(key)
    if isinstance(level, bool) or not isinstance(level, (int, float)) or not math.isfinite(level):
        raise InvalidEdits(f"{label}: {where} ({kind}) needs a finite number '{key}' (a level "
                           "in the DEM's vertical unit)" + ("" if key in props else
                                                            f"; it has no '{key}'"))
    one_way = props.get("one_way", False)
    if not isinstance(one_way, bool) or (one_way and kind != "culvert"):
        raise InvalidEdits(f"{label}: {where}: 'one_way' is true or false, and only for a "
                           "culvert")
    geometry = feature.get("geometry")
    gtype = geometry.get("type") if isinstance(geometry, dict) else None
    if gtype not in _GEOMETRIES[kind]:
        raise InvalidEdits(f"{label}: {where} ({kind}) has geometry {gtype!r}; give a "
                           + " or a ".join(_GEOMETRIES[kind]))
    try:
        geom = shapely.force_2d(shapely_shape(geometry))
    except (ValueError, TypeError, KeyError, IndexError, AttributeError,
            shapely.errors.ShapelyError) as exc:
        raise InvalidEdits(f"{label}: {where} has malformed coordinates ({exc})") from None
    if geom.is_empty or (gtype == "LineString" and len(geom.coords) < 2):
        raise InvalidEdits(f"{label}: {where} has an empty geometry; a line needs two vertices")
    if gtype == "Polygon" and not geom.area > 0:
        raise InvalidEdits(f"{label}: {where} ({kind}) encloses no area; give at least three "
                           "corners that are not on one line")
    if gtype == "LineString" and kind != "culvert" and not geom.length > 0:
        raise InvalidEdits(f"{label}: {where} ({kind}) has all its vertices at one point; give "
                           "a line through two different points")
    try:
        placed = reproject([geom], crs, grid, label)
    except InvalidOutlets as exc:
        raise InvalidEdits(f"{label}: {where}: {str(exc).split(': ', 1)[-1]}") from None
    if not placed:
        raise InvalidEdits(f"{label}: {where} ({kind}) leaves the DEM; keep it on the site")
    geom = placed[0]
    _check_inside(geom, grid, f"{label}: {where} ({kind})")
    if gtype == "Polygon":
        mask = burn([geom], grid)
        rows, cols = np.nonzero(mask)
        c = geom.centroid
        return Edit(index, kind, name, float(level), False, rows.astype(np.int64),
                    cols.astype(np.int64), math.nan, (c.x,), (c.y,))
    xy = np.asarray(geom.coords, dtype=np.float64)
    if kind == "culvert":
        # Only the ends matter; the vertices between them are where the pipe runs.
        rows, cols = _cells_of(grid, xy[[0, -1]])
        if rows[0] == rows[1] and cols[0] == cols[1]:
            raise InvalidEdits(f"{label}: {where} (culvert) has both ends in one cell; a "
                               "culvert joins two different cells")
    else:
        rows, cols = _cells_along(grid, xy)
    return Edit(index, kind, name, float(level), bool(one_way), rows, cols,
                _length_m(geom, grid, crs), (float(xy[0, 0]), float(xy[-1, 0])),
                (float(xy[0, 1]), float(xy[-1, 1])))


def _fractional(grid: Any, xy: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Fractional (column, row) positions of points in the grid's CRS."""
    t = grid.transform
    x = xy[:, 0] - t.c
    y = xy[:, 1] - t.f
    det = t.a * t.e - t.b * t.d
    cols = (t.e * x - t.b * y) / det
    rows = (t.a * y - t.d * x) / det
    return np.asarray(cols, dtype=np.float64), np.asarray(rows, dtype=np.float64)


def _check_inside(geom: Any, grid: Any, where: str) -> None:
    xy = shapely.get_coordinates(geom)
    fc, fr = _fractional(grid, xy)
    rows, cols = grid.shape
    outside = ~((fc >= 0) & (fc <= cols) & (fr >= 0) & (fr <= rows))
    if np.any(outside):
        k = int(np.flatnonzero(outside)[0])
        left, bottom, right, top = grid.bounds
        raise InvalidEdits(
            f"{where} leaves the DEM at ({xy[k, 0]:.2f}, {xy[k, 1]:.2f}); the DEM covers "
            f"x {left:.2f} to {right:.2f}, y {bottom:.2f} to {top:.2f} in its CRS")


def _cells_of(grid: Any, xy: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    fc, fr = _fractional(grid, xy)
    rows, cols = grid.shape
    return (np.clip(np.floor(fr), 0, rows - 1).astype(np.int64),
            np.clip(np.floor(fc), 0, cols - 1).astype(np.int64))


def _cells_along(grid: Any, xy: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The 4-connected cells a polyline passes through, in order, without repeats."""
    fc, fr = _fractional(grid, xy)
    rows, cols = grid.shape
    seen: dict[tuple[int, int], None] = {}
    for k in range(len(fc) - 1):
        for cell in _traverse(fc[k], fr[k], fc[k + 1], fr[k + 1], rows, cols):
            seen.setdefault(cell, None)
    cells = np.array(list(seen), dtype=np.int64).reshape(-1, 2)
    return cells[:, 0].copy(), cells[:, 1].copy()


def _traverse(x0: float, y0: float, x1: float, y1: float, rows: int, cols: int):
    """Cells ``(row, col)`` a segment in fractional (col, row) passes, one step at a time.

    Each step moves to the next cell boundary the segment crosses, along one
    axis only (Amanatides & Woo 1987); where it passes exactly through a
    corner the column step comes first, so consecutive cells share an edge.
    """
    c, r = int(math.floor(x0)), int(math.floor(y0))
    ce, re = int(math.floor(x1)), int(math.floor(y1))
    c, r = min(max(c, 0), cols - 1), min(max(r, 0), rows - 1)
    ce, re = min(max(ce, 0), cols - 1), min(max(re, 0), rows - 1)
    dx, dy = x1 - x0, y1 - y0
    sx, sy = (1 if dx > 0 else -1), (1 if dy > 0 else -1)
    tdx = abs(1.0 / dx) if dx else math.inf
    tdy = abs(1.0 / dy) if dy else math.inf
    tmx = ((c + 1 - x0) if dx > 0 else (x0 - c)) * tdx if dx else math.inf
    tmy = ((r + 1 - y0) if dy > 0 else (y0 - r)) * tdy if dy else math.inf
    yield r, c
    nx, ny = abs(ce - c), abs(re - r)
    while nx or ny:  # exactly the steps that reach the end cell, whatever the rounding
        if nx and (not ny or tmx <= tmy):
            c += sx
            tmx += tdx
            nx -= 1
        else:
            r += sy
            tmy += tdy
            ny -= 1
        yield min(max(r, 0), rows - 1), min(max(c, 0), cols - 1)


def _length_m(geom: Any, grid: Any, crs: pyproj.CRS) -> float:
    """Ground length of a line in metres (geodesic on a lon/lat grid)."""
    horizontal = grid.horizontal_crs
    if horizontal.is_geographic:
        geod = pyproj.Geod(ellps="WGS84")
        return float(geod.geometry_length(geom))
    return float(geom.length) * linear_unit_metres(horizontal)


def _elevation_at(grid: Any, row: int, col: int) -> float:
    elevation = getattr(grid, "elevation", None)
    if elevation is not None:
        return float(elevation[row, col])
    return float(grid.read_window(row, row + 1, col, col + 1)[0, 0])
