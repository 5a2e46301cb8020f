"""Assets on the grid: the places of concern a user uploads (a school, a substation, a
pumping station), read from a CSV table or GeoJSON points and placed on the DEM's cells.

:func:`read_assets` reads x, y in the DEM's CRS (or another CRS the file names)
or lon, lat in WGS 84, with a name and an optional kind, and places each on the
cell it stands on (or says it lies outside the DEM or on nodata). Bad input gets
one clear line naming the row or feature.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Iterator, Sequence
from typing import TYPE_CHECKING, Any

import numpy as np
import pyproj

from sillmark.errors import InvalidParameter
from sillmark.grid.asset_sources import (
    CSV_EXTENSIONS,
    DEFAULT_MAX_ASSETS,
    GEOJSON_EXTENSIONS,
    MAX_FILE_BYTES,
    InvalidAssets,
    parse_json,
    points_from_geojson,
    rows_from_csv,
    source_text,
    too_many,
    user_crs,
)
from sillmark.grid.geojson import CRS84

if TYPE_CHECKING:  # pragma: no cover
    from sillmark.grid.dem import DEM

__all__ = ["DEFAULT_MAX_ASSETS", "MAX_FILE_BYTES", "Asset", "Assets", "InvalidAssets", "assets_from_points", "read_assets"]


#: Placement of an asset on the grid (:attr:`Asset.status`, :attr:`AssetTable.status`).
STATUS_OK = "ok"


STATUS_OUTSIDE = "outside DEM"


STATUS_NODATA = "on nodata"


#: Valid ground that no outlet reaches (walled in by nodata); set by :func:`assess_assets`.
STATUS_UNREACHED = "not reached"




@dataclasses.dataclass(frozen=True, eq=False)
class Asset:
    """One asset as read and placed on the grid.

    Attributes
    ----------
    index : int
        0-based position in the source (data row of the CSV, feature of the GeoJSON).
    name, kind : str
        ``kind`` is ``""`` when the source has none.
    x, y : float
        The point in the DEM's CRS (NaN if it cannot be expressed there).
    lon, lat : float
        The point in WGS 84 degrees (NaN if it cannot be expressed there).
    row, col : int
        The cell holding the point (floored, as :meth:`sillmark.grid.dem.DEM.rowcol`);
        -1 when the point is outside the DEM.
    status : str
        ``"ok"``, ``"outside DEM"`` or ``"on nodata"``.
    properties : dict
        The source's other columns (CSV: text) or properties (GeoJSON: JSON values).
    """

    index: int
    name: str
    kind: str
    x: float
    y: float
    lon: float
    lat: float
    row: int
    col: int
    status: str
    properties: dict


@dataclasses.dataclass(frozen=True, eq=False)
class Assets(Sequence):
    """The assets of a site, in source order; a sequence of :class:`Asset`.

    Attributes
    ----------
    items : tuple of Asset
    source : str
        What they were read from, for messages (e.g. ``"'assets.csv'"``).
    source_crs : str
        Name of the CRS the coordinates were given in.
    dem_shape : tuple of int
        Grid they were placed on; :func:`assess_assets` checks it.
    """

    items: tuple
    source: str
    source_crs: str
    dem_shape: tuple

    def __len__(self) -> int:
        return len(self.items)

    def __getitem__(self, k):
        return self.items[k]

    def __iter__(self) -> Iterator[Asset]:
        return iter(self.items)

    @property
    def status_counts(self) -> dict[str, int]:
        """How many assets have each status."""
        out: dict[str, int] = {}
        for a in self.items:
            out[a.status] = out.get(a.status, 0) + 1
        return out


def read_assets(
    source: Any,
    dem: "DEM",
    *,
    crs: Any = None,
    max_assets: int = DEFAULT_MAX_ASSETS,
) -> Assets:
    """Read assets from a CSV table or GeoJSON points and place them on the DEM.

    Parameters
    ----------
    source : str, os.PathLike or dict
        A ``.csv`` (also ``.tsv``, ``.txt``) or ``.geojson``/``.json`` file,
        GeoJSON text, or a parsed GeoJSON object. A file with another
        extension is read as GeoJSON if it starts with ``{``, else as CSV.
    dem : DEM
        The site; coordinates are reprojected to its CRS with pyproj.
    crs : int, str or pyproj.CRS, optional, keyword-only
        CRS of the CSV ``x``/``y`` columns when they are not in the DEM's CRS.
        Refused for lon/lat columns (always WGS 84) and for GeoJSON (which
        names its own CRS).
    max_assets : int, keyword-only
        Most assets accepted (default :data:`DEFAULT_MAX_ASSETS`).

    Returns
    -------
    Assets

    Raises
    ------
    InvalidAssets
        The file is missing, too large, not UTF-8, not JSON; the CSV lacks the
        columns or has a coordinate that is not a number (the message gives the
        line); the GeoJSON holds something other than Point features; no assets;
        more than ``max_assets``.
    InvalidParameter
        ``crs`` or ``max_assets`` is unusable, or ``crs`` is given for a source
        that names its own CRS.

    Notes
    -----
    **CSV.** The first line that is not blank and does not start with ``#`` is
    the header. Column names are matched without regard to case or surrounding
    spaces. Columns are separated by commas, or by semicolons or tabs when the
    header has more of those; with semicolons a decimal comma (``468900,5``) is
    read as a decimal point. When both x/y and lon/lat columns are present,
    x/y are used (they are exact in the site CRS) and lon/lat are kept as
    properties. A blank name becomes ``"asset N"`` (N the 1-based data row).

    **GeoJSON.** A FeatureCollection of Point features (or one Point Feature).
    Coordinates are WGS 84 lon/lat (RFC 7946) unless a legacy top-level
    ``"crs"`` member names another CRS, e.g.
    ``{"type": "name", "properties": {"name": "EPSG:32633"}}``. The name is the
    ``name`` property (any case), else the feature ``id``, else ``"asset N"``.

    **Placement.** A point outside the DEM, or one that cannot be expressed in
    the DEM's CRS, gets status ``"outside DEM"``; one on a nodata cell
    ``"on nodata"``. Neither is an error: they are kept, without figures, so
    the user sees them.

    Examples
    --------
    >>> from sillmark.grid.dem import dem_from_array
    >>> dem = dem_from_array(np.zeros((2, 2)))
    >>> a = read_assets({"type": "Feature", "properties": {"name": "pump"},
    ...     "crs": {"type": "name", "properties": {"name": "EPSG:32633"}},
    ...     "geometry": {"type": "Point", "coordinates": [500001.5, 4999998.5]}}, dem)
    >>> a[0].name, a[0].row, a[0].col, a[0].status
    ('pump', 1, 1, 'ok')
    """
    limit = _check_limit(max_assets)
    if isinstance(source, dict):
        obj, label = source, "the GeoJSON object"
    else:
        text, label, ext = source_text(source)
        if ext in GEOJSON_EXTENSIONS or (ext not in CSV_EXTENSIONS and text.lstrip().startswith("{")):
            obj = parse_json(text, label)
        else:
            raw, src = rows_from_csv(text, label, limit, crs, dem)
            return _place(dem, raw, src, label)
    if crs is not None:
        raise InvalidParameter(
            f"crs is for the x/y columns of a CSV; {label} is GeoJSON, which names its own "
            "CRS (WGS 84 unless a 'crs' member says otherwise): omit crs"
        )
    raw, src, label = points_from_geojson(obj, label, limit)
    return _place(dem, raw, src, label)


def assets_from_points(
    dem: "DEM",
    points: Any,
    *,
    crs: Any = None,
    max_assets: int = DEFAULT_MAX_ASSETS,
) -> Assets:
    """Assets from Python values: ``(name, x, y)`` or ``(name, x, y, kind)`` items.

    For points a user drops on the map. ``x``, ``y`` are in ``crs`` (default the
    DEM's CRS). Placement is as in :func:`read_assets`.

    Examples
    --------
    >>> from sillmark.grid.dem import dem_from_array
    >>> dem = dem_from_array(np.zeros((2, 2)))
    >>> a = assets_from_points(dem, [("gate", 500000.5, 4999999.5, "sluice"), ("far", 0, 0)])
    >>> [(x.name, x.kind, x.status) for x in a]
    [('gate', 'sluice', 'ok'), ('far', '', 'outside DEM')]
    """
    limit = _check_limit(max_assets)
    try:
        items = list(points)
    except TypeError:
        raise InvalidAssets(
            f"points must be a list of (name, x, y) items, not {type(points).__name__}"
        ) from None
    if not items:
        raise InvalidAssets("no points given; give at least one (name, x, y) item")
    if len(items) > limit:
        raise InvalidAssets(too_many("the point list", len(items), limit))
    raw = []
    for k, item in enumerate(items):
        if not isinstance(item, (tuple, list)) or len(item) not in (3, 4):
            raise InvalidAssets(
                f"point {k} is {item!r}; give (name, x, y) or (name, x, y, kind)"
            )
        name = str(item[0]).strip() or f"asset {k + 1}"
        kind = "" if len(item) == 3 or item[3] is None else str(item[3]).strip()
        xy = []
        for axis, value in zip(("x", "y"), item[1:3]):
            if isinstance(value, bool) or not isinstance(value, (int, float, np.integer, np.floating)):
                raise InvalidAssets(f"point {k} ({name!r}) has {axis} = {value!r}, not a number")
            if not math.isfinite(float(value)):
                raise InvalidAssets(f"point {k} ({name!r}) has {axis} = {value!r}, not a finite number")
            xy.append(float(value))
        raw.append((name, kind, xy[0], xy[1], {}))
    src = dem.horizontal_crs if crs is None else user_crs(crs)
    return _place(dem, raw, src, "the point list")


def _check_limit(max_assets: Any) -> int:
    if isinstance(max_assets, bool) or not isinstance(max_assets, (int, np.integer)) or max_assets < 1:
        raise InvalidParameter(f"max_assets must be a positive whole number, not {max_assets!r}")
    return int(max_assets)


def _place(dem: "DEM", raw: list, src: pyproj.CRS, label: str) -> Assets:
    """Reproject ``(name, kind, x, y, props)`` items to the DEM's CRS and find their cells."""
    sx = np.array([r[2] for r in raw], dtype=np.float64)
    sy = np.array([r[3] for r in raw], dtype=np.float64)
    dst = dem.horizontal_crs
    try:
        if src.equals(dst, ignore_axis_order=True):
            x, y = sx.copy(), sy.copy()
        else:
            x, y = pyproj.Transformer.from_crs(src, dst, always_xy=True).transform(sx, sy, errcheck=False)
        if src.equals(CRS84, ignore_axis_order=True):
            lon, lat = sx.copy(), sy.copy()
        else:
            lon, lat = pyproj.Transformer.from_crs(src, CRS84, always_xy=True).transform(
                sx, sy, errcheck=False
            )
    except pyproj.exceptions.ProjError as exc:
        raise InvalidAssets(
            f"{label} cannot be transformed from {src.name!r} to the DEM's CRS ({exc})"
        ) from None
    x, y, lon, lat = (np.where(np.isfinite(v), v, np.nan) for v in map(np.asarray, (x, y, lon, lat)))
    t = dem.transform
    x = dem.wrapped_x(x)  # a -170° asset lies at 190° on a grid stored with 0–360° longitudes
    with np.errstate(invalid="ignore"):
        colf = np.floor((x - t.c) / t.a)
        rowf = np.floor((y - t.f) / t.e)
        inside = (colf >= 0) & (colf < dem.cols) & (rowf >= 0) & (rowf < dem.rows)
    row = np.full(len(raw), -1, dtype=np.int64)
    col = np.full(len(raw), -1, dtype=np.int64)
    if inside.any():
        row[inside], col[inside] = dem.rowcol(x[inside], y[inside])
    items = []
    for k, (name, kind, _, _, props) in enumerate(raw):
        if not inside[k]:
            status = STATUS_OUTSIDE
        elif not dem.valid[row[k], col[k]]:
            status = STATUS_NODATA
        else:
            status = STATUS_OK
        items.append(
            Asset(
                index=k, name=name, kind=kind, x=float(x[k]), y=float(y[k]), lon=float(lon[k]),
                lat=float(lat[k]), row=int(row[k]), col=int(col[k]), status=status,
                properties=dict(props),
            )
        )
    return Assets(items=tuple(items), source=label, source_crs=src.name, dem_shape=tuple(dem.shape))
