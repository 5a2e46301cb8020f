"""Uploads: a DEM (a new site), a site's settings with an optional water-body
GeoJSON, and asset tables.

Bodies are streamed to disk under a server-made name in ``DATA/uploads/`` and
counted as they arrive: past the configured limit the request ends with 413 and
the partial file is deleted. A file Sillmark cannot use is refused with the
engine's own message (400) and deleted; nothing already stored changes.

The page sends a DEM as the raw request body (so the browser can report upload
progress), with its name in the ``X-File-Name`` header (percent-encoded);
``multipart/form-data`` with a ``dem`` field works too.
"""

from __future__ import annotations

import contextlib
import os
import re
from pathlib import Path
from urllib.parse import unquote

from flask import Blueprint, current_app, jsonify, request, url_for
from werkzeug.exceptions import RequestEntityTooLarge

from analysis.errors import InvalidParameter, SillmarkError
from webapp import get_db, layout, services
from webapp.access import site_row
from webapp.sites import SiteNotReady

bp = Blueprint("uploads", __name__, url_prefix="/uploads")

CHUNK = 1 << 20


@contextlib.contextmanager
def _received(field: str, *, limit: int, required: bool = True):
    """Yield (path, original name) of the uploaded body, deleting the file afterwards.

    Yields (None, None) when ``required`` is False and no file was sent.
    """
    folder = layout.uploads_dir(services().data_dir)
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / (layout.new_name(".bin") + ".part")
    try:
        if request.mimetype == "multipart/form-data":
            upload = request.files.get(field)
            if upload is None or not upload.filename:
                if not required:
                    yield None, None
                    return
                raise InvalidParameter(f"no file in the upload; send it in the form field '{field}'")
            upload.save(path)
            name = upload.filename
            if os.path.getsize(path) > limit:
                raise RequestEntityTooLarge()
        else:
            if request.content_length is not None and request.content_length > limit:
                raise RequestEntityTooLarge()
            name = unquote(request.headers.get("X-File-Name", "")) or request.args.get("name", "upload")
            total = 0
            with open(path, "xb") as fh:
                while True:
                    chunk = request.stream.read(CHUNK)
                    if not chunk:
                        break
                    total += len(chunk)
                    if total > limit:
                        raise RequestEntityTooLarge()
                    fh.write(chunk)
        if os.path.getsize(path) == 0:
            raise InvalidParameter(f"the uploaded file '{_shown(name)}' is empty (0 bytes)")
        try:
            yield path, name
        except SillmarkError as exc:
            raise _in_user_terms(exc, path, name) from None
    finally:
        path.unlink(missing_ok=True)
        # A reader may have renamed the file to give it its proper extension.
        for sibling in folder.glob(path.stem + ".*"):
            sibling.unlink(missing_ok=True)


def _shown(name: str) -> str:
    return os.path.basename(str(name).replace("\\", "/"))[:80] or "upload"


def _in_user_terms(exc: SillmarkError, path: Path, name: str) -> SillmarkError:
    """The same error, naming the user's file instead of the server-made temporary one."""
    token = path.name.split(".")[0]
    text = re.sub(r"[^\s'\"()]*" + re.escape(token) + r"[^\s'\"()]*", _shown(name), str(exc))
    try:
        return type(exc)(text)
    except TypeError:  # pragma: no cover - an error class with another signature
        return exc


def _with_suffix(path: Path, name: str, allowed: tuple[str, ...], default: str) -> Path:
    """Rename the received file so readers that go by the extension read it right."""
    suffix = Path(_shown(name)).suffix.lower()
    target = path.with_suffix(suffix if suffix in allowed else default)
    os.replace(path, target)
    return target


@bp.post("/dem")
def dem():
    """A new DEM: read it, keep it as a draft site, say what was found (201)."""
    svc = services()
    with _received("dem", limit=int(current_app.config["MAX_UPLOAD_BYTES"])) as (path, name):
        site_id = svc.registry.register_upload(get_db(), path, name)
    row = svc.registry.site(get_db(), site_id)
    described = svc.registry.describe(get_db(), row)
    response = jsonify({
        "site_id": site_id,
        "name": described["name"],
        "dem": described["dem"],
        "settings_url": url_for("pages.site_settings", site_id=site_id),
        "site_url": url_for("pages.site", site_id=site_id),
    })
    response.status_code = 201
    return response


@bp.post("/sites/<int:site_id>/settings")
def settings(site_id: int):
    """Confirm or change a site's settings and queue its analysis (202)."""
    svc = services()
    site_row(site_id)
    form = request.form
    limit = int(current_app.config["MAX_SIDE_FILE_BYTES"])
    with _received("water", limit=limit, required=False) as (water, water_name):
        if water is not None:
            water = _with_suffix(water, water_name, (".geojson", ".json"), ".geojson")
        run_id = svc.registry.configure(
            get_db(), site_id,
            name=form.get("name"),
            vertical_unit=form.get("vertical_unit", ""),
            outlets=form.getlist("outlet"),
            connectivity=form.get("connectivity", "8"),
            water_file=water,
            water_name=water_name,
        )
    svc.runner.submit(run_id)
    response = jsonify({"run_id": run_id, "site_url": url_for("pages.site", site_id=site_id),
                        "status_url": url_for("api.status", site_id=site_id)})
    response.status_code = 202
    return response


@bp.post("/sites/<int:site_id>/assets")
def assets(site_id: int):
    """An asset table (CSV or GeoJSON points) for the site: becomes its active asset set (201)."""
    svc = services()
    row = site_row(site_id)
    if not row["current_run"]:
        raise SiteNotReady("add assets once the site's analysis has finished")
    data = svc.cache.get(site_id, row["current_run"])
    with _received("assets", limit=int(current_app.config["MAX_SIDE_FILE_BYTES"])) as (path, name):
        added = svc.registry.add_assets(get_db(), site_id, data.dem, Path(path), name)
    response = jsonify(added)
    response.status_code = 201
    return response
