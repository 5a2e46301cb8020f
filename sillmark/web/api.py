"""JSON API and downloads of the browser app (``/api/...``).

Views are short: parse the request, ask :mod:`sillmark.web.sites` (which calls
:mod:`sillmark`), serialise. Errors come back as ``{"error": message}`` with a
4xx status (see :func:`sillmark.web.create_app`). Levels are in the site's vertical
unit; areas in m² and ha and volumes in m³ on every site, and for sites in feet
also in ft², acres and acre-ft (``*_ft2``, ``*_acres``, ``*_acre_ft``; the
``areas`` member names the units a page shows, :func:`sillmark.units.area_units`).
"""

from __future__ import annotations

import os
import secrets
import threading
import zipfile
from pathlib import Path

from flask import Blueprint, abort, jsonify, request, send_file, url_for

from sillmark import SCREENING_CAUTION
from sillmark.errors import InvalidParameter
from sillmark.grid.crs import SEARCH_MAX, search_crs
from sillmark.io.asset_files import write_assets_csv, write_assets_geojson
from sillmark.io.csv_tables import write_depression_table_csv
from sillmark.io.geotiff import tag_vertical_datum
from sillmark.io.stage_files import (
    level_file_names,
    level_label,
    write_level,
    write_stage_table_csv,
)
from sillmark.io.styles import write_styles
from sillmark.io.summary import FILE_NAMES
from sillmark.products.source import ArraySource
from sillmark.units import datum_phrase
from sillmark.web import (
    barriers,
    db,
    depression_index,
    exports,
    get_db,
    layout,
    render,
    scenarios,
    services,
)
from sillmark.web.access import open_site, site_assets, site_row
from sillmark.web.site_data import parse_level
from sillmark.web.sites import run_dict

bp = Blueprint("api", __name__, url_prefix="/api")

#: The response header that carries the caution with every file download: a CSV
#: starts with its header row and has no place for it of its own.
CAUTION_HEADER = "X-Sillmark-Caution"


@bp.after_request
def _caution_on_downloads(response):
    """Every file sent as a download carries the screening caution in a header."""
    if response.headers.get("Content-Disposition", "").startswith("attachment"):
        response.headers[CAUTION_HEADER] = SCREENING_CAUTION
    return response

_export_locks: dict = {}
_export_guard = threading.Lock()

#: Downloads of one water level: kind -> (file name attribute or asset file, mimetype).
LEVEL_FILES = {
    "depth": "image/tiff",
    "water_state": "image/tiff",
    "flood_extent": "application/geo+json",
    "shielded": "application/geo+json",
    "depressions": "text/csv",
    "assets_csv": "text/csv",
    "assets_geojson": "application/geo+json",
}


def _lock_for(key) -> threading.Lock:
    with _export_guard:
        return _export_locks.setdefault(key, threading.Lock())


def _level_arg(required: bool = True):
    text = request.args.get("level")
    if text is None:
        if required:
            raise InvalidParameter("give a water level, e.g. ?level=47.6 (in the site's vertical unit)")
        return None
    return parse_level(text)


# --------------------------------------------------------------------------- sites and runs


@bp.get("/sites")
def sites():
    return jsonify({"sites": services().registry.sites(get_db()), "caution": SCREENING_CAUTION})


@bp.get("/sites/<int:site_id>")
def site(site_id: int):
    return jsonify(services().registry.describe(get_db(), site_row(site_id)))


@bp.get("/sites/<int:site_id>/status")
def status(site_id: int):
    """What the progress panel polls: the site's state and its latest run."""
    d = services().registry.describe(get_db(), site_row(site_id))
    response = jsonify({"state": d["state"], "current_run": d["current_run"], "run": d["latest_run"]})
    response.headers["Cache-Control"] = "no-store"
    return response


@bp.post("/sites/<int:site_id>/rerun")
def rerun(site_id: int):
    svc = services()
    run_id = svc.registry.rerun(get_db(), site_id)
    svc.runner.submit(run_id)
    response = jsonify({"run_id": run_id, "status_url": url_for("api.status", site_id=site_id)})
    response.status_code = 202
    return response


@bp.get("/crs")
def crs_search():
    """CRSs of the EPSG registry matching ``?q=`` (a code or words of a name), at most
    ``?limit=`` (default 10, at most 25): what the upload page's CRS chooser lists."""
    text = request.args.get("q", "")
    limit_text = request.args.get("limit", "10")
    if not limit_text.isdigit() or len(limit_text) > 3:
        raise InvalidParameter(f"limit must be a whole number from 1 to {SEARCH_MAX}")
    found = search_crs(text, limit=int(limit_text))
    response = jsonify({"query": text[:80], "results": [
        {"code": c.code, "name": c.name, "kind": c.kind,
         "area": c.area if len(c.area) <= 90 else c.area[:89] + "…"} for c in found]})
    response.headers["Cache-Control"] = "max-age=3600"
    return response


# --------------------------------------------------------------------------- the map's numbers


@bp.get("/sites/<int:site_id>/stage")
def stage(site_id: int):
    """Flooded and shielded totals, depression states and assets wet at ``?level=``."""
    level = _level_arg()
    row, data = open_site(site_id)
    key, assets = site_assets(site_id, data)
    return jsonify({**data.figures(level, key, assets), **_datum(row)})


def _datum(row) -> dict:
    """The vertical datum every answer with levels carries (None: not stated)."""
    return {"vertical_datum": row["vertical_datum"], "datum_phrase": datum_phrase(row["vertical_datum"])}


@bp.get("/sites/<int:site_id>/stage_table")
def stage_table(site_id: int):
    row, data = open_site(site_id)
    return jsonify({**data.stage_chart, **_datum(row)})


@bp.get("/sites/<int:site_id>/legend")
def legend(site_id: int):
    _, data = open_site(site_id)
    return jsonify(render.legend(data.unit.value, data.unit.symbol))


@bp.get("/sites/<int:site_id>/depressions")
def depressions(site_id: int):
    """One page of the depression table, sorted and filtered on the server.

    ``?page=&per_page=&sort=&order=&q=&min_depth=&min_area_m2=&min_volume_m3=&state=&level=``
    (see :func:`sillmark.web.depression_index.table_query`); the answer gives
    ``total`` (every depression), ``matched`` (those the filters keep), the page
    and ``not_shown``. The whole inventory is the result files' download.
    """
    level = _level_arg(required=False)
    row, data = open_site(site_id)
    query = depression_index.table_query(request.args, None if level is None else float(level))
    return jsonify({"unit": data.unit.value, "unit_symbol": data.unit.symbol,
                    **data.depressions.page(query), "caution": SCREENING_CAUTION,
                    "significance": data.summary.get("significance"),
                    "full_inventory_csv": url_for("api.depressions_all_csv", site_id=site_id),
                    **_datum(row)})


@bp.get("/sites/<int:site_id>/depressions_all.csv")
def depressions_all_csv(site_id: int):
    """Every depression of the current run, those below the significance minimum too,
    with a ``significant`` column (the full inventory; written on first request and
    kept with the run)."""
    _, data = open_site(site_id)
    folder = layout.run_dir(services().data_dir, site_id, data.run_id) / "inventory"
    path = folder / "depressions_all.csv"
    if not path.is_file():
        with _lock_for((site_id, data.run_id, "inventory")):
            if not path.is_file():
                folder.mkdir(parents=True, exist_ok=True)
                listed = data.listed
                extra = None if listed is None else {"significant": listed}
                write_depression_table_csv(data.result.depressions, data.dem, path, extra=extra)
    return send_file(path, mimetype="text/csv", as_attachment=True,
                     download_name="depressions_all.csv")


@bp.get("/sites/<int:site_id>/depressions/<int:depression_id>/curve")
def depression_curve(site_id: int, depression_id: int):
    _, data = open_site(site_id)
    return jsonify(data.depression_curve(depression_id))


def _view_args() -> tuple:
    bbox = depression_index.parse_bbox(request.args.get("bbox"))
    level = _level_arg(required=False)
    return bbox, None if level is None else float(level)


@bp.get("/sites/<int:site_id>/depressions.geojson")
def depressions_geojson(site_id: int):
    """Outlines of at most ``?limit=`` (default 200, at most 500) depressions meeting
    ``?bbox=west,south,east,north`` (WGS 84; the whole site without it), largest
    first, with their figures (and their state at ``?level=``); ``in_view`` and
    ``more_not_shown`` say how many the answer leaves out (with ``?whole=1``, none
    is given unless all of them fit; ``?min_area_m2=`` leaves out smaller ones).
    Every outline is in
    ``depressions`` of the result files."""
    bbox, level = _view_args()
    limit = depression_index.whole_arg(request.args, "limit", depression_index.VIEW_LIMIT, 1,
                                    depression_index.MAX_VIEW_LIMIT)
    row, data = open_site(site_id)
    whole = request.args.get("whole", "0") not in ("0", "", "false")
    min_area = depression_index.number_arg(request.args, "min_area_m2", "an area in m²")
    found = data.depressions.in_view(bbox, limit=limit, level=level, whole=whole, min_area_m2=min_area)
    response = jsonify({**found, "unit_symbol": data.unit.symbol, "caution": SCREENING_CAUTION,
                        "full_inventory": _full_file(site_id, "depressions"), **_datum(row)})
    response.mimetype = "application/geo+json"
    return response


@bp.get("/sites/<int:site_id>/spill_points.geojson")
def spill_points_geojson(site_id: int):
    """Spill points of at most ``?limit=`` (default and most 5000) depressions meeting
    ``?bbox=``, largest first; ``more_not_shown`` counts the others."""
    bbox, _ = _view_args()
    limit = depression_index.whole_arg(request.args, "limit", depression_index.MAX_SPILL_POINTS, 1,
                                    depression_index.MAX_SPILL_POINTS)
    row, data = open_site(site_id)
    response = jsonify({**data.depressions.spill_points(bbox, limit=limit), "unit_symbol": data.unit.symbol,
                        "caution": SCREENING_CAUTION, "full_inventory": _full_file(site_id, "spill_points"),
                        **_datum(row)})
    response.mimetype = "application/geo+json"
    return response


def _full_file(site_id: int, stem: str) -> str | None:
    """Download address of the result file holding every feature of a layer, if listed."""
    for suffix in (".gpkg", ".geojson"):
        if stem + suffix in FILE_NAMES:
            return url_for("api.result_file", site_id=site_id, name=stem + suffix)
    return None


@bp.get("/sites/<int:site_id>/outlets.geojson")
def outlets_geojson(site_id: int):
    """The cells the run's flood started from, as WGS84 GeoJSON (for the map)."""
    _, data = open_site(site_id)
    return jsonify(data.outlet_outline)


@bp.get("/sites/<int:site_id>/cell")
def cell(site_id: int):
    """Elevation, onset stage, depth at ``?level=`` and the route of the cell at ``?lon=&lat=``."""
    level = _level_arg()
    lon = _float_arg("lon")
    lat = _float_arg("lat")
    row, data = open_site(site_id)
    return jsonify({**data.cell_report(lon, lat, level), **_datum(row)})


def _float_arg(name: str) -> float:
    text = request.args.get(name)
    if text is None:
        raise InvalidParameter(f"give {name} in WGS 84 degrees, e.g. ?lon=8.57&lat=48.85")
    try:
        value = float(text)
    except ValueError:
        raise InvalidParameter(f"{name} must be a number of degrees, not {text[:40]!r}") from None
    if value != value or value in (float("inf"), float("-inf")):
        raise InvalidParameter(f"{name} must be a finite number of degrees")
    return value


#: Assets one answer lists at most (``?page=`` gives the others; a file may hold 10 000).
ASSETS_PER_PAGE = 1000


@bp.get("/sites/<int:site_id>/assets")
def assets(site_id: int):
    """The site's assets with their figures at ``?level=`` (an empty list if it has none),
    at most :data:`ASSETS_PER_PAGE` per answer (``?page=&per_page=``)."""
    level = _level_arg()
    _, data = open_site(site_id)
    key, placed = site_assets(site_id, data)
    row = services().registry.active_assets(get_db(), site_id)
    if placed is None:
        return jsonify({"assets": [], "source": None, "unit": data.unit.value,
                        "unit_symbol": data.unit.symbol, "level": float(level)})
    rows = data.asset_rows(key, placed, level)
    per_page = depression_index.whole_arg(request.args, "per_page", ASSETS_PER_PAGE, 1, ASSETS_PER_PAGE)
    pages = max(1, -(-len(rows) // per_page))
    page = min(depression_index.whole_arg(request.args, "page", 1, 1, 10**9), pages)
    shown = rows[(page - 1) * per_page: page * per_page]
    return jsonify({
        "assets": shown,
        "total": len(rows), "page": page, "pages": pages, "per_page": per_page,
        "not_shown": len(rows) - len(shown),
        "source": {"name": row["original_name"], "count": row["count"], "uploaded_utc": row["created_utc"]},
        "unit": data.unit.value,
        "unit_symbol": data.unit.symbol,
        "level": float(level),
        "caution": SCREENING_CAUTION,
    })


@bp.post("/sites/<int:site_id>/barrier")
def barrier(site_id: int):
    """The shortest barrier keeping an asset (``asset``), a drawn place (``polygon``, a
    GeoJSON geometry) or a location (``lon``, ``lat``) dry up to ``level``: its line,
    length and cells, or why none can."""
    body = request.get_json(silent=True) if request.is_json else None
    values = body if isinstance(body, dict) else request.form
    if values.get("level") is None:
        raise InvalidParameter("give the target level, e.g. level=11.5 (in the site's vertical unit)")
    level = parse_level(values.get("level"))
    row, data = open_site(site_id)
    _, placed = site_assets(site_id, data)
    ground = None
    scenario = values.get("scenario")
    if scenario is not None and str(scenario).strip() not in ("", "site"):
        try:
            scenario_id = int(str(scenario).strip())
        except ValueError:
            raise InvalidParameter("give the scenario as its id (scenario=3), or leave it out "
                                   "to plan on the site as it is") from None
        ground = scenarios.planning_ground(site_id, scenario_id)
    return jsonify(barriers.barrier_report(data, placed, values, level, row["vertical_datum"],
                                           ground=ground))


# --------------------------------------------------------------------------- downloads


def _result_file(site_id: int, name: str, *, attachment: bool = True):
    if name not in FILE_NAMES:
        abort(404, f"no result file {name!r}; the files are: {', '.join(FILE_NAMES)}")
    row = site_row(site_id)
    if not row["current_run"]:
        abort(409, "this site has no finished analysis yet")
    folder = layout.results_dir(services().data_dir, site_id, row["current_run"])
    path = folder / name
    if not path.is_file():
        abort(404, f"the result file {name} is missing; run the analysis again")
    mimetype = ("application/geo+json" if name.endswith(".geojson") else
                "application/json" if name.endswith(".json") else
                "text/csv" if name.endswith(".csv") else "image/tiff")
    return send_file(path, mimetype=mimetype, as_attachment=attachment, download_name=name,
                     max_age=0)


@bp.get("/sites/<int:site_id>/files/results/<name>")
def result_file(site_id: int, name: str):
    """One of the files ``sillmark analyse`` writes, from the site's current run."""
    return _result_file(site_id, name)


def _level_folder(site_id: int, data, level) -> tuple[Path, object]:
    """The export folder of one level, written on first request (write_level + asset files).

    Kept in the size-bounded export cache (:mod:`sillmark.web.exports`): a folder
    used least recently may be removed by a later request, and is written again
    when asked for.
    """

    label = level_label(level, data.unit)
    base = layout.levels_dir(services().data_dir, site_id, data.run_id)
    key, placed = site_assets(site_id, data)
    tag = f"assets{key[1]}" if key else "noassets"
    folder = base / f"{label}_{tag}"
    names = level_file_names(level, data.unit)
    cache = services().exports
    if not cache.known(folder):
        with _lock_for((site_id, data.run_id, label, tag)):
            if not cache.known(folder):

                datum = site_row(site_id)["vertical_datum"]

                def write(tmp: Path) -> None:
                    with data._engine_lock:
                        written = write_level(ArraySource(data.dem, data.result), level, tmp)
                    tag_vertical_datum(written.paths, datum)
                    if placed is not None:
                        table = data.asset_table(key, placed, level)
                        write_assets_csv(table, tmp / f"assets_{label}.csv")
                        write_assets_geojson(table, tmp / f"assets_{label}.geojson")
                        write_styles([tmp / f"assets_{label}.geojson"], data.unit)

                cache.build(folder, write, what=f"the exports at {label}")
    return folder, names


def _open_level_export(site_id: int, data, level, name_of) -> tuple[object, str]:
    """An open export file of one level and its name; ``name_of(folder, names)`` picks it.

    The folder is (re)written if the export cache removed it meanwhile.
    """
    for _ in range(3):
        folder, names = _level_folder(site_id, data, level)
        name = name_of(folder, names)
        try:
            handle = services().exports.open(folder, name)
        except FileNotFoundError:
            abort(404, "this site has no assets; upload an asset table first")
        if handle is not None:
            return handle, name
    abort(503, "the level's exports were removed to make room while they were being "
               "written; ask again")


@bp.get("/sites/<int:site_id>/files/level/<level>/<kind>")
def level_file(site_id: int, level: str, kind: str):
    """One export at a water level: depth, water_state, flood_extent, shielded,
    depressions, assets_csv or assets_geojson."""
    h = parse_level(level)
    if kind not in LEVEL_FILES:
        abort(404, f"no level file {kind!r}; choose one of {', '.join(LEVEL_FILES)}")
    _, data = open_site(site_id)
    label = level_label(h, data.unit)

    def name_of(_folder, names):
        name = {"assets_csv": f"assets_{label}.csv", "assets_geojson": f"assets_{label}.geojson"}.get(kind)
        return getattr(names, kind) if name is None else name

    handle, name = _open_level_export(site_id, data, h, name_of)
    return send_file(handle, mimetype=LEVEL_FILES[kind], as_attachment=True, download_name=name,
                     max_age=0)


@bp.get("/sites/<int:site_id>/files/level/<level>.zip")
def level_zip(site_id: int, level: str):
    """Every export at one water level in one ZIP, with the caution as a text file."""

    h = parse_level(level)
    row, data = open_site(site_id)
    label = level_label(h, data.unit)
    cache = services().exports

    def name_of(folder, _names):
        path = folder / f"sillmark_site{site_id}_{label}.zip"
        if not path.is_file():
            with _lock_for((site_id, data.run_id, folder.name, "zip")):
                if not path.is_file():  # built once; the others waited for it
                    try:
                        _write_level_zip(folder, path, grid=data.dem,
                                         title=f"site {site_id} at water level {label}",
                                         vertical_datum=row["vertical_datum"],
                                         connectivity=data.result.connectivity)
                    except FileNotFoundError:
                        return path.name  # the folder was removed meanwhile: open() says so
                    except OSError as exc:
                        if exports.out_of_space(exc, folder):
                            raise cache.space_error(f"the ZIP of the exports at {label}") from None
                        raise
                    cache.measure(folder)
        return path.name

    handle, name = _open_level_export(site_id, data, h, name_of)
    return send_file(handle, mimetype="application/zip", as_attachment=True, download_name=name,
                     max_age=0)


def _write_level_zip(folder: Path, path: Path, *, grid, title: str, vertical_datum,
                     connectivity: int) -> None:
    """Zip every export of ``folder`` into ``path`` with ``README.txt`` (what each file
    holds, units, datum and the caution; :mod:`sillmark.io.readme`), through a
    temporary file of this call's own (so a second writer can never truncate or move it)."""
    from sillmark.io.readme import README_NAME, readme_text

    tmp = path.with_name(f".{path.stem}.{secrets.token_hex(6)}.tmp")
    try:
        files = [f for f in sorted(folder.iterdir())
                 if f.is_file() and not f.name.startswith(".") and f.suffix != ".zip"
                 and f.name != README_NAME]
        with zipfile.ZipFile(tmp, "w", compression=zipfile.ZIP_DEFLATED) as zf:
            zf.writestr(README_NAME, readme_text(
                [f.name for f in files], grid=grid, title=title, vertical_datum=vertical_datum,
                connectivity=connectivity))
            for f in files:
                zf.write(f, arcname=f.name)
        os.replace(tmp, path)
    finally:
        tmp.unlink(missing_ok=True)


@bp.get("/sites/<int:site_id>/files/stage_table.csv")
def stage_table_csv(site_id: int):
    """The site stage table (the chart's rows) as ``stage_table.csv``."""

    _, data = open_site(site_id)
    path = layout.run_dir(services().data_dir, site_id, data.run_id) / "stage_table.csv"
    if not path.is_file():
        with _lock_for((site_id, data.run_id, "stage_table")):
            if not path.is_file():
                write_stage_table_csv(ArraySource(data.dem, data.result), data.stage_table, path)
    return send_file(path, mimetype="text/csv", as_attachment=True, download_name="stage_table.csv",
                     max_age=0)


@bp.get("/runs/<int:run_id>")
def run(run_id: int):
    row = db.get_run(get_db(), run_id)
    if row is None:
        abort(404, f"there is no run {run_id}")

    return jsonify({**run_dict(row), "site_id": row["site_id"]})
