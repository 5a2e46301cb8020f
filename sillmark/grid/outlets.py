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
import math
import os
from collections.abc import Sequence
from typing import Any

import numpy as np
from rasterio._err import CPLE_BaseError
from rasterio.errors import RasterioError

from sillmark.errors import InvalidOutlets, InvalidParameter
from sillmark.grid.dem import DEM
from sillmark.grid.georeference import horizontal_part, to_pyproj
from sillmark.grid.outlet_geojson import (
    burn,
    collect_geometries,
    extent_text,
    grid_difference,
    load_geojson,
    outlets_crs,
    reproject,
)
from sillmark.grid.raster_files import (
    gdal_reason,
    local_file,
    open_local_raster,
)

__all__ = [
    "Outlets",
    "build_outlets",
    "edge_outlets",
    "nodata_outlets",
    "outlets_from_geojson",
    "outlets_from_raster",
]

GEOJSON_EXTENSIONS = (".geojson", ".json")
RASTER_EXTENSIONS = (".tif", ".tiff", ".img")



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
    offsets = neighbour_offsets(connectivity)
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
    label, geometries = geojson_geometries(dem, source)
    burned = burn(geometries, dem)
    if not burned.any():
        raise InvalidOutlets(geojson_misses_message(label, geometries, dem))
    mask = burned & dem.valid
    if not mask.any():
        raise InvalidOutlets(geojson_nodata_message(label))
    return mask


def geojson_geometries(dem: Any, source: Any) -> tuple[str, list[Any]]:
    """The label and the geometries of a GeoJSON source, in the DEM's CRS."""
    obj, label = load_geojson(source)
    geometries = collect_geometries(obj, label)
    src_crs = outlets_crs(obj, label)
    return label, reproject(geometries, src_crs, dem, label)


def geojson_misses_message(label: str, geometries: list[Any], dem: Any) -> str:
    return (
        f"no outlet cells: {label} misses the grid ({extent_text(geometries, dem)}); "
        "check its CRS, use --outlet edge, or draw the water body inside the DEM"
    )


def geojson_nodata_message(label: str) -> str:
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
    path, name = mask_path(path)
    with open_local_raster(path, InvalidOutlets, "the outlet mask") as src:
        nodata = check_mask_raster(src, dem, name)
        try:
            data = src.read(1)
            hidden = src.read_masks(1) == 0
        except (RasterioError, CPLE_BaseError, OSError) as exc:
            raise InvalidOutlets(
                f"the outlet mask '{name}' opens but its pixels cannot be read "
                f"({gdal_reason(exc, path)}); export it again"
            ) from None
    marked = marked_cells(data, hidden, nodata)
    if not marked.any():
        raise InvalidOutlets(mask_empty_message(name))
    mask = marked & dem.valid
    if not mask.any():
        raise InvalidOutlets(mask_nodata_message(name))
    return mask


def mask_path(path: str | os.PathLike[str]) -> tuple[str, str]:
    path = local_file(path, InvalidOutlets, "the outlet mask")
    return path, os.path.basename(path)


def mask_empty_message(name: str) -> str:
    return (
        f"no outlet cells: the outlet mask '{name}' marks no cell (all zero or nodata); "
        "mark the water body with non-zero values, or use --outlet edge"
    )


def mask_nodata_message(name: str) -> str:
    return (
        f"no outlet cells: the outlet mask '{name}' marks only nodata cells of the DEM; "
        "mark cells with elevations, or use --outlet nodata"
    )


def marked_cells(data: np.ndarray, hidden: np.ndarray, nodata: float | None) -> np.ndarray:
    """Cells a mask raster marks: non-zero, finite, not its nodata, not hidden."""
    marked = data != 0
    if data.dtype.kind == "f":
        marked &= np.isfinite(data)
    if nodata is not None and not math.isnan(nodata):
        marked &= data != nodata
    marked &= ~hidden
    return marked


def check_mask_raster(src: Any, dem: Any, name: str) -> float | None:
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
    difference = grid_difference(src.transform, dem)
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
    items = outlet_specs(specs, connectivity)
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
    return one_source_refusal(spec, ext, name)


def _empty_message(dem: DEM, sources: Sequence[str]) -> str:
    return empty_text(sources, bool(dem.valid.all()))


def empty_text(sources: Sequence[str], all_valid: bool) -> str:
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


def neighbour_offsets(connectivity: Any) -> tuple[tuple[int, int], ...]:
    if isinstance(connectivity, bool) or connectivity not in (4, 8):
        raise InvalidParameter(
            f"connectivity must be 8 (edges and corners) or 4 (edges only), got {connectivity!r}"
        )
    return _OFFSETS_8 if connectivity == 8 else _OFFSETS_4


# ---------------------------------------------------------------------------
# window by window (the tiled engine)












# ---------------------------------------------------------------------------
# GeoJSON

def one_source_refusal(spec: str, ext: str, name: str):
    if ext == ".vrt":
        raise InvalidOutlets(
            f"the outlet mask '{name}' is a GDAL virtual raster (VRT), which can point to "
            "other or remote files; give a GeoTIFF mask"
        )
    raise InvalidOutlets(
        f"unknown outlet source {spec!r}; use 'edge', 'nodata', a GeoJSON file (.geojson, "
        ".json) or a mask raster (.tif, .tiff, .img)"
    )


def outlet_specs(specs: Any, connectivity: Any) -> list:
    """The outlet sources as a list (one source may be given alone), after checking
    the connectivity; :class:`InvalidOutlets` for something that is no list, or an empty one."""
    neighbour_offsets(connectivity)
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
    return items
