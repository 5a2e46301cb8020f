"""HTML pages: the list of sites, a new site, a site (its map or its progress), its
settings, the printed report, and the method and its limitations."""

from __future__ import annotations

import datetime as _dt
import threading

import numpy as np
from flask import Blueprint, current_app, render_template, request, url_for

from sillmark.errors import InvalidParameter
from sillmark.units import area_units, unit_words
from sillmark.web import db, get_db, reach_inputs, render, services
from sillmark.web.access import open_site, site_assets, site_row
from sillmark.web.dem_description import UNIT_SOURCE_TEXT
from sillmark.web.mapview import LEAFLET_VERSION, site_map
from sillmark.web.report import print_report
from sillmark.web.site_data import parse_level
from sillmark.web.sites import SiteNotReady, run_dict
from sillmark.web.tiles import warm

bp = Blueprint("pages", __name__)

_warmed: set = set()
_warm_lock = threading.Lock()


@bp.get("/")
def index():
    return render_template("index.html", sites=services().registry.sites(get_db()))


@bp.get("/sites/new")
def new_site():
    limit = int(current_app.config["MAX_UPLOAD_BYTES"])
    return render_template("new_site.html", max_upload_bytes=limit)


@bp.get("/sites/<int:site_id>")
def site(site_id: int):
    svc = services()
    row = site_row(site_id)
    described = svc.registry.describe(get_db(), row)
    if described["state"] == "draft":
        return _settings_page(described, first_time=True)
    if described["state"] in ("queued", "running", "failed"):
        return render_template("progress.html", site=described)
    try:
        _, data = open_site(site_id)
    except SiteNotReady as exc:
        # The results on disk no longer open (an older format, or missing files):
        # offer to make them again, or follow the run already doing so.
        latest = described["latest_run"]
        busy = latest is not None and latest["status"] in ("queued", "running") \
            and latest["id"] != described["current_run"]
        return render_template("progress.html", site=described, stale=None if busy else str(exc))
    _warm(data)
    rng = data.level_range()
    level = rng["initial"]
    text = request.args.get("level")
    if text is not None:
        level = float(parse_level(text))
    parts = site_map(data, site_id=site_id, level=level)
    config = {
        "site_id": site_id,
        "run_id": data.run_id,
        "unit": data.unit.value,
        "unit_symbol": data.unit.symbol,
        "unit_words": unit_words(data.unit),
        "datum": described["vertical_datum"],
        "is_feet": data.unit.is_feet,
        "range": rng,
        "areas": area_units(data.unit).as_dict(),
        "level": level,
        "names": parts.names,
        "legend": render.legend(data.unit.value, data.unit.symbol, ground=_ground(data)),
        "bounds": data.summary.get("lonlat_bounds"),
        # What a traced water body is submitted with (the site's other settings, unchanged).
        "settings": {
            "url": url_for("uploads.settings", site_id=site_id),
            "name": described["name"],
            "vertical_unit": described["vertical_unit"],
            "vertical_datum": described["vertical_datum"] or "",
            "outlets": sorted({o["kind"] for o in described["outlets"]} - {"file"}),
            "connectivity": described["connectivity"],
        },
    }
    return render_template("site.html", site=described, data=data, parts=parts, config=config,
                           summary=data.summary, leaflet_version=LEAFLET_VERSION)


@bp.get("/sites/<int:site_id>/settings")
def site_settings(site_id: int):
    described = services().registry.describe(get_db(), site_row(site_id))
    return _settings_page(described, first_time=not described["confirmed"])


def _settings_page(described: dict, *, first_time: bool):
    return render_template("settings.html", site=described, first_time=first_time,
                           unit_source=UNIT_SOURCE_TEXT.get(described["dem"].get("vertical_unit_source"), ""),
                           max_side_bytes=int(current_app.config["MAX_SIDE_FILE_BYTES"]),
                           reach_files=reach_inputs.names(services().data_dir, described["id"]))


@bp.get("/sites/<int:site_id>/print")
def print_map(site_id: int):
    row, data = open_site(site_id)
    conn = get_db()
    described = services().registry.describe(conn, row)
    text = request.args.get("level")
    if text is None:
        raise InvalidParameter("give the water level to print, e.g. ?level=47.6")
    level = float(parse_level(text))
    parts = site_map(data, site_id=site_id, level=level, for_print=True)
    run_row = db.get_run(conn, data.run_id)
    run = None
    if run_row is not None:
        run = {**run_dict(run_row), "settings": db.loads(run_row["settings"], {})}
    key, placed = site_assets(site_id, data)
    table = data.asset_table(key, placed, np.float32(level)) if placed is not None else None
    paper = print_report(data, described, run, level, table)
    config = {
        "site_id": site_id,
        "run_id": data.run_id,
        "unit": data.unit.value,
        "unit_symbol": data.unit.symbol,
        "unit_words": unit_words(data.unit),
        "datum": described["vertical_datum"],
        "is_feet": data.unit.is_feet,
        "areas": area_units(data.unit).as_dict(),
        "level": level,
        "names": parts.names,
        "legend": render.legend(data.unit.value, data.unit.symbol, ground=_ground(data)),
        "bounds": data.summary.get("lonlat_bounds"),
        "draw": paper["map"],
        "print": True,
    }
    now = _dt.datetime.now().astimezone()
    return render_template("print.html", site=described, parts=parts, config=config, level=level,
                           paper=paper, printed=now.strftime("%Y-%m-%d %H:%M %Z").strip(),
                           summary=data.summary)


@bp.get("/method")
def method():
    """What the analysis computes, what it leaves out, and when to ask an engineer."""
    return render_template("method.html")


def _ground(data) -> tuple | None:
    """The site's lowest and highest ground (what the relief tint spans), or None."""
    lo, hi = data.summary.get("elevation_min"), data.summary.get("elevation_max")
    return None if lo is None or hi is None else (float(lo), float(hi))


def _warm(data) -> None:
    """Prepare the tile lookups of a site in the background, once per opened run."""

    key = (data.site_id, data.run_id)
    with _warm_lock:
        if key in _warmed:
            return
        _warmed.add(key)
    zooms = int(current_app.config["WARM_ZOOMS"])
    if zooms < 0:
        return
    cache = services().tiles
    threading.Thread(target=warm, args=(data, cache, zooms), daemon=True,
                     name=f"sillmark-warm-{data.site_id}").start()
