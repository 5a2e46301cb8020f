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

import contextlib
import dataclasses
import functools
import math
import os
import re
import warnings
from collections.abc import Iterator
from typing import Any

import numpy as np
import pyproj
import rasterio
import rasterio.windows
from affine import Affine
from rasterio._err import CPLE_BaseError
from rasterio.crs import CRS
from rasterio.enums import MaskFlags
from rasterio.env import set_gdal_config
from rasterio.errors import CRSError, NotGeoreferencedWarning, RasterioError
from rasterio.io import DatasetReader

from sillmark.errors import (
    InvalidDEM,
    InvalidParameter,
    LocationOutsideDEM,
    SillmarkError,
)
from sillmark.units import VerticalUnit

__all__ = ["DEFAULT_MAX_CELLS", "DEM", "DEMGrid", "dem_from_array", "read_dem", "read_dem_grid"]

#: Largest grid :func:`read_dem` accepts unless told otherwise (20 000 × 20 000).
DEFAULT_MAX_CELLS = 400_000_000

#: Default grid of :func:`dem_from_array`: 1 m cells, north-west corner at
#: (500 000 E, 5 000 000 N) in the CRS given (UTM zone 33N by default).
DEFAULT_TRANSFORM = Affine(1.0, 0.0, 500_000.0, 0.0, -1.0, 5_000_000.0)

# Integers up to 2**24 in magnitude are exact in float32 (24-bit significand).
_FLOAT32_EXACT_INT = 2**24
_FLOAT32_MAX = float(np.finfo(np.float32).max)
#: Largest elevation magnitude :func:`read_dem` accepts, in the DEM's vertical unit
#: (metres or feet): the Earth's surface spans about -11 000 m to +8 850 m
#: (-36 100 ft to +29 000 ft), so a value beyond 10**8 is a fill code or a wrong
#: scale (integers up to 2**24, kept exactly, stay below it).
MAX_ABS_ELEVATION = 100_000_000.0

# GDAL drivers whose files describe data held elsewhere (other files, web
# services). Sillmark only reads self-contained local rasters, so these are never
# offered to GDAL when opening a user's file.
_REFUSED_DRIVERS = frozenset(
    {
        "VRT", "GTI", "DERIVED", "WMS", "WMTS", "WCS", "HTTP", "KMLSUPEROVERLAY",
        "PLMOSAIC", "MRF", "EEDA", "EEDAI", "DAAS", "STACTA", "STACIT", "OGCAPI",
        "NGW", "GDALG",
        # Labels and headers that name their data file(s) inside them: a label
        # could name any file the server can read.
        "PDS", "PDS4", "ISIS2", "ISIS3", "VICAR", "ERS", "FAST", "EIR", "NDF", "MFF",
        "MFF2", "GenBin", "ISCE", "ROI_PAC", "CEOS", "SAR_CEOS", "ECRGTOC", "RPFTOC",
        "SAFE", "SENTINEL2", "RS2", "RCM", "TSX", "COASP", "CPG", "DIMAP", "ILWIS",
        "TIL", "RRASTER", "SDTS", "ESRIC", "Zarr", "AIG",
        # Containers that may link to other files (HDF5 external links) or run
        # queries stored in the file (SQLite-based formats).
        "HDF5", "HDF5Image", "HDF4", "HDF4Image", "BAG", "S102", "S104", "S111",
        "netCDF", "KEA", "GPKG", "MBTiles", "Rasterlite", "SQLite", "PDF",
        "GNMFile", "GNMDatabase", "OSM",
    }
)
_REFUSED_DRIVERS_UPPER = frozenset(n.upper() for n in _REFUSED_DRIVERS)
#: GDAL settings for every raster Sillmark opens: GDAL's network file systems
#: (/vsicurl/, /vsis3/, /vsigs/, /vsiaz/, ... and plain http:// paths) accept
#: only files with these extensions, and no real file has it, so they fetch
#: nothing; no retries either. :func:`forbid_remote_access` sets the same for a
#: whole process (the web server) and its children.
NO_REMOTE_ACCESS = {
    "CPL_VSIL_CURL_ALLOWED_EXTENSIONS": ".sillmark-remote-access-is-off",
    "GDAL_HTTP_MAX_RETRY": "0",
    "GDAL_HTTP_TIMEOUT": "1",
}
#: Path forms GDAL reads as something other than a local file: its virtual file
#: systems (/vsizip/, /vsicurl/, /vsis3/, ... also with a backslash), URLs, and
#: driver prefixes such as ``zip:``, ``HDF5:``, ``GTIFF_DIR:`` or ``WMTS:``.
_GDAL_SPECIAL_PATH = re.compile(r"^\s*(?:[/\\]vsi|[a-z][a-z0-9_+.-]+:)", re.IGNORECASE)
_REFERENCE_MARKERS = (
    (b"<VRTDataset", "a GDAL virtual raster (VRT)"),
    (b"<GDALTileIndexDataset", "a GDAL tile index"),
    (b"<GDAL_WMS", "a web map service description"),
    (b"<GDAL_WMTS", "a web map tile service description"),
    (b"<WCS_GDAL", "a web coverage service description"),
    (b"<MRF_META", "a meta raster (MRF) description"),
)
_ACCEPTED = "a GeoTIFF (.tif) or another single-band raster file that GDAL reads"

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
        return _to_pyproj(self.crs)

    @functools.cached_property
    def _horizontal(self) -> pyproj.CRS:
        return _horizontal_part(self._pyproj_crs, "the DEM")

    @functools.cached_property
    def _degrees_per_unit(self) -> float:
        return _degrees_per_angular_unit(self._horizontal)

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
            areas = _geographic_row_areas(
                self.transform, self.rows, self._degrees_per_unit, _geod_for(self._horizontal)
            )
        else:
            metres = _linear_unit_metres(self._horizontal)
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
                f"({_crs_label(self.crs)})"
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
        _check_north_up(self.transform, "the DEM")
        if not isinstance(self.crs, CRS):
            raise InvalidDEM("DEM.crs must be a rasterio.crs.CRS")
        if not isinstance(self.vertical_unit, VerticalUnit):
            raise InvalidDEM("DEM.vertical_unit must be a VerticalUnit")
        if self._horizontal.is_geographic:
            _check_geographic_extent(self.transform, z.shape, self._degrees_per_unit)
        else:
            _check_projected_on_earth(self._horizontal, self.transform, z.shape)

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
    path = _local_file(path, InvalidDEM, "the DEM")
    name = os.path.basename(path)
    if band is not None and (
        isinstance(band, bool) or not isinstance(band, (int, np.integer)) or band < 1
    ):
        raise InvalidParameter(f"band must be a band number 1, 2, ..., got {band!r}")
    if isinstance(max_cells, bool) or not isinstance(max_cells, (int, np.integer)) or max_cells < 1:
        raise InvalidParameter(f"max_cells must be a positive integer, got {max_cells!r}")
    unit_arg = None if vertical_unit is None else VerticalUnit.parse(vertical_unit)
    crs_arg = None if crs is None else _parse_crs(crs, InvalidParameter, "crs")

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
                f"'{name}' opens but its pixels cannot be read ({_gdal_reason(exc, path)}); "
                "the file may be truncated or damaged: copy or export it again"
            ) from None

    elevation = _to_float32_elevation(
        raw, head.nodata, scale=head.scale, offset=head.offset, hidden=hidden, owned=True,
        label=f"'{name}'",
    )
    _check_plausible_heights(elevation, f"'{name}'")
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
    transform = _file_transform(src, name)
    file_crs = src.crs if src.crs else None
    dem_crs = _choose_crs(file_crs, crs_arg, name)
    band_unit = (src.units[band - 1] or "") if src.units else ""
    nodata = src.nodatavals[band - 1]
    flags = src.mask_flag_enums[band - 1]
    unit, unit_source = _resolve_vertical_unit(dem_crs, unit_arg, band_unit)
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
            _check_geographic_extent(self.transform, self.shape, self._degrees_per_unit)
        else:
            _check_projected_on_earth(self._horizontal, self.transform, self.shape)

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
                    f"({_gdal_reason(exc, self.path)}); the file may be truncated or damaged: "
                    "copy or export it again"
                ) from None
        out[r0 - row0 : r1 - row0, c0 - col0 : c1 - col0] = _to_float32_elevation(
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
    path = _local_file(path, InvalidDEM, "the DEM")
    name = os.path.basename(path)
    if band is not None and (
        isinstance(band, bool) or not isinstance(band, (int, np.integer)) or band < 1
    ):
        raise InvalidParameter(f"band must be a band number 1, 2, ..., got {band!r}")
    unit_arg = None if vertical_unit is None else VerticalUnit.parse(vertical_unit)
    crs_arg = None if crs is None else _parse_crs(crs, InvalidParameter, "crs")
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
    _check_north_up(transform, "the array")
    if crs is None:
        raise InvalidDEM("a DEM needs a CRS; pass crs as an EPSG code such as 32633")
    dem_crs = _parse_crs(crs, InvalidParameter, "crs")
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
    unit, unit_source = _resolve_vertical_unit(dem_crs, unit_arg, "")
    z = _to_float32_elevation(raw, nodata, owned=False, label="the elevation array")
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


def nodata_as_json(value: float | None) -> float | str | None:
    """A declared nodata value as JSON may hold it.

    A finite value stays a number; NaN and the infinities, which JSON has no
    number for (RFC 8259, section 6), become the strings ``"NaN"``,
    ``"Infinity"`` and ``"-Infinity"``; None stays None.

    Examples
    --------
    >>> nodata_as_json(-9999.0), nodata_as_json(float("nan")), nodata_as_json(float("-inf"))
    (-9999.0, 'NaN', '-Infinity')
    """
    if value is None:
        return None
    value = float(value)
    if math.isfinite(value):
        return value
    if math.isnan(value):
        return "NaN"
    return "Infinity" if value > 0 else "-Infinity"


def nodata_from_json(value: float | str | None) -> float | None:
    """The inverse of :func:`nodata_as_json`.

    Examples
    --------
    >>> nodata_from_json("-Infinity"), nodata_from_json(-9999.0), nodata_from_json(None)
    (-inf, -9999.0, None)
    """
    return None if value is None else float(value)


# ---------------------------------------------------------------------------
# opening files (shared with sillmark.grid.outlets)


def gdal_path_refusal(text: str, what: str = "the file") -> str | None:
    """Why ``text`` must not be given to GDAL as a path, or None for a plain local path.

    Refused: GDAL virtual and remote file systems (``/vsicurl/``, ``/vsizip/``,
    ``/vsis3/``, ...), anything with a scheme or driver prefix (``http://``,
    ``zip://``, ``HDF5:...``), and NUL bytes (C strings end there, so GDAL
    would open a different path than the one checked).
    """
    if "\0" in text:
        return f"{what} path contains a NUL byte; give the path of a local file"
    if "://" in text or _GDAL_SPECIAL_PATH.match(text):
        shown = text if len(text) <= 80 else text[:77] + "..."
        return (f"{what} path {shown!r} is a GDAL virtual or remote path; give the path of a "
                "local file (upload or download it first)")
    return None


#: CRS names a GeoJSON ``crs`` member may give: an authority code (``EPSG:32633``,
#: ``OGC:CRS84``) or its OGC URN (``urn:ogc:def:crs:EPSG::32633``).
_CRS_NAME = re.compile(r"^(?:urn:ogc:def:crs:[A-Za-z0-9_.-]+:[A-Za-z0-9_.-]*:[A-Za-z0-9_.-]+"
                       r"|[A-Za-z][A-Za-z0-9_.-]*:{1,2}[A-Za-z0-9_.-]+)$")


def crs_name_refusal(obj: Any, label: str) -> str | None:
    """Why the ``crs`` member of GeoJSON ``obj`` is refused, or None.

    Only authority names are taken: a PROJ string or WKT from a file could name
    grid or init files (``+nadgrids=...``, ``+init=...``) that PROJ would look for
    on the server.
    """
    member = obj.get("crs") if isinstance(obj, dict) else None
    if not isinstance(member, dict):
        return None
    props = member.get("properties")
    name = props.get("name") if isinstance(props, dict) else None
    if not isinstance(name, str) or _CRS_NAME.match(name.strip()):
        return None
    shown = name if len(name) <= 60 else name[:57] + "..."
    return (f"{label} names its CRS as {shown!r}; give an authority name such as "
            "'EPSG:32633' or 'urn:ogc:def:crs:EPSG::32633'")


def forbid_remote_access() -> None:
    """Turn GDAL's network file systems off for this process and the processes it starts.

    Sets :data:`NO_REMOTE_ACCESS` as GDAL configuration and in the environment
    (worker processes inherit it), and keeps PROJ from fetching grids.
    """

    for key, value in NO_REMOTE_ACCESS.items():
        os.environ[key] = value
        set_gdal_config(key, value)
    os.environ["PROJ_NETWORK"] = "OFF"
    try:
        pyproj.network.set_network_enabled(False)
    except AttributeError:  # pragma: no cover - pyproj without the network module
        pass


def _local_file(path: Any, error: type[SillmarkError], what: str) -> str:
    """Check that ``path`` names an existing, non-empty regular local file."""
    try:
        text = os.fspath(path)
    except TypeError:
        raise error(f"{what} must be a file path, got {type(path).__name__}") from None
    if isinstance(text, bytes):
        text = os.fsdecode(text)
    refusal = gdal_path_refusal(text, what)
    if refusal is not None:
        raise error(refusal)
    name = os.path.basename(text)
    if not os.path.exists(text):
        raise error(f"{what} '{name}' does not exist; check the path")
    if not os.path.isfile(text):
        raise error(f"{what} '{name}' is not a regular file (a folder?); give the file itself")
    if os.path.getsize(text) == 0:
        raise error(f"{what} '{name}' is empty (0 bytes); give {_ACCEPTED}")
    return text


@functools.lru_cache(maxsize=1)
def _allowed_drivers() -> tuple[str, ...]:
    with rasterio.Env() as env:
        names = env.drivers()
    return tuple(sorted(n for n in names if n.upper() not in _REFUSED_DRIVERS_UPPER))


@contextlib.contextmanager
def open_local_raster(
    path: str, error: type[SillmarkError] = InvalidDEM, what: str = "the raster"
) -> Iterator[DatasetReader]:
    """Open a checked local raster with GDAL, refusing drivers that fetch other data.

    Any rasterio/GDAL error raised while opening becomes ``error`` with GDAL's
    reason in the message. ``path`` must already have passed :func:`_local_file`.
    """
    name = os.path.basename(path)
    if path.lower().endswith(".vrt"):
        raise error(
            f"{what} '{name}' is a GDAL virtual raster (VRT), which can point to other or "
            f"remote files; convert it to a GeoTIFF first (gdal_translate in.vrt out.tif)"
        )
    refusal = gdal_path_refusal(path, what)
    if refusal is not None:
        raise error(refusal)
    # Report a vertical CRS stored in GeoTIFF keys as part of a compound CRS; no network.
    env = rasterio.Env(GTIFF_REPORT_COMPD_CS="YES", **NO_REMOTE_ACCESS)
    with env:
        try:
            with warnings.catch_warnings():
                # A file without geotransform is reported by our own checks.
                warnings.simplefilter("ignore", NotGeoreferencedWarning)
                src = DatasetReader(path, driver=list(_allowed_drivers()))
        # UnicodeDecodeError: rasterio decodes GeoTIFF CRS citation keys as UTF-8.
        except (RasterioError, CPLE_BaseError, OSError, UnicodeDecodeError) as exc:
            kind = _reference_kind(path)
            if kind:
                raise error(
                    f"{what} '{name}' is {kind}, which points to other or remote data; "
                    "give a self-contained raster file such as a GeoTIFF"
                ) from None
            raise error(
                f"{what} '{name}' is not a raster Sillmark can read ({_gdal_reason(exc, path)}); "
                f"give {_ACCEPTED}"
            ) from None
        try:
            _check_own_files(src, path, error, what)
            yield src
        finally:
            src.close()


def _check_own_files(src: DatasetReader, path: str, error: type[SillmarkError], what: str) -> None:
    """Refuse a raster whose driver reads files other than ``path`` and its own sidecars.

    A sidecar shares the file's name and folder (``site.tif.aux.xml``, ``site.tfw``);
    anything else (a header naming ``../other/file``) could be any file on the machine.
    """
    try:
        files = list(src.files)
    except (RasterioError, CPLE_BaseError, OSError):  # pragma: no cover - GDAL lists no files
        files = [path]
    own = os.path.realpath(path)
    folder = os.path.dirname(own)
    stem = os.path.splitext(os.path.basename(own))[0]
    for f in files:
        real = os.path.realpath(f)
        if real == own:
            continue
        if os.path.dirname(real) == folder and os.path.basename(real).startswith(stem + "."):
            continue
        raise error(
            f"{what} '{os.path.basename(path)}' is read together with other files it names "
            f"({src.driver} format); give a self-contained raster file such as a GeoTIFF"
        )


def _reference_kind(path: str) -> str | None:
    try:
        with open(path, "rb") as fh:
            head = fh.read(4096).lstrip()
    except OSError:
        return None
    for marker, kind in _REFERENCE_MARKERS:
        if head.startswith(marker) or marker in head[:1024]:
            return kind
    return None


def _gdal_reason(exc: BaseException, path: str) -> str:
    """The most specific message in an exception chain, without the full path."""
    messages = []
    seen: set[int] = set()
    cur: BaseException | None = exc
    while cur is not None and id(cur) not in seen:
        seen.add(id(cur))
        text = str(cur).strip()
        if text and "see previous exception" not in text.lower():
            messages.append(text)
        cur = cur.__cause__ or cur.__context__
    reason = messages[-1] if messages else type(exc).__name__
    reason = reason.replace(path, os.path.basename(path)).rstrip(".")
    return reason[:300]


def _file_transform(src: DatasetReader, name: str) -> Affine:
    t = src.transform
    if t == Affine.identity():
        if src.gcps[0] or src.rpcs:
            raise InvalidDEM(
                f"'{name}' is georeferenced only by control points or RPCs, not by a grid "
                "transform; warp it onto a north-up grid first (e.g. gdalwarp)"
            )
        raise InvalidDEM(
            f"'{name}' has no geotransform (no cell size or origin); give a georeferenced "
            "raster such as a GeoTIFF with its transform"
        )
    _check_north_up(t, f"'{name}'")
    return t


def _check_north_up(t: Affine, label: str) -> None:
    values = (t.a, t.b, t.c, t.d, t.e, t.f)
    if not all(math.isfinite(v) for v in values):
        raise InvalidDEM(f"{label} has a transform with non-finite values {values}; give a valid grid")
    if t.b != 0.0 or t.d != 0.0:
        raise InvalidDEM(
            f"{label} has a rotated or sheared grid (transform terms b={t.b:g}, d={t.d:g}); "
            "Sillmark needs a north-up grid: warp it first (e.g. gdalwarp)"
        )
    if not (t.a > 0.0 and t.e < 0.0):
        raise InvalidDEM(
            f"{label} is not north-up (cell width {t.a:g}, cell height {t.e:g}; needs a "
            "positive width and a negative height): warp it first (e.g. gdalwarp)"
        )


# ---------------------------------------------------------------------------
# CRS and vertical unit


def _parse_crs(value: Any, error: type[SillmarkError], what: str) -> CRS:
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


def _to_pyproj(crs: CRS) -> pyproj.CRS:
    try:
        return pyproj.CRS.from_wkt(crs.to_wkt(version="WKT2_2019"))
    except (CRSError, pyproj.exceptions.CRSError, ValueError):
        return pyproj.CRS.from_user_input(crs.to_wkt())


def _horizontal_part(pcrs: pyproj.CRS, label: str) -> pyproj.CRS:
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


def _degrees_per_angular_unit(horizontal: pyproj.CRS) -> float:
    factor = horizontal.axis_info[0].unit_conversion_factor  # radians per unit
    degrees = math.degrees(factor)
    return 1.0 if abs(degrees - 1.0) < 1e-12 else degrees


def _linear_unit_metres(horizontal: pyproj.CRS) -> float:
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


def _resolve_vertical_unit(
    crs: CRS, argument: VerticalUnit | None, band_unit: str
) -> tuple[VerticalUnit, str]:
    pcrs = _to_pyproj(crs)
    horizontal = _horizontal_part(pcrs, "the DEM")
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
    metres = _linear_unit_metres(horizontal)
    unit = _unit_for_factor(metres)
    if unit is None:
        raise InvalidDEM(
            f"cannot tell the vertical unit: the CRS ({horizontal.name}) is in "
            f"'{horizontal.axis_info[0].unit_name}' and does not state a vertical unit; "
            "pass vertical_unit ('m', 'ft' or 'us-ft')"
        )
    return unit, UNIT_FROM_HORIZONTAL


def _choose_crs(file_crs: CRS | None, argument: CRS | None, name: str) -> CRS:
    if file_crs is None:
        if argument is None:
            raise InvalidDEM(
                f"'{name}' has no CRS; pass its EPSG code (e.g. crs=32633 for UTM zone 33N)"
            )
        return argument
    if argument is not None:
        a = _horizontal_part(_to_pyproj(file_crs), f"'{name}'")
        b = _horizontal_part(_to_pyproj(argument), "crs")
        if not a.equals(b, ignore_axis_order=True):
            raise InvalidParameter(
                f"crs {_crs_label(argument)} differs from the CRS stored in '{name}' "
                f"({_crs_label(file_crs)}); omit crs, or fix the file's CRS first"
            )
        # The argument may add a vertical part the file lacks.
        if _vertical_axis(_to_pyproj(argument)) is not None and _vertical_axis(_to_pyproj(file_crs)) is None:
            return argument
    return file_crs


def _crs_label(crs: CRS) -> str:
    try:
        code = crs.to_string()
    except (CRSError, ValueError):
        code = ""
    if code and len(code) <= 40:
        return code
    try:
        return repr(_to_pyproj(crs).name)
    except (CRSError, pyproj.exceptions.CRSError):
        return "a custom CRS"


# ---------------------------------------------------------------------------
# values


def _to_float32_elevation(
    raw: np.ndarray,
    nodata: float | None,
    *,
    scale: float = 1.0,
    offset: float = 0.0,
    hidden: np.ndarray | None = None,
    owned: bool,
    label: str,
    allow_empty: bool = False,
) -> np.ndarray:
    """Missing values to NaN, integers to float32 exactly, -0.0 to +0.0.

    ``owned`` says the caller's array may be modified in place; ``allow_empty``
    accepts an array that is all nodata (a window of a larger grid).
    """
    invalid = _nodata_mask(raw, nodata)
    if hidden is not None:
        invalid |= hidden
    if invalid.all() and not allow_empty:
        raise InvalidDEM(
            f"every cell of {label} is nodata; give a DEM with at least one elevation "
            "(check the declared nodata value)"
        )
    scaled = scale != 1.0 or offset != 0.0
    if raw.dtype.kind in "iu" and raw.dtype.itemsize > 2 and not scaled:
        _check_exact_in_float32(raw, invalid, label)
    if raw.dtype.kind == "f" and raw.dtype.itemsize > 4 and not scaled:
        _check_float32_range(raw, invalid, label)
    with np.errstate(over="ignore", invalid="ignore"):
        if scaled:
            z = (raw.astype(np.float64) * scale + offset).astype(np.float32)
            if not np.all(np.isfinite(z[~invalid])):
                raise InvalidDEM(
                    f"{label} gives values beyond the float32 range after its scale {scale:g} "
                    f"and offset {offset:g}; check the band's scale and offset"
                )
        elif raw.dtype == np.float32 and owned and raw.flags.c_contiguous and raw.flags.writeable:
            z = raw
        else:
            z = np.ascontiguousarray(raw, dtype=np.float32)
            if z is raw:
                z = raw.copy()
    z[invalid] = np.nan
    z[z == 0.0] = 0.0  # -0.0 == 0.0, so this also turns -0.0 into +0.0
    return z


def _nodata_mask(raw: np.ndarray, nodata: float | None) -> np.ndarray:
    if raw.dtype.kind == "f":
        invalid = ~np.isfinite(raw)
    else:
        invalid = np.zeros(raw.shape, dtype=bool)
    if nodata is None:
        return invalid
    value = float(nodata)
    if math.isnan(value):
        return invalid
    if raw.dtype.kind in "iu":
        info = np.iinfo(raw.dtype)
        if value.is_integer() and info.min <= value <= info.max:
            invalid |= raw == raw.dtype.type(int(value))
    else:
        top = float(np.finfo(raw.dtype).max)
        if top < abs(value) <= top * (1.0 + 1e-7):
            # "-3.4028235e+38" written as text lands just past the float32 limit.
            value = math.copysign(top, value)
        if math.isinf(value) or abs(value) <= top:
            invalid |= raw == raw.dtype.type(value)
    return invalid


def _check_plausible_heights(z: np.ndarray, label: str) -> None:
    """Refuse elevations no terrain has in any unit Sillmark knows (|z| > MAX_ABS_ELEVATION)."""
    with np.errstate(invalid="ignore"):
        lo, hi = float(np.nanmin(z)), float(np.nanmax(z))
    worst = lo if abs(lo) >= abs(hi) else hi
    if abs(worst) > MAX_ABS_ELEVATION:
        r, c = np.unravel_index(int(np.nanargmin(z) if worst == lo else np.nanargmax(z)), z.shape)
        raise InvalidDEM(
            f"{label} holds an elevation of {worst:g} (row {r}, col {c}), beyond "
            f"±{MAX_ABS_ELEVATION:,.0f} in metres or feet; no terrain is that high or deep: "
            "declare such values as nodata, or check the band's scale"
        )


def _check_exact_in_float32(raw: np.ndarray, invalid: np.ndarray, label: str) -> None:
    big = (raw > _FLOAT32_EXACT_INT) | (raw < -_FLOAT32_EXACT_INT)
    big &= ~invalid
    if big.any():
        r, c = np.unravel_index(np.flatnonzero(big)[0], raw.shape)
        raise InvalidDEM(
            f"{label} holds integer values float32 cannot represent exactly (e.g. "
            f"{int(raw[r, c])} at row {r}, col {c}; the limit is ±2**24 = ±{_FLOAT32_EXACT_INT:,}); "
            "declare such values as nodata, or rescale the heights (e.g. to metres)"
        )


def _check_float32_range(raw: np.ndarray, invalid: np.ndarray, label: str) -> None:
    big = np.abs(raw) > _FLOAT32_MAX
    big &= ~invalid
    if big.any():
        r, c = np.unravel_index(np.flatnonzero(big)[0], raw.shape)
        raise InvalidDEM(
            f"{label} holds values beyond the float32 range (e.g. {float(raw[r, c]):g} at row "
            f"{r}, col {c}); declare them as nodata"
        )


# ---------------------------------------------------------------------------
# geometry helpers


def _check_geographic_extent(t: Affine, shape: tuple[int, int], deg_per_unit: float) -> None:
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


def _check_projected_on_earth(horizontal: pyproj.CRS, t: Affine, shape: tuple[int, int]) -> None:
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
    metres = _linear_unit_metres(horizontal)
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


def _geod_for(horizontal: pyproj.CRS) -> pyproj.Geod:
    geod = horizontal.get_geod()
    return geod if geod is not None else pyproj.Geod(ellps="WGS84")


def _geographic_row_areas(t: Affine, rows: int, deg_per_unit: float, geod: pyproj.Geod) -> np.ndarray:
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


def _short(a: np.ndarray) -> str:
    if a.ndim == 0:
        return str(a.item())
    return np.array2string(a.ravel()[:5], separator=", ") + ("..." if a.size > 5 else "")


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
