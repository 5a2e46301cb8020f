"""The depression inventory as a table: one row per depression, units in the column names.

The columns every table file and answer shares (``depressions.csv``, the
depressions at a level, the web app's table): elevations and depths with the
vertical unit's suffix, the spill point in the DEM's CRS and in WGS 84, areas in
m² and ha, volumes in m³ (and acre-feet on sites in feet).
"""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np

from sillmark.grid.crs import crs_unit_suffix, horizontal_crs, to_wgs84
from sillmark.units import own_unit_columns, unit_of, unit_suffix

if TYPE_CHECKING:  # pragma: no cover
    from sillmark.engine.flood import SpillResult
    from sillmark.grid.dem import DEM


def depression_columns(result: "SpillResult", dem: "DEM") -> dict[str, np.ndarray]:
    """The depression table with units in the column names, in file order.

    Every :class:`~sillmark.engine.flood.DepressionTable` column appears: elevations and
    depths get the vertical-unit suffix (``_m``, ``_ft``, ``_us_ft``), the spill
    point's CRS coordinates the CRS's unit (``spill_x_m`` ...), and
    ``volume_m2_vu`` is given converted to ``volume_m3``. Added: the spill point in
    WGS84 (``spill_lon_deg``, ``spill_lat_deg``), ``area_ha`` and, for sites in
    feet, ``area_ft2``, ``area_acres`` and ``volume_acre_ft``
    (:func:`sillmark.units.own_unit_columns`).

    Notes
    -----
    The acre-foot is 43 560 international cubic feet (:data:`sillmark.units.ACRE_FOOT_M3`)
    for both kinds of feet; the survey-foot acre-foot is 4 parts per million larger.
    """
    return table_columns(result.depressions, dem)


def table_columns(table, dem: "DEM") -> dict[str, np.ndarray]:
    """:func:`depression_columns` of a :class:`~sillmark.engine.flood.DepressionTable` itself."""
    t = table
    unit = unit_of(dem)
    v = unit_suffix(unit)
    crs = horizontal_crs(dem)
    h = crs_unit_suffix(crs)
    lon = np.full(len(t), np.nan)
    lat = np.full(len(t), np.nan)
    ok = np.isfinite(t.spill_x) & np.isfinite(t.spill_y)
    if ok.any():
        lon[ok], lat[ok] = to_wgs84(crs).transform(t.spill_x[ok], t.spill_y[ok])
    volume_m3 = np.asarray(t.volume_m2_vu, dtype=np.float64) * unit.metres
    cols: dict[str, np.ndarray] = {
        "id": t.id,
        "pit_row": t.pit_row,
        "pit_col": t.pit_col,
        f"pit_elevation_{v}": t.pit_elevation,
        "spill_row": t.spill_row,
        "spill_col": t.spill_col,
        f"spill_x_{h}": t.spill_x,
        f"spill_y_{h}": t.spill_y,
        "spill_lon_deg": lon,
        "spill_lat_deg": lat,
        f"spill_elevation_{v}": t.spill_elevation,
        "spills_to": t.spills_to,
        f"max_depth_{v}": t.max_depth,
        "cell_count": t.cell_count,
        "area_m2": np.asarray(t.area_m2, dtype=np.float64),
        "area_ha": np.asarray(t.area_m2, dtype=np.float64) / 1e4,
        "volume_m3": volume_m3,
    }
    cols.update(own_unit_columns(unit, area_m2=cols["area_m2"], volume_m3=volume_m3))
    return cols
