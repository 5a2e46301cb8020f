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
from affine import Affine
from rasterio._err import CPLE_BaseError
from rasterio.crs import CRS
from rasterio.errors import RasterioError

from sillmark.errors import (
    InvalidDEM,
    InvalidParameter,
)
from sillmark.grid.dem_grid import DEMGrid, band_header
from sillmark.grid.elevations import check_plausible_heights, to_float32_elevation
from sillmark.grid.georeference import (
    UNIT_FROM_ARGUMENT,
    Georeferenced,
    check_geographic_extent,
    check_projected_on_earth,
    parse_crs,
    resolve_vertical_unit,
)
from sillmark.grid.raster_files import (
    check_north_up,
    gdal_reason,
    local_file,
    open_local_raster,
)
from sillmark.units import VerticalUnit

__all__ = ["DEFAULT_MAX_CELLS", "DEM", "dem_from_array", "read_dem"]

#: Largest grid :func:`read_dem` accepts unless told otherwise (20 000 × 20 000).
DEFAULT_MAX_CELLS = 400_000_000

#: Default grid of :func:`dem_from_array`: 1 m cells, north-west corner at
#: (500 000 E, 5 000 000 N) in the CRS given (UTM zone 33N by default).
DEFAULT_TRANSFORM = Affine(1.0, 0.0, 500_000.0, 0.0, -1.0, 5_000_000.0)




@dataclasses.dataclass(frozen=True, eq=False)
class DEM(Georeferenced):
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
        head = band_header(src, path, band, crs_arg, unit_arg)
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

