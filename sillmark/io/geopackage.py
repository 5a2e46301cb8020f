"""GeoPackage layers for large vector results (points, lines, polygons with attributes).

Written through pyogrio with GDAL's own GPKG driver, in the DEM's horizontal CRS
(no reprojection: coordinates stay exactly as the grid gives them), with the
driver's R*Tree spatial index so a GIS opens a layer of a million outlines and
draws one part of it without reading the rest. The file is written to a
temporary name beside the target and renamed over it (:mod:`sillmark.io.atomic`),
so a crash never leaves half a GeoPackage under a result's name.

Where the caution goes
----------------------
GDAL keeps metadata of a GeoPackage in the ``gpkg_metadata`` and
``gpkg_metadata_reference`` tables the GeoPackage standard defines (the
metadata extension), for the dataset and for each layer. The screening caution
is written there under the key ``caution``, for the dataset and for the layer,
and it also opens the layer's ``description`` in ``gpkg_contents``, which most
GIS show beside the layer name.

References
----------
Open Geospatial Consortium (2021). OGC GeoPackage Encoding Standard, version
1.3.1, OGC 12-128r18 (the spatial index and metadata extensions). Recalled
from memory.
"""

from __future__ import annotations

import os
import re
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np
import pyproj
import shapely

from sillmark import SCREENING_CAUTION, __version__
from sillmark.errors import InvalidParameter, SillmarkError
from sillmark.grid.crs import horizontal_crs
from sillmark.io.atomic import atomic_output

__all__ = ["GeoPackageWriteError", "write_geopackage_layer"]

#: Geometry kinds a layer may hold, by shapely type id, and the layer type each
#: family is written as (single parts are promoted to multi where both occur).
_KINDS = {
    0: "Point", 4: "MultiPoint",
    1: "LineString", 5: "MultiLineString",
    3: "Polygon", 6: "MultiPolygon",
}
_FAMILY = {0: "point", 4: "point", 1: "line", 5: "line", 3: "polygon", 6: "polygon"}
_GEOMETRY_TYPES = frozenset(_KINDS.values())
#: Column names GDAL's GPKG driver uses itself.
_RESERVED = frozenset({"fid", "geom", "geometry"})
_NAME = re.compile(r"^[A-Za-z_][A-Za-z0-9_]{0,62}$")


class GeoPackageWriteError(SillmarkError, OSError):
    """GDAL could not write the GeoPackage (disk full, folder not writable...)."""


def write_geopackage_layer(
    path: str | os.PathLike,
    geometries: Sequence[Any] | np.ndarray,
    attributes: Mapping[str, Any] | None = None,
    *,
    crs: Any,
    layer: str = "features",
    geometry_type: str | None = None,
    description: str = "",
) -> Path:
    """Write one layer of shapes with attributes as a GeoPackage, atomically.

    Parameters
    ----------
    path : str or path-like
        The ``.gpkg`` to write; an existing file of that name is replaced whole
        once the new one is complete.
    geometries : sequence of shapely geometries
        Points, lines or polygons (single or multi parts; one family per
        layer), in the coordinates of ``crs``. None and empty geometries are
        refused.
    attributes : mapping of column name to 1-D array, optional
        One value per geometry. Numbers (NaN becomes null), booleans and
        strings. Names: letters, digits and ``_``, not starting with a digit,
        at most 63 characters, and not ``fid``, ``geom`` or ``geometry``.
    crs : DEM, or anything pyproj accepts, keyword-only
        A DEM (or any grid with ``crs``): its horizontal CRS. Otherwise an
        EPSG code, ``"EPSG:nnnn"``, WKT or a pyproj / rasterio CRS.
    layer : str, keyword-only
        Layer name (same rule as column names).
    geometry_type : str, optional, keyword-only
        The layer's type ("Point", "MultiPolygon", ...). Default: from the
        geometries (the multi type when single and multi parts are mixed);
        required for an empty layer.
    description : str, keyword-only
        What the layer holds; stored after the caution in ``gpkg_contents``.

    Returns
    -------
    pathlib.Path
        ``path``.

    Raises
    ------
    InvalidParameter
        Unusable geometries, attributes, names or CRS, in a one-line message.
    GeoPackageWriteError
        GDAL could not write the file; nothing is left under ``path``'s name
        beyond what was there before.

    Notes
    -----
    Memory: the layer's WKB (about 16 bytes per vertex) besides the inputs.
    The spatial index costs the driver one pass over the features at the end
    of the write.

    Examples
    --------
    >>> import tempfile, pathlib, shapely
    >>> out = pathlib.Path(tempfile.mkdtemp()) / "pits.gpkg"
    >>> write_geopackage_layer(out, [shapely.Point(500000.5, 4999999.5)],
    ...                        {"depth_m": [0.42]}, crs="EPSG:32633", layer="pits").name
    'pits.gpkg'
    """
    import pyogrio.raw
    from pyogrio.errors import DataSourceError, FieldError, GeometryError

    layer = _checked_name(layer, "layer name")
    geoms = _checked_geometries(geometries)
    kind = _layer_type(geoms, geometry_type)
    names, columns = _checked_attributes(attributes, len(geoms))
    wkt = _crs_wkt(crs)
    caution_text = SCREENING_CAUTION if not description else \
        f"{SCREENING_CAUTION} {str(description).strip()}"
    metadata = {"caution": SCREENING_CAUTION, "producer": f"sillmark {__version__}"}
    layer_metadata = dict(metadata)
    if description:
        layer_metadata["description"] = str(description).strip()
    target = Path(path)
    try:
        with atomic_output(target) as tmp:
            # GDAL wants the .gpkg extension: write under it, then hand the
            # file to atomic_output's temporary name for the final rename.
            staged = tmp.with_name(tmp.name + ".gpkg")
            try:
                pyogrio.raw.write(
                    str(staged), shapely.to_wkb(geoms) if len(geoms) else np.array([], dtype=object),
                    columns, names,
                    layer=layer, driver="GPKG", geometry_type=kind, crs=wkt,
                    promote_to_multi=kind.startswith("Multi"),
                    dataset_metadata=metadata, layer_metadata=layer_metadata,
                    layer_options={"SPATIAL_INDEX": "YES", "DESCRIPTION": caution_text,
                                   "IDENTIFIER": layer},
                )
                os.replace(staged, tmp)
            finally:
                staged.unlink(missing_ok=True)
    except (DataSourceError, FieldError, GeometryError, OSError) as err:
        if isinstance(err, SillmarkError):
            raise
        first = str(err).strip().splitlines()[0] if str(err).strip() else type(err).__name__
        raise GeoPackageWriteError(f"could not write the GeoPackage {target.name}: {first}") from None
    return target


def _checked_name(name: Any, what: str) -> str:
    if not isinstance(name, str) or not _NAME.match(name) or name.lower() in _RESERVED:
        raise InvalidParameter(
            f"the {what} {name!r} is not usable; use letters, digits and _ (not first a digit), "
            "at most 63 characters, and not fid, geom or geometry"
        )
    return name


def _checked_geometries(geometries: Any) -> np.ndarray:
    if isinstance(geometries, (str, bytes)) or not hasattr(geometries, "__len__"):
        raise InvalidParameter("the geometries must be a list or array of shapely shapes")
    geoms = np.asarray(list(geometries) if not isinstance(geometries, np.ndarray) else geometries,
                       dtype=object)
    if geoms.ndim != 1:
        raise InvalidParameter("the geometries must be a flat list of shapely shapes")
    if len(geoms):
        is_geom = np.fromiter((isinstance(g, shapely.Geometry) for g in geoms), bool, len(geoms))
        if not is_geom.all():
            k = int(np.flatnonzero(~is_geom)[0])
            raise InvalidParameter(
                f"geometry {k} is {type(geoms[k]).__name__}, not a shapely shape (None is refused too)"
            )
        empty = shapely.is_empty(geoms)
        if empty.any():
            raise InvalidParameter(f"geometry {int(np.flatnonzero(empty)[0])} is empty")
    return geoms


def _layer_type(geoms: np.ndarray, geometry_type: str | None) -> str:
    if geometry_type is not None and geometry_type not in _GEOMETRY_TYPES:
        raise InvalidParameter(
            f"unknown geometry type {geometry_type!r}; use one of {', '.join(sorted(_GEOMETRY_TYPES))}"
        )
    if not len(geoms):
        if geometry_type is None:
            raise InvalidParameter("an empty layer needs its geometry_type (e.g. 'MultiPolygon')")
        return geometry_type
    ids = np.unique(shapely.get_type_id(geoms))
    unknown = [int(i) for i in ids if int(i) not in _KINDS]
    if unknown:
        raise InvalidParameter(
            f"a layer holds points, lines or polygons, not {shapely.GeometryType(unknown[0]).name}"
        )
    families = {_FAMILY[int(i)] for i in ids}
    if len(families) > 1:
        raise InvalidParameter(
            f"one layer holds one kind of shape, not {' and '.join(sorted(families))}s together"
        )
    inferred = _KINDS[int(ids.max())]  # the multi type when both occur
    if geometry_type is None:
        return inferred
    if _FAMILY[[k for k, v in _KINDS.items() if v == geometry_type][0]] != _FAMILY[int(ids.max())]:
        raise InvalidParameter(f"the geometries are {inferred}s, not {geometry_type}s")
    if not geometry_type.startswith("Multi") and inferred.startswith("Multi"):
        raise InvalidParameter(f"the geometries include {inferred}s; use geometry_type='{inferred}'")
    return geometry_type


def _checked_attributes(attributes: Mapping[str, Any] | None, count: int):
    if attributes is None:
        return [], []
    if not isinstance(attributes, Mapping):
        raise InvalidParameter("the attributes must be a mapping of column name to values")
    names, columns, seen = [], [], set()
    for name, values in attributes.items():
        name = _checked_name(name, "column name")
        if name.lower() in seen:
            raise InvalidParameter(f"column {name!r} is given twice (names ignore case)")
        seen.add(name.lower())
        col = np.asarray(values)
        if col.ndim != 1 or col.shape[0] != count:
            raise InvalidParameter(
                f"column {name!r} must hold one value per geometry ({count}), not shape {col.shape}"
            )
        if col.dtype.kind in "US":
            col = col.astype(object)
        elif col.dtype.kind == "O":
            if not all(isinstance(v, str) or v is None for v in col):
                raise InvalidParameter(f"column {name!r} mixes text with other values")
        elif col.dtype.kind == "u":
            if col.size and int(col.max()) > np.iinfo(np.int64).max:
                raise InvalidParameter(f"column {name!r} holds whole numbers beyond 64 bits")
            col = col.astype(np.int64)
        elif col.dtype.kind == "f" and col.dtype.itemsize < 4:
            col = col.astype(np.float32)
        elif col.dtype.kind not in "bif":
            raise InvalidParameter(
                f"column {name!r} must hold numbers, booleans or text, not {col.dtype}"
            )
        names.append(name)
        columns.append(col)
    return names, columns


def _crs_wkt(crs: Any) -> str:
    if crs is None:
        raise InvalidParameter("a GeoPackage layer needs the DEM's CRS; give crs=dem or an EPSG code")
    if hasattr(crs, "crs") and not isinstance(crs, pyproj.CRS):
        return horizontal_crs(crs).to_wkt()
    try:
        text = crs.to_wkt() if hasattr(crs, "to_wkt") else crs
        parsed = pyproj.CRS.from_user_input(text)
    except (pyproj.exceptions.CRSError, TypeError, ValueError):
        raise InvalidParameter(f"unknown CRS {crs!r}; give an EPSG code such as EPSG:32633") from None
    return (parsed.to_2d() if parsed.is_compound else parsed).to_wkt()
