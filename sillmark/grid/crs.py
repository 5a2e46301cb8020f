"""CRS helpers: a grid's horizontal CRS, its unit, its label, and the way to WGS 84.

One place for the CRS texts that files and pages show, e.g.
``EPSG:32633 (WGS 84 / UTM zone 33N)``, and for the column-name suffix of a
CRS's unit (``m``, ``ft``, ``us_ft``, ``deg``).
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pyproj

from sillmark.errors import InvalidDEM

#: WGS 84 latitude/longitude; with ``always_xy`` transformers give lon, lat.
WGS84 = "EPSG:4326"

_CRS_UNIT_SUFFIX = {
    "metre": "m",
    "meter": "m",
    "foot": "ft",
    "us survey foot": "us_ft",
    "degree": "deg",
}


def horizontal_crs(grid: Any) -> pyproj.CRS:
    """The grid's horizontal CRS (a compound CRS's vertical part dropped).

    Raises
    ------
    InvalidDEM
        The grid has no CRS, so its results cannot be placed on a map.
    """
    if grid.crs is None:
        raise InvalidDEM(
            "the DEM has no CRS, so its results cannot be placed on a map; "
            "give one (e.g. EPSG:32633)"
        )
    horizontal = getattr(grid, "horizontal_crs", None)
    if horizontal is not None:
        return horizontal
    crs = pyproj.CRS.from_user_input(grid.crs.to_wkt())
    return crs.to_2d() if crs.is_compound else crs


def full_crs(grid: Any) -> pyproj.CRS:
    """The grid's whole CRS, with its vertical part when it has one."""
    return pyproj.CRS.from_user_input(grid.crs.to_wkt())


def crs_unit_name(crs: pyproj.CRS) -> str:
    """Name of the unit of the CRS's first axis, e.g. ``metre`` (``unknown`` without axes)."""
    axes = crs.axis_info
    return axes[0].unit_name if axes else "unknown"


def crs_unit_suffix(crs: pyproj.CRS) -> str:
    """Column-name suffix of the CRS's unit, e.g. ``m``, ``ft``, ``us_ft`` or ``deg``.

    Examples
    --------
    >>> crs_unit_suffix(pyproj.CRS("EPSG:32633"))
    'm'
    >>> crs_unit_suffix(pyproj.CRS("EPSG:4326"))
    'deg'
    """
    name = crs_unit_name(crs).lower()
    return _CRS_UNIT_SUFFIX.get(name, "".join(ch if ch.isalnum() else "_" for ch in name))


def crs_text(crs: Any) -> str:
    """A CRS as people read it: its EPSG code and name, or its name alone.

    ``crs`` is a :class:`pyproj.CRS`, a :class:`rasterio.crs.CRS` or anything
    :meth:`pyproj.CRS.from_user_input` reads; one that cannot be read at all is
    "a custom CRS".

    Examples
    --------
    >>> crs_text(pyproj.CRS("EPSG:32633"))
    'EPSG:32633 (WGS 84 / UTM zone 33N)'
    >>> crs_text("EPSG:4326")
    'EPSG:4326 (WGS 84)'
    """
    try:
        if not isinstance(crs, pyproj.CRS):
            crs = pyproj.CRS.from_user_input(crs.to_wkt() if hasattr(crs, "to_wkt") else crs)
        epsg = crs.to_epsg()
    except (pyproj.exceptions.CRSError, ValueError, TypeError):
        return "a custom CRS"
    return f"EPSG:{epsg} ({crs.name})" if epsg else f"{crs.name} (no EPSG code)"


def crs_label(grid: Any) -> str:
    """The grid's whole CRS as :func:`crs_text` writes it."""
    return crs_text(full_crs(grid))


def horizontal_unit_suffix(grid: Any) -> str:
    """Column-name suffix of the grid's horizontal CRS unit, e.g. ``m`` or ``ft``."""
    return crs_unit_suffix(horizontal_crs(grid))


def normal_longitude(lon: Any) -> Any:
    """Longitudes in [-180, 180], as RFC 7946 asks of GeoJSON (190 becomes -170).

    Examples
    --------
    >>> normal_longitude(np.array([190.0, -185.0, 180.0, 15.0])).tolist()
    [-170.0, 175.0, 180.0, 15.0]
    """
    a = np.asarray(lon, dtype=np.float64)
    with np.errstate(invalid="ignore"):
        out = np.where(np.abs(a) <= 180.0, a, np.mod(a + 180.0, 360.0) - 180.0)
    return out if out.ndim else float(out)


class LonLatTransformer:
    """A transformer to WGS 84 longitude/latitude whose longitudes are always in [-180, 180].

    Wraps a :class:`pyproj.Transformer` (``always_xy=True``); only
    :meth:`transform` is offered, which is what the writers use.
    """

    def __init__(self, source: Any) -> None:
        self._inner = pyproj.Transformer.from_crs(source, pyproj.CRS("OGC:CRS84"), always_xy=True)

    def transform(self, x: Any, y: Any, *args: Any, **kwargs: Any):
        lon, lat = self._inner.transform(x, y, *args, **kwargs)
        lon = normal_longitude(lon)
        if isinstance(x, list):
            lon = list(lon)
        return lon, lat


def to_wgs84(crs: pyproj.CRS) -> LonLatTransformer:
    """Transformer from ``crs`` to WGS 84 lon/lat, longitudes in [-180, 180] (RFC 7946)."""
    return LonLatTransformer(crs)


def wgs84_transformer(grid: Any) -> LonLatTransformer:
    """Transformer from the grid's horizontal CRS to WGS 84 lon/lat (``always_xy``)."""
    return to_wgs84(horizontal_crs(grid))
