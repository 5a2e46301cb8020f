"""Outlines of depressions: one (Multi)Polygon per depression from the id raster.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np
import rasterio
import rasterio.features
import rasterio.windows
import shapely
import shapely.geometry

from sillmark.errors import InvalidParameter
from sillmark.grid.dem import check_layers_on_grid

if TYPE_CHECKING:  # pragma: no cover
    from sillmark.engine.flood import SpillResult
    from sillmark.grid.dem import DEM


def depression_polygons(result: "SpillResult", dem: "DEM") -> list:
    """One shapely (Multi)Polygon per depression, in the DEM's CRS; index ``k`` is id ``k+1``.

    The whole id raster is vectorised once (:func:`rasterio.features.shapes`,
    4-connected, cell edges as outlines); a depression whose cells meet only at
    corners (possible with 8-connectivity) comes out as a MultiPolygon, the
    union of its pieces.

    Notes
    -----
    Memory: a boolean mask of the grid (1 byte per cell) plus the vertices of the
    outlines.
    """
    check_layers_on_grid(dem, depression_id=result.depression_id)
    ids = np.ascontiguousarray(result.depression_id, dtype=np.int32)
    n = len(result.depressions)
    pieces: list[list] = [[] for _ in range(n)]
    if n:
        for geom, value in rasterio.features.shapes(
            ids, mask=ids > 0, connectivity=4, transform=dem.transform
        ):
            pieces[int(value) - 1].append(shapely.geometry.shape(geom))
    out = []
    for k, parts in enumerate(pieces):
        if not parts:
            raise InvalidParameter(f"depression {k + 1} has no cells in the id raster")
        # The pieces are distinct 4-connected regions of one value, so their
        # interiors are disjoint and they meet at most at corners: the
        # MultiPolygon of them is already their union (and valid).
        out.append(parts[0] if len(parts) == 1 else shapely.geometry.MultiPolygon(parts))
    return out
