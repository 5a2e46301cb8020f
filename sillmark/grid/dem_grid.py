"""A DEM opened without its cells: the grid, read window by window.

:func:`read_dem_grid` makes every check :func:`sillmark.grid.dem.read_dem`
makes, without reading the cells; :class:`DEMGrid` reads any window on
demand, converted exactly as ``read_dem`` converts the whole raster. The tiled
engine's tasks and the out-of-core products read DEMs larger than memory this way.
"""

from __future__ import annotations

import dataclasses
import os
from typing import Any

import numpy as np
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
)
from sillmark.grid._elevation_kernels import clean_float32
from sillmark.grid.elevations import float_nodata, to_float32_elevation
from sillmark.grid.georeference import (
    Georeferenced,
    check_geographic_extent,
    check_projected_on_earth,
    choose_crs,
    parse_crs,
    resolve_vertical_unit,
)
from sillmark.grid.raster_files import (
    file_transform,
    gdal_reason,
    local_file,
    open_local_raster,
)
from sillmark.units import VerticalUnit


@dataclasses.dataclass(frozen=True, eq=False)
class DEMGrid(Georeferenced):
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
        r0, r1 = max(row0, 0), min(row1, rows)
        c0, c1 = max(col0, 0), min(col1, cols)
        inside = (r0, r1, c0, c1) == (row0, row1, col0, col1)
        shape = (row1 - row0, col1 - col0)
        out = np.empty(shape, dtype=np.float32) if inside else np.full(shape, np.nan, np.float32)
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
        part = out[r0 - row0 : r1 - row0, c0 - col0 : c1 - col0]
        if raw.dtype == np.float32 and self.scale == 1.0 and self.offset == 0.0:
            # The usual survey DEM: one compiled pass gives what to_float32_elevation
            # gives (missing cells NaN, -0.0 made +0.0) in its whole-array steps, about
            # four times faster on a 16 M-cell window (5 against 20 ms), with no
            # temporary arrays. The tiled engine and the hierarchy read every window here.
            nodata = float_nodata(raw.dtype, self.nodata)
            clean_float32(raw, np.float32(0.0 if nodata is None else nodata), nodata is not None,
                          hidden if hidden is not None else np.zeros((1, 1), dtype=bool),
                          hidden is not None, part)
            return out
        part[...] = to_float32_elevation(
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
        return band_header(src, path, band, crs_arg, unit_arg)




def band_header(src: DatasetReader, path: str, band: int | None, crs_arg: CRS | None,
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
