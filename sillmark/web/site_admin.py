"""Looking after sites: every file of a run, renaming and deleting a site.

- The Files tab lists what the run's results folder actually holds (read from
  the folder, so files a newer version adds appear without a list to update);
  each file can be downloaded by its name.
- Editors may rename a site (a name another site already has is refused and
  said so) and delete it, after typing its name to confirm; deleting removes its
  records and every file of it from the data folder. Viewers may do neither:
  the sign-in check refuses them any change before these views run.
"""

from __future__ import annotations

import logging
import shutil
import sqlite3
import uuid
from pathlib import Path

from flask import (
    Blueprint,
    jsonify,
    redirect,
    render_template,
    request,
    send_file,
    url_for,
)

from sillmark.errors import InvalidParameter
from sillmark.web import db, get_db, layout, services, wants_json
from sillmark.web.access import site_row

log = logging.getLogger(__name__)

bp = Blueprint("admin", __name__)

#: Longest site name kept, in characters (as for names taken from uploads).
NAME_LENGTH = 80

#: What each file of a results folder holds, by name (or by the start of its name).
_WHAT = {
    "onset_stage.tif": "onset stage (GeoTIFF)",
    "fill_depth.tif": "fill depth (GeoTIFF)",
    "depression_id.tif": "depression ids (GeoTIFF)",
    "flood_tree.tif": "flood tree (GeoTIFF)",
    "depressions.csv": "depression table (CSV)",
    "depressions.geojson": "depression outlines (GeoJSON)",
    "depressions.gpkg": "depression outlines (GeoPackage)",
    "spill_points.geojson": "spill points (GeoJSON)",
    "spill_points.gpkg": "spill points (GeoPackage)",
    "depression_hierarchy.csv": "nested depressions: pits and merged pools (CSV)",
    "depression_hierarchy.json": "nested depressions: pits and merged pools (JSON)",
    "depression_curves.csv": "stage–area and stage–storage curves of every depression (CSV)",
    "summary.json": "summary of the run (JSON)",
    "README.txt": "what each file is, units and the caution (text)",
}
_SUFFIX_WHAT = {
    ".sld": "map style for a desktop GIS (OGC SLD)",
    ".tif": "raster (GeoTIFF)",
    ".geojson": "vector layer (GeoJSON)",
    ".gpkg": "vector layer (GeoPackage)",
    ".csv": "table (CSV)",
    ".json": "data (JSON)",
    ".txt": "text",
}
_MIMETYPES = {".geojson": "application/geo+json", ".json": "application/json", ".csv": "text/csv",
              ".tif": "image/tiff", ".sld": "application/vnd.ogc.sld+xml",
              ".gpkg": "application/geopackage+sqlite3", ".txt": "text/plain"}


def describe_file(name: str) -> str:
    """A few words on what a result file holds."""
    if name in _WHAT:
        return _WHAT[name]
    suffix = Path(name).suffix.lower()
    if suffix == ".sld":
        layer = Path(name).stem
        return f"map style of {layer} for a desktop GIS (OGC SLD)"
    return _SUFFIX_WHAT.get(suffix, "file")


def folder_files(folder: Path) -> list[dict]:
    """Every file of a results folder (not hidden or temporary ones), by name, with its size."""
    try:
        entries = sorted(folder.iterdir(), key=lambda p: (p.suffix.lower() == ".sld", p.name))
    except OSError:
        return []
    out = []
    for path in entries:
        if path.name.startswith(".") or not path.is_file():
            continue
        out.append({"name": path.name, "what": describe_file(path.name),
                    "bytes": path.stat().st_size})
    return out


def run_files(site_id: int, run_id: int | None) -> list[dict]:
    """The files of one run of a site, each with its download address."""
    if not run_id:
        return []
    folder = layout.results_dir(services().data_dir, site_id, run_id)
    files = folder_files(folder)
    for f in files:
        f["url"] = url_for("admin.run_file", site_id=site_id, name=f["name"])
    return files


@bp.app_context_processor
def _for_templates():
    return {"run_files": run_files}


@bp.get("/api/sites/<int:site_id>/files")
def files(site_id: int):
    """Every file of the site's current run, read from its results folder."""
    row = site_row(site_id)
    return jsonify({"site_id": site_id, "run_id": row["current_run"],
                    "files": run_files(site_id, row["current_run"])})


@bp.get("/api/sites/<int:site_id>/files/run/<name>")
def run_file(site_id: int, name: str):
    """One file of the site's current run, by a name the folder holds."""
    row = site_row(site_id)
    if not row["current_run"]:
        return _refuse(409, "this site has no finished analysis yet")
    folder = layout.results_dir(services().data_dir, site_id, row["current_run"])
    names = {f["name"] for f in folder_files(folder)}
    if name not in names:  # only names read from the folder: no path of the sender's making
        return _refuse(404, f"the run has no file {name!r}; the Files tab lists those it has")
    mimetype = _MIMETYPES.get(Path(name).suffix.lower(), "application/octet-stream")
    return send_file(folder / name, mimetype=mimetype, as_attachment=True, download_name=name,
                     max_age=0)


# --------------------------------------------------------------------------- names


def clean_site_name(text) -> str:
    """A site name as kept: printable characters, single spaces, at most :data:`NAME_LENGTH`."""
    words = "".join(ch if ch.isprintable() else " " for ch in str(text or "")).split()
    name = " ".join(words)[:NAME_LENGTH].strip()
    if not name:
        raise InvalidParameter("give the site a name (letters, digits or other printable characters)")
    return name


def _name_key(name: str) -> str:
    return " ".join(str(name).split()).casefold()


def same_named(conn: sqlite3.Connection, name: str, *, other_than: int | None = None) -> list[int]:
    """Ids of the sites called ``name`` (ignoring case and spacing), but ``other_than``."""
    key = _name_key(name)
    rows = conn.execute("SELECT id, name FROM sites ORDER BY id").fetchall()
    return [int(r["id"]) for r in rows if _name_key(r["name"]) == key and r["id"] != other_than]


def duplicate_names(sites: list[dict]) -> set[str]:
    """Names (as :func:`_name_key` keys) that more than one of ``sites`` carries."""
    seen: dict[str, int] = {}
    for s in sites:
        key = _name_key(s["name"])
        seen[key] = seen.get(key, 0) + 1
    return {k for k, n in seen.items() if n > 1}


@bp.app_template_filter("name_key")
def _name_key_filter(name: str) -> str:
    return _name_key(name)


@bp.app_context_processor
def _duplicates_for_templates():
    return {"duplicate_names": duplicate_names}


# --------------------------------------------------------------------------- rename, delete


def _manage_page(row, *, status: int = 200, message: str | None = None, done: str | None = None,
                 proposed: str | None = None):
    return render_template("manage_site.html", site=row, message=message, done=done,
                           proposed=proposed if proposed is not None else row["name"]), status


def _refuse(status: int, message: str, **details):
    if wants_json():
        response = jsonify({**details, "error": message, "status": status})
        response.status_code = status
        return response
    return render_template("error.html", status=status, message=message), status


@bp.get("/sites/<int:site_id>/manage")
def manage(site_id: int):
    """The page to rename or delete a site."""
    row = site_row(site_id)
    done = {"renamed": "The site was renamed."}.get(request.args.get("done", ""))
    return _manage_page(row, done=done)


def _sent(field: str) -> str:
    if request.is_json:
        body = request.get_json(silent=True) or {}
        return str(body.get(field, "") if isinstance(body, dict) else "")
    return str(request.form.get(field, ""))


@bp.post("/sites/<int:site_id>/rename")
def rename(site_id: int):
    """Give a site another name; a name another site has is refused (409)."""
    row = site_row(site_id)
    sent = _sent("name")
    try:
        name = clean_site_name(sent)
    except InvalidParameter as exc:
        if wants_json():
            return _refuse(400, str(exc))
        return _manage_page(row, status=400, message=str(exc), proposed=sent)
    conn = get_db()
    with db.transaction(conn):
        others = same_named(conn, name, other_than=site_id)
        if not others:
            conn.execute("UPDATE sites SET name = ? WHERE id = ?", (name, site_id))
    if others:
        message = (f"another site (number {others[0]}) is already called “{name}”; choose a name "
                   "no other site has, so the two cannot be mistaken for each other")
        if wants_json():
            return _refuse(409, message, duplicate_of=others)
        return _manage_page(row, status=409, message=message, proposed=name)
    if wants_json():
        return jsonify({"id": site_id, "name": name})
    return redirect(url_for("admin.manage", site_id=site_id, done="renamed"), code=303)


@bp.post("/sites/<int:site_id>/delete")
def delete(site_id: int):
    """Delete a site, its runs and every file of it, once its name is typed to confirm."""
    row = site_row(site_id)
    typed = " ".join(_sent("confirm_name").split())
    if typed != " ".join(str(row["name"]).split()):
        message = ("to delete the site, type its name exactly as shown "
                   f"(“{row['name']}”); nothing was deleted")
        if wants_json():
            return _refuse(400, message)
        return _manage_page(row, status=400, message=message)
    conn = get_db()
    with db.transaction(conn):
        busy = conn.execute("SELECT COUNT(*) FROM runs WHERE site_id = ? AND status IN (?, ?)",
                            (site_id, db.QUEUED, db.RUNNING)).fetchone()[0]
        if not busy:
            conn.execute("DELETE FROM sites WHERE id = ?", (site_id,))
    if busy:
        message = ("an analysis of this site is queued or running; wait until it ends, then "
                   "delete the site (nothing was deleted)")
        if wants_json():
            return _refuse(409, message)
        return _manage_page(row, status=409, message=message)
    _remove_site_files(site_id)
    log.info("site %s (%s) deleted", site_id, row["name"])
    if wants_json():
        return jsonify({"deleted": site_id})
    return redirect(url_for("pages.index"), code=303)


def _remove_site_files(site_id: int) -> None:
    """Forget the site's open results and cached exports, then remove its folder."""
    svc = services()
    svc.cache.drop(site_id)
    folder = layout.site_dir(svc.data_dir, site_id)
    svc.exports.forget_under(folder)
    if not folder.exists():
        return
    # Out of the way first (one rename), so a site made later never meets half a folder.
    trash = folder.with_name(f".deleted-{folder.name}-{uuid.uuid4().hex[:8]}")
    try:
        folder.rename(trash)
    except OSError:
        trash = folder
    shutil.rmtree(trash, ignore_errors=True)
    if trash.exists():  # pragma: no cover - e.g. a file held open on some platforms
        log.warning("some files of deleted site %s could not be removed from %s", site_id, trash)
