"""Outlet cells: where water enters or leaves the site.

The Priority-Flood starts from a set of outlet cells. They come from the DEM
itself (its edge, or the valid cells next to nodata such as open sea or a masked
lake), from GeoJSON points, lines or polygons the user draws (a river channel, a
lake, a culvert), or from a mask raster on the DEM's grid. :func:`build_outlets`
combines any of these. Outlets are only ever valid (non-nodata) cells.
"""

from __future__ import annotations

import dataclasses
import functools
import json
import math
import os
from collections.abc import Iterable, Sequence
from typing import Any

import numpy as np
import pyproj
import rasterio.windows
import shapely
from affine import Affine
from rasterio._err import CPLE_BaseError
from rasterio.errors import RasterioError
from rasterio.features import rasterize
from shapely.geometry import shape as shapely_shape

from sillmark.errors import InvalidOutlets, InvalidParameter
from sillmark.grid.dem import DEM
from sillmark.grid.geojson import geojson_crs
from sillmark.grid.georeference import horizontal_part, to_pyproj
from sillmark.grid.raster_files import (
    crs_name_refusal,
    gdal_reason,
    local_file,
    open_local_raster,
)

__all__ = [
    "OutletPlan",
    "Outlets",
    "build_outlets",
    "edge_outlets",
    "nodata_outlets",
    "outlets_from_geojson",
    "outlets_from_raster",
    "plan_outlets",
]

GEOJSON_EXTENSIONS = (".geojson", ".json")
RASTER_EXTENSIONS = (".tif", ".tiff", ".img")

_POINT_TYPES = {"Point", "MultiPoint"}
_LINE_TYPES = {"LineString", "MultiLineString"}
_POLYGON_TYPES = {"Polygon", "MultiPolygon"}
_GEOMETRY_TYPES = _POINT_TYPES | _LINE_TYPES | _POLYGON_TYPES | {"GeometryCollection"}
_ACCEPTED_GEOJSON = "a GeoJSON FeatureCollection, Feature or geometry of points, lines or polygons"

# Most vertices a reprojected line or ring is densified to (see _densify_step).
_MAX_DENSIFIED_VERTICES = 1_000_000

# Neighbour offsets (row, col).
_OFFSETS_4 = ((-1, 0), (0, -1), (0, 1), (1, 0))
_OFFSETS_8 = ((-1, -1), (-1, 0), (-1, 1), (0, -1), (0, 1), (1, -1), (1, 0), (1, 1))


@dataclasses.dataclass(frozen=True, eq=False)
class Outlets:
    """The outlet cells of a site and what made them.

    Attributes
    ----------
    mask : numpy.ndarray
        bool, the DEM's shape, read-only; True on valid outlet cells only.
    sources : tuple of str
        What made them, in order, e.g. ``("edge", "nodata", "river.geojson")``.
    """

    mask: np.ndarray
    sources: tuple[str, ...]

    def __post_init__(self) -> None:
        if not isinstance(self.mask, np.ndarray) or self.mask.dtype != bool or self.mask.ndim != 2:
            raise InvalidOutlets("Outlets.mask must be a 2-D bool numpy array")
        mask = self.mask
        if mask.flags.writeable:
            mask = mask.view()
            mask.flags.writeable = False
            object.__setattr__(self, "mask", mask)
        object.__setattr__(self, "sources", tuple(str(s) for s in self.sources))

    @functools.cached_property
    def count(self) -> int:
        """Number of outlet cells."""
        return int(np.count_nonzero(self.mask))


# ---------------------------------------------------------------------------
# outlets from the DEM itself


def edge_outlets(dem: DEM) -> np.ndarray:
    """Valid cells on the perimeter of the grid (first and last row and column).

    These are exactly the valid cells with a 4- or 8-neighbour outside the grid.

    Parameters
    ----------
    dem : DEM

    Returns
    -------
    numpy.ndarray of bool
        The DEM's shape; may be all False if the whole perimeter is nodata.

    Examples
    --------
    >>> from sillmark.grid.dem import dem_from_array
    >>> edge_outlets(dem_from_array(np.zeros((3, 3)))).astype(int)
    array([[1, 1, 1],
           [1, 0, 1],
           [1, 1, 1]])
    """
    mask = np.zeros(dem.shape, dtype=bool)
    mask[0, :] = mask[-1, :] = True
    mask[:, 0] = mask[:, -1] = True
    return mask & dem.valid


def nodata_outlets(dem: DEM, *, connectivity: int = 8) -> np.ndarray:
    """Valid cells with a nodata neighbour (open sea, a masked lake, a data gap).

    Parameters
    ----------
    dem : DEM
    connectivity : {8, 4}
        8: a nodata cell sharing an edge or a corner counts; 4: edges only.
        Cells outside the grid are not nodata (see :func:`edge_outlets`).

    Returns
    -------
    numpy.ndarray of bool
        The DEM's shape; all False when the DEM has no nodata.

    Examples
    --------
    >>> from sillmark.grid.dem import dem_from_array
    >>> z = np.zeros((3, 3)); z[0, 0] = np.nan
    >>> nodata_outlets(dem_from_array(z), connectivity=4).astype(int)
    array([[0, 1, 0],
           [1, 0, 0],
           [0, 0, 0]])
    """
    offsets = _offsets(connectivity)
    valid = dem.valid
    padded = np.pad(~valid, 1, constant_values=False)
    rows, cols = dem.shape
    near = np.zeros(dem.shape, dtype=bool)
    for dr, dc in offsets:
        near |= padded[1 + dr : 1 + dr + rows, 1 + dc : 1 + dc + cols]
    return near & valid


# ---------------------------------------------------------------------------
# outlets the user draws


def outlets_from_geojson(dem: DEM, source: Any) -> np.ndarray:
    """Cells under GeoJSON points, lines or polygons.

    Parameters
    ----------
    dem : DEM
    source : str, os.PathLike or dict
        A path to a ``.geojson``/``.json`` file, GeoJSON text, or a parsed
        GeoJSON object: a FeatureCollection, a Feature or a bare geometry.
        Coordinates are WGS 84 longitude/latitude (RFC 7946) unless a legacy
        top-level ``"crs"`` member names another CRS, e.g.
        ``{"type": "name", "properties": {"name": "EPSG:32633"}}``.

    Returns
    -------
    numpy.ndarray of bool
        The DEM's shape; True on valid cells only.

    Raises
    ------
    InvalidOutlets
        Not JSON, not GeoJSON, no geometries, an unsupported geometry type or
        ``crs`` member, geometries that miss the grid, or that cover only
        nodata cells.

    Notes
    -----
    Geometries are reprojected to the DEM's CRS (pyproj, axis order x/lon
    first as GeoJSON writes it) after densifying their edges to about half a
    cell, so straight edges in the source CRS stay in place on the grid. Then
    they are burned onto the grid with :func:`rasterio.features.rasterize`:

    - points and lines mark every cell they touch;
    - polygons mark the cells whose centre lies inside, and in addition every
      cell touched by the parts of the polygon narrower than one cell (found
      by a morphological opening), so a channel thinner than a cell still
      gives a continuous line of outlet cells while a lake is not widened.

    A source that marks no valid cell is an error on its own, even when other
    outlets are combined with it: it nearly always means a wrong CRS.
    """
    label, geometries = _geojson_geometries(dem, source)
    burned = _burn(geometries, dem)
    if not burned.any():
        raise InvalidOutlets(_geojson_misses_message(label, geometries, dem))
    mask = burned & dem.valid
    if not mask.any():
        raise InvalidOutlets(_geojson_nodata_message(label))
    return mask


def _geojson_geometries(dem: Any, source: Any) -> tuple[str, list[Any]]:
    """The label and the geometries of a GeoJSON source, in the DEM's CRS."""
    obj, label = _load_geojson(source)
    geometries = _collect_geometries(obj, label)
    src_crs = _geojson_crs(obj, label)
    return label, _reproject(geometries, src_crs, dem, label)


def _geojson_misses_message(label: str, geometries: list[Any], dem: Any) -> str:
    return (
        f"no outlet cells: {label} misses the grid ({_extent_text(geometries, dem)}); "
        "check its CRS, use --outlet edge, or draw the water body inside the DEM"
    )


def _geojson_nodata_message(label: str) -> str:
    return (
        f"no outlet cells: {label} covers only nodata cells of the DEM; draw the water "
        "body over cells with elevations, or use --outlet nodata"
    )


def outlets_from_raster(dem: DEM, path: str | os.PathLike[str]) -> np.ndarray:
    """Cells a mask raster marks: non-zero, not nodata, on the DEM's own grid.

    Parameters
    ----------
    dem : DEM
    path : str or os.PathLike
        A local single-band raster (GeoTIFF, .img) with exactly the DEM's shape
        and transform (and CRS, if it has one). VRT files are refused.

    Returns
    -------
    numpy.ndarray of bool
        The DEM's shape; True on valid cells only.

    Raises
    ------
    InvalidOutlets
        Unreadable file, several bands, a different grid or CRS, or no marked
        valid cell.
    """
    path, name = _mask_path(path)
    with open_local_raster(path, InvalidOutlets, "the outlet mask") as src:
        nodata = _check_mask_raster(src, dem, name)
        try:
            data = src.read(1)
            hidden = src.read_masks(1) == 0
        except (RasterioError, CPLE_BaseError, OSError) as exc:
            raise InvalidOutlets(
                f"the outlet mask '{name}' opens but its pixels cannot be read "
                f"({gdal_reason(exc, path)}); export it again"
            ) from None
    marked = _marked(data, hidden, nodata)
    if not marked.any():
        raise InvalidOutlets(_mask_empty_message(name))
    mask = marked & dem.valid
    if not mask.any():
        raise InvalidOutlets(_mask_nodata_message(name))
    return mask


def _mask_path(path: str | os.PathLike[str]) -> tuple[str, str]:
    path = local_file(path, InvalidOutlets, "the outlet mask")
    return path, os.path.basename(path)


def _mask_empty_message(name: str) -> str:
    return (
        f"no outlet cells: the outlet mask '{name}' marks no cell (all zero or nodata); "
        "mark the water body with non-zero values, or use --outlet edge"
    )


def _mask_nodata_message(name: str) -> str:
    return (
        f"no outlet cells: the outlet mask '{name}' marks only nodata cells of the DEM; "
        "mark cells with elevations, or use --outlet nodata"
    )


def _marked(data: np.ndarray, hidden: np.ndarray, nodata: float | None) -> np.ndarray:
    """Cells a mask raster marks: non-zero, finite, not its nodata, not hidden."""
    marked = data != 0
    if data.dtype.kind == "f":
        marked &= np.isfinite(data)
    if nodata is not None and not math.isnan(nodata):
        marked &= data != nodata
    marked &= ~hidden
    return marked


def _check_mask_raster(src: Any, dem: Any, name: str) -> float | None:
    """Checks of an open mask raster against the DEM's grid; returns its nodata."""
    if src.count != 1:
        raise InvalidOutlets(
            f"the outlet mask '{name}' has {src.count} bands; give a single-band mask "
            "(non-zero = outlet)"
        )
    if (src.height, src.width) != dem.shape:
        raise InvalidOutlets(
            f"the outlet mask '{name}' is {src.height} × {src.width} cells but the DEM is "
            f"{dem.rows} × {dem.cols}; give a mask on the DEM's own grid"
        )
    difference = _grid_difference(src.transform, dem)
    if difference:
        raise InvalidOutlets(
            f"the outlet mask '{name}' is not on the DEM's grid ({difference}); "
            "give a mask with the DEM's cell size and origin"
        )
    if src.crs:
        mask_h = horizontal_part(to_pyproj(src.crs), f"the outlet mask '{name}'")
        if not mask_h.equals(dem.horizontal_crs, ignore_axis_order=True):
            raise InvalidOutlets(
                f"the outlet mask '{name}' is in {mask_h.name!r} but the DEM is in "
                f"{dem.horizontal_crs.name!r}; give a mask in the DEM's CRS"
            )
    dtype = np.dtype(src.dtypes[0])
    if dtype.kind not in "biuf":
        raise InvalidOutlets(
            f"the outlet mask '{name}' holds {dtype.name} values; give integers (non-zero = outlet)"
        )
    return src.nodatavals[0]


# ---------------------------------------------------------------------------
# combinations


def build_outlets(
    dem: DEM, specs: Any = ("edge",), *, connectivity: int = 8
) -> Outlets:
    """Combine outlet sources into one :class:`Outlets`.

    Parameters
    ----------
    dem : DEM
    specs : sequence
        Each item is ``"edge"``, ``"nodata"``, a path to a GeoJSON file
        (``.geojson``, ``.json``) or a mask raster (``.tif``, ``.tiff``,
        ``.img``), GeoJSON text, or a parsed GeoJSON dict. A single item may be
        given on its own. Default: the DEM edge.
    connectivity : {8, 4}
        Neighbourhood for ``"nodata"`` adjacency.

    Returns
    -------
    Outlets

    Raises
    ------
    InvalidOutlets
        An unknown or unusable source, or no outlet cell at all; the message
        names the sources used and what to try.
    InvalidParameter
        ``connectivity`` is not 4 or 8.

    Examples
    --------
    >>> from sillmark.grid.dem import dem_from_array
    >>> z = np.zeros((4, 4)); z[1:3, 1:3] = np.nan
    >>> out = build_outlets(dem_from_array(z), ["edge", "nodata"])
    >>> out.count, out.sources
    (12, ('edge', 'nodata'))
    """
    _offsets(connectivity)
    if isinstance(specs, (str, bytes, os.PathLike, dict)):
        specs = (specs,)
    try:
        items = list(specs)
    except TypeError:
        raise InvalidOutlets(
            f"outlets must be a list of sources, got {type(specs).__name__}; "
            "e.g. ['edge'] or ['nodata', 'river.geojson']"
        ) from None
    if not items:
        raise InvalidOutlets(
            "no outlet sources given; use 'edge', 'nodata', a GeoJSON file or a mask raster"
        )
    mask = np.zeros(dem.shape, dtype=bool)
    sources: list[str] = []
    for spec in items:
        label, part = _one_source(dem, spec, connectivity)
        mask |= part
        sources.append(label)
    if not mask.any():
        raise InvalidOutlets(_empty_message(dem, sources))
    return Outlets(mask=mask, sources=tuple(sources))


def _one_source(dem: DEM, spec: Any, connectivity: int) -> tuple[str, np.ndarray]:
    if isinstance(spec, dict):
        return "GeoJSON object", outlets_from_geojson(dem, spec)
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
        return "edge", edge_outlets(dem)
    if key == "nodata":
        return "nodata", nodata_outlets(dem, connectivity=connectivity)
    if spec.lstrip().startswith("{"):
        return "GeoJSON text", outlets_from_geojson(dem, spec)
    ext = os.path.splitext(key)[1]
    name = os.path.basename(spec)
    if ext in GEOJSON_EXTENSIONS:
        return name, outlets_from_geojson(dem, spec)
    if ext in RASTER_EXTENSIONS:
        return name, outlets_from_raster(dem, spec)
    return _one_source_refusal(spec, ext, name)


def _empty_message(dem: DEM, sources: Sequence[str]) -> str:
    return _empty_text(sources, bool(dem.valid.all()))


def _empty_text(sources: Sequence[str], all_valid: bool) -> str:
    used = ", ".join(f"'{s}'" for s in sources)
    reasons = []
    if "edge" in sources:
        reasons.append("every cell on the DEM edge is nodata")
    if "nodata" in sources:
        reasons.append("the DEM has no nodata" if all_valid else "no valid cell touches nodata")
    tries = []
    if "edge" not in sources:
        tries.append("use --outlet edge")
    if "nodata" not in sources and not all_valid:
        tries.append("use --outlet nodata")
    tries.append("draw the water body inside the DEM")
    because = f" ({'; '.join(reasons)})" if reasons else ""
    return f"no outlet cells from {used}{because}; " + ", or ".join(tries)


def _offsets(connectivity: Any) -> tuple[tuple[int, int], ...]:
    if isinstance(connectivity, bool) or connectivity not in (4, 8):
        raise InvalidParameter(
            f"connectivity must be 8 (edges and corners) or 4 (edges only), got {connectivity!r}"
        )
    return _OFFSETS_8 if connectivity == 8 else _OFFSETS_4


# ---------------------------------------------------------------------------
# window by window (the tiled engine)


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
                for dr, dc in _offsets(self.connectivity):
                    part |= gap[1 + dr : 1 + dr + h, 1 + dc : 1 + dc + w]
            elif kind[0] == "shapes":
                t = grid.transform
                transform = Affine(t.a, t.b, t.c + t.a * col0 + t.b * row0,
                                   t.d, t.e, t.f + t.d * col0 + t.e * row0)
                part = _rasterize_parts(kind[1], kind[2], (h, w), transform).astype(bool)
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
            raise InvalidOutlets(_empty_text(self.sources, all_valid))


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
    _offsets(connectivity)
    if isinstance(specs, (str, bytes, os.PathLike, dict)):
        specs = (specs,)
    try:
        items = list(specs)
    except TypeError:
        raise InvalidOutlets(
            f"outlets must be a list of sources, got {type(specs).__name__}; "
            "e.g. ['edge'] or ['nodata', 'river.geojson']"
        ) from None
    if not items:
        raise InvalidOutlets(
            "no outlet sources given; use 'edge', 'nodata', a GeoJSON file or a mask raster"
        )
    sources, kinds, messages = [], [], []
    half = 0.5 * max(grid.cell_size)
    for spec in items:
        label, kind = _plan_source(grid, spec)
        sources.append(label)
        if kind[0] == "geojson":
            text, geometries = kind[1], kind[2]
            centred, touched = _burn_parts(geometries, half)
            kinds.append(("shapes", tuple(centred), tuple(touched)))
            messages.append((_geojson_misses_message(text, geometries, grid),
                             _geojson_nodata_message(text)))
        elif kind[0] == "mask":
            kinds.append(kind)
            name = os.path.basename(kind[1])
            messages.append((_mask_empty_message(name), _mask_nodata_message(name)))
        else:
            kinds.append(kind)
            messages.append(())
    return OutletPlan(sources=tuple(sources), kinds=tuple(kinds), connectivity=int(connectivity),
                      _messages=tuple(messages))


def _plan_source(grid: Any, spec: Any) -> tuple[str, tuple]:
    """Like :func:`_one_source`, without marking cells."""
    if isinstance(spec, dict):
        label, geometries = _geojson_geometries(grid, spec)
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
        label, geometries = _geojson_geometries(grid, spec)
        return "GeoJSON text", ("geojson", label, geometries)
    ext = os.path.splitext(key)[1]
    name = os.path.basename(spec)
    if ext in GEOJSON_EXTENSIONS:
        label, geometries = _geojson_geometries(grid, spec)
        return name, ("geojson", label, geometries)
    if ext in RASTER_EXTENSIONS:
        path, name = _mask_path(spec)
        with open_local_raster(path, InvalidOutlets, "the outlet mask") as src:
            nodata = _check_mask_raster(src, grid, name)
        return name, ("mask", path, nodata)
    # Same refusals and message as build_outlets.
    return _one_source_refusal(spec, ext, name)


def _one_source_refusal(spec: str, ext: str, name: str):
    if ext == ".vrt":
        raise InvalidOutlets(
            f"the outlet mask '{name}' is a GDAL virtual raster (VRT), which can point to "
            "other or remote files; give a GeoTIFF mask"
        )
    raise InvalidOutlets(
        f"unknown outlet source {spec!r}; use 'edge', 'nodata', a GeoJSON file (.geojson, "
        ".json) or a mask raster (.tif, .tiff, .img)"
    )


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
    return _marked(data, hidden, nodata)


# ---------------------------------------------------------------------------
# GeoJSON


def _load_geojson(source: Any) -> tuple[Any, str]:
    if isinstance(source, dict):
        return source, "the GeoJSON object"
    if isinstance(source, bytes):
        source = os.fsdecode(source)
    if isinstance(source, str) and source.lstrip().startswith(("{", "[")):
        return _parse_json(source, "the GeoJSON text"), "the GeoJSON text"
    if isinstance(source, (str, os.PathLike)):
        path = local_file(source, InvalidOutlets, "the GeoJSON file")
        label = f"the GeoJSON '{os.path.basename(path)}'"
        try:
            with open(path, "rb") as fh:
                data = fh.read()
            text = data.decode("utf-8-sig")
        except UnicodeDecodeError:
            raise InvalidOutlets(
                f"{label} is not UTF-8 text; give {_ACCEPTED_GEOJSON} (RFC 7946 files are UTF-8)"
            ) from None
        except OSError as exc:
            raise InvalidOutlets(f"{label} cannot be read ({exc.strerror}); check the file") from None
        return _parse_json(text, label), label
    raise InvalidOutlets(
        f"GeoJSON outlets must be a file path, GeoJSON text or a dict, got {type(source).__name__}"
    )


def _parse_json(text: str, label: str) -> Any:
    try:
        return json.loads(text)
    except json.JSONDecodeError as exc:
        raise InvalidOutlets(
            f"{label} is not valid JSON ({exc.msg} at line {exc.lineno} column {exc.colno}); "
            f"give {_ACCEPTED_GEOJSON}"
        ) from None
    except RecursionError:
        raise InvalidOutlets(f"{label} is nested too deeply to read; give {_ACCEPTED_GEOJSON}") from None


def _collect_geometries(obj: Any, label: str) -> list[Any]:
    """Shapely geometries (2-D, non-empty, single parts) from a GeoJSON object."""
    if not isinstance(obj, dict):
        raise InvalidOutlets(
            f"{label} is JSON but not a GeoJSON object (found a {type(obj).__name__}); give {_ACCEPTED_GEOJSON}"
        )
    kind = obj.get("type")
    if kind == "FeatureCollection":
        features = obj.get("features")
        if not isinstance(features, list):
            raise InvalidOutlets(f"{label} is a FeatureCollection without a 'features' list")
        geoms = [_feature_geometry(f, label, i) for i, f in enumerate(features)]
    elif kind == "Feature":
        geoms = [_feature_geometry(obj, label, 0)]
    elif kind in _GEOMETRY_TYPES:
        geoms = [_geometry(obj, label, "its geometry")]
    elif isinstance(kind, str):
        raise InvalidOutlets(
            f"{label} has unsupported type '{kind}'; accepted: FeatureCollection, Feature, "
            "Point, MultiPoint, LineString, MultiLineString, Polygon, MultiPolygon, "
            "GeometryCollection"
        )
    else:
        raise InvalidOutlets(f"{label} has no 'type' member; give {_ACCEPTED_GEOJSON}")
    parts = [p for g in geoms if g is not None for p in _single_parts(g)]
    if not parts:
        raise InvalidOutlets(
            f"{label} has no geometries; draw at least one point, line or polygon of the water body"
        )
    return parts


def _feature_geometry(feature: Any, label: str, index: int) -> Any:
    if not isinstance(feature, dict) or feature.get("type") != "Feature":
        raise InvalidOutlets(f"{label}: item {index} of 'features' is not a GeoJSON Feature")
    geometry = feature.get("geometry")
    if geometry is None:
        return None  # RFC 7946 allows unlocated features; they mark nothing
    return _geometry(geometry, label, f"feature {index}")


def _geometry(obj: Any, label: str, where: str) -> Any:
    if not isinstance(obj, dict):
        raise InvalidOutlets(f"{label}: the geometry of {where} is not a GeoJSON object")
    kind = obj.get("type")
    if kind not in _GEOMETRY_TYPES:
        raise InvalidOutlets(
            f"{label}: {where} has unsupported geometry type {kind!r}; accepted: Point, "
            "MultiPoint, LineString, MultiLineString, Polygon, MultiPolygon, GeometryCollection"
        )
    try:
        geom = shapely_shape(obj)
    except (ValueError, TypeError, KeyError, IndexError, AttributeError, shapely.errors.ShapelyError) as exc:
        raise InvalidOutlets(
            f"{label}: the {kind} of {where} has malformed coordinates ({exc}); "
            "give [x, y] number pairs as RFC 7946 describes"
        ) from None
    return shapely.force_2d(geom)


def _single_parts(geom: Any) -> list[Any]:
    if geom.is_empty:
        return []
    if isinstance(geom, shapely.GeometryCollection) or geom.geom_type.startswith("Multi"):
        return [p for sub in shapely.get_parts(geom) for p in _single_parts(sub)]
    return [geom]


def _geojson_crs(obj: dict, label: str) -> pyproj.CRS:
    refusal = crs_name_refusal(obj, label)
    if refusal is not None:
        raise InvalidOutlets(refusal)
    return geojson_crs(obj, label, InvalidOutlets)


def _reproject(geoms: list[Any], src: pyproj.CRS, dem: DEM, label: str) -> list[Any]:
    dst = dem.horizontal_crs
    if src.equals(dst, ignore_axis_order=True):
        return geoms
    try:
        forward = pyproj.Transformer.from_crs(src, dst, always_xy=True)
        backward = pyproj.Transformer.from_crs(dst, src, always_xy=True)
    except pyproj.exceptions.ProjError as exc:
        raise InvalidOutlets(
            f"{label} cannot be transformed from {src.name!r} to the DEM's CRS ({exc})"
        ) from None
    step = _densify_step(backward, dem)

    def move(xy: np.ndarray) -> np.ndarray:
        x, y = forward.transform(xy[:, 0], xy[:, 1], errcheck=False)
        return np.column_stack([x, y])

    out = []
    for k, g in enumerate(geoms):
        if step is not None and g.geom_type != "Point":
            vertices = g.length / step
            local = step if vertices <= _MAX_DENSIFIED_VERTICES else g.length / _MAX_DENSIFIED_VERTICES
            g = shapely.segmentize(g, local)
        moved = shapely.transform(g, move)
        finite = np.isfinite(shapely.get_coordinates(moved)).all(axis=1)
        if finite.all():
            out.append(moved)
        elif finite.any():
            raise InvalidOutlets(
                f"{label}: part of geometry {k} lies where the DEM's CRS "
                f"({dst.name}) is not defined; clip the geometry to the site"
            )
        # else: no vertex can be placed in the DEM's CRS, so it lies far off the grid
    return out


def _densify_step(backward: pyproj.Transformer, dem: DEM) -> float | None:
    """Half a DEM cell, measured in the source CRS at the DEM's centre."""
    left, bottom, right, top = dem.bounds
    cx, cy = (left + right) / 2, (bottom + top) / 2
    dx, dy = dem.cell_size
    x, y = backward.transform(np.array([cx, cx + dx, cx]), np.array([cy, cy, cy + dy]), errcheck=False)
    d1 = math.hypot(x[1] - x[0], y[1] - y[0])
    d2 = math.hypot(x[2] - x[0], y[2] - y[0])
    step = 0.5 * min(d1, d2)
    return step if math.isfinite(step) and step > 0 else None


def _burn(geoms: Iterable[Any], dem: DEM) -> np.ndarray:
    """Rasterise: points, lines and thin polygon parts by touch, polygons by centre."""
    centred, touched = _burn_parts(geoms, 0.5 * max(dem.cell_size))
    return _rasterize_parts(centred, touched, dem.shape, dem.transform)


def _burn_parts(geoms: Iterable[Any], half: float) -> tuple[list[Any], list[Any]]:
    """The geometries burned by cell centre and those burned by touch (see :func:`_burn`)."""
    touched: list[Any] = []
    centred: list[Any] = []
    for g in geoms:
        if g.geom_type != "Polygon":
            touched.append(g)
            continue
        for part in [g] if g.is_valid else _single_parts(shapely.make_valid(g)):
            if part.geom_type != "Polygon":
                touched.append(part)  # a collapsed ring: a line or a point
                continue
            centred.append(part)
            thin = _thin_parts(part, half)
            if thin is not None:
                touched.append(thin)
    return centred, touched


def _rasterize_parts(centred: list[Any], touched: list[Any], shape: tuple[int, int],
                     transform: Any) -> np.ndarray:
    """Burn the parts of :func:`_burn_parts` on a grid (or a window of one)."""
    out = np.zeros(shape, dtype=np.uint8)
    common = dict(out_shape=shape, transform=transform, out=out, fill=0, dtype="uint8")
    if centred:
        rasterize(((g, 1) for g in centred), all_touched=False, **common)
    if touched:
        rasterize(((g, 1) for g in touched), all_touched=True, **common)
    return out.astype(bool)


def _thin_parts(polygon: Any, half: float) -> Any:
    """The parts of ``polygon`` narrower than ``2 * half`` (None if there are none)."""
    core = polygon.buffer(-half, join_style="mitre").buffer(half, join_style="mitre")
    thin = polygon.difference(core)
    if thin.is_empty:
        return None
    # Drop numerical slivers left along edges the opening reproduced exactly.
    if thin.buffer(-1e-6 * half).is_empty:
        return None
    return thin


def _grid_difference(transform: Any, dem: DEM) -> str:
    t, d = transform, dem.transform
    dx, dy = dem.cell_size
    if abs(t.b) > 0 or abs(t.d) > 0:
        return "the mask's grid is rotated or sheared"
    if abs(t.a - d.a) > 1e-9 * dx or abs(t.e - d.e) > 1e-9 * dy:
        return f"cell size {abs(t.a):.9g} × {abs(t.e):.9g} vs the DEM's {dx:.9g} × {dy:.9g}"
    if abs(t.c - d.c) > 1e-6 * dx or abs(t.f - d.f) > 1e-6 * dy:
        return f"north-west corner ({t.c:.9g}, {t.f:.9g}) vs the DEM's ({d.c:.9g}, {d.f:.9g})"
    return ""


def _extent_text(geoms: list[Any], dem: DEM) -> str:
    left, bottom, right, top = dem.bounds
    dem_text = f"the DEM covers x {left:.10g} to {right:.10g}, y {bottom:.10g} to {top:.10g}"
    if not geoms:
        return f"no geometry can be placed in the DEM's CRS; {dem_text}"
    gx0, gy0, gx1, gy1 = shapely.total_bounds(geoms)
    return f"its extent in the DEM's CRS is x {gx0:.10g} to {gx1:.10g}, y {gy0:.10g} to {gy1:.10g}; {dem_text}"
