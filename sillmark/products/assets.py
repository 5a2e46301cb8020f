"""Assets: when each place of concern gets wet, and why.

An *asset* is a point a user cares about (a school, a substation, a pumping
station). :func:`read_assets` reads them from a CSV table or GeoJSON points and
places each on the DEM's grid. :func:`assess_assets` reads, for each asset at one
outlet water level, the cell it stands on, its ground elevation, its onset stage,
whether it is flooded, shielded or dry, the depth and freeboard, and the
*controlling sill*: the highest cell on the route by which water first reaches
it, found by walking the flood tree back to an outlet.

:func:`raise_sill` answers "what if that sill were higher?" (a temporary barrier,
sandbags, a raised road). It raises the one sill cell on a copy of the DEM and
runs the Priority-Flood again, so the new onset stage and the sill that then
controls are exact: water may find an entirely different way in.

Everything here reads one :class:`~sillmark.engine.flood.SpillResult`; nothing is
estimated. Units are those of the DEM (:attr:`sillmark.grid.dem.DEM.vertical_unit`).
"""

from __future__ import annotations

import csv
import dataclasses
import functools
import io
import json
import math
import os
from collections.abc import Iterator, Sequence
from typing import TYPE_CHECKING, Any

import numpy as np
import pyproj
from scipy import ndimage

from sillmark.engine.flood import OUTLET_CODE, SpillResult, priority_flood
from sillmark.errors import InvalidParameter, LocationOutsideDEM, SillmarkError
from sillmark.grid.crs import LonLatTransformer
from sillmark.grid.elevations import MAX_ABS_ELEVATION
from sillmark.grid.geojson import CRS84, geojson_crs
from sillmark.grid.outlets import Outlets
from sillmark.grid.raster_files import crs_name_refusal, gdal_path_refusal
from sillmark.products.stage import checked_level
from sillmark.units import VerticalUnit

if TYPE_CHECKING:  # pragma: no cover
    from sillmark.grid.dem import DEM

__all__ = [
    "DEFAULT_MAX_ASSETS",
    "MAX_FILE_BYTES",
    "Asset",
    "AssetTable",
    "Assets",
    "InvalidAssets",
    "Sill",
    "WhatIf",
    "assess_assets",
    "assets_from_points",
    "raise_sill",
    "raise_sills",
    "read_assets",
    "what_if_at",
]

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

#: State of an asset at a water level (:attr:`AssetTable.state`); "" without figures.
STATE_FLOODED = "flooded"
STATE_SHIELDED = "shielded"
STATE_DRY = "dry"
STATE_NONE = ""

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
_CRS84 = CRS84  # RFC 7946, section 4: WGS 84 longitude, latitude


class InvalidAssets(SillmarkError, ValueError):
    """The asset file or list cannot be used (format, columns, values, geometry, size)."""


# --------------------------------------------------------------------------- records


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


@dataclasses.dataclass(frozen=True)
class Sill:
    """A cell that controls when water reaches a place.

    ``elevation`` is in the site's vertical unit; ``x``, ``y`` the cell centre in
    the DEM's CRS.
    """

    row: int
    col: int
    x: float
    y: float
    elevation: float


@dataclasses.dataclass(frozen=True, eq=False)
class AssetTable:
    """Figures for every asset at one outlet water level; columns are arrays.

    One entry per asset, in the order of the :class:`Assets`. Text columns are
    tuples of str, numeric columns numpy arrays. Assets without figures (status
    other than ``"ok"``) hold NaN in float columns, -1 in index columns and
    ``""`` in ``state``: they stay in the table so the user sees them.

    Attributes
    ----------
    assets : Assets
        The input records (names, kinds, properties, source coordinates).
    dem : DEM
        The DEM the figures were read from (for coordinates and units).
    level : float
        The outlet water level ``h``, at float32 precision (as the onset stage).
    unit : VerticalUnit
        Unit of every elevation, depth and level.
    connectivity : int
        Of the flood the figures come from.
    name, kind : tuple of str
    status : tuple of str
        ``"ok"``, ``"outside DEM"``, ``"on nodata"`` or ``"not reached"``
        (valid ground that no outlet reaches).
    state : tuple of str
        ``"flooded"`` when ``s <= h``; ``"shielded"`` when ``z < h < s``: below
        the water level but no surface path reaches it yet (still at risk from
        seepage, local rain, a breach); ``"dry"`` otherwise; ``""`` without figures.
        The same classes as :func:`sillmark.products.stage.water_level_map`.
    x, y, lon, lat : float64
        The asset's point (DEM CRS and WGS 84).
    row, col : int64
        Its cell.
    ground_elevation : float32
        ``z`` of the cell (the cell value, not interpolated).
    onset_stage : float32
        ``s``: the outlet water level at which surface water first reaches the cell.
    depth : float32
        ``h - z`` when flooded, 0 when shielded or dry (no water from the
        outlets stands there), NaN without figures.
    depth_if_reached : float32
        ``h - z`` wherever ``z < h`` (flooded or shielded), else 0: the depth a
        shielded asset would get if the water found a way in.
    freeboard : float32
        ``s - h``: how far the water may rise before it reaches the asset
        (negative once it has: by how much the level exceeds the onset stage).
    depression_id : int32
        Depression the cell lies in (0 = none; see :class:`sillmark.engine.flood.DepressionTable`).
    sill_row, sill_col : int64
    sill_x, sill_y : float64
    sill_elevation : float32
        The controlling sill: the highest cell on the route from the outlets; its
        elevation equals ``onset_stage``.
    sill_is_own_cell : bool
        The asset's own ground is the controlling point (``s == z``): nothing
        shields it; it gets wet as soon as the water stands at its ground.
    route_cells : tuple of (n, 2) int32 arrays
        ``(row, col)`` of the route, from the outlet cell to the asset's cell
        (``(0, 2)`` arrays without figures). See :meth:`route_xy`, :meth:`route_lonlat`.

    Notes
    -----
    Memory: 8 bytes per route cell (the routes of 10 000 assets 2 000 cells long
    take 160 MB); the other columns about 120 bytes per asset.
    """

    assets: Assets
    dem: "DEM"
    level: float
    unit: VerticalUnit
    connectivity: int
    name: tuple
    kind: tuple
    status: tuple
    state: tuple
    x: np.ndarray
    y: np.ndarray
    lon: np.ndarray
    lat: np.ndarray
    row: np.ndarray
    col: np.ndarray
    ground_elevation: np.ndarray
    onset_stage: np.ndarray
    depth: np.ndarray
    depth_if_reached: np.ndarray
    freeboard: np.ndarray
    depression_id: np.ndarray
    sill_row: np.ndarray
    sill_col: np.ndarray
    sill_x: np.ndarray
    sill_y: np.ndarray
    sill_elevation: np.ndarray
    sill_is_own_cell: np.ndarray
    route_cells: tuple

    #: The per-asset columns, in order.
    COLUMNS = (
        "name", "kind", "status", "state", "x", "y", "lon", "lat", "row", "col",
        "ground_elevation", "onset_stage", "depth", "depth_if_reached", "freeboard",
        "depression_id", "sill_row", "sill_col", "sill_x", "sill_y", "sill_elevation",
        "sill_is_own_cell",
    )

    def __len__(self) -> int:
        return len(self.name)

    def has_figures(self, k: int) -> bool:
        """True when asset ``k`` is on reached ground and has figures."""
        return self.status[k] == STATUS_OK

    def record(self, k: int) -> dict[str, Any]:
        """The columns of asset ``k`` as plain Python values (None for NaN)."""
        if not 0 <= k < len(self):
            raise InvalidParameter(f"no asset {k}; indices run from 0 to {len(self) - 1}")
        out: dict[str, Any] = {}
        for column in self.COLUMNS:
            value = getattr(self, column)[k]
            if isinstance(value, str):
                out[column] = value
            elif isinstance(value, (bool, np.bool_)):
                out[column] = bool(value)
            elif isinstance(value, (np.integer, int)):
                out[column] = int(value)
            else:
                f = float(value)
                out[column] = f if math.isfinite(f) else None
        out["route_cells"] = int(self.route_cells[k].shape[0])
        return out

    def sill(self, k: int) -> Sill | None:
        """The controlling sill of asset ``k`` (None without figures)."""
        if not self.has_figures(k):
            return None
        return Sill(
            int(self.sill_row[k]), int(self.sill_col[k]), float(self.sill_x[k]),
            float(self.sill_y[k]), float(self.sill_elevation[k]),
        )

    def route_xy(self, k: int) -> np.ndarray:
        """Cell centres of the route of asset ``k``, outlet first: (n, 2) float64 x, y."""
        cells = self.route_cells[k]
        if cells.shape[0] == 0:
            return np.empty((0, 2))
        x, y = self.dem.xy(cells[:, 0], cells[:, 1])
        return np.column_stack([x, y])

    def route_lonlat(self, k: int) -> np.ndarray:
        """The route of asset ``k`` in WGS 84, outlet first: (n, 2) float64 lon, lat."""
        xy = self.route_xy(k)
        if xy.shape[0] == 0:
            return xy
        lon, lat = self._wgs84.transform(xy[:, 0], xy[:, 1])
        return np.column_stack([lon, lat])

    @functools.cached_property
    def _wgs84(self) -> pyproj.Transformer:
        return _to_wgs84(self.dem)


@dataclasses.dataclass(frozen=True, eq=False)
class WhatIf:
    """The onset stage of a place if its controlling sill were raised.

    Attributes
    ----------
    name : str or None
        The asset's name, when an :class:`Asset` was given.
    row, col : int
        The place's cell.
    height : float
        How much the sill cell was raised (vertical unit).
    raised : Sill
        The cell that was raised, with its elevation *before* raising.
    raised_elevation : float
        Its elevation after raising (``raised.elevation + height`` in float32).
    own_sill : bool
        The place's own ground was the controlling point (``s == z``), so the
        raised cell is the place itself: raising it stands for raising the
        ground under the asset (a pad, a flood wall round it), not a barrier
        between it and the water.
    onset_before, onset_after : float
        Onset stage of the place now and with the raised sill.
    sill_before, sill_after : Sill
        Controlling sill now (the raised cell) and in the recomputed flood
        (``sill_after.elevation`` is in the raised DEM, so it equals ``onset_after``).
    route_before, route_after : (n, 2) int32 arrays
        ``(row, col)`` of the route from the outlet cell to the place.
    route_after_xy : (n, 2) float64 array
        Cell centres of ``route_after`` in the DEM's CRS.
    unit : VerticalUnit
    explanation : str
        One or two sentences for the user.
    result : SpillResult
        The whole recomputed flood (onset stage of every cell with the raised
        sill): about 9 bytes per cell; drop the WhatIf to free it.
    raised_cells : int
        How many cells were raised to ``raised_elevation``: the crest under the
        barrier (see :func:`sill_crest`), or 1.
    """

    name: str | None
    row: int
    col: int
    height: float
    raised: Sill
    raised_elevation: float
    own_sill: bool
    onset_before: float
    onset_after: float
    sill_before: Sill
    sill_after: Sill
    route_before: np.ndarray
    route_after: np.ndarray
    route_after_xy: np.ndarray
    unit: VerticalUnit
    explanation: str
    result: SpillResult
    raised_cells: int = 1

    @property
    def gain(self) -> float:
        """``onset_after - onset_before``: between 0 and ``height``."""
        return float(np.float32(self.onset_after) - np.float32(self.onset_before))

    @property
    def raised_cell_controls(self) -> bool:
        """The raised cell is still the controlling sill."""
        return (self.sill_after.row, self.sill_after.col) == (self.raised.row, self.raised.col)

    @property
    def changed(self) -> bool:
        """The onset stage rose."""
        return self.onset_after != self.onset_before


# --------------------------------------------------------------------------- reading


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


# --------------------------------------------------------------------------- CSV


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
        src = _CRS84
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


# --------------------------------------------------------------------------- GeoJSON


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


# --------------------------------------------------------------------------- placing


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
        if src.equals(_CRS84, ignore_axis_order=True):
            lon, lat = sx.copy(), sy.copy()
        else:
            lon, lat = pyproj.Transformer.from_crs(src, _CRS84, always_xy=True).transform(
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


# --------------------------------------------------------------------------- assessing


def assess_assets(assets: Assets, dem: "DEM", result: SpillResult, level: Any) -> AssetTable:
    """Onset stage, state at ``level``, depth, freeboard, controlling sill and route of each asset.

    Parameters
    ----------
    assets : Assets
        From :func:`read_assets` on this DEM.
    dem : DEM
    result : SpillResult
        From :func:`sillmark.engine.flood.analyse_site` on this DEM.
    level : float
        Outlet water level ``h`` in the DEM's vertical unit; compared at float32
        precision, like :func:`sillmark.products.stage.water_level_map`.

    Returns
    -------
    AssetTable

    Raises
    ------
    InvalidParameter
        A level that is not a finite number; a result or assets that belong to
        another DEM.

    Notes
    -----
    The route is the flood-tree path (:meth:`sillmark.engine.flood.SpillResult.route`),
    reversed so that it runs from the outlet to the asset, the way the water
    comes. Its highest cell is the controlling sill; for an asset in no
    depression that is the asset's own cell. Cost: one route walk per asset.

    Examples
    --------
    >>> from sillmark.grid.dem import dem_from_array
    >>> from sillmark.grid.outlets import build_outlets
    >>> from sillmark.engine.flood import analyse_site
    >>> z = [[5, 5, 5], [5, 1, 5], [5, 3, 5]]
    >>> dem = dem_from_array(z)
    >>> result = analyse_site(dem, build_outlets(dem))
    >>> table = assess_assets(assets_from_points(dem, [("hut", 500001.5, 4999998.5)]), dem, result, 2)
    >>> table.state[0], float(table.onset_stage[0]), (int(table.sill_row[0]), int(table.sill_col[0]))
    ('shielded', 3.0, (2, 1))
    """
    _check_result(dem, result)
    if not isinstance(assets, Assets):
        raise InvalidParameter(f"assets must come from read_assets(), not {type(assets).__name__}")
    if tuple(assets.dem_shape) != tuple(dem.shape):
        raise InvalidParameter(
            f"the assets were placed on a {assets.dem_shape[0]} x {assets.dem_shape[1]} grid, "
            f"but the DEM is {dem.rows} x {dem.cols}; read them again with this DEM"
        )
    h = checked_level(level)
    n = len(assets)
    nan32 = np.full(n, np.nan, dtype=np.float32)
    z = nan32.copy()
    s = nan32.copy()
    sill_z = nan32.copy()
    sill_row = np.full(n, -1, dtype=np.int64)
    sill_col = np.full(n, -1, dtype=np.int64)
    dep = np.full(n, -1, dtype=np.int32)
    own = np.zeros(n, dtype=bool)
    status = [a.status for a in assets]
    empty = np.empty((0, 2), dtype=np.int32)
    routes = [empty] * n
    for k, a in enumerate(assets):
        if a.status != STATUS_OK:
            continue
        r, c = a.row, a.col
        if result.flood_tree[r, c] == 0:  # valid ground no outlet reaches
            status[k] = STATUS_UNREACHED
            continue
        route = result.route(r, c)
        z[k] = result.elevation[r, c]
        s[k] = result.onset_stage[r, c]
        sill_row[k], sill_col[k] = route.sill_row, route.sill_col
        sill_z[k] = route.sill_elevation
        own[k] = (route.sill_row, route.sill_col) == (r, c)
        dep[k] = result.depression_id[r, c]
        routes[k] = np.column_stack([route.rows[::-1], route.cols[::-1]]).astype(np.int32)

    ok = np.array([st == STATUS_OK for st in status], dtype=bool)
    with np.errstate(invalid="ignore"):
        flooded = ok & (s <= h)
        shielded = ok & ~flooded & (z < h)
        below = np.where(ok, np.maximum(h - z, np.float32(0)), np.nan).astype(np.float32)
        depth = np.where(flooded, h - z, np.where(ok, np.float32(0), np.nan)).astype(np.float32)
        freeboard = (s - h).astype(np.float32)
    state = tuple(
        STATE_FLOODED if flooded[k] else STATE_SHIELDED if shielded[k] else STATE_DRY if ok[k] else STATE_NONE
        for k in range(n)
    )
    sill_x = np.full(n, np.nan)
    sill_y = np.full(n, np.nan)
    if ok.any():
        sill_x[ok], sill_y[ok] = dem.xy(sill_row[ok], sill_col[ok])
    return AssetTable(
        assets=assets,
        dem=dem,
        level=float(h),
        unit=VerticalUnit.parse(dem.vertical_unit),
        connectivity=int(result.connectivity),
        name=tuple(a.name for a in assets),
        kind=tuple(a.kind for a in assets),
        status=tuple(status),
        state=state,
        x=np.array([a.x for a in assets], dtype=np.float64),
        y=np.array([a.y for a in assets], dtype=np.float64),
        lon=np.array([a.lon for a in assets], dtype=np.float64),
        lat=np.array([a.lat for a in assets], dtype=np.float64),
        row=np.array([a.row for a in assets], dtype=np.int64),
        col=np.array([a.col for a in assets], dtype=np.int64),
        ground_elevation=z,
        onset_stage=s,
        depth=depth,
        depth_if_reached=below,
        freeboard=freeboard,
        depression_id=dep,
        sill_row=sill_row,
        sill_col=sill_col,
        sill_x=sill_x,
        sill_y=sill_y,
        sill_elevation=sill_z,
        sill_is_own_cell=own,
        route_cells=tuple(routes),
    )


def _check_result(dem: "DEM", result: SpillResult) -> None:
    if not isinstance(result, SpillResult):
        raise InvalidParameter(
            f"result must be a SpillResult from analyse_site(), not {type(result).__name__}"
        )
    if result.elevation.shape != dem.shape or not np.array_equal(
        result.elevation, dem.elevation, equal_nan=True
    ):
        raise InvalidParameter(
            "the result was not computed on this DEM; run analyse_site() on it first"
        )


# --------------------------------------------------------------------------- what-if


def raise_sill(
    dem: "DEM",
    outlets_mask: "Outlets | np.ndarray",
    result: SpillResult,
    asset_or_cell: Any,
    height: Any,
    *,
    connectivity: int | None = None,
    across_crest: bool = True,
) -> WhatIf:
    """The onset stage a place would have if its controlling sill were raised by ``height``.

    The sill cell is raised on a copy of the DEM and the Priority-Flood is run
    again on the whole grid, so the answer is exact: water may come another way,
    and the sill that then controls may lie anywhere on the site.

    Parameters
    ----------
    dem : DEM
    outlets_mask : Outlets or (rows, cols) bool array
        The outlets ``result`` was computed with.
    result : SpillResult
        The flood of ``dem`` with these outlets.
    asset_or_cell : Asset or (row, col)
        The place: an :class:`Asset` with status ``"ok"``, or a cell.
    height : float
        How much to raise the sill, in the DEM's vertical unit; > 0.
    connectivity : {8, 4}, optional, keyword-only
        Must match ``result.connectivity`` (the default).
    across_crest : bool, keyword-only
        Raise the whole crest (default), as a barrier across a notch would:
        the sill cell and the connected ground at most
        :data:`CREST_TOLERANCE` above it (:func:`sill_crest`) are all raised to
        the sill's elevation plus ``height``. With False only the sill cell is
        raised, and on a flat notch the water then goes round it. A place that
        is its own controlling point has only its cell raised.

    Returns
    -------
    WhatIf

    Raises
    ------
    InvalidParameter
        ``height`` is not a positive finite number or too small to change the
        float32 elevation; ``connectivity`` differs from the result's; the
        result or outlets do not belong together.
    LocationOutsideDEM
        The place is outside the grid, on nodata, or reached by no outlet.

    Notes
    -----
    Raising one cell by ``height`` lifts the highest cell of every path through
    it by at most ``height`` and lowers none, so
    ``onset_before <= onset_after <= onset_before + height``. When the sill lies
    on a flat stretch (neighbouring cells at the same elevation) the water goes
    round the raised cell and nothing changes; the result then names the
    neighbour that now controls, at the same elevation. When the place is its
    own controlling point (``s == z``), every path ends on its cell, so the
    onset stage rises by exactly ``height`` (to float32 rounding).

    Cost: a copy of the elevation (4 bytes per cell) and a full flood (9 bytes
    per cell in the result, about 0.5 s for 3 million cells).
    """
    mask = outlets_mask.mask if isinstance(outlets_mask, Outlets) else np.asarray(outlets_mask)
    _check_result(dem, result)
    conn = result.connectivity if connectivity is None else connectivity
    if isinstance(conn, bool) or conn not in (4, 8):
        raise InvalidParameter(f"connectivity must be 8 or 4, not {connectivity!r}")
    if conn != result.connectivity:
        raise InvalidParameter(
            f"connectivity {conn} differs from the result's ({result.connectivity}); "
            "compare like with like: omit connectivity or recompute the result"
        )
    if mask.shape != dem.shape or mask.dtype != np.bool_:
        raise InvalidParameter(
            f"outlets_mask must be a bool array of the DEM's shape {dem.shape}, "
            f"not {mask.dtype} {mask.shape}"
        )
    if not np.array_equal(result.flood_tree == OUTLET_CODE, mask & dem.valid):
        raise InvalidParameter(
            "the outlets differ from those the result was computed with; pass the same outlets"
        )
    name, r, c = _target(asset_or_cell)
    h = _height(height)
    before = result.route(r, c)  # LocationOutsideDEM off the grid, on nodata, unreached
    sr, sc = before.sill_row, before.sill_col
    old = dem.elevation[sr, sc]
    new = np.float32(np.float64(old) + h)
    if not np.isfinite(new):
        raise InvalidParameter(f"raising {float(old):g} by {h:g} exceeds the range a DEM can hold")
    if new == old:
        raise InvalidParameter(
            f"a height of {h:g} is below the precision of the elevation {float(old):g} "
            "(float32); give a larger height"
        )
    z = np.array(dem.elevation, dtype=np.float32, copy=True)
    own = (sr, sc) == (r, c)
    crest_r, crest_c = (
        sill_crest(result, sr, sc, new) if across_crest and not own
        else (np.array([sr]), np.array([sc]))
    )
    z[crest_r, crest_c] = new  # a barrier with its top at the raised sill's level
    # Read-only like DEM.elevation, so the compiled kernels take the same
    # specialisation analyse_site() already used (no second compilation).
    z.flags.writeable = False
    after = priority_flood(z, mask, connectivity=conn, row_areas=dem.row_areas, transform=dem.transform)
    return _read_what_if(
        dem, result, after, name, r, c, before, float(old), float(new), h, len(crest_r)
    )


#: How far above the sill's own elevation ground still counts as the same crest,
#: in the site's vertical unit: lidar DEMs carry noise of about a decimetre
#: (common practice), so a notch floor is seldom exactly level.
CREST_TOLERANCE = 0.10


def sill_crest(
    result: SpillResult, row: int, col: int, top: float, *, tolerance: float = CREST_TOLERANCE
) -> tuple[np.ndarray, np.ndarray]:
    """Cells a barrier must cover to raise sill ``(row, col)`` to ``top``.

    The crest is the sill cell and every cell connected to it (under the
    result's connectivity), outside any depression, whose ground lies at the
    sill's elevation or at most ``tolerance`` above it (and below ``top``): the
    floor of a notch or a road low spot. Ground below the sill (either side of
    it) and higher parts of the rim are not part of it, so raising a notch
    above the rest of the rim shows which sill controls next.
    """

    z = result.elevation
    floor = z[row, col]
    ceiling = min(float(top), float(floor) + float(tolerance))
    with np.errstate(invalid="ignore"):
        band = (z >= floor) & (z <= np.float32(ceiling)) & (z < np.float32(top))
    band &= result.depression_id == 0
    band[row, col] = True
    structure = np.ones((3, 3), bool) if result.connectivity == 8 else None
    parts, _ = ndimage.label(band, structure=structure)
    rows, cols = np.nonzero(parts == parts[row, col])
    return rows.astype(np.int64), cols.astype(np.int64)


def _read_what_if(
    dem: "DEM", result: SpillResult, after: SpillResult, name: str | None, r: int, c: int,
    before: Any, old: float, new: float, h: float, raised_cells: int = 1,
) -> WhatIf:
    """The :class:`WhatIf` of place ``(r, c)`` from the flood ``after`` with its sill raised."""
    sr, sc = before.sill_row, before.sill_col
    route = after.route(r, c)
    unit = VerticalUnit.parse(dem.vertical_unit)

    def sill(row: int, col: int, elevation: float) -> Sill:
        x, y = dem.xy(row, col)
        return Sill(int(row), int(col), x, y, float(elevation))

    raised = sill(sr, sc, old)
    sill_after = sill(route.sill_row, route.sill_col, route.sill_elevation)
    onset_before = float(result.onset_stage[r, c])
    onset_after = float(after.onset_stage[r, c])
    own = (sr, sc) == (r, c)
    cells_after = np.column_stack([route.rows[::-1], route.cols[::-1]]).astype(np.int32)
    xa, ya = dem.xy(cells_after[:, 0], cells_after[:, 1])
    return WhatIf(
        name=name,
        row=r,
        col=c,
        height=h,
        raised=raised,
        raised_elevation=new,
        own_sill=own,
        onset_before=onset_before,
        onset_after=onset_after,
        sill_before=raised,
        sill_after=sill_after,
        route_before=np.column_stack([before.rows[::-1], before.cols[::-1]]).astype(np.int32),
        route_after=cells_after,
        route_after_xy=np.column_stack([xa, ya]),
        unit=unit,
        explanation=_explain(
            raised, new, h, own, onset_before, onset_after, sill_after, unit, raised_cells
        ),
        result=after,
        raised_cells=raised_cells,
    )


def what_if_at(what_if: WhatIf, dem: "DEM", result: SpillResult, asset_or_cell: Any) -> WhatIf:
    """The raised sill of ``what_if`` read at another place it controls: no second flood.

    Places behind one sill share its what-if: the raised DEM is the same, so
    its flood (``what_if.result``) answers for all of them. The returned
    :class:`WhatIf` shares that result.

    Parameters
    ----------
    what_if : WhatIf
        From :func:`raise_sill` on ``dem`` and ``result``.
    dem : DEM
    result : SpillResult
        The flood ``what_if`` was computed from (before raising).
    asset_or_cell : Asset or (row, col)
        A place whose controlling sill in ``result`` is the cell ``what_if`` raised.

    Raises
    ------
    InvalidParameter
        ``what_if`` is not a WhatIf of this DEM, or the place's controlling
        sill is another cell (run :func:`raise_sill` for it).
    LocationOutsideDEM
        The place is outside the grid, on nodata, or reached by no outlet.
    """
    if not isinstance(what_if, WhatIf):
        raise InvalidParameter(f"expected a WhatIf from raise_sill(), not {type(what_if).__name__}")
    _check_result(dem, result)
    if what_if.result.elevation.shape != dem.shape:
        raise InvalidParameter("the what-if was computed on another grid; run raise_sill() on this DEM")
    name, r, c = _target(asset_or_cell)
    before = result.route(r, c)
    cell = (before.sill_row, before.sill_col)
    if cell != (what_if.raised.row, what_if.raised.col):
        raise InvalidParameter(
            f"the controlling sill of the place at row {r}, col {c} is the cell at row {cell[0]}, "
            f"col {cell[1]}, not the raised cell at row {what_if.raised.row}, col "
            f"{what_if.raised.col}; run raise_sill() for it"
        )
    return _read_what_if(
        dem, result, what_if.result, name, r, c, before, what_if.raised.elevation,
        what_if.raised_elevation, what_if.height, what_if.raised_cells,
    )


def raise_sills(
    dem: "DEM",
    outlets_mask: "Outlets | np.ndarray",
    result: SpillResult,
    assets: Assets,
    height: Any,
) -> Iterator[tuple[int, WhatIf]]:
    """:func:`raise_sill` for every asset behind a sill, one flood per distinct sill cell.

    Assets whose controlling sill is their own cell (no sill between them and
    the water), and assets without figures (outside the DEM, on nodata, not
    reached), are passed over. The others are grouped by their controlling
    sill cell, in the order each sill is first met; for each group the sill is
    raised and the site flooded once (:func:`raise_sill`), and every asset of
    the group read from that flood (:func:`what_if_at`).

    Yields
    ------
    (int, WhatIf)
        The asset's 0-based index in ``assets`` and its what-if, group by group.

    Notes
    -----
    Each group's flood is held only while its what-ifs are (about 9 bytes per
    cell): consume them one group at a time and keep what you need, not the
    WhatIf objects, to free it. ``height`` is checked before any flood is run.
    """
    if not isinstance(assets, Assets):
        raise InvalidParameter(f"assets must come from read_assets(), not {type(assets).__name__}")
    _check_result(dem, result)
    _height(height)
    groups: dict[tuple[int, int], list[int]] = {}
    for k, a in enumerate(assets):
        if a.status != STATUS_OK or result.flood_tree[a.row, a.col] == 0:
            continue
        route = result.route(a.row, a.col)
        cell = (int(route.sill_row), int(route.sill_col))
        if cell == (a.row, a.col):
            continue
        groups.setdefault(cell, []).append(k)
    for members in groups.values():
        first = raise_sill(dem, outlets_mask, result, assets[members[0]], height)
        yield members[0], first
        for k in members[1:]:
            yield k, what_if_at(first, dem, result, assets[k])
        del first


def _target(asset_or_cell: Any) -> tuple[str | None, int, int]:
    if isinstance(asset_or_cell, Asset):
        a = asset_or_cell
        if a.status != STATUS_OK:
            raise LocationOutsideDEM(
                f"the asset {a.name!r} is {a.status}, so it has no controlling sill; "
                "pick an asset on the DEM's data"
            )
        return a.name, a.row, a.col
    try:
        r, c = asset_or_cell
        ok = all(isinstance(v, (int, np.integer)) and not isinstance(v, bool) for v in (r, c))
    except (TypeError, ValueError):
        ok = False
    if not ok:
        raise InvalidParameter(
            f"give an Asset from read_assets() or a (row, col) cell, not {asset_or_cell!r}"
        )
    return None, int(r), int(c)


def _height(height: Any) -> float:
    if isinstance(height, bool):
        raise InvalidParameter(f"the height must be a number, not {height!r}")
    try:
        h = float(height)
    except (TypeError, ValueError):
        raise InvalidParameter(f"the height must be a number, not {height!r}") from None
    if not math.isfinite(h) or h <= 0:
        raise InvalidParameter(
            f"the height must be a positive finite number (how much to raise the sill), not {height!r}"
        )
    if h > MAX_ABS_ELEVATION:
        raise InvalidParameter(
            f"the height {h:g} is more than any sill could be raised by (at most "
            f"{MAX_ABS_ELEVATION:g} in the site's vertical unit); give the height of the works"
        )
    return h


def _explain(
    raised: Sill, new: float, height: float, own: bool, before: float, after: float,
    sill_after: Sill, unit: VerticalUnit, raised_cells: int = 1,
) -> str:
    u = unit.symbol
    at = f"row {raised.row}, col {raised.col}"
    if own:
        return (
            f"The asset's own ground ({before:.2f} {u}) is its controlling point: no sill "
            f"stands between it and the water, so there is no barrier to raise. Raising "
            f"its own cell by {height:.2f} {u} (a pad or a wall round it) makes its onset "
            f"stage {after:.2f} {u}."
        )
    what = "the controlling sill" if raised_cells == 1 else (
        f"the crest of the controlling sill ({raised_cells} cells)"
    )
    head = f"Raising {what} at {at} from {raised.elevation:.2f} to {new:.2f} {u}"
    there = f"row {sill_after.row}, col {sill_after.col}"
    if after == before:
        return (
            f"{head} changes nothing: the water goes round it over the cell at {there}, "
            f"at the same elevation ({after:.2f} {u}), which now controls."
        )
    if (sill_after.row, sill_after.col) == (raised.row, raised.col):
        return (
            f"{head} lifts the onset stage from {before:.2f} to {after:.2f} {u}; "
            "the raised cell still controls."
        )
    return (
        f"{head} lifts the onset stage from {before:.2f} to {after:.2f} {u}; the water then "
        f"comes over the sill at {there} ({sill_after.elevation:.2f} {u}), which now controls."
    )


def _to_wgs84(dem: "DEM") -> pyproj.Transformer:

    return LonLatTransformer(dem.horizontal_crs)
