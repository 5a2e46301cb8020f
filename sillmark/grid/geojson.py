"""The CRS of a GeoJSON object, shared by every GeoJSON reader (outlets, assets).

RFC 7946 section 4 fixes GeoJSON coordinates to WGS 84 longitude, latitude; the
earlier 2008 GeoJSON specification allowed a top-level ``crs`` member naming
another CRS, which many files still carry. Both are accepted here.
"""

from __future__ import annotations

import pyproj

from sillmark.errors import SillmarkError

#: WGS 84 longitude, latitude (RFC 7946 section 4).
CRS84 = pyproj.CRS("OGC:CRS84")


def geojson_crs(obj: dict, label: str, error: type[SillmarkError]) -> pyproj.CRS:
    """Horizontal CRS of GeoJSON ``obj``: RFC 7946 lon/lat, or its named ``crs`` member.

    ``label`` names the file in messages; ``error`` is the exception class the
    caller raises for its kind of input.
    """
    member = obj.get("crs")
    if member is None:
        return CRS84
    name = None
    if isinstance(member, dict) and member.get("type") == "name":
        props = member.get("properties")
        if isinstance(props, dict) and isinstance(props.get("name"), str):
            name = props["name"]
    if name is None:
        raise error(
            f"{label} has a 'crs' member Sillmark cannot use; remove it (coordinates are then "
            'WGS 84 lon/lat) or give {"type": "name", "properties": {"name": "EPSG:32633"}}'
        )
    try:
        crs = pyproj.CRS.from_user_input(name)
    except pyproj.exceptions.CRSError:
        raise error(
            f"{label} names an unknown CRS {name!r}; use a name such as 'EPSG:32633' or "
            "'urn:ogc:def:crs:EPSG::32633'"
        ) from None
    return crs.to_2d() if (crs.is_compound or len(crs.axis_info) > 2) else crs
