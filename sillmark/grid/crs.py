"""CRS helpers: a grid's horizontal CRS, its unit, its label, and the way to WGS 84.

One place for the CRS texts that files and pages show, e.g.
``EPSG:32633 (WGS 84 / UTM zone 33N)``, and for the column-name suffix of a
CRS's unit (``m``, ``ft``, ``us_ft``, ``deg``).
"""

from __future__ import annotations

import dataclasses
import functools
from typing import Any

import numpy as np
import pyproj
import pyproj.database
import pyproj.enums

from sillmark.errors import InvalidDEM, InvalidParameter

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


# --------------------------------------------------------------------------- choosing a CRS

#: Kinds of CRS a DEM may be given: projected, lon/lat, and those with heights too.
_CHOOSABLE = (
    pyproj.enums.PJType.PROJECTED_CRS,
    pyproj.enums.PJType.GEOGRAPHIC_2D_CRS,
    pyproj.enums.PJType.COMPOUND_CRS,
)
_KIND_WORDS = {
    pyproj.enums.PJType.PROJECTED_CRS: "projected",
    pyproj.enums.PJType.GEOGRAPHIC_2D_CRS: "longitude/latitude",
    pyproj.enums.PJType.COMPOUND_CRS: "with heights",
}
#: Names of the geodetic frames most site DEMs come in (common practice), listed first.
_COMMON_FRAMES = ("WGS 84", "ETRS89", "NAD83 /", "NAD83(2011)", "GDA2020", "OSGB36", "NZGD2000")
#: Most matches one search returns.
SEARCH_MAX = 25


@dataclasses.dataclass(frozen=True)
class CRSChoice:
    """One CRS of the EPSG registry that a search found."""

    code: str  # "EPSG:32633"
    name: str
    kind: str  # projected, longitude/latitude, with heights
    area: str  # where it is meant for, as the registry says


@functools.lru_cache(maxsize=1)
def _epsg_catalogue() -> tuple[tuple[CRSChoice, str], ...]:
    """Every current EPSG CRS a DEM may be given, with a lower-case search text (cached)."""
    found = pyproj.database.query_crs_info(auth_name="EPSG", pj_types=list(_CHOOSABLE),
                                           allow_deprecated=False)
    out = []
    for info in found:
        area = info.area_of_use.name if info.area_of_use is not None else ""
        choice = CRSChoice(code=f"EPSG:{info.code}", name=info.name,
                           kind=_KIND_WORDS.get(info.type, "other"), area=area)
        out.append((choice, f"{info.code} {info.name} {area}".lower()))
    out.sort(key=lambda pair: int(pair[0].code[5:]))
    return tuple(out)


def search_crs(text: str, *, limit: int = 10) -> list[CRSChoice]:
    """CRSs of the EPSG registry (from PROJ's own database) matching ``text``.

    A number matches codes that start with it (an exact code first); words
    match names and areas of use that contain every one of them, e.g.
    ``utm 33n`` or ``british national grid``. At most ``limit`` (capped at
    :data:`SEARCH_MAX`) results.

    Raises
    ------
    InvalidParameter
        ``text`` is empty or longer than 80 characters, or ``limit`` is not 1 to
        :data:`SEARCH_MAX`.

    Examples
    --------
    >>> [c.code for c in search_crs("32633")]
    ['EPSG:32633']
    >>> search_crs("utm zone 33n", limit=50)[0].name  # doctest: +SKIP
    'WGS 84 / UTM zone 33N'
    """
    query = " ".join(str(text).split()).lower()
    if query.upper().startswith("EPSG:"):
        query = query[5:].strip()
    if not query or len(query) > 80:
        raise InvalidParameter(
            "give a CRS search of 1 to 80 characters: an EPSG code such as 32633, or words "
            "of its name such as 'UTM zone 33N'"
        )
    if isinstance(limit, bool) or not isinstance(limit, int) or not 1 <= limit <= SEARCH_MAX:
        raise InvalidParameter(f"limit must be a whole number from 1 to {SEARCH_MAX}")
    catalogue = _epsg_catalogue()
    if query.isdigit():
        exact = [c for c, _ in catalogue if c.code[5:] == query]
        rest = [c for c, _ in catalogue if c.code[5:].startswith(query) and c.code[5:] != query]
        return (exact + rest)[:limit]
    words = query.split()
    hits = [c for c, hay in catalogue if all(w in hay for w in words)]
    # Names that hold the words come before matches on the area of use only.
    # and among those, the world-wide and continental frames people use most first.
    hits.sort(key=lambda c: (not all(w in c.name.lower() for w in words),
                             not c.name.startswith(_COMMON_FRAMES), len(c.name)))
    return hits[:limit]


def epsg_crs(text: Any) -> pyproj.CRS:
    """The EPSG CRS a person chose: ``EPSG:32633`` or ``32633``.

    Raises
    ------
    InvalidParameter
        Not an EPSG code, or a code PROJ's registry does not hold.

    Examples
    --------
    >>> epsg_crs("EPSG:32633").name
    'WGS 84 / UTM zone 33N'
    """
    raw = str(text).strip()
    code = raw[5:].strip() if raw.upper().startswith("EPSG:") else raw
    if not code.isdigit() or len(code) > 9:
        raise InvalidParameter(
            f"the CRS must be an EPSG code such as EPSG:32633 or 32633, not {raw[:40]!r}; "
            "search the list by code or name to find it"
        )
    try:
        return pyproj.CRS.from_epsg(int(code))
    except pyproj.exceptions.CRSError:
        raise InvalidParameter(
            f"EPSG:{int(code)} is not a CRS in the EPSG registry; search the list by code or "
            "name to find the right one"
        ) from None
