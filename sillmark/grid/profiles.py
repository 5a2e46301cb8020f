"""A river's water-surface profile: a centreline with stations of known level.

A flood study or a gauge network gives design levels at stations along a river.
The profile file is GeoJSON (RFC 7946 lon/lat, or a named ``crs`` member as
outlet files accept) with exactly one LineString, the river's centreline drawn
from either end, and two or more Points with a numeric property ``level`` in the
site's vertical unit: the stations.

- Each station sits at the chainage (distance along the centreline) of the
  point of the line nearest to it.
- Between stations the level varies linearly with chainage; beyond the end
  stations it stays at the end level.
- Every cell takes the reference level ``W0`` of the point of the centreline
  nearest to its centre (:func:`reference_level`).

Distances are measured in the DEM's CRS; on a lon/lat grid the longitudes are
scaled by the cosine of the site's middle latitude first, so that a degree east
and a degree north weigh as the ground distances they stand for (a local
equirectangular approximation, good to a fraction of a percent over a site).
"""

from __future__ import annotations

import dataclasses
import math
import os
from typing import Any

import numpy as np
import shapely

from sillmark.errors import InvalidOutlets, InvalidProfile
from sillmark.grid.geojson import geojson_crs
from sillmark.grid.outlet_geojson import burn, load_geojson, reproject
from sillmark.grid.raster_files import crs_name_refusal

__all__ = ["Profile", "read_profile", "reference_level"]

#: Largest number of cell-to-line distances worked out at once (memory bound).
_CELLS_PER_BLOCK = 1 << 20


@dataclasses.dataclass(frozen=True, eq=False)
class Profile:
    """A centreline on the DEM's grid and its stations.

    Attributes
    ----------
    line : shapely.LineString
        The centreline in the DEM's CRS.
    chainage : ndarray of float64
        Each station's chainage along ``line``, increasing, in the CRS's ground
        unit (metres for lon/lat grids).
    level : ndarray of float64
        Each station's level, in the site's vertical unit.
    names : tuple of str
        Each station's name (its ``name`` property, else ``station N``).
    length : float
        The centreline's length, in the same unit as ``chainage``.
    label : str
        The file, as messages name it.
    """

    line: Any
    chainage: np.ndarray
    level: np.ndarray
    names: tuple[str, ...]
    length: float
    label: str
    scale_x: float
    source_line: dict = dataclasses.field(default_factory=dict)

    def level_at(self, chainage: np.ndarray) -> np.ndarray:
        """The reference level at ``chainage``, linear between stations, flat beyond."""
        return np.interp(chainage, self.chainage, self.level)

    def centreline_cells(self, dem: Any) -> np.ndarray:
        """The cells the centreline passes through (an outlet mask)."""
        return burn([self.line], dem)

    def as_outlet(self) -> dict:
        """The centreline alone as GeoJSON in the file's own CRS: an outlet source
        (:func:`sillmark.grid.outlets.build_outlets`)."""
        return self.source_line


def _feature_list(obj: Any, label: str) -> list[dict]:
    if not isinstance(obj, dict) or obj.get("type") != "FeatureCollection":
        raise InvalidProfile(
            f"{label} is not a GeoJSON FeatureCollection; give one LineString (the river's "
            "centreline) and two or more Points with a 'level' property (the stations)")
    features = obj.get("features")
    if not isinstance(features, list):
        raise InvalidProfile(f"{label} is a FeatureCollection without a 'features' list")
    return features


def read_profile(source: str | os.PathLike | dict, dem: Any) -> Profile:
    """Read a profile file and place it on the DEM's grid.

    Parameters
    ----------
    source : path, GeoJSON text or dict
    dem : DEM
        The grid the profile is placed on (its CRS and bounds).

    Returns
    -------
    Profile

    Raises
    ------
    InvalidProfile
        Not one LineString, fewer than two stations, a station without a numeric
        ``level``, two stations at one chainage with different levels, or a line
        that misses the DEM.
    """
    try:
        obj, label = load_geojson(source)
    except InvalidOutlets as exc:
        raise InvalidProfile(str(exc).replace("outlets", "profile")) from None
    lines, stations = [], []
    for k, feature in enumerate(_feature_list(obj, label)):
        where = f"{label}: feature {k}"
        if not isinstance(feature, dict) or feature.get("type") != "Feature":
            raise InvalidProfile(f"{where} is not a GeoJSON Feature")
        geometry = feature.get("geometry")
        props = feature.get("properties") or {}
        kind = geometry.get("type") if isinstance(geometry, dict) else None
        if kind == "LineString":
            lines.append(_shape(geometry, where))
            line_feature = {"type": "Feature", "properties": {}, "geometry": geometry}
        elif kind == "Point":
            level = props.get("level") if isinstance(props, dict) else None
            if isinstance(level, bool) or not isinstance(level, (int, float)) or not math.isfinite(level):
                raise InvalidProfile(
                    f"{where} is a station without a numeric 'level' property (found {level!r}); "
                    "give the design water level there in the site's vertical unit")
            name = props.get("name")
            stations.append((_shape(geometry, where), float(level),
                             str(name) if name not in (None, "") else f"station {len(stations) + 1}"))
        else:
            raise InvalidProfile(
                f"{where} is a {kind or 'feature without geometry'}; a profile holds one "
                "LineString (the centreline) and Points (the stations)")
    if len(lines) != 1:
        raise InvalidProfile(
            f"{label} holds {len(lines)} LineStrings; give exactly one, the river's centreline")
    if len(stations) < 2:
        raise InvalidProfile(
            f"{label} holds {len(stations)} station(s); give at least two Points with a 'level'")
    refusal = crs_name_refusal(obj, label)
    if refusal is not None:
        raise InvalidProfile(refusal)
    src = geojson_crs(obj, label, InvalidProfile)
    try:
        moved = reproject([lines[0]] + [s[0] for s in stations], src, dem, label)
    except InvalidOutlets as exc:
        raise InvalidProfile(str(exc)) from None
    if len(moved) != 1 + len(stations):
        raise InvalidProfile(f"{label} lies where the DEM's CRS is not defined; check its CRS")
    line, points = moved[0], moved[1:]
    if not line.intersects(shapely.box(*dem.bounds)):
        left, bottom, right, top = dem.bounds
        raise InvalidProfile(
            f"{label}: the centreline misses the DEM (x {left:.6g} to {right:.6g}, y {bottom:.6g} "
            f"to {top:.6g} in the DEM's CRS); check the file's CRS")
    scale_x = _x_scale(dem)
    scaled = _scaled(line, scale_x)
    chainage = np.array([scaled.project(_scaled(p, scale_x)) for p in points])
    level = np.array([s[1] for s in stations])
    names = tuple(s[2] for s in stations)
    order = np.argsort(chainage, kind="stable")
    chainage, level, names = chainage[order], level[order], tuple(names[i] for i in order)
    same = np.flatnonzero((np.diff(chainage) == 0) & (np.diff(level) != 0))
    if same.size:
        a, b = names[same[0]], names[same[0] + 1]
        raise InvalidProfile(
            f"{label}: stations {a!r} and {b!r} fall at the same chainage with different "
            "levels; move one of them along the river")
    source_line = {"type": "FeatureCollection", "features": [line_feature],
                   **({"crs": obj["crs"]} if "crs" in obj else {})}
    return Profile(line=line, chainage=chainage, level=level, names=names,
                   length=float(scaled.length), label=label, scale_x=scale_x,
                   source_line=source_line)


def _shape(geometry: dict, where: str) -> Any:
    try:
        return shapely.force_2d(shapely.geometry.shape(geometry))
    except (ValueError, TypeError, KeyError, IndexError, AttributeError,
            shapely.errors.ShapelyError) as exc:
        raise InvalidProfile(f"{where} has malformed coordinates ({exc})") from None


def _x_scale(dem: Any) -> float:
    """Metres per unit east over metres per unit north: cos(latitude) on lon/lat grids."""
    crs = getattr(dem, "horizontal_crs", None)
    if crs is not None and crs.is_geographic:
        _, bottom, _, top = dem.bounds
        return math.cos(math.radians(0.5 * (bottom + top)))
    return 1.0


def _scaled(geom: Any, scale_x: float) -> Any:
    if scale_x == 1.0:
        return geom
    return shapely.transform(geom, lambda xy: xy * np.array([scale_x, 1.0]))


def reference_level(profile: Profile, dem: Any, r0: int = 0, r1: int | None = None,
                    c0: int = 0, c1: int | None = None) -> np.ndarray:
    """``W0`` on the window ``r0:r1, c0:c1``: the profile level at the centreline point
    nearest each cell's centre.

    Returns float32 of shape ``(r1 - r0, c1 - c0)`` (default: the whole grid),
    NaN on nodata cells when the grid has a ``valid`` mask. Memory: a few
    float64 values per cell of the window.

    Examples
    --------
    A straight channel along the x axis falling from 10 at x=0 to 8 at x=4 (a
    1 m grid in a metric CRS): the cell centred at x=1.5 stands at 9.25.

    >>> import numpy as np
    >>> from affine import Affine
    >>> from sillmark.grid.dem import dem_from_array
    >>> dem = dem_from_array(np.zeros((2, 4)), transform=Affine(1, 0, 0, 0, -1, 2))
    >>> fc = {"type": "FeatureCollection", "crs": {"type": "name",
    ...       "properties": {"name": "EPSG:32633"}}, "features": [
    ...   {"type": "Feature", "properties": {},
    ...    "geometry": {"type": "LineString", "coordinates": [[0, 1], [4, 1]]}},
    ...   {"type": "Feature", "properties": {"level": 10},
    ...    "geometry": {"type": "Point", "coordinates": [0, 1]}},
    ...   {"type": "Feature", "properties": {"level": 8},
    ...    "geometry": {"type": "Point", "coordinates": [4, 1]}}]}
    >>> reference_level(read_profile(fc, dem), dem)[0].tolist()
    [9.75, 9.25, 8.75, 8.25]
    """
    rows, width = dem.shape
    r1 = rows if r1 is None else r1
    c1 = width if c1 is None else c1
    cols = c1 - c0
    out = np.empty((r1 - r0, cols), dtype=np.float32)
    scaled = _scaled(profile.line, profile.scale_x)
    a, b, c, d, e, f = tuple(dem.transform)[:6]
    step = max(1, _CELLS_PER_BLOCK // max(cols, 1))
    col_centre = np.arange(c0, c1) + 0.5
    for s0 in range(r0, r1, step):
        s1 = min(r1, s0 + step)
        row_centre = np.arange(s0, s1)[:, None] + 0.5
        x = a * col_centre[None, :] + b * row_centre + c
        y = d * col_centre[None, :] + e * row_centre + f
        pts = shapely.points((x * profile.scale_x).ravel(), np.broadcast_to(y, x.shape).ravel())
        chain = shapely.line_locate_point(scaled, pts)
        out[s0 - r0:s1 - r0] = profile.level_at(chain).reshape(s1 - s0, cols)
    valid = getattr(dem, "valid", None)
    if valid is not None:
        out[~valid[r0:r1, c0:c1]] = np.nan
    return out
