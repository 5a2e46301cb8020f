"""What the printed report of a site shows at one outlet water level.

The print page (``templates/print.html``) is a document one files: the water-level
map with what its legend lists drawn on it (the routes by which water reaches
each asset, their controlling sills, the spill points, the named assets), a table
of each asset's state and depth, the totals at the level, the site stage chart,
the DEM and the run it came from, and a short statement of the method and its
limits. This module gathers those figures on the server, from the site's open
results, so that every number on the paper is one the engine computed; the page's
script only draws them.

Everything a person reads is in ground units and coordinates: levels carry the
vertical datum (or "datum not stated"), areas and volumes are in hectares and
cubic metres on metric sites and in acres and acre-feet on feet sites.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from sillmark import SCREENING_CAUTION
from sillmark.grid.assets import STATUS_OUTSIDE
from sillmark.units import (
    ACRE_FOOT_M3,
    ACRE_M2,
    VerticalUnit,
    datum_phrase,
    level_text,
    unit_words,
)

#: Spill points drawn on the paper at most (the largest depressions first); more
#: would hide the map under their symbols.
MAX_SPILL_POINTS = 150

#: Assets whose routes are drawn at most (every asset is still in the table).
MAX_ROUTES = 60


def area_text(m2: float | None, unit: VerticalUnit) -> str:
    """An area as the site's people read it: ha or m² (metric), acres or ft² (feet).

    Examples
    --------
    >>> area_text(25_000.0, VerticalUnit.METRE)
    '2.50 ha'
    >>> area_text(640.0, VerticalUnit.METRE)
    '640 m²'
    >>> area_text(ACRE_M2 * 3, VerticalUnit.US_SURVEY_FOOT)
    '3.00 acres'
    """
    if m2 is None or not math.isfinite(m2):
        return "–"
    if unit.is_feet:
        if m2 < ACRE_M2 / 10:
            return f"{m2 / 0.3048 ** 2:,.0f} ft²"
        return f"{m2 / ACRE_M2:,.2f} acres"
    if m2 < 1e4:
        return f"{m2:,.0f} m²"
    return f"{m2 / 1e4:,.2f} ha"


def volume_text(m3: float | None, unit: VerticalUnit) -> str:
    """A volume: m³ on metric sites, acre-ft on feet sites.

    Examples
    --------
    >>> volume_text(12_345.4, VerticalUnit.METRE)
    '12,345 m³'
    >>> volume_text(ACRE_FOOT_M3 * 2.5, VerticalUnit.FOOT)
    '2.50 acre-ft'
    """
    if m3 is None or not math.isfinite(m3):
        return "–"
    if unit.is_feet:
        return f"{m3 / ACRE_FOOT_M3:,.2f} acre-ft"
    return f"{m3:,.0f} m³"


def _depth_text(value: float | None, unit: VerticalUnit) -> str:
    if value is None or not math.isfinite(value):
        return "–"
    return f"{value:.2f} {unit.symbol}"


def _number(value: float | None) -> str:
    return "–" if value is None or not math.isfinite(value) else f"{value:.2f}"


def _coordinate_lines(x: float, y: float, geographic: bool) -> list[str]:
    """A position as two short lines: easting and northing, or latitude and longitude."""
    if geographic:
        return [f"lat {y:.6f}", f"lon {x:.6f}"]
    return [f"{x:,.1f} E", f"{y:,.1f} N"]


def thin_route(lonlat: np.ndarray) -> np.ndarray:
    """The vertices of a route where its direction changes (and its two ends).

    A route walks from cell centre to cell centre, so long straight runs of
    cells add nothing to the drawn line. ``lonlat`` is (n, 2); the result keeps
    the first and last point and each point where the step before it differs
    from the step after it.

    Examples
    --------
    >>> thin_route(np.array([[0., 0.], [1., 0.], [2., 0.], [3., 1.], [4., 2.]])).tolist()
    [[0.0, 0.0], [2.0, 0.0], [4.0, 2.0]]
    """
    points = np.asarray(lonlat, dtype=np.float64)
    if points.shape[0] <= 2:
        return points
    steps = np.diff(points, axis=0)
    turns = np.any(~np.isclose(steps[1:], steps[:-1], rtol=1e-9, atol=1e-12), axis=1)
    keep = np.concatenate([[True], turns, [True]])
    return points[keep]


def _assets(data, table, unit: VerticalUnit, datum: str | None) -> tuple[list[dict], list[dict]]:
    """Rows of the asset table and the features the map draws (routes, sills, points)."""
    geographic = bool(data.dem.is_geographic)
    rows: list[dict] = []
    drawn: list[dict] = []
    for k in range(len(table)):
        rec = table.record(k)
        state = rec["state"] or ""
        if state == "flooded":
            depth = _depth_text(rec["depth"], unit)
        elif state == "shielded":
            depth = f"{_depth_text(rec['depth_if_reached'], unit)} below, not reached"
        elif state == "dry":
            depth = f"{_depth_text(rec['freeboard'], unit)} to spare"
        else:
            depth = "no figures (" + str(rec["status"]).replace("_", " ") + ")"
        has = table.has_figures(k)
        rows.append({
            "name": rec["name"],
            "kind": (rec["kind"] or "").replace("_", " "),
            "state": state or "no figures",
            "depth": depth,
            "ground": _number(rec["ground_elevation"]) if has else "–",
            "onset": _number(rec["onset_stage"]) if has else "–",
            "sill": ("own ground" if rec["sill_is_own_cell"] else _number(rec["sill_elevation"])) if has else "–",
            "position": _coordinate_lines(rec["x"], rec["y"], geographic)
            if rec["x"] is not None and rec["y"] is not None else ["–"],
        })
        if rec["lon"] is None or rec["lat"] is None or rec["status"] == STATUS_OUTSIDE:
            continue  # an asset off the DEM is off the printed map too; the table still lists it
        item: dict[str, Any] = {"name": rec["name"], "state": state, "lon": rec["lon"], "lat": rec["lat"]}
        if has and len(drawn) < MAX_ROUTES:
            route = thin_route(table.route_lonlat(k))
            item["route"] = [[round(float(a), 7), round(float(b), 7)] for a, b in route]
            sill = table.sill(k)
            slon, slat = data.lonlat(sill.x, sill.y)
            item["sill"] = {"lon": float(slon), "lat": float(slat),
                            "text": level_text(sill.elevation, unit, datum),
                            "own": bool(rec["sill_is_own_cell"])}
        drawn.append(item)
    return rows, drawn


def _spill_points(data, unit: VerticalUnit, datum: str | None) -> tuple[list[dict], int]:
    """The spill points of the largest listed depressions (at most :data:`MAX_SPILL_POINTS`):
    those the site lists under its significance minimum, as its table and map do."""
    t = data.result.depressions
    listed = data.listed
    among = np.arange(len(t)) if listed is None else np.flatnonzero(listed)
    n = int(among.size)
    if n == 0:
        return [], 0
    area = np.asarray(t.area_m2, dtype=np.float64)[among]
    order = among[np.argsort(-area, kind="stable")[:MAX_SPILL_POINTS]]
    lon, lat = data.lonlat(np.asarray(t.spill_x)[order], np.asarray(t.spill_y)[order])
    points = []
    for j, k in enumerate(order):
        if not (math.isfinite(float(lon[j])) and math.isfinite(float(lat[j]))):
            continue
        points.append({"lon": float(lon[j]), "lat": float(lat[j]),
                       "text": "spill " + level_text(float(t.spill_elevation[k]), unit, datum)})
    return points, n - len(order)


def _settings_text(settings: dict, summary: dict) -> list[tuple[str, str]]:
    outlets = summary.get("outlet_sources") or [o.get("kind", "?") for o in settings.get("outlets", [])]
    conn = settings.get("connectivity", summary.get("connectivity"))
    return [
        ("Outlets", ", ".join(str(o) for o in outlets) or "–"),
        ("Connectivity", f"{conn} neighbours" + (" (D8)" if conn == 8 else "")),
        ("Vertical unit", unit_words(settings.get("vertical_unit") or summary.get("vertical_unit") or "m")),
    ]


def print_report(data, described: dict, run: dict | None, level: float, table=None) -> dict:
    """The figures of the printed report at ``level`` (see the module docstring).

    Parameters
    ----------
    data : sillmark.web.site_data.SiteData
        The site's open results.
    described : dict
        :meth:`sillmark.web.sites.Registry.describe` of the site.
    run : dict or None
        The current run: its dates (``created_utc``, ``finished_utc``) and
        ``settings`` (the snapshot the worker ran with).
    level : float
        The outlet water level, in the site's vertical unit.
    table : sillmark.products.assets.AssetTable, optional
        The site's assets assessed at ``level`` (None when it has none).

    Returns
    -------
    dict
        ``level_text``, ``figures`` (key, label, value), ``assets`` (table rows),
        ``map`` (what the page's script draws: assets with routes and sills,
        spill points), ``dem`` and ``run`` (label, value pairs), ``caution``.
    """
    unit = data.unit
    datum = described.get("vertical_datum")
    f = data.figures(np.float32(level))
    figures = [
        ("flooded-area", "Flooded area", area_text(f["flooded_area_m2"], unit)),
        ("flooded-volume", "Water volume", volume_text(f["flooded_volume_m3"], unit)),
        ("shielded-area", "Shielded low ground", area_text(f["shielded_area_m2"], unit)),
        ("depressions", "Depressions overtopped", f"{f['depressions']['overtopped']} of {f['depressions']['total']}"),
    ]
    rows: list[dict] = []
    drawn: list[dict] = []
    if table is not None:
        rows, drawn = _assets(data, table, unit, datum)
        states = [r["state"] for r in rows]
        figures.append(("assets", "Assets wet", f"{states.count('flooded')} of {len(rows)} flooded, "
                                      f"{states.count('shielded')} shielded"))
    spills, not_drawn = _spill_points(data, unit, datum)
    summary = data.summary or {}
    info = described.get("dem") or {}
    cell = info.get("cell_size") or [None]
    dem_rows = [
        ("Source file", described.get("original_name") or "–"),
        ("Uploaded", _date(described.get("created_utc"))),
        ("Grid", f"{summary.get('rows', info.get('rows'))} × {summary.get('cols', info.get('cols'))} cells"
                 + (f" of {cell[0]:g} {info.get('cell_unit', '')}".rstrip() if cell[0] else "")),
        ("CRS", info.get("crs") or "–"),
        ("Heights", unit_words(unit) + (f" above {datum}" if datum else ", datum not stated")),
    ]
    settings = (run or {}).get("settings") or {}
    run_rows = [
        ("Run", f"number {(run or {}).get('id', data.run_id)}"),
        ("Finished", _date((run or {}).get("finished_utc"))),
        *_settings_text(settings, summary),
    ]
    return {
        "level_text": level_text(level, unit, datum),
        # The unit and datum of the level columns, said once in their headings.
        "level_unit": f"{unit.symbol} {datum_phrase(datum)}" if datum else f"{unit.symbol}, {datum_phrase(None)}",
        "figures": figures,
        "assets": rows,
        "map": {"assets": drawn, "spills": spills, "spills_not_drawn": not_drawn},
        "dem": dem_rows,
        "run": run_rows,
        "area_unit": "acres" if unit.is_feet else "ha",
        "volume_unit": "acre-ft" if unit.is_feet else "m³",
        "caution": SCREENING_CAUTION,
    }


def _date(utc: str | None) -> str:
    """``2026-12-03T16:52:10Z`` as ``2026-12-03 16:52 UTC``."""
    if not utc:
        return "–"
    text = str(utc).replace("T", " ").rstrip("Z")
    return text[:16] + " UTC"
