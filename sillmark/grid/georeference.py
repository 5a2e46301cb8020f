"""Placing a DEM on the Earth: its CRS, its vertical unit, true cell areas, and the checks
that refuse georeferencing no real survey has.

The vertical unit comes from the CRS's vertical axis, the band's unit, the user, or
the horizontal unit, in that order (see :func:`resolve_vertical_unit`). Cells of a
lon/lat DEM get their true area on the CRS's ellipsoid (:class:`pyproj.Geod`),
never degrees squared.
"""

from __future__ import annotations

import functools
import math
from typing import Any

import numpy as np
import pyproj
from affine import Affine
from rasterio.crs import CRS
from rasterio.errors import CRSError

from sillmark.errors import (
    InvalidDEM,
    InvalidParameter,
    LocationOutsideDEM,
    SillmarkError,
)
from sillmark.grid.crs import crs_text
from sillmark.units import VerticalUnit

# How a DEM's vertical unit was decided (the value of DEM.vertical_unit_source).
UNIT_FROM_CRS = "crs"


UNIT_FROM_ARGUMENT = "argument"


UNIT_FROM_BAND = "band-unit"


UNIT_FROM_HORIZONTAL = "horizontal-unit"


UNIT_DEFAULT_GEOGRAPHIC = "geographic-default"


# Geodesic polygon edges bow poleward of the parallels that bound a lon/lat cell;
# splitting each parallel edge into pieces this wide (degrees) keeps that error
# below about 1e-10 of the cell area.
_PARALLEL_STEP_DEG = 0.001


_MAX_PARALLEL_PIECES = 2000


def parse_crs(value: Any, error: type[SillmarkError], what: str) -> CRS:
    if isinstance(value, CRS):
        return value
    try:
        if isinstance(value, (int, np.integer)) and not isinstance(value, bool):
            result = CRS.from_epsg(int(value))
        elif isinstance(value, str) and value.strip().isdigit():
            result = CRS.from_epsg(int(value.strip()))
        elif isinstance(value, pyproj.CRS):
            result = CRS.from_wkt(value.to_wkt())
        else:
            result = CRS.from_user_input(value)
    except (CRSError, ValueError, TypeError) as exc:
        raise error(
            f"{what} {value!r} is not a CRS Sillmark recognises ({str(exc).rstrip('.')}); "
            "give an EPSG code such as 32633 or 'EPSG:32633', or a WKT string"
        ) from None
    return result


def to_pyproj(crs: CRS) -> pyproj.CRS:
    try:
        return pyproj.CRS.from_wkt(crs.to_wkt(version="WKT2_2019"))
    except (CRSError, pyproj.exceptions.CRSError, ValueError):
        return pyproj.CRS.from_user_input(crs.to_wkt())


def horizontal_part(pcrs: pyproj.CRS, label: str) -> pyproj.CRS:
    if pcrs.is_geocentric:
        raise InvalidDEM(
            f"{label} is in a geocentric (earth-centred x, y, z) CRS; give a DEM in a "
            "projected or geographic CRS"
        )
    if pcrs.is_vertical and not pcrs.is_compound:
        raise InvalidDEM(
            f"{label} has only a vertical CRS; give its horizontal CRS too (e.g. 'EPSG:32633+5773')"
        )
    horizontal = pcrs.to_2d() if (pcrs.is_compound or len(pcrs.axis_info) > 2) else pcrs
    if horizontal.is_compound or horizontal.is_vertical:
        raise InvalidDEM(f"{label} has a CRS without a usable horizontal part ({pcrs.name})")
    return horizontal


def degrees_per_angular_unit(horizontal: pyproj.CRS) -> float:
    factor = horizontal.axis_info[0].unit_conversion_factor  # radians per unit
    degrees = math.degrees(factor)
    return 1.0 if abs(degrees - 1.0) < 1e-12 else degrees


def linear_unit_metres(horizontal: pyproj.CRS) -> float:
    axes = horizontal.axis_info
    if not axes:
        raise InvalidDEM(f"the CRS {horizontal.name!r} has no axes; give an EPSG code")
    return float(axes[0].unit_conversion_factor)


def _unit_for_factor(metres: float) -> VerticalUnit | None:
    for unit in VerticalUnit:
        if abs(metres - unit.metres) <= 1e-12 * unit.metres:
            return unit
    return None


def _vertical_axis(pcrs: pyproj.CRS) -> Any:
    """The first axis pointing up or down (the height axis), or None."""
    for axis in pcrs.axis_info:
        if axis.direction.lower() in ("up", "down"):
            return axis
    return None


def resolve_vertical_unit(
    crs: CRS, argument: VerticalUnit | None, band_unit: str
) -> tuple[VerticalUnit, str]:
    pcrs = to_pyproj(crs)
    horizontal = horizontal_part(pcrs, "the DEM")
    axis = _vertical_axis(pcrs)
    if axis is not None:
        if axis.direction.lower() == "down":
            raise InvalidDEM(
                f"the vertical CRS of the DEM measures depth (positive down, {pcrs.name}); "
                "Sillmark needs heights positive up: negate the values and use a height CRS"
            )
        from_crs = _unit_for_factor(axis.unit_conversion_factor)
        if from_crs is None:
            raise InvalidDEM(
                f"the vertical axis of the DEM's CRS is in '{axis.unit_name}', which Sillmark "
                "does not handle; convert the elevations to metres or feet"
            )
        if argument is not None and argument is not from_crs:
            raise InvalidParameter(
                f"vertical unit '{argument.value}' contradicts the DEM's CRS, whose vertical "
                f"axis is in {axis.unit_name} ('{from_crs.value}'); omit the unit or use "
                f"'{from_crs.value}'"
            )
        return from_crs, UNIT_FROM_CRS
    if argument is not None:
        return argument, UNIT_FROM_ARGUMENT
    if band_unit.strip():
        try:
            return VerticalUnit.parse(band_unit), UNIT_FROM_BAND
        except InvalidParameter:
            pass  # free-text label we do not understand: fall through
    if horizontal.is_geographic:
        return VerticalUnit.METRE, UNIT_DEFAULT_GEOGRAPHIC
    metres = linear_unit_metres(horizontal)
    unit = _unit_for_factor(metres)
    if unit is None:
        raise InvalidDEM(
            f"cannot tell the vertical unit: the CRS ({horizontal.name}) is in "
            f"'{horizontal.axis_info[0].unit_name}' and does not state a vertical unit; "
            "pass vertical_unit ('m', 'ft' or 'us-ft')"
        )
    return unit, UNIT_FROM_HORIZONTAL


def choose_crs(file_crs: CRS | None, argument: CRS | None, name: str) -> CRS:
    if file_crs is None:
        if argument is None:
            raise InvalidDEM(
                f"'{name}' has no CRS; pass its EPSG code (e.g. crs=32633 for UTM zone 33N)"
            )
        return argument
    if argument is not None:
        a = horizontal_part(to_pyproj(file_crs), f"'{name}'")
        b = horizontal_part(to_pyproj(argument), "crs")
        if not a.equals(b, ignore_axis_order=True):
            raise InvalidParameter(
                f"crs {crs_text(argument)} differs from the CRS stored in '{name}' "
                f"({crs_text(file_crs)}); omit crs, or fix the file's CRS first"
            )
        # The argument may add a vertical part the file lacks.
        if _vertical_axis(to_pyproj(argument)) is not None and _vertical_axis(to_pyproj(file_crs)) is None:
            return argument
    return file_crs


def check_geographic_extent(t: Affine, shape: tuple[int, int], deg_per_unit: float) -> None:
    rows, cols = shape
    top = t.f * deg_per_unit
    bottom = (t.f + rows * t.e) * deg_per_unit
    span = cols * t.a * deg_per_unit
    # Grids registered on cell centres may reach half a cell past a pole or
    # the 360° span; row_areas clips those cells at the pole.
    tol = 0.5 * max(abs(t.a), abs(t.e)) * deg_per_unit + 1e-9
    if top > 90.0 + tol or bottom < -90.0 - tol:
        raise InvalidDEM(
            f"the DEM's rows run from latitude {top:.9g} to {bottom:.9g}, beyond the poles; "
            "check that the CRS is really geographic (lon/lat)"
        )
    if span > 360.0 + 2 * tol:
        raise InvalidDEM(
            f"the DEM spans {span:.9g}° of longitude, more than 360°; check the transform"
        )


#: Longest side a DEM may have on the ground, in metres: about the Earth's equator.
EARTH_CIRCUMFERENCE_M = 40_075_017.0


@functools.lru_cache(maxsize=64)
def _lonlat_transformers(horizontal: pyproj.CRS) -> tuple[pyproj.Transformer, pyproj.Transformer]:
    """Forward (CRS to lon/lat) and backward transformers of a projected CRS, made once."""
    lonlat = pyproj.CRS("OGC:CRS84")
    return (pyproj.Transformer.from_crs(horizontal, lonlat, always_xy=True),
            pyproj.Transformer.from_crs(lonlat, horizontal, always_xy=True))


def _grid_sample_points(t: Affine, shape: tuple[int, int]) -> tuple[np.ndarray, np.ndarray]:
    """x, y of the corners, edge middles and centre of a north-up grid."""
    rows, cols = shape
    fr = np.array([0.0, 0.0, 0.0, 0.5, 0.5, 0.5, 1.0, 1.0, 1.0])
    fc = np.array([0.0, 0.5, 1.0, 0.0, 0.5, 1.0, 0.0, 0.5, 1.0])
    return t.c + fc * cols * t.a, t.f + fr * rows * t.e


def check_projected_on_earth(horizontal: pyproj.CRS, t: Affine, shape: tuple[int, int]) -> None:
    """Refuse a projected grid that cannot be placed on the Earth.

    Three ways to fail: the CRS has no geodetic datum (a local engineering
    grid), so nothing relates it to longitude and latitude; a side of the grid
    is longer than the equator; or a corner, edge middle or the centre does not
    come back to itself through longitude/latitude (an origin or cell size far
    beyond the projection's reach).

    Raises
    ------
    InvalidDEM
        With what was found and what would be accepted.
    """
    name = horizontal.name or "unnamed"
    try:
        forward, backward = _lonlat_transformers(horizontal)
    except pyproj.exceptions.ProjError:
        raise InvalidDEM(
            f"the DEM's CRS '{name}' has no geodetic datum (a local or engineering grid), so "
            "Sillmark cannot place it on the Earth for maps, GeoJSON and true areas; assign the "
            "DEM its real projected CRS (an EPSG code, e.g. with gdal_edit -a_srs) and try again"
        ) from None
    metres = linear_unit_metres(horizontal)
    width, height = shape[1] * abs(t.a) * metres, shape[0] * abs(t.e) * metres
    if max(width, height) > EARTH_CIRCUMFERENCE_M:
        raise InvalidDEM(
            f"the DEM covers {width:.4g} m × {height:.4g} m (cells of {abs(t.a):.4g} × "
            f"{abs(t.e):.4g} CRS units), more than the Earth's circumference; check the "
            "transform's cell size and the CRS's unit"
        )
    x, y = _grid_sample_points(t, shape)
    with np.errstate(invalid="ignore", over="ignore"):
        lon, lat = forward.transform(x, y, errcheck=False)
        bx, by = backward.transform(lon, lat, errcheck=False)
        tol = max(abs(t.a), abs(t.e), 1.0 / metres)
        off = ~(np.isfinite(lon) & np.isfinite(lat) & (np.abs(bx - x) <= tol) & (np.abs(by - y) <= tol))
    if off.any():
        k = int(np.argmax(off))
        raise InvalidDEM(
            f"the DEM's georeferencing cannot be placed on the Earth: the point ({x[k]:.6g}, "
            f"{y[k]:.6g}) of its grid lies beyond what CRS '{name}' can map to longitude and "
            "latitude; check the transform's origin and cell size, and that the CRS is the "
            "one the DEM was made in"
        )


def geod_for(horizontal: pyproj.CRS) -> pyproj.Geod:
    geod = horizontal.get_geod()
    return geod if geod is not None else pyproj.Geod(ellps="WGS84")


def geographic_row_areas(t: Affine, rows: int, deg_per_unit: float, geod: pyproj.Geod) -> np.ndarray:
    width = abs(t.a) * deg_per_unit
    pieces = min(_MAX_PARALLEL_PIECES, max(1, math.ceil(width / _PARALLEL_STEP_DEG)))
    lons = np.linspace(0.0, width, pieces + 1)
    ring_lons = np.concatenate([lons, lons[::-1]])
    areas = np.empty(rows, dtype=np.float64)
    ring_lats = np.empty(2 * (pieces + 1), dtype=np.float64)
    for r in range(rows):
        north = min(90.0, (t.f + r * t.e) * deg_per_unit)
        south = max(-90.0, (t.f + (r + 1) * t.e) * deg_per_unit)
        ring_lats[: pieces + 1] = north
        ring_lats[pieces + 1 :] = south
        area, _ = geod.polygon_area_perimeter(ring_lons, ring_lats)
        areas[r] = abs(area)
    return areas




class Georeferenced:
    """Georeferencing shared by :class:`DEM` and :class:`DEMGrid`.

    Needs ``shape``, ``transform`` and ``crs`` on the instance. The cached values
    live in the instance ``__dict__`` (see :class:`DEM`).
    """

    @property
    def rows(self) -> int:
        return self.shape[0]

    @property
    def cols(self) -> int:
        return self.shape[1]

    def __setstate__(self, state: dict) -> None:
        # Unpickling bypasses __post_init__: keep the arrays read-only.
        self.__dict__.update(state)
        for key in ("elevation", "valid", "row_areas"):
            arr = state.get(key)
            if isinstance(arr, np.ndarray):
                arr.flags.writeable = False

    # -- georeferencing --------------------------------------------------

    @functools.cached_property
    def _pyproj_crs(self) -> pyproj.CRS:
        return to_pyproj(self.crs)

    @functools.cached_property
    def _horizontal(self) -> pyproj.CRS:
        return horizontal_part(self._pyproj_crs, "the DEM")

    @functools.cached_property
    def _degrees_per_unit(self) -> float:
        return degrees_per_angular_unit(self._horizontal)

    @property
    def horizontal_crs(self) -> pyproj.CRS:
        """The horizontal part of :attr:`crs` as a :class:`pyproj.CRS` (2-D)."""
        return self._horizontal

    @functools.cached_property
    def is_geographic(self) -> bool:
        """True when the grid is in longitude/latitude."""
        return bool(self._horizontal.is_geographic)

    @property
    def cell_size(self) -> tuple[float, float]:
        """``(dx, dy)``: cell width and height in CRS units, both positive."""
        return abs(self.transform.a), abs(self.transform.e)

    @property
    def bounds(self) -> tuple[float, float, float, float]:
        """``(left, bottom, right, top)`` of the grid in CRS units."""
        t = self.transform
        left, top = t.c, t.f
        return left, top + t.e * self.rows, left + t.a * self.cols, top

    @functools.cached_property
    def row_areas(self) -> np.ndarray:
        """True area of one cell in each row, in m² (float64, shape ``(rows,)``, read-only).

        Projected grids: ``|a · e|`` times the square of the CRS's linear unit in
        metres (so US-survey-foot grids come out in m²); every row is the same.
        The map projection's own scale error is not corrected (grid area, as is
        common practice for site-sized DEMs).

        Geographic grids: the area on the CRS's ellipsoid (WGS 84 if the CRS
        names none) of the cell bounded by two meridians and two parallels,
        computed with :meth:`pyproj.Geod.polygon_area_perimeter` (Karney 2013).
        The parallel edges are split into pieces at most 0.001° wide so the
        geodesic edges follow the parallels to about 1e-10 of the cell area.

        References
        ----------
        C. F. F. Karney (2013), "Algorithms for geodesics", Journal of Geodesy
        87, 43–55. https://doi.org/10.1007/s00190-012-0578-z
        """
        if self.is_geographic:
            areas = geographic_row_areas(
                self.transform, self.rows, self._degrees_per_unit, geod_for(self._horizontal)
            )
        else:
            metres = linear_unit_metres(self._horizontal)
            areas = np.full(self.rows, abs(self.transform.a * self.transform.e) * metres**2)
        areas.flags.writeable = False
        return areas

    # -- coordinates -----------------------------------------------------

    def xy(self, row: Any, col: Any) -> tuple[Any, Any]:
        """Map coordinates of the centre of cell ``(row, col)``.

        Parameters
        ----------
        row, col : int or array_like of int
            Cell indices (numpy arrays broadcast together).

        Returns
        -------
        x, y : float or numpy.ndarray
            Floats for scalar input, float64 arrays otherwise.

        Raises
        ------
        LocationOutsideDEM
            If an index lies outside the grid.

        Examples
        --------

        >>> from sillmark.grid.dem import dem_from_array
        >>> dem = dem_from_array(np.zeros((2, 3), dtype=np.float32))
        >>> dem.xy(0, 0)
        (500000.5, 4999999.5)
        """
        r = np.asarray(row)
        c = np.asarray(col)
        for name, idx, size in (("row", r, self.rows), ("col", c, self.cols)):
            integral = idx.dtype.kind in "iu" or (
                idx.dtype.kind == "f" and bool(np.all(np.isfinite(idx) & (idx == np.floor(idx))))
            )
            if not integral:
                raise InvalidParameter(f"{name} must be an integer cell index, got {_short(idx)}")
            if np.any((idx < 0) | (idx >= size)):
                raise LocationOutsideDEM(
                    f"cell index {name}={_short(idx)} lies outside the DEM, which has "
                    f"{self.rows} rows and {self.cols} columns; use 0 to {size - 1}"
                )
        t = self.transform
        x = t.c + (c.astype(np.float64) + 0.5) * t.a
        y = t.f + (r.astype(np.float64) + 0.5) * t.e
        if x.ndim == 0 and y.ndim == 0:
            return float(x), float(y)
        xb, yb = np.broadcast_arrays(x, y)
        return xb.copy(), yb.copy()

    def wrapped_x(self, x: Any) -> Any:
        """``x`` with longitudes brought into the grid's own 360° turn.

        On a geographic grid a longitude and the same longitude plus or minus
        360° are one place: a grid stored with 0–360° longitudes holds the
        point given as -170° at 190°. Other grids get ``x`` unchanged.

        Examples
        --------

        >>> from sillmark.grid.dem import dem_from_array
        >>> from affine import Affine
        >>> dem = dem_from_array(np.zeros((2, 4), np.float32), crs=4326,
        ...                      transform=Affine(1, 0, 180, 0, -1, 10))
        >>> float(dem.wrapped_x(-178.5))
        181.5
        """
        if not self.is_geographic:
            return x
        turn = 360.0 / self._degrees_per_unit
        west = self.transform.c
        with np.errstate(invalid="ignore"):
            return west + np.mod(np.asarray(x, dtype=np.float64) - west, turn)

    def rowcol(self, x: Any, y: Any) -> tuple[Any, Any]:
        """The cell ``(row, col)`` holding map point ``(x, y)``.

        A point on a cell boundary belongs to the cell to its east and south
        (indices are floored); the east and south edges of the grid are outside.

        Parameters
        ----------
        x, y : float or array_like
            Map coordinates in the DEM's CRS.

        Returns
        -------
        row, col : int or numpy.ndarray of int64

        Raises
        ------
        LocationOutsideDEM
            If a point lies outside the grid (or is NaN).

        Examples
        --------

        >>> from sillmark.grid.dem import dem_from_array
        >>> dem = dem_from_array(np.zeros((2, 3), dtype=np.float32))
        >>> dem.rowcol(500002.9, 4999998.1)
        (1, 2)
        """
        xs = self.wrapped_x(np.asarray(x, dtype=np.float64))
        ys = np.asarray(y, dtype=np.float64)
        t = self.transform
        with np.errstate(invalid="ignore"):
            colf = np.floor((xs - t.c) / t.a)
            rowf = np.floor((ys - t.f) / t.e)
            inside = (colf >= 0) & (colf < self.cols) & (rowf >= 0) & (rowf < self.rows)
        if not np.all(inside):
            left, bottom, right, top = self.bounds
            bad = np.broadcast_arrays(xs, ys, inside)
            k = np.flatnonzero(~bad[2])[0]
            raise LocationOutsideDEM(
                f"point ({bad[0].flat[k]:.10g}, {bad[1].flat[k]:.10g}) lies outside the DEM; "
                f"give x in [{left:.10g}, {right:.10g}) and y in ({bottom:.10g}, {top:.10g}] "
                f"({crs_text(self.crs)})"
            )
        rows = rowf.astype(np.int64)
        cols = colf.astype(np.int64)
        if rows.ndim == 0 and cols.ndim == 0:
            return int(rows), int(cols)
        rows, cols = np.broadcast_arrays(rows, cols)
        return rows.copy(), cols.copy()

def _short(a: np.ndarray) -> str:
    if a.ndim == 0:
        return str(a.item())
    return np.array2string(a.ravel()[:5], separator=", ") + ("..." if a.size > 5 else "")
