"""Reading a site DEM into one checked, in-memory grid.

:func:`read_dem` opens a single-band raster (GeoTIFF first, but any raster GDAL
reads from a local file), checks that it is a north-up grid with a CRS, turns
every kind of missing value into NaN in a float32 elevation array and works out
the vertical unit. :func:`dem_from_array` builds the same :class:`DEM` from an
array, for tests and internal use. The :class:`DEM` also knows the true area of
its cells in m² (per row, on the ellipsoid for lon/lat grids) and converts
between cell indices and map coordinates.

Every problem with the input is raised as :class:`~sillmark.errors.InvalidDEM`
(or :class:`~sillmark.errors.InvalidParameter` for a bad argument) with a
one-sentence message; no rasterio or GDAL error escapes.
"""

from __future__ import annotations

import dataclasses
import functools
import os
from typing import Any

import numpy as np
import pyproj
import rasterio
import rasterio.windows
from affine import Affine
from rasterio._err import CPLE_BaseError
from rasterio.crs import CRS
from rasterio.enums import MaskFlags
from rasterio.errors import RasterioError
from rasterio.io import DatasetReader

from sillmark.errors import (
    InvalidDEM,
    InvalidParameter,
    LocationOutsideDEM,
)
from sillmark.grid.crs import crs_text
from sillmark.grid.elevations import check_plausible_heights, to_float32_elevation
from sillmark.grid.georeference import (
    UNIT_FROM_ARGUMENT,
    check_geographic_extent,
    check_projected_on_earth,
    choose_crs,
    degrees_per_angular_unit,
    geod_for,
    geographic_row_areas,
    horizontal_part,
    linear_unit_metres,
    parse_crs,
    resolve_vertical_unit,
    to_pyproj,
)
from sillmark.grid.raster_files import (
    check_north_up,
    file_transform,
    gdal_reason,
    local_file,
    open_local_raster,
)
from sillmark.units import VerticalUnit

__all__ = ["DEFAULT_MAX_CELLS", "DEM", "DEMGrid", "dem_from_array", "read_dem", "read_dem_grid"]

#: Largest grid :func:`read_dem` accepts unless told otherwise (20 000 × 20 000).
DEFAULT_MAX_CELLS = 400_000_000

#: Default grid of :func:`dem_from_array`: 1 m cells, north-west corner at
#: (500 000 E, 5 000 000 N) in the CRS given (UTM zone 33N by default).
DEFAULT_TRANSFORM = Affine(1.0, 0.0, 500_000.0, 0.0, -1.0, 5_000_000.0)






class _Georeferenced:
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


@dataclasses.dataclass(frozen=True, eq=False)
class DEM(_Georeferenced):
    """A site DEM: float32 elevations on a north-up grid, with CRS and vertical unit.

    Build one with :func:`read_dem` or :func:`dem_from_array`, which check and
    convert their input; the constructor itself only checks the structure.

    Attributes
    ----------
    elevation : numpy.ndarray
        float32, shape ``(rows, cols)``, C-contiguous, read-only; NaN where nodata.
    transform : affine.Affine
        Maps (col, row) of a cell's north-west corner to map (x, y). North-up:
        no rotation or shear, ``a > 0`` and ``e < 0``.
    crs : rasterio.crs.CRS
        Coordinate reference system (may be compound, with a vertical part).
    vertical_unit : VerticalUnit
        Unit of the elevations.
    nodata : float or None
        The nodata value the source declared, if any (the array holds NaN there).
    source_dtype : str
        Data type of the band in the source, e.g. ``"int16"``.
    path : str or None
        The file the DEM was read from.
    vertical_unit_source : str
        How the vertical unit was decided: ``"crs"``, ``"argument"``,
        ``"band-unit"``, ``"horizontal-unit"`` or ``"geographic-default"``
        (see :func:`read_dem`). Lets a user interface say when it was assumed.

    Notes
    -----
    ``valid``, ``row_areas`` and ``is_geographic`` are computed once and cached on
    the instance (the dataclass is frozen but keeps a ``__dict__``, which is where
    :func:`functools.cached_property` stores them). The cached arrays are read-only.
    Instances compare by identity.
    """

    elevation: np.ndarray
    transform: Affine
    crs: CRS
    vertical_unit: VerticalUnit
    nodata: float | None = None
    source_dtype: str = "float32"
    path: str | None = None
    vertical_unit_source: str = UNIT_FROM_ARGUMENT

    def __post_init__(self) -> None:
        z = self.elevation
        if not isinstance(z, np.ndarray) or z.dtype != np.float32 or z.ndim != 2:
            raise InvalidDEM(
                "DEM.elevation must be a 2-D float32 numpy array; build DEMs with "
                "read_dem() or dem_from_array(), which convert the input"
            )
        if z.shape[0] == 0 or z.shape[1] == 0:
            raise InvalidDEM(
                f"the DEM has no cells (shape {z.shape}); give a grid at least 1 × 1"
            )
        if not z.flags.c_contiguous:
            raise InvalidDEM("DEM.elevation must be C-contiguous; pass np.ascontiguousarray(z)")
        if z.flags.writeable:
            # A read-only view: the caller's own array stays writeable.
            z = z.view()
            z.flags.writeable = False
            object.__setattr__(self, "elevation", z)
        if not isinstance(self.transform, Affine):
            raise InvalidDEM("DEM.transform must be an affine.Affine")
        check_north_up(self.transform, "the DEM")
        if not isinstance(self.crs, CRS):
            raise InvalidDEM("DEM.crs must be a rasterio.crs.CRS")
        if not isinstance(self.vertical_unit, VerticalUnit):
            raise InvalidDEM("DEM.vertical_unit must be a VerticalUnit")
        if self._horizontal.is_geographic:
            check_geographic_extent(self.transform, z.shape, self._degrees_per_unit)
        else:
            check_projected_on_earth(self._horizontal, self.transform, z.shape)

    # -- shape and masks -------------------------------------------------

    @property
    def shape(self) -> tuple[int, int]:
        """``(rows, cols)``."""
        return self.elevation.shape  # type: ignore[return-value]

    @functools.cached_property
    def valid(self) -> np.ndarray:
        """bool array of the DEM's shape, True where the elevation is known (read-only)."""
        mask = ~np.isnan(self.elevation)
        mask.flags.writeable = False
        return mask

# ---------------------------------------------------------------------------
# public constructors


def read_dem(
    path: str | os.PathLike[str],
    *,
    band: int | None = None,
    vertical_unit: str | VerticalUnit | None = None,
    crs: Any = None,
    max_cells: int = DEFAULT_MAX_CELLS,
) -> DEM:
    """Read one band of a local raster file as a :class:`DEM`.

    Parameters
    ----------
    path : str or os.PathLike
        A local raster file. GDAL virtual or remote paths (``/vsi...``,
        ``...://...``) and files that point at other data (VRT, web service
        descriptions) are refused.
    band : int, optional
        1-based band to read. Required when the file has more than one band.
    vertical_unit : str or VerticalUnit, optional
        Unit of the elevations (``"m"``, ``"ft"``, ``"us-ft"``) when the CRS does
        not say; must agree with the CRS when it does.
    crs : int, str or CRS, optional
        EPSG code, ``"EPSG:nnnn"`` or WKT to use when the file has no CRS. If the
        file has one, this must describe the same horizontal CRS.
    max_cells : int, optional
        Refuse grids with more cells than this. Checked from the declared size
        before any pixel is read, so an oversized (or maliciously compressed)
        file never allocates memory.

    Returns
    -------
    DEM

    Raises
    ------
    InvalidDEM
        The file is missing, empty, not a raster, refers to other data, has
        several bands and no ``band``, has no CRS (and no ``crs``), is rotated,
        sheared or not north-up, has zero or more than ``max_cells`` cells, is
        entirely nodata, holds integers float32 cannot store exactly, finite
        floats beyond the float32 range or elevations beyond
        ±:data:`MAX_ABS_ELEVATION`, names other files it is read with (a label
        or header format), or cannot be read (damaged or truncated).
    InvalidParameter
        ``band``, ``vertical_unit``, ``crs`` or ``max_cells`` is unusable, or
        ``vertical_unit`` contradicts the unit of the CRS's vertical axis.

    Notes
    -----
    Values. Declared nodata, NaN, ±inf and cells the file's own mask (internal
    mask or alpha band) hides become NaN. Integer bands become float32 without
    changing any value; integers beyond ±2**24 cannot be stored exactly and are
    refused. A band scale and offset, when declared, are applied
    (``value = raw * scale + offset``, computed in float64, stored as float32).
    ``-0.0`` is stored as ``+0.0``.

    Vertical unit, first that applies:

    1. the vertical axis of the CRS (a compound CRS, or a 3-D CRS's height
       axis); a ``vertical_unit`` argument that contradicts it is an error;
    2. the ``vertical_unit`` argument;
    3. the band's unit label when it names m, ft or US survey feet;
    4. the horizontal unit of a projected CRS if it is metres, international or
       US survey feet: DEM heights usually follow the horizontal unit in
       projected CRSs (common practice, not a rule; pass ``vertical_unit``
       when a DEM breaks it);
    5. metres for a geographic (lon/lat) CRS.

    :attr:`DEM.vertical_unit_source` records which one applied.

    Memory: about ``rows × cols × (itemsize + 5)`` bytes at peak (the band as
    stored, the float32 copy and a bool mask).

    Examples
    --------
    >>> dem = read_dem("site.tif")  # doctest: +SKIP
    >>> dem.vertical_unit, dem.shape  # doctest: +SKIP
    (<VerticalUnit.METRE: 'm'>, (512, 640))
    """
    path = local_file(path, InvalidDEM, "the DEM")
    name = os.path.basename(path)
    if band is not None and (
        isinstance(band, bool) or not isinstance(band, (int, np.integer)) or band < 1
    ):
        raise InvalidParameter(f"band must be a band number 1, 2, ..., got {band!r}")
    if isinstance(max_cells, bool) or not isinstance(max_cells, (int, np.integer)) or max_cells < 1:
        raise InvalidParameter(f"max_cells must be a positive integer, got {max_cells!r}")
    unit_arg = None if vertical_unit is None else VerticalUnit.parse(vertical_unit)
    crs_arg = None if crs is None else parse_crs(crs, InvalidParameter, "crs")

    with open_local_raster(path, InvalidDEM, "the DEM") as src:
        if src.width == 0 or src.height == 0:
            raise InvalidDEM(
                f"'{name}' has zero width or height ({src.width} × {src.height} cells); "
                "give a raster with at least one cell"
            )
        cells = src.width * src.height
        if cells > max_cells:
            raise InvalidDEM(
                f"'{name}' has {src.height:,} × {src.width:,} = {cells:,} cells, more than "
                f"the limit of {int(max_cells):,}; crop it to the site or resample it to "
                "coarser cells (or raise max_cells if the machine has the memory)"
            )
        head = _band_header(src, path, band, crs_arg, unit_arg)
        try:
            raw = src.read(head.band)
            hidden = src.read_masks(head.band) == 0 if head.masked else None
        except (RasterioError, CPLE_BaseError, OSError) as exc:
            raise InvalidDEM(
                f"'{name}' opens but its pixels cannot be read ({gdal_reason(exc, path)}); "
                "the file may be truncated or damaged: copy or export it again"
            ) from None

    elevation = to_float32_elevation(
        raw, head.nodata, scale=head.scale, offset=head.offset, hidden=hidden, owned=True,
        label=f"'{name}'",
    )
    check_plausible_heights(elevation, f"'{name}'")
    return DEM(
        elevation=elevation,
        transform=head.transform,
        crs=head.crs,
        vertical_unit=head.vertical_unit,
        nodata=head.nodata,
        source_dtype=head.source_dtype,
        path=path,
        vertical_unit_source=head.vertical_unit_source,
    )


def _band_header(src: DatasetReader, path: str, band: int | None, crs_arg: CRS | None,
                 unit_arg: VerticalUnit | None) -> "DEMGrid":
    """Checks of an open raster that need no pixels; the band's grid and value rules."""
    name = os.path.basename(path)
    if band is None:
        if src.count != 1:
            raise InvalidDEM(
                f"'{name}' has {src.count} bands and Sillmark needs one band of "
                f"elevations; pass band=N (1 to {src.count}) to pick one"
            )
        band = 1
    elif band > src.count:
        raise InvalidParameter(
            f"band={band} but '{name}' has {src.count} band"
            f"{'s' if src.count != 1 else ''}; use 1 to {src.count}"
        )
    band = int(band)
    dtype = np.dtype(src.dtypes[band - 1])
    if dtype.kind not in "iuf":
        raise InvalidDEM(
            f"band {band} of '{name}' holds {dtype.name} values, not elevations; "
            "give a band of integer or floating-point heights"
        )
    transform = file_transform(src, name)
    file_crs = src.crs if src.crs else None
    dem_crs = choose_crs(file_crs, crs_arg, name)
    band_unit = (src.units[band - 1] or "") if src.units else ""
    nodata = src.nodatavals[band - 1]
    flags = src.mask_flag_enums[band - 1]
    unit, unit_source = resolve_vertical_unit(dem_crs, unit_arg, band_unit)
    return DEMGrid(
        shape=(int(src.height), int(src.width)),
        transform=transform,
        crs=dem_crs,
        vertical_unit=unit,
        nodata=None if nodata is None else float(nodata),
        source_dtype=dtype.name,
        path=path,
        vertical_unit_source=unit_source,
        band=band,
        scale=float(src.scales[band - 1]) if src.scales else 1.0,
        offset=float(src.offsets[band - 1]) if src.offsets else 0.0,
        masked=MaskFlags.per_dataset in flags or MaskFlags.alpha in flags,
    )


@dataclasses.dataclass(frozen=True, eq=False)
class DEMGrid(_Georeferenced):
    """The grid of a DEM file, without its cells: for reading it window by window.

    Made by :func:`read_dem_grid`, with the checks of :func:`read_dem` that need
    no pixels. It has the georeferencing of :class:`DEM` (``shape``, ``rows``,
    ``cols``, ``transform``, ``crs``, ``vertical_unit``, ``row_areas``, ``xy``,
    ``rowcol``, ...) and reads any window with :meth:`read_window`, converting
    the values exactly as :func:`read_dem` does, so that a window equals the same
    cells of ``read_dem(path).elevation``. It pickles small (no pixels), so a
    task on another machine can read its own windows of a shared file.

    Attributes
    ----------
    shape : (int, int)
    transform, crs, vertical_unit, nodata, source_dtype, path, vertical_unit_source
        As in :class:`DEM`.
    band : int
        1-based band of the elevations.
    scale, offset : float
        The band's declared scale and offset (1 and 0 when none).
    masked : bool
        Whether the file's own mask (internal mask or alpha band) hides cells.
    """

    shape: tuple[int, int]
    transform: Affine
    crs: CRS
    vertical_unit: VerticalUnit
    nodata: float | None
    source_dtype: str
    path: str
    vertical_unit_source: str
    band: int
    scale: float = 1.0
    offset: float = 0.0
    masked: bool = False

    def __post_init__(self) -> None:
        if self._horizontal.is_geographic:
            check_geographic_extent(self.transform, self.shape, self._degrees_per_unit)
        else:
            check_projected_on_earth(self._horizontal, self.transform, self.shape)

    def read_window(self, row0: int, row1: int, col0: int, col1: int) -> np.ndarray:
        """Elevations of rows ``row0:row1`` and columns ``col0:col1`` (float32, NaN nodata).

        Parts of the window outside the grid are NaN. The file is opened for each
        call, so windows may be read from several processes at once.

        Raises
        ------
        InvalidDEM
            The pixels cannot be read, or the window holds values :func:`read_dem`
            refuses (integers float32 cannot store exactly, floats beyond float32).
        """
        rows, cols = self.shape
        out = np.full((row1 - row0, col1 - col0), np.nan, dtype=np.float32)
        r0, r1 = max(row0, 0), min(row1, rows)
        c0, c1 = max(col0, 0), min(col1, cols)
        if r0 >= r1 or c0 >= c1:
            return out
        name = os.path.basename(self.path)
        window = rasterio.windows.Window(c0, r0, c1 - c0, r1 - r0)
        with open_local_raster(self.path, InvalidDEM, "the DEM") as src:
            try:
                raw = src.read(self.band, window=window)
                hidden = src.read_masks(self.band, window=window) == 0 if self.masked else None
            except (RasterioError, CPLE_BaseError, OSError) as exc:
                raise InvalidDEM(
                    f"'{name}' opens but its pixels cannot be read "
                    f"({gdal_reason(exc, self.path)}); the file may be truncated or damaged: "
                    "copy or export it again"
                ) from None
        out[r0 - row0 : r1 - row0, c0 - col0 : c1 - col0] = to_float32_elevation(
            raw, self.nodata, scale=self.scale, offset=self.offset, hidden=hidden, owned=True,
            label=f"'{name}'", allow_empty=True,
        )
        return out


def read_dem_grid(
    path: str | os.PathLike[str],
    *,
    band: int | None = None,
    vertical_unit: str | VerticalUnit | None = None,
    crs: Any = None,
) -> DEMGrid:
    """Open a DEM file for reading window by window: :class:`DEMGrid`.

    The same checks as :func:`read_dem` that need no pixels (a local single-band
    raster or a chosen band, north-up, a CRS, a vertical unit), and no limit on
    the number of cells: nothing of the grid is read here. The checks on values
    (nodata everywhere, integers beyond float32) are made window by window, by
    :meth:`DEMGrid.read_window`, and by the caller for "all nodata".

    Raises
    ------
    InvalidDEM, InvalidParameter
        As :func:`read_dem`.
    """
    path = local_file(path, InvalidDEM, "the DEM")
    name = os.path.basename(path)
    if band is not None and (
        isinstance(band, bool) or not isinstance(band, (int, np.integer)) or band < 1
    ):
        raise InvalidParameter(f"band must be a band number 1, 2, ..., got {band!r}")
    unit_arg = None if vertical_unit is None else VerticalUnit.parse(vertical_unit)
    crs_arg = None if crs is None else parse_crs(crs, InvalidParameter, "crs")
    with open_local_raster(path, InvalidDEM, "the DEM") as src:
        if src.width == 0 or src.height == 0:
            raise InvalidDEM(
                f"'{name}' has zero width or height ({src.width} × {src.height} cells); "
                "give a raster with at least one cell"
            )
        return _band_header(src, path, band, crs_arg, unit_arg)


def dem_from_array(
    elevation: Any,
    *,
    transform: Affine | None = None,
    crs: Any = "EPSG:32633",
    vertical_unit: str | VerticalUnit | None = "m",
    nodata: float | None = None,
) -> DEM:
    """Build a :class:`DEM` from an array, with the checks :func:`read_dem` applies.

    Parameters
    ----------
    elevation : array_like
        2-D numeric array of elevations; it is copied, never modified.
    transform : affine.Affine, optional
        North-up grid transform; default :data:`DEFAULT_TRANSFORM` (1 m cells,
        north-west corner at 500 000 E, 5 000 000 N).
    crs : int, str or CRS, optional
        EPSG code, ``"EPSG:nnnn"``, WKT or CRS object; default UTM zone 33N.
    vertical_unit : str or VerticalUnit or None, optional
        Default ``"m"``. ``None`` decides it as :func:`read_dem` does when no
        unit is given (from the CRS, else the horizontal unit, else metres).
    nodata : float, optional
        Value to treat as missing (becomes NaN), in addition to NaN and ±inf.

    Returns
    -------
    DEM

    Raises
    ------
    InvalidDEM
        Not 2-D, empty, not numeric, all nodata, integers beyond ±2**24,
        finite values beyond the float32 range, or a transform that is not
        north-up.
    InvalidParameter
        Unknown CRS or unit, or a unit that contradicts the CRS.

    Examples
    --------
    >>> dem = dem_from_array([[3, 2], [1, -9999]], nodata=-9999)
    >>> dem.elevation
    array([[ 3.,  2.],
           [ 1., nan]], dtype=float32)
    >>> dem.cell_size, float(dem.row_areas[0])
    ((1.0, 1.0), 1.0)
    """
    if transform is None:
        transform = DEFAULT_TRANSFORM
    if not isinstance(transform, Affine):
        raise InvalidParameter(
            f"transform must be an affine.Affine, got {type(transform).__name__}; "
            "e.g. Affine(dx, 0, west, 0, -dy, north)"
        )
    check_north_up(transform, "the array")
    if crs is None:
        raise InvalidDEM("a DEM needs a CRS; pass crs as an EPSG code such as 32633")
    dem_crs = parse_crs(crs, InvalidParameter, "crs")
    unit_arg = None if vertical_unit is None else VerticalUnit.parse(vertical_unit)
    try:
        raw = np.asarray(elevation)
    except (ValueError, TypeError) as exc:
        raise InvalidDEM(f"the elevation cannot be read as an array ({exc}); give a 2-D numeric array") from None
    if raw.ndim != 2:
        raise InvalidDEM(
            f"the elevation array has {raw.ndim} dimension{'s' if raw.ndim != 1 else ''} "
            f"(shape {raw.shape}); give a 2-D array (rows, cols)"
        )
    if raw.shape[0] == 0 or raw.shape[1] == 0:
        raise InvalidDEM(
            f"the elevation array has zero width or height (shape {raw.shape}); "
            "give at least one cell"
        )
    if raw.dtype.kind not in "iuf":
        raise InvalidDEM(
            f"the elevation array holds {raw.dtype} values; give integer or floating-point heights"
        )
    unit, unit_source = resolve_vertical_unit(dem_crs, unit_arg, "")
    z = to_float32_elevation(raw, nodata, owned=False, label="the elevation array")
    return DEM(
        elevation=z,
        transform=transform,
        crs=dem_crs,
        vertical_unit=unit,
        nodata=None if nodata is None else float(nodata),
        source_dtype=raw.dtype.name,
        path=None,
        vertical_unit_source=unit_source,
    )






# ---------------------------------------------------------------------------
# opening files (shared with sillmark.grid.outlets)


























# ---------------------------------------------------------------------------
# CRS and vertical unit






















# ---------------------------------------------------------------------------
# values












# ---------------------------------------------------------------------------
# geometry helpers


















def check_layers_on_grid(dem: "DEM | DEMGrid", **layers: np.ndarray) -> None:
    """Every named layer has the DEM's shape, or :class:`InvalidParameter` naming the first that differs.

    Examples
    --------
    >>> z = dem_from_array(np.zeros((2, 3), np.float32))
    >>> check_layers_on_grid(z, onset_stage=np.zeros((2, 3)))
    >>> check_layers_on_grid(z, onset_stage=np.zeros((3, 2)))
    Traceback (most recent call last):
    ...
    sillmark.errors.InvalidParameter: the result's onset_stage is 3 x 2 cells but the DEM is 2 x 3; export a result computed on this DEM
    """
    shape = tuple(dem.shape)
    for name, layer in layers.items():
        got = tuple(np.shape(layer))
        if got != shape:
            raise InvalidParameter(
                f"the result's {name} is {got[0]} x {got[1]} cells but the DEM is "
                f"{shape[0]} x {shape[1]}; export a result computed on this DEM"
            )

def _short(a: np.ndarray) -> str:
    if a.ndim == 0:
        return str(a.item())
    return np.array2string(a.ravel()[:5], separator=", ") + ("..." if a.size > 5 else "")


@dataclasses.dataclass(frozen=True)
class RasterOutline:
    """What a person must choose before a raster file can be read as a DEM.

    Attributes
    ----------
    bands : int
        Number of bands in the file (a DEM needs one chosen when more than 1).
    has_crs : bool
        Whether the file states its CRS (without one, a CRS must be given).
    band_names : tuple of str
        The bands' own descriptions ('' where the file gives none).
    """

    bands: int
    has_crs: bool
    band_names: tuple[str, ...]


def raster_outline(path: str | os.PathLike[str]) -> RasterOutline:
    """Band count and CRS presence of a local raster file, read from its header.

    Raises
    ------
    InvalidDEM
        As :func:`read_dem` for files that are not local, self-contained rasters.
    """
    path = local_file(path, InvalidDEM, "the DEM")
    with open_local_raster(path, InvalidDEM, "the DEM") as src:
        names = tuple("".join(ch for ch in (d or "") if ch.isprintable())[:60]
                      for d in src.descriptions)
        return RasterOutline(bands=int(src.count), has_crs=bool(src.crs), band_names=names)
