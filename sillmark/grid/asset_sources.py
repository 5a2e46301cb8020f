"""Asset files read into raw points: CSV tables and GeoJSON points, checked line by line.

:func:`source_text` reads an asset file (or takes inline GeoJSON text) within
the size limits, :func:`rows_from_csv` and :func:`points_from_geojson` turn it
into ``(name, kind, x, y, properties)`` tuples with the CRS they are in, and
:class:`InvalidAssets` says, in one line naming the row or feature, what was
wrong and what would be accepted. :mod:`sillmark.grid.assets` places the points
on the DEM's cells.
"""

from __future__ import annotations

import csv
import io
import json
import math
import os
from typing import TYPE_CHECKING, Any

import numpy as np
import pyproj

from sillmark.errors import InvalidParameter, SillmarkError
from sillmark.grid.geojson import CRS84, geojson_crs
from sillmark.grid.raster_files import crs_name_refusal, gdal_path_refusal

if TYPE_CHECKING:  # pragma: no cover
    from sillmark.grid.dem import DEM

__all__ = ["CSV_EXTENSIONS", "DEFAULT_MAX_ASSETS", "GEOJSON_EXTENSIONS", "MAX_FILE_BYTES",
           "InvalidAssets", "check_lonlat", "parse_json", "points_from_geojson", "rows_from_csv",
           "source_text", "too_many", "user_crs"]


#: Most assets one file may hold unless the caller allows more (``max_assets``).
DEFAULT_MAX_ASSETS = 10_000


#: Largest asset file read (64 MiB); 10 000 assets fit in a small fraction of it.
MAX_FILE_BYTES = 64 * 2**20


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


def too_many(label: str, count: int, limit: int) -> str:
    return (
        f"{label} holds {count} assets, more than the limit of {limit}; split the file "
        "or raise the limit (max_assets)"
    )


def source_text(source: Any) -> tuple[str, str, str]:
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


def rows_from_csv(text: str, label: str, limit: int, crs: Any, dem: "DEM") -> tuple[list, pyproj.CRS]:
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
        src = dem.horizontal_crs if crs is None else user_crs(crs)
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
                raise InvalidAssets(too_many(label, _count_rows(reader, k), limit))
            where = f"line {line} (asset row {k})"
            vx = _number(fields[icx], cx_name, where, label, decimal_comma)
            vy = _number(fields[icy], cy_name, where, label, decimal_comma)
            if geographic:
                check_lonlat(vx, vy, f"{label}: {where}", "name the columns x and y")
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


def check_lonlat(lon: float, lat: float, where: str, hint: str) -> None:
    if not (-90.0 <= lat <= 90.0) or not (-180.0 <= lon <= 360.0):
        raise InvalidAssets(
            f"{where}: ({lon:.10g}, {lat:.10g}) is not a longitude, latitude in degrees; "
            f"if the coordinates are in a projected CRS, {hint}"
        )


def user_crs(value: Any) -> pyproj.CRS:
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


def parse_json(text: str, label: str) -> Any:
    try:
        return json.loads(text)
    except json.JSONDecodeError as exc:
        raise InvalidAssets(
            f"{label} is not valid JSON ({exc.msg} at line {exc.lineno} column {exc.colno}); "
            f"give {_ACCEPTED_SOURCE}"
        ) from None
    except RecursionError:
        raise InvalidAssets(f"{label} is nested too deeply to read; give {_ACCEPTED_SOURCE}") from None


def points_from_geojson(obj: Any, label: str, limit: int) -> tuple[list, pyproj.CRS, str]:
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
        raise InvalidAssets(too_many(label, len(features), limit))
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
            check_lonlat(x, y, f"{label}: {where}", "name that CRS in a 'crs' member or convert to WGS 84")
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
