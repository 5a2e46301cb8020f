"""Assets on the grid: the places of concern a user uploads (a school, a substation, a
pumping station), read from a CSV table or GeoJSON points and placed on the DEM's cells.

:func:`read_assets` reads x, y in the DEM's CRS (or another CRS the file names)
or lon, lat in WGS 84, with a name and an optional kind, and places each on the
cell it stands on (or says it lies outside the DEM or on nodata). Bad input gets
one clear line naming the row or feature.
"""

from __future__ import annotations

import csv
import dataclasses
import io
import json
import math
import os
from collections.abc import Iterator, Sequence
from typing import TYPE_CHECKING, Any

import numpy as np
import pyproj

from sillmark.errors import InvalidParameter, SillmarkError
from sillmark.grid.geojson import CRS84, geojson_crs
from sillmark.grid.raster_files import crs_name_refusal, gdal_path_refusal

if TYPE_CHECKING:  # pragma: no cover
    from sillmark.grid.dem import DEM

__all__ = ["DEFAULT_MAX_ASSETS", "MAX_FILE_BYTES", "Asset", "Assets", "InvalidAssets", "assets_from_points", "read_assets"]


#: Most assets one file may hold unless the caller allows more (``max_assets``).
DEFAULT_MAX_ASSETS = 10_000


#: Largest asset file read (64 MiB); 10 000 assets fit in a small fraction of it.
MAX_FILE_BYTES = 64 * 2**20


#: Placement of an asset on the grid (:attr:`Asset.status`, :attr:`AssetTable.status`).
STATUS_OK = "ok"


STATUS_OUTSIDE = "outside DEM"


STATUS_NODATA = "on nodata"


#: Valid ground that no outlet reaches (walled in by nodata); set by :func:`assess_assets`.
STATUS_UNREACHED = "not reached"


CSV_EXTENSIONS = (".csv", ".tsv", ".txt")


GEOJSON_EXTENSIONS = (".geojson", ".json")


# Accepted spellings of the coordinate columns of a CSV (compared in lower case).
_X_NAMES = ("x", "easting")


_Y_NAMES = ("y", "northing")


_LON_NAMES = ("lon", "longitude", "lng")


_LAT_NAMES = ("lat", "latitude")


_ACCEPTED_COLUMNS = (
    "a 'name' column and either 'x' and 'y' in the site CRS (also 'easting', "
    "'northing') or 'lon' and 'lat' in WGS 84 degrees (also 'longitude', 'latitude'); "
    "optionally 'kind' and any other columns"
)


_ACCEPTED_SOURCE = (
    "a CSV table (.csv) with a name column and x/y or lon/lat columns, or a GeoJSON "
    "FeatureCollection of Point features (.geojson)"
)


class InvalidAssets(SillmarkError, ValueError):
    """The asset file or list cannot be used (format, columns, values, geometry, size)."""


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
        text, label, ext = _source_text(source)
        if ext in GEOJSON_EXTENSIONS or (ext not in CSV_EXTENSIONS and text.lstrip().startswith("{")):
            obj = _parse_json(text, label)
        else:
            raw, src = _from_csv(text, label, limit, crs, dem)
            return _place(dem, raw, src, label)
    if crs is not None:
        raise InvalidParameter(
            f"crs is for the x/y columns of a CSV; {label} is GeoJSON, which names its own "
            "CRS (WGS 84 unless a 'crs' member says otherwise): omit crs"
        )
    raw, src, label = _from_geojson(obj, label, limit)
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
        raise InvalidAssets(_too_many("the point list", len(items), limit))
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
    src = dem.horizontal_crs if crs is None else _user_crs(crs)
    return _place(dem, raw, src, "the point list")


def _check_limit(max_assets: Any) -> int:
    if isinstance(max_assets, bool) or not isinstance(max_assets, (int, np.integer)) or max_assets < 1:
        raise InvalidParameter(f"max_assets must be a positive whole number, not {max_assets!r}")
    return int(max_assets)


def _too_many(label: str, count: int, limit: int) -> str:
    return (
        f"{label} holds {count} assets, more than the limit of {limit}; split the file "
        "or raise the limit (max_assets)"
    )


def _source_text(source: Any) -> tuple[str, str, str]:
    """Text, label and lower-case extension of a path or of inline GeoJSON text."""
    if isinstance(source, bytes):
        source = os.fsdecode(source)
    if isinstance(source, str) and source.lstrip().startswith(("{", "[")):
        return source, "the GeoJSON text", ".geojson"
    try:
        path = os.fspath(source)
    except TypeError:
        raise InvalidAssets(
            f"assets must be a file path, GeoJSON text or a GeoJSON dict, not "
            f"{type(source).__name__}; give {_ACCEPTED_SOURCE}"
        ) from None
    if isinstance(path, bytes):
        path = os.fsdecode(path)
    name = os.path.basename(path)
    label = f"'{name}'"
    refusal = gdal_path_refusal(path, "the asset file")
    if refusal is not None:
        raise InvalidAssets(refusal)
    if not os.path.exists(path):
        raise InvalidAssets(f"the asset file {label} does not exist; check the path")
    if not os.path.isfile(path):
        raise InvalidAssets(f"the asset file {label} is not a regular file (a folder?); give the file")
    size = os.path.getsize(path)
    if size == 0:
        raise InvalidAssets(f"the asset file {label} is empty (0 bytes); give {_ACCEPTED_SOURCE}")
    if size > MAX_FILE_BYTES:
        raise InvalidAssets(
            f"the asset file {label} is {size / 2**20:.0f} MiB, more than the "
            f"{MAX_FILE_BYTES // 2**20} MiB accepted; give at most {DEFAULT_MAX_ASSETS} points"
        )
    try:
        with open(path, "rb") as fh:
            data = fh.read()
    except OSError as exc:
        raise InvalidAssets(f"the asset file {label} cannot be read ({exc.strerror})") from None
    try:
        text = data.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        raise InvalidAssets(
            f"the asset file {label} is not UTF-8 text (byte {exc.start}); save it as "
            "UTF-8 (in a spreadsheet: 'CSV UTF-8')"
        ) from None
    return text, label, os.path.splitext(name)[1].lower()


def _from_csv(text: str, label: str, limit: int, crs: Any, dem: "DEM") -> tuple[list, pyproj.CRS]:
    lines = text.splitlines(keepends=True)
    start = 0
    while start < len(lines) and (not lines[start].strip() or lines[start].lstrip().startswith("#")):
        start += 1
    if start == len(lines):
        raise InvalidAssets(f"{label} has no header line and no assets; give {_ACCEPTED_SOURCE}")
    header_line = lines[start]
    delimiter = max((",", ";", "\t"), key=lambda d: (header_line.count(d), d == ","))
    body = "".join(lines[start:])
    reader = csv.reader(io.StringIO(body, newline=""), delimiter=delimiter)
    try:
        header = [h.strip() for h in next(reader)]
    except csv.Error as exc:
        raise InvalidAssets(f"{label}: the header line cannot be read as CSV ({exc})") from None
    lower = [h.lower() for h in header]
    seen: dict[str, int] = {}
    for k, h in enumerate(lower):
        if h and h in seen:
            raise InvalidAssets(
                f"{label} has the column '{header[k]}' twice (columns {seen[h] + 1} and {k + 1}); "
                "give each column once"
            )
        seen[h] = k

    def find(names: tuple[str, ...]) -> int | None:
        hits = [seen[n] for n in names if n in seen]
        if len(hits) > 1:
            both = " and ".join(f"'{header[i]}'" for i in hits)
            raise InvalidAssets(f"{label} has both {both}, which mean the same; keep one")
        return hits[0] if hits else None

    i_name = find(("name",))
    i_kind = find(("kind",))
    ix, iy = find(_X_NAMES), find(_Y_NAMES)
    ilon, ilat = find(_LON_NAMES), find(_LAT_NAMES)
    found = ", ".join(f"'{h}'" for h in header if h) or "none"
    if i_name is None:
        raise InvalidAssets(f"{label} has no 'name' column (found: {found}); give {_ACCEPTED_COLUMNS}")
    if ix is not None and iy is not None:
        icx, icy, geographic = ix, iy, False
        src = dem.horizontal_crs if crs is None else _user_crs(crs)
    elif ilon is not None and ilat is not None:
        if crs is not None:
            raise InvalidParameter(
                f"crs is for x/y columns, but {label} gives lon/lat (always WGS 84); omit crs"
            )
        icx, icy, geographic = ilon, ilat, True
        src = CRS84
    else:
        raise InvalidAssets(
            f"{label} has no pair of coordinate columns (found: {found}); give {_ACCEPTED_COLUMNS}"
        )
    used = {i_name, icx, icy} | ({i_kind} if i_kind is not None else set())
    extra = [k for k in range(len(header)) if k not in used]
    decimal_comma = delimiter == ";"
    cx_name, cy_name = header[icx], header[icy]

    raw = []
    offset = start  # physical lines before the header
    try:
        for fields in reader:
            line = offset + reader.line_num
            if not any(f.strip() for f in fields):
                continue
            if len(fields) > len(header) and any(f.strip() for f in fields[len(header):]):
                raise InvalidAssets(
                    f"{label}: line {line} has {len(fields)} fields but the header has "
                    f"{len(header)} columns; quote values that contain '{delimiter}'"
                )
            fields = fields + [""] * (len(header) - len(fields))
            k = len(raw) + 1
            if k > limit:
                raise InvalidAssets(_too_many(label, _count_rows(reader, k), limit))
            where = f"line {line} (asset row {k})"
            vx = _number(fields[icx], cx_name, where, label, decimal_comma)
            vy = _number(fields[icy], cy_name, where, label, decimal_comma)
            if geographic:
                _check_lonlat(vx, vy, f"{label}: {where}", "name the columns x and y")
            name = fields[i_name].strip() or f"asset {k}"
            kind = fields[i_kind].strip() if i_kind is not None else ""
            props = {header[i] or f"column {i + 1}": fields[i].strip() for i in extra}
            raw.append((name, kind, vx, vy, props))
    except csv.Error as exc:
        raise InvalidAssets(
            f"{label}: line {offset + reader.line_num} cannot be read as CSV ({exc})"
        ) from None
    if not raw:
        raise InvalidAssets(f"{label} has a header but no asset rows; add one row per asset")
    return raw, src


def _count_rows(reader: Any, so_far: int) -> int:
    return so_far + sum(1 for fields in reader if any(f.strip() for f in fields))


def _number(text: str, column: str, where: str, label: str, decimal_comma: bool) -> float:
    t = text.strip()
    if not t:
        raise InvalidAssets(f"{label}: '{column}' on {where} is empty; give a number")
    if decimal_comma and "," in t and "." not in t:
        t = t.replace(",", ".")
    try:
        value = float(t)
    except ValueError:
        raise InvalidAssets(
            f"{label}: '{column}' on {where} is {text.strip()!r}, not a number; "
            "give decimal numbers such as 468900.5"
        ) from None
    if not math.isfinite(value):
        raise InvalidAssets(f"{label}: '{column}' on {where} is {text.strip()!r}; give a finite number")
    return value


def _check_lonlat(lon: float, lat: float, where: str, hint: str) -> None:
    if not (-90.0 <= lat <= 90.0) or not (-180.0 <= lon <= 360.0):
        raise InvalidAssets(
            f"{where}: ({lon:.10g}, {lat:.10g}) is not a longitude, latitude in degrees; "
            f"if the coordinates are in a projected CRS, {hint}"
        )


def _user_crs(value: Any) -> pyproj.CRS:
    try:
        if isinstance(value, (int, np.integer)) and not isinstance(value, bool):
            out = pyproj.CRS.from_epsg(int(value))
        else:
            out = pyproj.CRS.from_user_input(value)
    except (pyproj.exceptions.CRSError, TypeError, ValueError):
        raise InvalidParameter(
            f"crs {value!r} is not a CRS Sillmark recognises; give an EPSG code such as 32633"
        ) from None
    return out.to_2d() if (out.is_compound or len(out.axis_info) > 2) else out


def _parse_json(text: str, label: str) -> Any:
    try:
        return json.loads(text)
    except json.JSONDecodeError as exc:
        raise InvalidAssets(
            f"{label} is not valid JSON ({exc.msg} at line {exc.lineno} column {exc.colno}); "
            f"give {_ACCEPTED_SOURCE}"
        ) from None
    except RecursionError:
        raise InvalidAssets(f"{label} is nested too deeply to read; give {_ACCEPTED_SOURCE}") from None


def _from_geojson(obj: Any, label: str, limit: int) -> tuple[list, pyproj.CRS, str]:
    if not isinstance(obj, dict):
        raise InvalidAssets(
            f"{label} is JSON but not a GeoJSON object (found a {type(obj).__name__}); "
            "give a FeatureCollection of Point features"
        )
    kind = obj.get("type")
    if kind == "FeatureCollection":
        features = obj.get("features")
        if not isinstance(features, list):
            raise InvalidAssets(f"{label} is a FeatureCollection without a 'features' list")
    elif kind == "Feature":
        features = [obj]
    elif isinstance(kind, str):
        raise InvalidAssets(
            f"{label} is a GeoJSON {kind}; give a FeatureCollection of Point features, "
            "each with a 'name' property"
        )
    else:
        raise InvalidAssets(f"{label} has no 'type' member; give a FeatureCollection of Point features")
    if not features:
        raise InvalidAssets(f"{label} has no features; add one Point feature per asset")
    if len(features) > limit:
        raise InvalidAssets(_too_many(label, len(features), limit))
    src = _geojson_crs(obj, label)
    raw = []
    for k, feature in enumerate(features):
        if not isinstance(feature, dict) or feature.get("type") != "Feature":
            raise InvalidAssets(f"{label}: item {k} of 'features' is not a GeoJSON Feature")
        props = feature.get("properties")
        if props is None:
            props = {}
        if not isinstance(props, dict):
            raise InvalidAssets(f"{label}: the properties of feature {k} are not a JSON object")
        name_key = _key(props, "name")
        kind_key = _key(props, "kind")
        name = props.get(name_key) if name_key is not None else None
        if name is None or not str(name).strip():
            fid = feature.get("id")
            name = str(fid) if fid is not None and str(fid).strip() else f"asset {k + 1}"
        name = str(name).strip()
        kind_value = props.get(kind_key) if kind_key is not None else None
        kind_text = "" if kind_value is None else str(kind_value).strip()
        where = f"feature {k} ({name!r})"
        geometry = feature.get("geometry")
        if geometry is None:
            raise InvalidAssets(f"{label}: {where} has no geometry; give each asset a Point")
        if not isinstance(geometry, dict):
            raise InvalidAssets(f"{label}: the geometry of {where} is not a GeoJSON object")
        gtype = geometry.get("type")
        if gtype != "Point":
            raise InvalidAssets(
                f"{label}: {where} is a {gtype if isinstance(gtype, str) else 'geometry of no type'}, "
                "not a Point; an asset is one point (use its centre or entrance)"
            )
        coords = geometry.get("coordinates")
        if (
            not isinstance(coords, list)
            or len(coords) < 2
            or not all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in coords)
            or not all(math.isfinite(v) for v in coords[:2])
        ):
            raise InvalidAssets(
                f"{label}: the Point of {where} has coordinates {coords!r}; give [x, y] numbers"
            )
        x, y = float(coords[0]), float(coords[1])
        if src.is_geographic:
            _check_lonlat(x, y, f"{label}: {where}", "name that CRS in a 'crs' member or convert to WGS 84")
        rest = {key: value for key, value in props.items() if key not in (name_key, kind_key)}
        raw.append((name, kind_text, x, y, rest))
    return raw, src, label


def _key(props: dict, wanted: str) -> str | None:
    for key in props:
        if isinstance(key, str) and key.strip().lower() == wanted:
            return key
    return None


def _geojson_crs(obj: dict, label: str) -> pyproj.CRS:
    refusal = crs_name_refusal(obj, label)
    if refusal is not None:
        raise InvalidAssets(refusal)
    return geojson_crs(obj, label, InvalidAssets)


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
