"""Helpers for tests: north-up test grids and writing small rasters with rasterio."""

from __future__ import annotations

import warnings
from pathlib import Path

import numpy as np
import rasterio
from affine import Affine
from rasterio.errors import NotGeoreferencedWarning

UTM33 = "EPSG:32633"
#: North-west corner of the test grids (UTM zone 33N, near 15° E, 45.15° N).
WEST, NORTH = 500_000.0, 5_000_000.0


def grid(dx: float = 1.0, dy: float | None = None, west: float = WEST, north: float = NORTH) -> Affine:
    """North-up transform with ``dx`` × ``dy`` cells and the given north-west corner."""
    return Affine(dx, 0.0, west, 0.0, -(dx if dy is None else dy), north)


def write_raster(
    path: Path,
    data: np.ndarray,
    *,
    crs: str | None = UTM33,
    transform: Affine | None = None,
    nodata: float | None = None,
    dtype: str | None = None,
    driver: str = "GTiff",
    units: str | None = None,
    scale: float | None = None,
    offset: float | None = None,
    **creation: object,
) -> Path:
    """Write ``data`` (rows × cols, or bands × rows × cols) as a raster file.

    ``transform=None`` writes the default 1 m grid; pass ``transform=False`` to
    write no georeferencing at all.
    """
    arr = np.asarray(data)
    if arr.ndim == 2:
        arr = arr[np.newaxis]
    profile: dict[str, object] = dict(
        driver=driver,
        width=arr.shape[2],
        height=arr.shape[1],
        count=arr.shape[0],
        dtype=dtype or arr.dtype.name,
        nodata=nodata,
        **creation,
    )
    if crs is not None:
        profile["crs"] = crs
    if transform is not False:
        profile["transform"] = grid() if transform is None else transform
    with warnings.catch_warnings():
        # Only expected when writing a deliberately ungeoreferenced file.
        warnings.simplefilter("ignore", NotGeoreferencedWarning)
        with rasterio.open(path, "w", **profile) as dst:
            dst.write(arr.astype(profile["dtype"]))
            if units is not None:
                dst.units = (units,) * arr.shape[0]
            if scale is not None:
                dst.scales = (scale,) * arr.shape[0]
            if offset is not None:
                dst.offsets = (offset,) * arr.shape[0]
    return path
