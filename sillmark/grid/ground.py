"""Ground distances along paths of grid cells, in the grid's ground unit.

A path of cells (a route of the flood tree) is a chain of steps between the
centres of neighbouring cells. On a projected grid a step is the straight line
between the two centres: one cell width or height for a side step, the
diagonal (√2 times the cell size on square cells) for a corner step, in the
CRS's own linear unit (metres, international feet or US survey feet). On a
longitude/latitude grid a step is the geodesic between the two centres on the
CRS's ellipsoid (Karney 2013, through :meth:`pyproj.Geod.line_length`), in
metres: degrees are never used as a length.

References
----------
C. F. F. Karney (2013), "Algorithms for geodesics", Journal of Geodesy 87,
43–55. https://doi.org/10.1007/s00190-012-0578-z
"""

from __future__ import annotations

import dataclasses
from typing import Any

import numpy as np

from sillmark.errors import InvalidParameter
from sillmark.grid.georeference import geod_for, linear_unit_metres

# Symbols of the linear units a projected grid may have, by their size in metres.
_LINEAR_SYMBOLS = ((1.0, "m"), (0.3048, "ft"), (1200.0 / 3937.0, "US ft"))


@dataclasses.dataclass(frozen=True)
class GroundLength:
    """A length on the ground: ``value`` in ``unit`` (``m``, ``ft`` or ``US ft``),
    and the same in metres."""

    value: float
    unit: str
    metres: float

    def text(self, digits: int = 1) -> str:
        """The length as people read it, e.g. ``125.3 m``."""
        return f"{self.value:,.{digits}f} {self.unit}"


def ground_unit(grid: Any) -> tuple[str, float]:
    """``(symbol, metres per unit)`` of the lengths :func:`path_length` gives on ``grid``.

    Lon/lat grids measure in metres; projected grids in their CRS's linear unit.

    Examples
    --------
    >>> from sillmark.grid.dem import dem_from_array
    >>> ground_unit(dem_from_array(np.zeros((2, 2), np.float32)))
    ('m', 1.0)
    """
    if grid.is_geographic:
        return "m", 1.0
    metres = linear_unit_metres(grid.horizontal_crs)
    for size, symbol in _LINEAR_SYMBOLS:
        if abs(metres - size) <= 1e-9 * size:
            return symbol, metres
    return f"units of {metres:g} m", metres


def ground_unit_suffix(grid: Any) -> str:
    """Column-name suffix of :func:`ground_unit`: ``m``, ``ft`` or ``us_ft``."""
    symbol, metres = ground_unit(grid)
    return {"m": "m", "ft": "ft", "US ft": "us_ft"}.get(symbol, f"{metres:g}m")


def position_text(grid: Any, x: float, y: float) -> str:
    """A map position as people read it: ``x 500041.0 m, y 4999957.0 m`` in the
    grid's CRS, or ``lon 15.000522°, lat 45.153090°`` on a lon/lat grid.

    Examples
    --------
    >>> from sillmark.grid.dem import dem_from_array
    >>> position_text(dem_from_array(np.zeros((2, 2), np.float32)), 500000.5, 4999999.5)
    'x 500000.5 m, y 4999999.5 m'
    """
    if grid.is_geographic:
        return f"lon {x:.6f}°, lat {y:.6f}°"
    symbol, _ = ground_unit(grid)
    return f"x {x:.1f} {symbol}, y {y:.1f} {symbol}"


def path_length(grid: Any, rows: Any, cols: Any) -> GroundLength:
    """Length on the ground of the path through the centres of cells ``(rows, cols)``.

    Parameters
    ----------
    grid : DEM or DEMGrid
        Anything with ``transform``, ``is_geographic``, ``horizontal_crs`` and ``xy``.
    rows, cols : array_like of int
        The path's cells in order; consecutive cells must be neighbours
        (8-neighbour steps) or the same cell.

    Returns
    -------
    GroundLength
        Zero for a path of one cell.

    Raises
    ------
    InvalidParameter
        The arrays differ in length, or two consecutive cells are not neighbours.

    Examples
    --------
    Three steps on a 2 m grid, one of them diagonal: 2 + 2 + 2√2 m.

    >>> from sillmark.grid.dem import dem_from_array
    >>> from affine import Affine
    >>> dem = dem_from_array(np.zeros((3, 4), np.float32),
    ...                      transform=Affine(2, 0, 500000, 0, -2, 5000000))
    >>> round(path_length(dem, [0, 0, 1, 1], [0, 1, 2, 3]).value, 6)
    6.828427
    """
    r = np.asarray(rows, dtype=np.int64).reshape(-1)
    c = np.asarray(cols, dtype=np.int64).reshape(-1)
    if r.shape != c.shape:
        raise InvalidParameter("a path needs as many rows as columns")
    symbol, metres = ground_unit(grid)
    if r.size < 2:
        return GroundLength(0.0, symbol, 0.0)
    dr, dc = np.diff(r), np.diff(c)
    if np.any(np.abs(dr) > 1) or np.any(np.abs(dc) > 1):
        raise InvalidParameter("the cells of a path must follow each other as neighbours")
    if grid.is_geographic:
        x, y = grid.xy(r, c)
        deg = getattr(grid, "_degrees_per_unit", 1.0)
        length = float(geod_for(grid.horizontal_crs).line_length(x * deg, y * deg))
        return GroundLength(length, symbol, length)
    dx, dy = abs(grid.transform.a), abs(grid.transform.e)
    length = float(np.sum(np.hypot(dc * dx, dr * dy)))
    return GroundLength(length, symbol, length * metres)
