"""Named scenarios of a site in the web app, and their comparison with the base.

A scenario is the site's DEM plus a set of edits (an uploaded edits GeoJSON,
or the wall the barrier planner found), analysed in the background by the
same engine as the base (:mod:`sillmark.web.scenario_run`, through the job
runner). Routes:

- ``GET /api/sites/<id>/scenarios``: the site's scenarios with their run's
  state, phase and percent;
- ``POST /api/sites/<id>/scenarios``: a new scenario, from a form (``name``,
  file field ``edits``) or JSON (``name``, ``edits`` as a FeatureCollection,
  ``source``); the edits are read on the DEM first, and a bad one is refused
  (400) with the engine's one line naming the feature; 202 and the run queued;
- ``GET /api/sites/<id>/scenarios/<n>``, ``DELETE`` the same (its files too),
  ``POST .../<n>/run`` (analyse it again against the site's current results);
- ``GET /api/sites/<id>/scenarios/<n>/compare?level=``: newly flooded and
  newly protected areas, the legend, and the change of onset stage of the
  assets and the depressions (paged: ``page``, ``asset_page``, ``per_page``,
  ``changed=1`` for the depressions whose onset stage changed);
- ``GET /tiles/<id>/scenario/<n>/<level>/<z>/<x>/<y>.png``: the compare map;
- ``GET /sites/<id>/files/scenario/<n>/<level>.zip``: every export of the comparison.

The comparison itself is :mod:`sillmark.products.scenario_compare`; this
module only finds the arrays and serialises.
"""

from __future__ import annotations

import json
import os
import shutil
import threading
from pathlib import Path

import numpy as np
from flask import Blueprint, abort, current_app, jsonify, request, send_file, url_for

from sillmark import SCREENING_CAUTION
from sillmark.errors import InvalidParameter
from sillmark.grid.edits import read_edits
from sillmark.io.scenario_files import write_comparison, zip_folder
from sillmark.io.stage_files import level_label
from sillmark.products.scenario_compare import (
    NEWLY_FLOODED,
    NEWLY_PROTECTED,
    OnsetChanges,
    compare_at_level,
    compare_codes,
    depression_changes,
    onset_changes,
)
from sillmark.units import area_units, datum_phrase, level_text
from sillmark.web import barriers, db, get_db, layout, render, services
from sillmark.web.access import open_site, site_assets, site_row
from sillmark.web.caches import LockedLRU
from sillmark.web.scenario_run import load_onset
from sillmark.web.site_data import parse_level
from sillmark.web.sites import SiteNotReady, UnknownSite, run_dict
from sillmark.web.tiles import _check_tile, _tile
from sillmark.web.uploads import _received

bp = Blueprint("scenarios", __name__)

#: Colours of the compare map (RGB) and their opacity (0-255): a brick red for
#: ground the edits bring water to, a sea green for ground they keep dry.
NEWLY_FLOODED_COLOUR = (196, 58, 38)
NEWLY_PROTECTED_COLOUR = (38, 140, 110)
COMPARE_ALPHA = 175
_PLTE = bytes((0, 0, 0)) + bytes(NEWLY_FLOODED_COLOUR) + bytes(NEWLY_PROTECTED_COLOUR)
_TRNS = bytes((0, COMPARE_ALPHA, COMPARE_ALPHA))

LEGEND = (
    {"code": NEWLY_FLOODED, "key": "newly_flooded",
     "label": "newly flooded: dry in the base, wet with the scenario's edits",
     "colour": "#%02x%02x%02x" % NEWLY_FLOODED_COLOUR},
    {"code": NEWLY_PROTECTED, "key": "newly_protected",
     "label": "newly protected: wet in the base, dry with the scenario's edits",
     "colour": "#%02x%02x%02x" % NEWLY_PROTECTED_COLOUR},
)

MAX_NAME = 80
#: Most scenarios one site keeps (each holds a full set of result files).
MAX_SCENARIOS = 50
#: Rows of a change table in one answer, at most.
MAX_PER_PAGE = 200


# --------------------------------------------------------------------------- rows


def _name(text) -> str:
    clean = "".join(ch for ch in str(text or "") if ch.isprintable()).strip()
    if not clean:
        raise InvalidParameter("give the scenario a name, e.g. 'culvert under Ford Road'")
    if len(clean) > MAX_NAME:
        raise InvalidParameter(f"a scenario's name has at most {MAX_NAME} characters")
    return clean


def _scenario(conn, site_id: int, scenario_id: int):
    row = conn.execute("SELECT * FROM scenarios WHERE id = ? AND site_id = ?",
                       (int(scenario_id), int(site_id))).fetchone() \
        if 0 < scenario_id < 2**63 and 0 < site_id < 2**63 else None  # ids SQLite can hold
    if row is None:
        raise UnknownSite(f"there is no scenario {scenario_id} on site {site_id}")
    return row


def _state(run) -> str:
    return "queued" if run is None else {db.DONE: "done"}.get(run["status"], run["status"])


def describe(conn, site, row) -> dict:
    """A scenario as the page lists it: its edits, its run's state, whether it is up to date."""
    run = db.get_run(conn, row["run_id"]) if row["run_id"] else None
    return {
        "id": int(row["id"]),
        "name": row["name"],
        "created_utc": row["created_utc"],
        "edits_name": row["edits_name"],
        "edit_count": int(row["edit_count"]),
        "state": _state(run),
        "run": run_dict(run) if run is not None else None,
        "up_to_date": int(row["base_run"]) == int(site["current_run"] or 0),
        "edits_url": url_for("scenarios.edits_file", site_id=site["id"], scenario_id=row["id"]),
    }


# --------------------------------------------------------------------------- list, create, delete


@bp.get("/api/sites/<int:site_id>/scenarios")
def listing(site_id: int):
    conn = get_db()
    site = site_row(site_id)
    rows = conn.execute("SELECT * FROM scenarios WHERE site_id = ? ORDER BY id", (site_id,)).fetchall()
    return jsonify({"scenarios": [describe(conn, site, r) for r in rows],
                    "caution": SCREENING_CAUTION})


@bp.get("/api/sites/<int:site_id>/scenarios/<int:scenario_id>")
def one(site_id: int, scenario_id: int):
    conn = get_db()
    return jsonify({**describe(conn, site_row(site_id), _scenario(conn, site_id, scenario_id)),
                    "caution": SCREENING_CAUTION})


@bp.get("/sites/<int:site_id>/files/scenario/<int:scenario_id>/edits.geojson")
def edits_file(site_id: int, scenario_id: int):
    row = _scenario(get_db(), site_id, scenario_id)
    path = layout.site_dir(services().data_dir, site_id) / row["edits_file"]
    return send_file(path, mimetype="application/geo+json", as_attachment=True,
                     download_name="scenario_edits.geojson", max_age=0)


def _edits_received(folder: Path):
    """(name, edits source name, path of the edits written into ``folder``) of the request."""
    limit = int(current_app.config["MAX_SIDE_FILE_BYTES"])
    target = folder / layout.new_name(".geojson")
    if request.is_json:
        body = request.get_json(silent=True)
        if not isinstance(body, dict) or not isinstance(body.get("edits"), dict):
            raise InvalidParameter("send the scenario as JSON with 'name' and 'edits' (a GeoJSON "
                                   "FeatureCollection), or as a form with an edits file")
        text = json.dumps(body["edits"])
        if len(text) > limit:
            abort(413, "the edits are larger than the upload limit")
        target.write_text(text, encoding="utf-8")
        source = "".join(ch for ch in str(body.get("source") or "drawn edits") if ch.isprintable())
        return body.get("name"), source[:120], target
    with _received("edits", limit=limit) as (path, original):
        shutil.copyfile(path, target)
    return request.form.get("name"), os.path.basename(str(original or "edits.geojson"))[:120], target


@bp.post("/api/sites/<int:site_id>/scenarios")
def create(site_id: int):
    """A new scenario: the edits read on the site's DEM, then its run queued (202)."""
    svc = services()
    conn = get_db()
    site, data = open_site(site_id)
    folder = layout.site_dir(svc.data_dir, site_id) / "scenarios"
    folder.mkdir(parents=True, exist_ok=True)
    name, source, path = _edits_received(folder)
    try:
        name = _name(name)
        if conn.execute("SELECT 1 FROM scenarios WHERE site_id = ? AND name = ?",
                        (site_id, name)).fetchone():
            raise InvalidParameter(f"this site already has a scenario named {name!r}; "
                                   "choose another name")
        count = conn.execute("SELECT COUNT(*) FROM scenarios WHERE site_id = ?", (site_id,)).fetchone()[0]
        if count >= MAX_SCENARIOS:
            raise InvalidParameter(f"this site has {count} scenarios, the most it keeps; "
                                   "delete some first")
        placed = read_edits(path, data.dem)  # InvalidEdits: one line naming the feature
        if not len(placed):
            raise InvalidParameter("the edits file holds no edits; give at least one culvert, "
                                   "barrier or breach")
        base = db.get_run(conn, site["current_run"])
        rel = f"scenarios/{path.name}"
        with db.transaction(conn):
            cur = conn.execute(
                "INSERT INTO scenarios(site_id, name, created_utc, edits_file, edits_name, "
                "edit_count, base_run) VALUES (?, ?, ?, ?, ?, ?, ?)",
                (site_id, name, db.utc_now(), rel, source, len(placed), int(site["current_run"])))
            scenario_id = int(cur.lastrowid)
            run_id = _queue(conn, site_id, scenario_id, base, rel, source)
    except BaseException:
        path.unlink(missing_ok=True)
        raise
    svc.runner.submit(run_id)
    row = _scenario(conn, site_id, scenario_id)
    response = jsonify({**describe(conn, site_row(site_id), row), "caution": SCREENING_CAUTION})
    response.status_code = 202
    return response


def _queue(conn, site_id: int, scenario_id: int, base, rel: str, source: str) -> int:
    """Queue the scenario's run with the base run's settings; inside a transaction."""
    return db.queue_scenario_run(conn, site_id, scenario_id, int(base["id"]),
                                 db.loads(base["settings"], {}), rel, source)


def _busy(conn, row) -> bool:
    run = db.get_run(conn, row["run_id"]) if row["run_id"] else None
    return run is not None and run["status"] in (db.QUEUED, db.RUNNING)


@bp.post("/api/sites/<int:site_id>/scenarios/<int:scenario_id>/run")
def rerun(site_id: int, scenario_id: int):
    """Analyse the scenario again, against the site's current results (202)."""
    conn = get_db()
    site, _ = open_site(site_id)
    row = _scenario(conn, site_id, scenario_id)
    if _busy(conn, row):
        raise SiteNotReady(f"scenario {row['name']!r} is being analysed already")
    base = db.get_run(conn, site["current_run"])
    with db.transaction(conn):
        run_id = _queue(conn, site_id, scenario_id, base, row["edits_file"], row["edits_name"])
    services().runner.submit(run_id)
    response = jsonify(describe(conn, site_row(site_id), _scenario(conn, site_id, scenario_id)))
    response.status_code = 202
    return response


@bp.delete("/api/sites/<int:site_id>/scenarios/<int:scenario_id>")
def delete(site_id: int, scenario_id: int):
    """Remove a scenario, its runs and its files (refused while it is being analysed)."""
    conn = get_db()
    row = _scenario(conn, site_id, scenario_id)
    if _busy(conn, row):
        raise SiteNotReady(f"scenario {row['name']!r} is being analysed; delete it once "
                           "its run has ended")
    runs = [r["id"] for r in conn.execute("SELECT id FROM runs WHERE scenario_id = ?",
                                          (scenario_id,)).fetchall()]
    with db.transaction(conn):
        conn.execute("DELETE FROM runs WHERE scenario_id = ?", (scenario_id,))
        conn.execute("DELETE FROM scenarios WHERE id = ?", (scenario_id,))
    data_dir = services().data_dir
    (layout.site_dir(data_dir, site_id) / row["edits_file"]).unlink(missing_ok=True)
    for run_id in runs:
        shutil.rmtree(layout.run_dir(data_dir, site_id, run_id), ignore_errors=True)
    return jsonify({"deleted": scenario_id, "name": row["name"]})


# --------------------------------------------------------------------------- comparison


class _Opened:
    """A finished scenario beside the site's open results: its onset stage and caches."""

    def __init__(self, data, row) -> None:
        folder = layout.run_dir(services().data_dir, data.site_id, row["run_id"])
        self.run_id = int(row["run_id"])
        self.name = row["name"]
        self.onset = load_onset(folder)
        if self.onset.shape != data.dem.shape:
            raise SiteNotReady(f"scenario {row['name']!r} was made on another grid; run it again")
        self.onset_flat = self.onset.reshape(-1)
        self.levels = LockedLRU(64)
        self.depressions = depression_changes(data.result.depressions, data.result.onset_stage,
                                              self.onset)


_OPEN_LOCK = threading.Lock()


def _open(site_id: int, scenario_id: int):
    """(site row, open site, scenario row, _Opened), or 404 / 409 with the reason."""
    site, data = open_site(site_id)
    conn = get_db()
    row = _scenario(conn, site_id, scenario_id)
    run = db.get_run(conn, row["run_id"]) if row["run_id"] else None
    if run is None or run["status"] != db.DONE:
        if run is not None and run["status"] == db.FAILED:
            raise SiteNotReady(f"scenario {row['name']!r} failed: {run['message']}")
        phase = f" ({run['phase']}, {run['percent']:.0f} %)" if run is not None else ""
        raise SiteNotReady(f"scenario {row['name']!r} is still being analysed{phase}")
    if int(row["base_run"]) != int(site["current_run"]):
        raise SiteNotReady(f"the site was analysed again since scenario {row['name']!r} was; "
                           "run the scenario again to compare it with the new results")
    with _OPEN_LOCK:
        cache = getattr(data, "_scenarios", None)
        if cache is None:
            cache = data._scenarios = LockedLRU(4)
    found = cache.get(int(row["run_id"]))
    if found is None:
        found = _Opened(data, row)
        cache.put(int(row["run_id"]), found)
    return site, data, row, found


def planning_ground(site_id: int, scenario_id: int):
    """The ground of a scenario analysed against the site's current run, for the
    barrier planner (:func:`sillmark.web.barriers.scenario_ground`)."""
    _, data, row, opened = _open(site_id, scenario_id)
    path = layout.site_dir(services().data_dir, site_id) / row["edits_file"]
    return barriers.scenario_ground(data, row["name"], int(row["id"]), path, opened.onset)


def _areas(data, opened: _Opened, level) -> dict:
    key = float(level)
    hit = opened.levels.get(key)
    if hit is None:
        with data.engine_lock:
            hit = compare_at_level(data.result.onset_stage, opened.onset, level,
                                   row_areas=data.dem.row_areas, elevation=data.dem.elevation,
                                   keep_codes=False)
        opened.levels.put(key, hit)
    return hit


def _page(values, changes, level, page: int, per_page: int, only_changed: bool = False,
          among: np.ndarray | None = None) -> dict:
    """One page of the places of ``changes``: those of ``among`` (a bool mask; all when
    None), and of them only those whose onset stage changed with ``only_changed``."""
    wet_before, wet_after = changes.states(level)
    mask = np.ones(len(changes), dtype=bool) if among is None else np.asarray(among, dtype=bool).copy()
    if only_changed:
        with np.errstate(invalid="ignore"):
            mask &= changes.change != 0
    keep = np.flatnonzero(mask)
    total = int(keep.size)
    pages = max(1, -(-total // per_page))
    page = min(max(page, 1), pages)
    rows = []
    for k in keep[(page - 1) * per_page: page * per_page]:
        k = int(k)
        rows.append({**values(k),
                     "onset_base": _num(changes.before[k]),
                     "onset_scenario": _num(changes.after[k]),
                     "change": _num(changes.change[k]),
                     "state_base": "wet" if wet_before[k] else "dry",
                     "state_scenario": "wet" if wet_after[k] else "dry"})
    return {"total": total, "page": page, "pages": pages, "per_page": per_page, "rows": rows}


def _num(v) -> float | None:
    v = float(v)
    return v if np.isfinite(v) else None


def _int_arg(name: str, default: int, low: int, high: int) -> int:
    text = request.args.get(name)
    if text is None or text == "":
        return default
    try:
        value = int(text)
    except ValueError:
        raise InvalidParameter(f"{name} must be a whole number") from None
    return min(max(value, low), high)


def _asset_places(site_id: int, data):
    """(Assets, rows, cols) of the site's active assets, or (None, None, None)."""
    _, placed = site_assets(site_id, data)
    if placed is None:
        return None, None, None
    rows = np.array([a.row if a.status == "ok" else -1 for a in placed], np.int64)
    cols = np.array([a.col if a.status == "ok" else -1 for a in placed], np.int64)
    return placed, rows, cols


@bp.get("/api/sites/<int:site_id>/scenarios/<int:scenario_id>/compare")
def compare(site_id: int, scenario_id: int):
    level = parse_level(request.args.get("level", ""))
    site, data, row, opened = _open(site_id, scenario_id)
    per_page = _int_arg("per_page", 25, 1, MAX_PER_PAGE)
    c = _areas(data, opened, level)
    unit, datum = data.unit, site["vertical_datum"]
    units = area_units(unit)
    areas = {"units": units.as_dict()}
    for key, m2 in (("newly_flooded", c.newly_flooded_m2), ("newly_protected", c.newly_protected_m2)):
        areas[f"{key}_m2"] = m2
        areas[f"{key}_{units.small_area_key}"] = float(units.small(m2))
        areas[f"{key}_{units.large_area_key}"] = float(units.large(m2))
    placed, rows, cols = _asset_places(site_id, data)
    assets = None
    if placed is not None:
        changes = onset_changes(data.result.onset_stage, opened.onset, rows, cols)
        assets = _page(lambda k: {"index": k, "name": placed[k].name}, changes, level,
                       _int_arg("asset_page", 1, 1, 2**31), per_page)
    t = data.result.depressions

    def depression(k: int) -> dict:
        x, y = data.dem.xy(int(t.pit_row[k]), int(t.pit_col[k]))
        lon, lat = data.lonlat(float(x), float(y))
        return {"id": k + 1, "pit_x": float(x), "pit_y": float(y), "lon": float(lon),
                "lat": float(lat)}

    # The depressions the site lists (its significance minimum), as its own table does.
    depressions = _page(depression, opened.depressions, level, _int_arg("page", 1, 1, 2**31),
                        per_page, only_changed=request.args.get("changed") in ("1", "true"),
                        among=data.listed)
    label = level_label(level, unit)
    return jsonify({
        "scenario": describe(get_db(), site, row),
        "level": float(level),
        "level_text": level_text(float(level), unit, datum),
        "unit_symbol": unit.symbol,
        "datum": datum_phrase(datum),
        "cells": c.cells,
        "areas": areas,
        "legend": [dict(item, opacity=round(COMPARE_ALPHA / 255, 2)) for item in LEGEND],
        "tiles": f"/tiles/{site_id}/scenario/{scenario_id}/{float(level):.3f}/{{z}}/{{x}}/{{y}}.png",
        "zip_url": url_for("scenarios.compare_zip", site_id=site_id, scenario_id=scenario_id,
                           level=f"{float(level):.3f}"),
        "zip_name": f"sillmark_site{site_id}_scenario{scenario_id}_{label}.zip",
        "assets": assets,
        "depressions": depressions,
        "caution": SCREENING_CAUTION,
    })


@bp.get("/tiles/<int:site_id>/scenario/<int:scenario_id>/<level>/<int:z>/<int:x>/<int:y>.png")
def tile(site_id: int, scenario_id: int, level: str, z: int, x: int, y: int):
    _check_tile(z, x, y)
    h = parse_level(level)
    _, data, _, opened = _open(site_id, scenario_id)

    def draw() -> bytes:
        index = services().tiles.get(data.grid, z, x, y)
        if index is None:
            return render.BLANK_PNG
        out = np.zeros(index.shape, np.uint8)
        inside = index >= 0
        cells = index[inside]
        codes = compare_codes(data.onset_flat[cells], opened.onset_flat[cells], h)
        out[inside] = np.where(codes == NEWLY_FLOODED, 1, np.where(codes == NEWLY_PROTECTED, 2, 0))
        if not out.any():
            return render.BLANK_PNG
        return render.encode_palette_png(out.reshape(render.TILE, render.TILE), _PLTE, _TRNS)

    return _tile(data, ("scenario", opened.run_id, repr(float(h)), z, x, y), draw)


_ZIP_LOCKS: dict = {}
_ZIP_LOCK = threading.Lock()


@bp.get("/sites/<int:site_id>/files/scenario/<int:scenario_id>/<level>.zip")
def compare_zip(site_id: int, scenario_id: int, level: str):
    """The compare GeoTIFF, the area and change CSVs, the edits file and README.txt, zipped."""
    h = parse_level(level)
    site, data, row, opened = _open(site_id, scenario_id)
    svc = services()
    unit = data.unit
    label = level_label(h, unit)
    key, placed = site_assets(site_id, data)
    tag = f"assets{key[1]}" if key else "noassets"
    folder = layout.levels_dir(svc.data_dir, site_id, opened.run_id) / f"compare_{label}_{tag}"
    zip_name = f"sillmark_site{site_id}_scenario{scenario_id}_{label}.zip"
    cache = svc.exports
    with _ZIP_LOCK:
        gate = _ZIP_LOCKS.setdefault(str(folder), threading.Lock())

    def write(tmp: Path) -> None:
        # The depressions the site lists (its significance minimum), as the page does.
        t = data.result.depressions
        k = np.arange(len(t)) if data.listed is None else np.flatnonzero(data.listed)
        xs, ys = data.dem.xy(np.asarray(t.pit_row)[k], np.asarray(t.pit_col)[k])
        lead = {"depression_id": k + 1, "pit_x": np.atleast_1d(xs), "pit_y": np.atleast_1d(ys)}
        ch = opened.depressions
        changes = OnsetChanges(before=ch.before[k], after=ch.after[k], change=ch.change[k])
        assets = None
        _, rows, cols = _asset_places(site_id, data)
        if placed is not None:
            assets = ({"name": np.array([a.name for a in placed], dtype=object),
                       "x": np.array([a.x for a in placed]), "y": np.array([a.y for a in placed])},
                      onset_changes(data.result.onset_stage, opened.onset, rows, cols))
        edits = json.loads((layout.site_dir(svc.data_dir, site_id) / row["edits_file"])
                           .read_text(encoding="utf-8"))
        comparison = _areas(data, opened, h)
        with data.engine_lock:
            write_comparison(
                tmp, grid=data.dem, comparison=comparison,
                codes=lambda r0, r1: compare_codes(data.result.onset_stage[r0:r1],
                                                   opened.onset[r0:r1], h,
                                                   valid=~np.isnan(data.dem.elevation[r0:r1])),
                scenario_name=row["name"], edits=edits, depressions=(lead, changes),
                assets=assets, vertical_datum=site["vertical_datum"],
                connectivity=data.result.connectivity)
        zip_folder(tmp, tmp / zip_name)

    for _ in range(3):
        if not cache.known(folder):
            with gate:
                if not cache.known(folder):
                    cache.build(folder, write, what=f"the comparison at {label}")
        handle = cache.open(folder, zip_name)
        if handle is not None:
            return send_file(handle, mimetype="application/zip", as_attachment=True,
                             download_name=zip_name, max_age=0)
    abort(503, "the comparison's exports were removed to make room while they were being "
               "written; ask again")

