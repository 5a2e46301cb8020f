"""The barrier planner in the browser app: the shortest wall keeping a place dry up to a level.

For an asset, a location clicked on the map or a polygon drawn on it (every
cell it covers must stay dry), and a target outlet water
level ``L``, :func:`barrier_report` asks
:func:`sillmark.products.barrier_planner.plan_barrier` for the fewest cells to
raise to ``L`` (a minimum vertex cut between the place and the outlets in the
graph of cells below ``L``) and serialises the answer for the map: the wall as
lines in WGS 84, its length on the ground in the site's ground unit and its
cell count, or, where no wall can do it, why, in words. The wall also comes as
an edits file (one ``barrier`` feature per piece, crest ``L``) that
``sillmark analyse --edits`` reads.
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import math
from pathlib import Path
from typing import Any

import numpy as np
import pyproj

from sillmark import SCREENING_CAUTION
from sillmark.engine.culverts import culvert_edges
from sillmark.engine.flood import OUTLET_CODE
from sillmark.errors import InvalidParameter, LocationOutsideDEM
from sillmark.grid.crs import to_wgs84
from sillmark.grid.edits import read_edits
from sillmark.grid.ground import ground_unit, position_text
from sillmark.grid.places import read_place_polygon
from sillmark.products.barrier_planner import plan_barrier
from sillmark.units import level_text

__all__ = ["MAX_POLYGON_TEXT", "barrier_report"]

#: Longest polygon, as GeoJSON text, a request may draw (a hand-drawn place has
#: a few dozen vertices).
MAX_POLYGON_TEXT = 200_000


def _place(data, assets, values: dict) -> tuple[np.ndarray, str, str]:
    """(cells, name, key) of the place a request names: ``asset`` index, ``polygon``
    (a GeoJSON geometry, WGS 84 lon/lat or a named ``crs``), or ``lon`` and ``lat``.

    ``cells`` is a bool mask on the DEM; ``key`` tells places apart in the cache.
    """
    polygon = values.get("polygon")
    if polygon is not None and polygon != "":
        if isinstance(polygon, str):
            # Form text: parsed here, so it is never taken for a path on the server.
            if len(polygon) > MAX_POLYGON_TEXT:
                raise InvalidParameter(f"the polygon is longer than {MAX_POLYGON_TEXT:,} "
                                       "characters; draw it with fewer vertices")
            try:
                polygon = json.loads(polygon)
            except (ValueError, RecursionError):
                raise InvalidParameter("the polygon is not valid JSON; give a GeoJSON geometry "
                                       "(an object with 'type': 'Polygon' and its "
                                       "'coordinates')") from None
        if isinstance(polygon, dict):
            if len(json.dumps(polygon)) > MAX_POLYGON_TEXT:
                raise InvalidParameter(f"the polygon is longer than {MAX_POLYGON_TEXT:,} "
                                       "characters; draw it with fewer vertices")
        if not isinstance(polygon, dict):
            raise InvalidParameter("give the polygon as a GeoJSON geometry (an object with "
                                   "'type': 'Polygon' and its 'coordinates')")
        place = read_place_polygon(polygon, data.dem)
        cells = np.flatnonzero(place.mask)
        key = "polygon:" + hashlib.sha256(cells.astype(np.int64).tobytes()).hexdigest()
        at = position_text(data.dem, place.x, place.y)
        return place.mask, f"the drawn place of {place.cells} cells round {at}", key
    asset = values.get("asset")
    if asset is not None and str(asset).strip() != "":
        if assets is None:
            raise InvalidParameter("this site has no assets; upload an asset table first, or "
                                   "give a location as lon and lat")
        try:
            index = int(str(asset).strip())
        except ValueError:
            raise InvalidParameter("give the asset as its index in the asset table "
                                   "(asset=0, 1, ...)") from None
        if not 0 <= index < len(assets):
            raise InvalidParameter(f"there is no asset {index}; indices run from 0 to "
                                   f"{len(assets) - 1}")
        a = assets[index]
        if a.status != "ok":
            raise InvalidParameter(f"asset {a.name!r} has no place on the DEM ({a.status})")
        return _one_cell(data, int(a.row), int(a.col)), a.name, f"cell:{a.row},{a.col}"
    lon, lat = values.get("lon"), values.get("lat")
    if lon is None or lat is None:
        raise InvalidParameter("give the place as an asset index (asset=0), a location (lon "
                               "and lat in WGS 84 degrees) or a polygon (GeoJSON)")
    try:
        lon, lat = float(lon), float(lat)
    except (TypeError, ValueError):
        raise InvalidParameter("lon and lat must be numbers of degrees") from None
    row, col = data.cell_at(lon, lat)
    x, y = data.dem.xy(row, col)
    return (_one_cell(data, row, col),
            f"the location at {position_text(data.dem, float(x), float(y))}", f"cell:{row},{col}")


def _one_cell(data, row: int, col: int) -> np.ndarray:
    if not math.isfinite(float(data.dem.elevation[row, col])):
        raise LocationOutsideDEM("there is no elevation at that place (nodata)")
    mask = np.zeros(data.dem.shape, dtype=bool)
    mask[row, col] = True
    return mask


@dataclasses.dataclass(frozen=True)
class PlanningGround:
    """The ground a barrier is planned on: the site's, or a scenario's (its edits in place).

    ``elevation`` and ``onset_stage`` are whole-grid arrays; ``culverts`` the
    scenario's culverts and flap valves as edges of the flood graph (None for
    none); ``features`` the scenario's own edits, lon/lat, which a saved
    scenario keeps beside the wall (None when the file names another CRS).
    """

    key: str
    label: str
    elevation: np.ndarray
    onset_stage: np.ndarray
    culverts: Any = None
    features: list | None = None


def site_ground(data) -> PlanningGround:
    """The site's own ground: its DEM and its run's onset stages, no culverts."""
    return PlanningGround("site", "the site as it is", data.dem.elevation,
                          data.result.onset_stage)


def scenario_ground(data, name: str, scenario_id: int, edits_path, onset_stage) -> PlanningGround:
    """A scenario's ground: the site's DEM with the scenario's barriers and breaches,
    its culverts, and the onset stages of its own run."""
    placed = read_edits(edits_path, data.dem)
    elevation, _ = placed.apply(data.dem.elevation)
    culverts = None
    if placed.culverts:
        culverts = culvert_edges(data.dem.shape, **placed.culvert_ends(), elevation=elevation)
    body = json.loads(Path(edits_path).read_text(encoding="utf-8"))
    return PlanningGround(f"scenario:{scenario_id}", f"scenario {name!r}", elevation,
                          onset_stage, culverts, _lonlat_features(body))


def _lonlat_features(body: dict) -> list:
    """The features of an edits file with lon/lat positions (RFC 7946), whatever
    named CRS the file gave (read as :func:`sillmark.grid.edits.read_edits` reads it)."""
    features = [dict(f) for f in body.get("features") or []]
    member = body.get("crs")
    if not member:
        return features
    transformer = to_wgs84(pyproj.CRS.from_user_input(member["properties"]["name"]))

    def lonlat(coords):
        if coords and isinstance(coords[0], (int, float)):
            lon, lat = transformer.transform(float(coords[0]), float(coords[1]))
            return [round(lon, 9), round(lat, 9)]
        return [lonlat(c) for c in coords]

    for f in features:
        geometry = dict(f["geometry"])
        geometry["coordinates"] = lonlat(geometry["coordinates"])
        f["geometry"] = geometry
    return features


def barrier_report(data, assets, values: dict, level: np.float32, datum: str | None = None,
                   ground: PlanningGround | None = None) -> dict:
    """Plan the shortest barrier for the place in ``values`` at ``level``, as the map draws it.

    Parameters
    ----------
    data : sillmark.web.site_data.SiteData
    assets : Assets or None
        The site's placed assets (for ``values["asset"]``).
    values : dict
        ``asset`` (an index), ``polygon`` (a GeoJSON geometry: every cell it
        covers must stay dry) or ``lon`` and ``lat`` (WGS 84 degrees).
    level : float32
        Target outlet water level, in the site's vertical unit.
    datum : str or None
        The site's vertical datum, for the words.
    ground : PlanningGround, optional
        Where to plan: default the site's own ground (:func:`site_ground`); a
        scenario's (:func:`scenario_ground`) plans against its edits, culverts
        included, and its edits file then holds the scenario's edits and the wall.

    Returns
    -------
    dict
        ``possible``, ``needed``, ``message`` (the answer in words), and for a
        wall: ``cells``, ``length`` with ``length_unit``, ``line`` (GeoJSON
        MultiLineString in WGS 84) and ``edits`` (the edits file).
        ``place_cells`` counts the place's cells; ``row`` and ``col`` are the
        one that water reaches first.
    """
    ground = site_ground(data) if ground is None else ground
    place, name, place_key = _place(data, assets, values)
    onsets = np.where(place, ground.onset_stage, np.inf)
    first = int(np.argmin(np.where(np.isnan(onsets), np.inf, onsets)))
    row, col = divmod(first, data.dem.shape[1])
    z = float(ground.elevation[row, col])
    onset = float(ground.onset_stage[row, col])
    unit = data.unit
    key = (place_key, float(level), datum, ground.key)
    out = data.barrier_plans.get(key)
    if out is not None:
        return {**out, "name": name}
    count = int(np.count_nonzero(place))
    base = {
        "row": row, "col": col, "place_cells": count,
        "level": float(level), "onset_stage": onset if math.isfinite(onset) else None,
        "ground_elevation": z,
        "unit": unit.value, "unit_symbol": unit.symbol,
        "cells": 0, "length": 0.0, "length_unit": ground_unit(data.dem)[0], "length_m": 0.0,
        "line": None, "edits": None, "caution": SCREENING_CAUTION, "ground": ground.label,
    }
    at = level_text(float(level), unit, datum)
    its = "Its onset stage" if count == 1 else f"The onset stage of its first cell to get wet (of {count})"
    if not math.isfinite(onset):
        out = {**base, "possible": True, "needed": False,
               "message": "No outlet reaches this place at any level: no barrier is needed."}
    elif float(level) <= onset:
        out = {**base, "possible": True, "needed": False,
               "message": f"{its} is {level_text(onset, unit, datum)}: it stays dry below "
                          f"{at} without a barrier. Choose a level above its onset stage."}
    else:
        outlets = data.result.flood_tree == OUTLET_CODE
        with data.engine_lock:  # one heavy computation at a time per site
            plan = plan_barrier(ground.elevation, outlets, place, float(level),
                                connectivity=int(data.result.connectivity),
                                culverts=ground.culverts)
        out = _wall(data, base, plan, at, datum, ground)
    data.barrier_plans.put(key, out)
    return {**out, "name": name}


def _wall(data, base: dict, plan, at: str, datum: str | None, ground: PlanningGround) -> dict:
    if not plan.possible:
        reason = plan.reason.split(":")[0]
        return {**base, "possible": False, "needed": True,
                "message": f"No barrier can keep it dry up to {at}: {reason}. Water stands "
                           "against it straight from an outlet, so a wall would have to be "
                           "built on the place itself."}
    if plan.cells == 0:
        return {**base, "possible": True, "needed": False,
                "message": f"No barrier is needed up to {at}: {plan.reason.split(':')[0]}."}
    length = plan.ground_length(data.dem)
    pieces = plan.pieces
    lines, features = [], []
    for k, (r, c) in enumerate(pieces):
        x, y = data.dem.xy(r, c)
        x, y = np.atleast_1d(x).astype(float), np.atleast_1d(y).astype(float)
        if x.size == 1:  # a one-cell plug: a short line across its cell, west to east
            half = abs(data.dem.transform.a) / 4
            x, y = np.array([x[0] - half, x[0] + half]), np.array([y[0], y[0]])
        lon, lat = data.lonlat(x, y)
        coords = [[round(float(a), 9), round(float(b), 9)] for a, b in zip(lon, lat)]
        lines.append(coords)
        features.append({
            "type": "Feature",
            "properties": {"kind": "barrier", "crest": float(plan.level),
                           "name": f"planned barrier {k + 1}" if len(pieces) > 1 else "planned barrier",
                           "planned_cells": int(r.size)},
            "geometry": {"type": "LineString", "coordinates": coords},
        })
    edits = {
        "type": "FeatureCollection",
        "name": "planned barrier",
        "description": (f"Shortest barrier with crest {at} found by the barrier planner; "
                        "feed it to sillmark analyse --edits."),
        "caution": SCREENING_CAUTION,
        "features": features,
    }
    touched = sum(len(e.rows) for e in read_edits(edits, data.dem).items)
    if ground.features:
        # Planned on a scenario's ground: saved as a scenario, the wall keeps its company.
        edits["features"] = ground.features + features
        edits["description"] += f" Planned on {ground.label}, whose edits come first."
    words = "piece" if len(pieces) == 1 else "pieces"
    return {
        **base, "possible": True, "needed": True,
        "cells": plan.cells, "pieces": len(pieces),
        "length": length.value, "length_unit": length.unit, "length_m": length.metres,
        "edit_cells": int(touched),
        "line": {"type": "MultiLineString", "coordinates": lines},
        "edits": edits,
        "message": (f"Raise {plan.cells} cells to a crest of {at}: a barrier "
                    f"{length.text()} long in {len(pieces)} {words} keeps it dry up to that level."),
    }
