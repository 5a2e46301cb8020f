"""Outlets planned for a DEM read tile by tile: which sources mark which cells, decided per window.

:func:`plan_outlets` checks every outlet source of a DEM file once (the same
checks and messages as :func:`sillmark.grid.outlets.build_outlets`) and returns
an :class:`OutletPlan`, small to pickle, whose :meth:`OutletPlan.window` marks the
outlet cells of any window, so each tile of the pipeline marks its own.
"""

from __future__ import annotations

import dataclasses
import os
from typing import Any

import numpy as np
import rasterio.windows
from affine import Affine
from rasterio._err import CPLE_BaseError
from rasterio.errors import RasterioError

from sillmark.errors import InvalidOutlets
from sillmark.grid.outlet_geojson import burn_parts, rasterize_parts
from sillmark.grid.outlets import (
    GEOJSON_EXTENSIONS,
    RASTER_EXTENSIONS,
    check_mask_raster,
    empty_text,
    geojson_geometries,
    geojson_misses_message,
    geojson_nodata_message,
    marked_cells,
    mask_empty_message,
    mask_nodata_message,
    mask_path,
    neighbour_offsets,
    one_source_refusal,
    outlet_specs,
)
from sillmark.grid.raster_files import (
    gdal_reason,
    open_local_raster,
)


@dataclasses.dataclass(frozen=True, eq=False)
class OutletPlan:
    """Outlet sources made ready to mark window by window, for grids too large to hold.

    Made by :func:`plan_outlets`; it pickles small (geometries, file names, no
    cells), so a task on another machine can mark the outlets of its own window
    with :meth:`window`. The union of the windows equals
    ``build_outlets(read_dem(path), specs, connectivity=...).mask``.

    Attributes
    ----------
    sources : tuple of str
        Labels of the sources, as :attr:`Outlets.sources`.
    kinds : tuple
        Per source: ``("edge",)``, ``("nodata",)``, ``("shapes", centred,
        touched)`` (GeoJSON, reprojected, split into parts burned by cell centre
        and by touch) or ``("mask", path, nodata)`` (a mask raster on the grid).
    connectivity : int
    """

    sources: tuple[str, ...]
    kinds: tuple
    connectivity: int
    _messages: tuple = ()

    def window(self, grid: Any, halo: np.ndarray, row0: int, row1: int, col0: int,
               col1: int) -> tuple[np.ndarray, np.ndarray]:
        """Outlet cells of rows ``row0:row1``, columns ``col0:col1`` of ``grid``.

        Parameters
        ----------
        grid : DEMGrid or DEM
            The grid (its shape and transform).
        halo : float32 array
            Elevations of the window grown by one cell on every side, NaN on
            nodata and outside the grid (``grid.read_window(row0 - 1, row1 + 1,
            col0 - 1, col1 + 1)``).

        Returns
        -------
        mask : bool array, the window's shape
            True on valid outlet cells.
        counts : int64 array, shape (n_sources, 2)
            Per source, the cells it marks in the window and those of them on
            valid data (for the checks of :meth:`check`).
        """
        rows, cols = grid.shape
        h, w = row1 - row0, col1 - col0
        inner = halo[1:-1, 1:-1]
        valid = ~np.isnan(inner)
        mask = np.zeros((h, w), dtype=bool)
        counts = np.zeros((len(self.kinds), 2), dtype=np.int64)
        for k, kind in enumerate(self.kinds):
            if kind[0] == "edge":
                part = np.zeros((h, w), dtype=bool)
                if row0 == 0:
                    part[0, :] = True
                if row1 == rows:
                    part[-1, :] = True
                if col0 == 0:
                    part[:, 0] = True
                if col1 == cols:
                    part[:, -1] = True
            elif kind[0] == "nodata":
                gap = np.isnan(halo)
                # Cells beyond the grid's edge are not nodata.
                if row0 == 0:
                    gap[0, :] = False
                if row1 == rows:
                    gap[-1, :] = False
                if col0 == 0:
                    gap[:, 0] = False
                if col1 == cols:
                    gap[:, -1] = False
                part = np.zeros((h, w), dtype=bool)
                for dr, dc in neighbour_offsets(self.connectivity):
                    part |= gap[1 + dr : 1 + dr + h, 1 + dc : 1 + dc + w]
            elif kind[0] == "shapes":
                t = grid.transform
                transform = Affine(t.a, t.b, t.c + t.a * col0 + t.b * row0,
                                   t.d, t.e, t.f + t.d * col0 + t.e * row0)
                part = rasterize_parts(kind[1], kind[2], (h, w), transform).astype(bool)
            else:
                path, nodata = kind[1], kind[2]
                part = _mask_window(path, nodata, row0, row1, col0, col1)
            counts[k, 0] = np.count_nonzero(part)
            part &= valid
            counts[k, 1] = np.count_nonzero(part)
            mask |= part
        return mask, counts

    def check(self, counts: np.ndarray, *, all_valid: bool) -> None:
        """Raise as :func:`build_outlets` would from the summed window ``counts``.

        Raises
        ------
        InvalidOutlets
            A GeoJSON or mask source marks no cell, or only nodata cells; or the
            sources together mark no valid cell.
        """
        for k, kind in enumerate(self.kinds):
            if kind[0] in ("shapes", "mask"):
                if counts[k, 0] == 0:
                    raise InvalidOutlets(self._messages[k][0])
                if counts[k, 1] == 0:
                    raise InvalidOutlets(self._messages[k][1])
        if not counts[:, 1].any():
            raise InvalidOutlets(empty_text(self.sources, all_valid))


def plan_outlets(grid: Any, specs: Any = ("edge",), *, connectivity: int = 8) -> OutletPlan:
    """Check outlet sources against a grid and prepare them for :meth:`OutletPlan.window`.

    Accepts what :func:`build_outlets` accepts and makes the checks that need no
    cells up front: GeoJSON is read, reprojected and split into parts; a mask
    raster's bands, grid and CRS are checked. The checks that need cells (a
    source that marks nothing) are :meth:`OutletPlan.check`, on the counts the
    windows return.

    Parameters
    ----------
    grid : DEMGrid or DEM
    specs : sequence
        As for :func:`build_outlets`.
    connectivity : {8, 4}

    Raises
    ------
    InvalidOutlets, InvalidParameter
        As :func:`build_outlets`, for what can be told without the cells.
    """
    items = outlet_specs(specs, connectivity)
    sources, kinds, messages = [], [], []
    half = 0.5 * max(grid.cell_size)
    for spec in items:
        label, kind = _plan_source(grid, spec)
        sources.append(label)
        if kind[0] == "geojson":
            text, geometries = kind[1], kind[2]
            centred, touched = burn_parts(geometries, half)
            kinds.append(("shapes", tuple(centred), tuple(touched)))
            messages.append((geojson_misses_message(text, geometries, grid),
                             geojson_nodata_message(text)))
        elif kind[0] == "mask":
            kinds.append(kind)
            name = os.path.basename(kind[1])
            messages.append((mask_empty_message(name), mask_nodata_message(name)))
        else:
            kinds.append(kind)
            messages.append(())
    return OutletPlan(sources=tuple(sources), kinds=tuple(kinds), connectivity=int(connectivity),
                      _messages=tuple(messages))


def _plan_source(grid: Any, spec: Any) -> tuple[str, tuple]:
    """Like :func:`_one_source`, without marking cells."""
    if isinstance(spec, dict):
        label, geometries = geojson_geometries(grid, spec)
        return "GeoJSON object", ("geojson", label, geometries)
    if isinstance(spec, bytes):
        spec = os.fsdecode(spec)
    if isinstance(spec, os.PathLike):
        spec = os.fspath(spec)
    if not isinstance(spec, str):
        raise InvalidOutlets(
            f"unknown outlet source {spec!r}; use 'edge', 'nodata', a GeoJSON file or a mask raster"
        )
    key = spec.strip().lower()
    if key == "edge":
        return "edge", ("edge",)
    if key == "nodata":
        return "nodata", ("nodata",)
    if spec.lstrip().startswith("{"):
        label, geometries = geojson_geometries(grid, spec)
        return "GeoJSON text", ("geojson", label, geometries)
    ext = os.path.splitext(key)[1]
    name = os.path.basename(spec)
    if ext in GEOJSON_EXTENSIONS:
        label, geometries = geojson_geometries(grid, spec)
        return name, ("geojson", label, geometries)
    if ext in RASTER_EXTENSIONS:
        path, name = mask_path(spec)
        with open_local_raster(path, InvalidOutlets, "the outlet mask") as src:
            nodata = check_mask_raster(src, grid, name)
        return name, ("mask", path, nodata)
    # Same refusals and message as build_outlets.
    return one_source_refusal(spec, ext, name)



def _mask_window(path: str, nodata: float | None, row0: int, row1: int, col0: int,
                 col1: int) -> np.ndarray:
    """Cells a mask raster (already checked against the grid) marks in one window."""
    window = rasterio.windows.Window(col0, row0, col1 - col0, row1 - row0)
    with open_local_raster(path, InvalidOutlets, "the outlet mask") as src:
        try:
            data = src.read(1, window=window)
            hidden = src.read_masks(1, window=window) == 0
        except (RasterioError, CPLE_BaseError, OSError) as exc:
            raise InvalidOutlets(
                f"the outlet mask '{os.path.basename(path)}' opens but its pixels cannot be "
                f"read ({gdal_reason(exc, path)}); export it again"
            ) from None
    return marked_cells(data, hidden, nodata)
