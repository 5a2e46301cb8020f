"""What the upload page shows of a DEM, and the choices a DEM file leaves open.

:func:`dem_info` describes a DEM read for the upload page (grid, cell size,
CRS, vertical unit and how it was decided, nodata share); :func:`dem_choices`
decides the CRS and band a file is read with, or raises :class:`ChoiceNeeded`
when the user must pick one first (a file that states no CRS, or holds
several bands). Used by :mod:`sillmark.web.sites` and the upload views.
"""

from __future__ import annotations

import os
from typing import Any

import numpy as np
import pyproj

from sillmark.errors import InvalidDEM, InvalidParameter
from sillmark.grid.crs import crs_label, epsg_crs, full_crs
from sillmark.grid.elevations import nodata_as_json

__all__ = ["UNIT_SOURCE_TEXT", "ChoiceNeeded", "band_choices", "crs_code", "dem_choices", "dem_info"]


class ChoiceNeeded(InvalidDEM):
    """The DEM file reads only once the user has chosen its CRS or its band.

    ``details`` go into the JSON answer beside the message, so the upload page
    can open the chooser that is needed: ``needs`` (``["crs"]``, ``["band"]``
    or both), ``bands`` (the band choices) and ``pending`` (the token under
    which the received file waits, so it need not be sent again).
    """

    def __init__(self, message: str, *, needs: list[str], bands: list[dict]) -> None:
        super().__init__(message)
        self.details: dict = {"needs": needs, "bands": bands}


# --------------------------------------------------------------------------- DEM description


def _cell_size_metres(dem) -> list[float] | None:
    """Width and height in metres of a cell at the middle of a lon/lat DEM, on its ellipsoid."""
    if not dem.is_geographic:
        return None
    t = dem.transform
    lon = t.c + t.a * dem.cols / 2.0
    lat = t.f + t.e * dem.rows / 2.0
    geod = dem.horizontal_crs.get_geod() or pyproj.Geod(ellps="WGS84")
    dx, dy = dem.cell_size
    lat = min(max(lat, -89.0), 89.0)
    width = geod.inv(lon - dx / 2.0, lat, lon + dx / 2.0, lat)[2]
    height = geod.inv(lon, lat - dy / 2.0, lon, lat + dy / 2.0)[2]
    return [float(width), float(height)]


def _datum_of_crs(dem) -> str | None:
    """The vertical datum a compound CRS names (e.g. ``North American Vertical Datum 1988``)."""
    try:
        crs = full_crs(dem)
    except (pyproj.exceptions.CRSError, AttributeError):  # pragma: no cover
        return None
    for part in crs.sub_crs_list if crs.is_compound else []:
        if part.is_vertical and part.datum is not None:
            return part.datum.name
    return None


def dem_info(dem, *, file_bytes: int | None = None) -> dict:
    """What the upload page shows about a DEM it read.

    ``dem`` is a :class:`~sillmark.grid.dem.DEM`, or a
    :class:`~sillmark.grid.dem_grid.DEMGrid` (its header only) for a DEM too large to
    read in a request: the elevation range and nodata share are then None until
    an analysis has read the cells (see :meth:`Registry.describe`).
    """

    total = dem.rows * dem.cols
    dx, dy = dem.cell_size
    h = dem.horizontal_crs
    unit_name = h.axis_info[0].unit_name if h.axis_info else ""
    epsg = h.to_epsg()
    z = getattr(dem, "elevation", None)
    return {
        "rows": dem.rows,
        "cols": dem.cols,
        "cells": total,
        "cell_size": [dx, dy],
        "cell_unit": "degree" if dem.is_geographic else unit_name,
        "crs": crs_label(dem),
        "epsg": epsg,
        "is_geographic": bool(dem.is_geographic),
        "vertical_unit": dem.vertical_unit.value,
        "vertical_unit_source": dem.vertical_unit_source,
        "vertical_unit_certain": dem.vertical_unit_source in ("crs", "band-unit"),
        "nodata_value": nodata_as_json(dem.nodata),
        "nodata_share": None if z is None else float(1.0 - np.count_nonzero(dem.valid) / total),
        "elevation_min": None if z is None else float(np.nanmin(z)),
        "elevation_max": None if z is None else float(np.nanmax(z)),
        "source_dtype": dem.source_dtype,
        "file_bytes": file_bytes,
        "cell_size_m": _cell_size_metres(dem),
        "vertical_datum_from_crs": _datum_of_crs(dem),
    }


UNIT_SOURCE_TEXT = {
    "crs": "stated by the file's vertical CRS",
    "band-unit": "stated by the band's unit label",
    "horizontal-unit": "assumed from the CRS's horizontal unit (please confirm)",
    "geographic-default": "assumed metres for a lon/lat DEM (please confirm)",
    "argument": "set by you",
}


def crs_code(crs) -> str | None:
    """``EPSG:n`` of a chosen CRS (None when none was chosen)."""
    if crs is None:
        return None
    epsg = crs.to_epsg()
    return f"EPSG:{epsg}" if epsg else crs.to_string()


def band_choices(outline) -> list[dict]:
    return [{"band": i + 1, "name": outline.band_names[i] if i < len(outline.band_names) else ""}
            for i in range(outline.bands)]


def dem_choices(outline, name: str, crs: Any, band: Any):
    """(CRS, band) to read the file with, from what the user chose and what the file needs.

    A CRS is used only for a file that states none (a file's own CRS wins, and
    the page shows it); a band only for a file of several. Raises
    :class:`ChoiceNeeded` when the file needs a choice the user has not made.
    """
    shown = os.path.basename(str(name).replace("\\", "/"))
    needs, parts = [], []
    chosen_band = None
    if outline.bands > 1:
        text = str(band if band is not None else "").strip()
        if not text:
            needs.append("band")
            parts.append(f"has {outline.bands} bands; choose the band that holds the ground "
                         f"elevations (1 to {outline.bands}) under 'Band'")
        elif not text.isdigit() or not 1 <= int(text) <= outline.bands:
            raise InvalidParameter(
                f"band {text[:12]!r} is not in '{shown}', which has {outline.bands} bands; "
                f"choose a band from 1 to {outline.bands}")
        else:
            chosen_band = int(text)
    chosen_crs = None
    if not outline.has_crs:
        text = str(crs if crs is not None else "").strip()
        if not text:
            needs.append("crs")
            parts.append("has no CRS; choose it under 'CRS of the DEM' "
                         "(search by EPSG code or name)")
        else:
            chosen_crs = epsg_crs(text)
    if needs:
        raise ChoiceNeeded(f"'{shown}' " + " and ".join(parts)
                           + "; the file is kept until you choose, so it need not be sent again",
                           needs=needs, bands=band_choices(outline))
    return chosen_crs, chosen_band
