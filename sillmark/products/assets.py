"""Assets: when each place of concern gets wet, and why.

An *asset* is a point a user cares about (a school, a substation, a pumping
station), read and placed on the grid by :func:`sillmark.grid.assets.read_assets`.
:func:`assess_assets` reads, for each asset at one
outlet water level, the cell it stands on, its ground elevation, its onset stage,
whether it is flooded, shielded or dry, the depth and freeboard, and the
*controlling sill*: the highest cell on the route by which water first reaches
it, found by walking the flood tree back to an outlet.

What raising a sill would change is :mod:`sillmark.products.what_if`.

Everything here reads one :class:`~sillmark.engine.flood.SpillResult`; nothing is
estimated. Units are those of the DEM (:attr:`sillmark.grid.dem.DEM.vertical_unit`).
"""

from __future__ import annotations

import dataclasses
import functools
import math
from typing import TYPE_CHECKING, Any

import numpy as np
import pyproj

from sillmark.engine.flood import SpillResult
from sillmark.errors import InvalidParameter
from sillmark.grid.assets import STATUS_OK, STATUS_UNREACHED, Assets
from sillmark.grid.crs import LonLatTransformer
from sillmark.products.cutoff import asset_cutoff
from sillmark.products.stage import checked_level
from sillmark.units import VerticalUnit

if TYPE_CHECKING:  # pragma: no cover
    from sillmark.grid.dem import DEM

__all__ = ["AssetTable", "Sill", "assess_assets"]


#: State of an asset at a water level (:attr:`AssetTable.state`); "" without figures.
STATE_FLOODED = "flooded"
STATE_SHIELDED = "shielded"
STATE_DRY = "dry"
STATE_NONE = ""


# --------------------------------------------------------------------------- records


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
    cutoff : AssetCutOff or None
        With refuges: each asset's cut-off stage and island window
        (:func:`sillmark.products.cutoff.asset_cutoff`).

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
    cutoff: Any = None

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


# --------------------------------------------------------------------------- assessing


def assess_assets(assets: Assets, dem: "DEM", result: SpillResult, level: Any, *,
                  cutoff: Any = None) -> AssetTable:
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
    cutoff : CutOff, optional
        The cut-off stage of the site (:func:`sillmark.products.cutoff.cutoff_stage`):
        adds each asset's cut-off stage and island window.

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
    >>> from sillmark.grid.assets import assets_from_points
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
        cutoff=None if cutoff is None else asset_cutoff(
            cutoff, np.where(ok, [a.row for a in assets], -1),
            np.where(ok, [a.col for a in assets], -1), float(h)),
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


def _to_wgs84(dem: "DEM") -> pyproj.Transformer:

    return LonLatTransformer(dem.horizontal_crs)
