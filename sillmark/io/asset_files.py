"""Asset files: the asset table as CSV and as GeoJSON points with their routes.

===========================  =============================================================
``assets.csv``               one row per asset: a header with units in the column names
                             (the first line), the rows
``assets.geojson``           RFC 7946 (WGS 84 lon/lat): a Point per asset, and optionally
                             the route of each as a LineString and its controlling sill
                             as a Point; ``feature_kind`` tells them apart
``what_if_raise_{H}.csv``    one row per asset behind a sill: its onset stage now and with
                             the controlling sill raised by ``H``, the sill before and
                             after, the gain and an explanation
===========================  =============================================================

All carry :data:`sillmark.SCREENING_CAUTION` and are written atomically
(temporary file, then rename) with :func:`sillmark.io.atomic.atomic_output`. Assets
without figures (outside the DEM, on nodata, not reached) are kept, with empty
fields (CSV) or null values (GeoJSON) and their status.
"""

from __future__ import annotations

import math
import os
from collections.abc import Iterator
from decimal import Decimal
from pathlib import Path
from typing import Any

import numpy as np

from sillmark import SCREENING_CAUTION
from sillmark.errors import InvalidParameter
from sillmark.grid.crs import horizontal_unit_suffix
from sillmark.io.csv_tables import write_table_csv
from sillmark.io.geojson import COORDINATE_DECIMALS, write_feature_collection
from sillmark.io.stage_files import level_label
from sillmark.products.assets import STATE_FLOODED, AssetTable
from sillmark.products.what_if import WhatIf
from sillmark.units import VerticalUnit, unit_suffix

__all__ = [
    "FEATURE_ASSET",
    "FEATURE_ROUTE",
    "FEATURE_SILL",
    "asset_columns",
    "asset_file_names",
    "what_if_file_name",
    "what_if_row",
    "write_assets_csv",
    "write_assets_geojson",
    "write_what_if_csv",
]

#: Values of the ``feature_kind`` property in ``assets.geojson``.
FEATURE_ASSET = "asset"
FEATURE_ROUTE = "route"
FEATURE_SILL = "controlling_sill"

# Prefix given to an input property whose name is already an output column.
_CLASH_PREFIX = "input_"


def asset_columns(table: AssetTable) -> dict[str, list]:
    """The asset table with units in the column names, in file order.

    Elevations, depths and freeboard get the vertical-unit suffix (``_m``,
    ``_ft``, ``_us_ft``), map coordinates the CRS's unit (``x_m``, or ``x_deg``
    on a lon/lat DEM); ``lon_deg``/``lat_deg`` are WGS 84. ``route_cells`` is
    the number of cells on the route. Then come the input's own columns or
    properties (a name already taken gets the prefix ``input_``).

    Values are plain Python (str, int, float, bool, JSON values of GeoJSON
    properties) with None for NaN and for missing properties. Elevations and
    the onset stage are written as the shortest decimals that read back as the
    same float32 values; depths and freeboard as the decimal difference of
    those forms (0.6, where float32 arithmetic in :class:`AssetTable` holds
    0.5999985), a difference below the precision of the data.
    """
    dem = table.dem
    v = unit_suffix(table.unit)
    h = horizontal_unit_suffix(dem)
    n = len(table)
    sill_lon = np.full(n, np.nan)
    sill_lat = np.full(n, np.nan)
    ok = np.isfinite(table.sill_x)
    if ok.any():
        sill_lon[ok], sill_lat[ok] = table._wgs84.transform(table.sill_x[ok], table.sill_y[ok])
    has = np.array([table.has_figures(k) for k in range(n)], dtype=bool)
    depth: list = []
    below: list = []
    freeboard: list = []
    for k in range(n):
        if not has[k]:
            depth.append(None)
            below.append(None)
            freeboard.append(None)
            continue
        under = _difference(table.level, table.ground_elevation[k])
        below.append(max(under, 0.0))
        depth.append(under if table.state[k] == STATE_FLOODED else 0.0)
        freeboard.append(_difference(table.onset_stage[k], table.level))

    def ints(a: np.ndarray) -> list:
        return [int(a[k]) if has[k] else None for k in range(n)]

    def place(a: np.ndarray) -> list:
        return [int(a[k]) if a[k] >= 0 else None for k in range(n)]

    cols: dict[str, list] = {
        "name": list(table.name),
        "kind": list(table.kind),
        "status": list(table.status),
        "state": list(table.state),
        f"x_{h}": _floats64(table.x),
        f"y_{h}": _floats64(table.y),
        "lon_deg": _floats64(table.lon),
        "lat_deg": _floats64(table.lat),
        "row": place(table.row),
        "col": place(table.col),
        f"ground_elevation_{v}": _floats32(table.ground_elevation),
        f"onset_stage_{v}": _floats32(table.onset_stage),
        f"depth_{v}": depth,
        f"depth_if_reached_{v}": below,
        f"freeboard_{v}": freeboard,
        "depression_id": ints(table.depression_id),
        "sill_row": ints(table.sill_row),
        "sill_col": ints(table.sill_col),
        f"sill_x_{h}": _floats64(table.sill_x),
        f"sill_y_{h}": _floats64(table.sill_y),
        "sill_lon_deg": _floats64(np.round(sill_lon, COORDINATE_DECIMALS)),
        "sill_lat_deg": _floats64(np.round(sill_lat, COORDINATE_DECIMALS)),
        f"sill_elevation_{v}": _floats32(table.sill_elevation),
        "sill_is_own_cell": [bool(table.sill_is_own_cell[k]) if has[k] else None for k in range(n)],
        "route_cells": [int(c.shape[0]) if has[k] else None for k, c in enumerate(table.route_cells)],
    }
    if table.cutoff is not None:
        cols.update(_cutoff_columns(table, v, h))
    taken = {c.lower() for c in cols}
    keys: list[str] = []
    for asset in table.assets:
        for key in asset.properties:
            if key not in keys:
                keys.append(key)
    for key in keys:
        out = key
        while out.lower() in taken:
            out = _CLASH_PREFIX + out
        taken.add(out.lower())
        cols[out] = [a.properties.get(key) for a in table.assets]
    return cols


def _floats32(a: np.ndarray) -> list:
    """float32 values as the shortest floats that read back the same (None for NaN)."""
    out = []
    for value in a:
        f = np.float32(value)
        out.append(float(np.format_float_positional(f, unique=True, trim="-")) if np.isfinite(f) else None)
    return out


def _difference(a: Any, b: Any) -> float:
    """``a - b`` for float32 figures, as the decimal difference of their shortest forms.

    Elevations and levels are float32; their shortest decimal forms (47.6, 46.69)
    are what the user entered and sees. Subtracting those decimals gives 0.91
    where float32 arithmetic gives 0.9099998, a difference far below the
    precision of the data.
    """
    return float(Decimal(_short(a)) - Decimal(_short(b)))


def _short(value: Any) -> str:
    return np.format_float_positional(np.float32(value), unique=True, trim="-")


def _floats64(a: np.ndarray) -> list:
    return [float(v) if math.isfinite(v) else None for v in a]


def _level_text(table: AssetTable) -> str:
    return np.format_float_positional(np.float32(table.level), unique=True, trim="-")


def _bound_text(value: float) -> Any:
    """A cut-off bound as a table holds it: a number, or words for the infinities."""
    if math.isnan(value):
        return None
    if value == math.inf:
        return "never"
    if value == -math.inf:
        return "always"
    return np.format_float_positional(np.float32(value), unique=True, trim="-")


def _cutoff_columns(table: AssetTable, v: str, h: str) -> dict[str, list]:
    """Cut-off stage, island window and the cell where the last route goes under first."""
    cut = table.cutoff
    n = len(table)
    where = np.full((2, n), np.nan)
    found = cut.cut_row >= 0
    if found.any():
        where[0, found], where[1, found] = table.dem.xy(cut.cut_row[found], cut.cut_col[found])
    known = ~np.isnan(cut.stage)
    return {
        f"cutoff_stage_{v}": [_bound_text(x) for x in cut.stage],
        f"island_from_{v}": [_bound_text(x) for x in cut.island_from],
        f"island_to_{v}": [_bound_text(x) for x in cut.island_to],
        "island_now": [bool(cut.is_island[k]) if known[k] else None for k in range(n)],
        f"cut_at_x_{h}": _floats64(where[0]),
        f"cut_at_y_{h}": _floats64(where[1]),
    }


def write_assets_csv(table: AssetTable, path: str | os.PathLike) -> Path:
    """Write the asset table as CSV: the header on the first line, one row per asset.

    Empty fields are values that do not exist (no figures). The water level is
    in the file name; the caution, the units and what the columns mean are in
    the folder's ``README.txt`` (:mod:`sillmark.io.readme`).
    """
    _check(table)
    columns = asset_columns(table)
    return write_table_csv(path, _object_columns(columns, len(table)))


def write_assets_geojson(
    table: AssetTable,
    path: str | os.PathLike,
    *,
    routes: bool = True,
    sills: bool = True,
) -> Path:
    """Write the assets as an RFC 7946 FeatureCollection in WGS 84 lon/lat.

    Features, told apart by the ``feature_kind`` property:

    - ``"asset"``: a Point at the asset as given, with every column of
      :func:`asset_columns` (null geometry if it cannot be expressed in WGS 84);
    - ``"route"`` (``routes=True``): a LineString through the cell centres of
      the route, from the outlet to the asset, the way the water comes. Cells
      in a straight run are merged into one segment (the line is the same). An
      asset on an outlet cell has a one-cell route and no route feature;
    - ``"controlling_sill"`` (``sills=True``): a Point at the sill cell's centre.

    Route and sill features carry ``name`` and ``asset_index`` (0-based, the
    order of the asset features). Every feature carries ``caution``.
    """
    _check(table)
    final = Path(path)
    columns = asset_columns(table)
    v = unit_suffix(table.unit)
    n = len(table)
    names = list(columns)
    values = list(columns.values())

    def point(lon: Any, lat: Any) -> dict | None:
        if lon is None or lat is None or not (math.isfinite(lon) and math.isfinite(lat)):
            return None
        return {
            "type": "Point",
            "coordinates": [round(float(lon), COORDINATE_DECIMALS), round(float(lat), COORDINATE_DECIMALS)],
        }

    def features() -> Iterator[dict]:
        for k in range(n):
            props = {"feature_kind": FEATURE_ASSET}
            props.update({name: col[k] for name, col in zip(names, values)})
            props["caution"] = SCREENING_CAUTION
            yield {"type": "Feature", "geometry": point(columns["lon_deg"][k], columns["lat_deg"][k]),
                   "properties": props}
        for k in range(n):
            if not table.has_figures(k):
                continue
            common = {
                "name": table.name[k],
                "asset_index": k,
                f"onset_stage_{v}": columns[f"onset_stage_{v}"][k],
                f"sill_elevation_{v}": columns[f"sill_elevation_{v}"][k],
            }
            if routes and table.route_cells[k].shape[0] >= 2:
                line = _route_line(table, k)
                yield {
                    "type": "Feature",
                    "geometry": {
                        "type": "LineString",
                        "coordinates": np.round(line, COORDINATE_DECIMALS).tolist(),
                    },
                    "properties": {
                        "feature_kind": FEATURE_ROUTE,
                        **common,
                        "route_cells": int(table.route_cells[k].shape[0]),
                        "direction": "outlet to asset",
                        "caution": SCREENING_CAUTION,
                    },
                }
            if sills:
                yield {
                    "type": "Feature",
                    "geometry": point(columns["sill_lon_deg"][k], columns["sill_lat_deg"][k]),
                    "properties": {
                        "feature_kind": FEATURE_SILL,
                        **common,
                        "sill_row": int(table.sill_row[k]),
                        "sill_col": int(table.sill_col[k]),
                        "sill_is_own_cell": bool(table.sill_is_own_cell[k]),
                        "caution": SCREENING_CAUTION,
                    },
                }

    # Foreign members (RFC 7946, section 6.1).
    members = {
        "name": "assets",
        "caution": SCREENING_CAUTION,
        "vertical_unit": table.unit.value,
        "water_level": {"value": float(_level_text(table)), "unit": table.unit.value},
        "connectivity": table.connectivity,
    }
    return write_feature_collection(final, members, features())


def _route_line(table: AssetTable, k: int) -> np.ndarray:
    """Lon/lat vertices of the route of asset ``k``: its corner cells' centres."""
    cells = table.route_cells[k]
    kept = cells[_corner_index(cells)].astype(np.int64)
    x, y = table.dem.xy(kept[:, 0], kept[:, 1])
    lon, lat = table._wgs84.transform(x, y)
    return np.column_stack([lon, lat])


def _corner_index(cells: np.ndarray) -> np.ndarray:
    """Indices of the route cells to keep as line vertices: first, last, and turns.

    A cell inside a straight run (same grid step before and after it) adds no
    vertex: the centres are in line, so the line drawn is the same. Decided on
    the integer grid steps, so it is exact.
    """
    keep = np.ones(cells.shape[0], dtype=bool)
    if cells.shape[0] > 2:
        step = np.diff(cells.astype(np.int64), axis=0)
        keep[1:-1] = np.any(step[1:] != step[:-1], axis=1)
    return np.flatnonzero(keep)


def _check(table: AssetTable) -> None:
    if not isinstance(table, AssetTable):
        raise InvalidParameter(f"expected an AssetTable from assess_assets(), not {type(table).__name__}")


# --------------------------------------------------------------------------- file names


def asset_file_names(level: Any, unit: Any) -> tuple[str, str]:
    """``assets_{h}.csv`` and ``assets_{h}.geojson`` for one water level.

    ``{h}`` is :func:`sillmark.io.stage_files.level_label`, as in the other files
    of the level.

    >>> asset_file_names(47.6, "m")
    ('assets_47.60m.csv', 'assets_47.60m.geojson')
    """

    h = level_label(level, unit)
    return f"assets_{h}.csv", f"assets_{h}.geojson"


def what_if_file_name(height: Any, unit: Any) -> str:
    """``what_if_raise_{H}.csv``, with ``H`` the height written like a level.

    >>> what_if_file_name(0.5, "m"), what_if_file_name(2, "ft")
    ('what_if_raise_0.50m.csv', 'what_if_raise_2.00ft.csv')
    """

    return f"what_if_raise_{level_label(height, unit)}.csv"


# --------------------------------------------------------------------------- what-if


def what_if_row(what_if: WhatIf, dem: Any, *, kind: str = "", assets_behind_sill: int = 1) -> dict[str, Any]:
    """One row of ``what_if_raise_{H}.csv`` as plain values, units in the keys.

    Elevations and onset stages are the shortest decimals of their float32
    values; ``gain_{u}`` is the decimal difference of the onset stages (as the
    depths of :func:`asset_columns`). ``assets_behind_sill`` is how many assets
    share the raised sill (one flood serves them all). The row holds no arrays,
    so keeping it does not keep the what-if's flood alive.
    """
    if not isinstance(what_if, WhatIf):
        raise InvalidParameter(f"expected a WhatIf from raise_sill(), not {type(what_if).__name__}")
    v = unit_suffix(what_if.unit)
    h = horizontal_unit_suffix(dem)
    before, after = what_if.sill_before, what_if.sill_after

    def f32(value: Any) -> float:
        return float(_short(value))

    return {
        "name": what_if.name if what_if.name is not None else "",
        "kind": kind,
        "row": int(what_if.row),
        "col": int(what_if.col),
        f"height_{v}": f32(what_if.height),
        f"onset_before_{v}": f32(what_if.onset_before),
        f"onset_after_{v}": f32(what_if.onset_after),
        f"gain_{v}": _difference(what_if.onset_after, what_if.onset_before),
        "sill_before_row": int(before.row),
        "sill_before_col": int(before.col),
        f"sill_before_x_{h}": float(before.x),
        f"sill_before_y_{h}": float(before.y),
        f"sill_before_elevation_{v}": f32(before.elevation),
        f"raised_elevation_{v}": f32(what_if.raised_elevation),
        "raised_cells": int(what_if.raised_cells),
        "sill_after_row": int(after.row),
        "sill_after_col": int(after.col),
        f"sill_after_x_{h}": float(after.x),
        f"sill_after_y_{h}": float(after.y),
        f"sill_after_elevation_{v}": f32(after.elevation),
        "raised_cell_controls": bool(what_if.raised_cell_controls),
        "assets_behind_sill": int(assets_behind_sill),
        "explanation": what_if.explanation,
    }


def write_what_if_csv(
    rows: list[dict[str, Any]],
    dem: Any,
    path: str | os.PathLike,
    *,
    height: Any,
) -> Path:
    """Write ``what_if_raise_{H}.csv`` from rows of :func:`what_if_row`, in the order given.

    The header on the first line, then the rows; with no rows the header is
    still written. The height is in the file name; the caution and what the
    columns mean are in the folder's ``README.txt``.
    """

    unit = VerticalUnit.parse(dem.vertical_unit)
    v = unit_suffix(unit)
    h = horizontal_unit_suffix(dem)
    header = list(rows[0]) if rows else list(_what_if_header(v, h))
    for row in rows:
        if list(row) != header:
            raise InvalidParameter("the what-if rows differ in their columns; build them all with what_if_row()")
    columns = {name: [row[name] for row in rows] for name in header}
    return write_table_csv(path, _object_columns(columns, len(rows)))


def _object_columns(columns: dict, n: int) -> dict[str, np.ndarray]:
    """Every column as an object array, so each value is written as it is
    (:func:`sillmark.io.csv_tables.cell_text`: booleans as true/false, lists as JSON)."""
    out = {}
    for name, values in columns.items():
        array = np.empty(n, dtype=object)
        for k, value in enumerate(values):  # one by one: a value may itself be a list
            array[k] = value
        out[name] = array
    return out


def _what_if_header(v: str, h: str) -> tuple[str, ...]:
    return (
        "name", "kind", "row", "col", f"height_{v}", f"onset_before_{v}", f"onset_after_{v}",
        f"gain_{v}", "sill_before_row", "sill_before_col", f"sill_before_x_{h}", f"sill_before_y_{h}",
        f"sill_before_elevation_{v}", f"raised_elevation_{v}", "sill_after_row", "sill_after_col",
        f"sill_after_x_{h}", f"sill_after_y_{h}", f"sill_after_elevation_{v}",
        "raised_cell_controls", "assets_behind_sill", "explanation",
    )
