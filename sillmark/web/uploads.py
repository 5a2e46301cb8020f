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
import errno
import os
import re
import secrets
import time
from pathlib import Path
from urllib.parse import unquote

from flask import Blueprint, current_app, jsonify, request, url_for
from werkzeug.exceptions import RequestEntityTooLarge

from sillmark.errors import InvalidDEM, InvalidParameter, SillmarkError
from sillmark.grid.assets import InvalidAssets, read_assets
from sillmark.grid.crs import crs_label
from sillmark.grid.dem_grid import read_dem_grid
from sillmark.grid.raster_files import raster_outline
from sillmark.web import get_db, layout, services
from sillmark.web.access import site_row
from sillmark.web.db import StorageError
from sillmark.web.dem_description import ChoiceNeeded, dem_choices
from sillmark.web.sites import SiteNotReady

bp = Blueprint("uploads", __name__, url_prefix="/uploads")

CHUNK = 1 << 20


@contextlib.contextmanager
def _received(field: str, *, limit: int, required: bool = True):
    """Yield (path, original name) of the uploaded body, deleting the file afterwards.

    Yields (None, None) when ``required`` is False and no file was sent.
    """
    folder = layout.uploads_dir(services().data_dir)
    path = folder / (layout.new_name(".bin") + ".part")
    try:
        try:
            if not required and request.mimetype != "multipart/form-data":
                # An optional file comes only in a multipart form; a plain form
                # (or none) carries the other fields and no file.
                yield None, None
                return
            folder.mkdir(parents=True, exist_ok=True)
            if request.mimetype == "multipart/form-data":
                upload = request.files.get(field)
                if upload is None or not upload.filename:
                    if not required:
                        yield None, None
                        return
                    raise InvalidParameter(
                        f"no file in the upload; send it in the form field '{field}'")
                upload.save(path)
                name = upload.filename
                if os.path.getsize(path) > limit:
                    raise RequestEntityTooLarge()
            else:
                if request.content_length is not None and request.content_length > limit:
                    raise RequestEntityTooLarge()
                name = (unquote(request.headers.get("X-File-Name", ""))
                        or request.args.get("name", "upload"))
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
        except OSError as exc:
            # A full disk or a read-only data folder: say so, keep nothing.
            problem = _storage_problem(exc, folder)
            if problem is None:
                raise
            raise problem from None
        if os.path.getsize(path) == 0:
            raise InvalidParameter(f"the uploaded file '{_shown(name)}' is empty (0 bytes)")
        try:
            yield path, name
        except SillmarkError as exc:
            raise _in_user_terms(exc, path, name) from None
    finally:
        path.unlink(missing_ok=True)
        # A reader may have renamed the file to give it its proper extension.
        if folder.is_dir():
            for sibling in folder.glob(path.stem + ".*"):
                sibling.unlink(missing_ok=True)


#: errno values that mean the disk, or the user's quota on it, is full.
_NO_SPACE = {errno.ENOSPC, errno.EDQUOT, errno.EFBIG}


def _storage_problem(exc: OSError, folder: Path) -> StorageError | None:
    """The clear error for an upload the data folder could not take, or None."""
    if isinstance(exc, StorageError):
        return exc
    if exc.errno in _NO_SPACE:
        return StorageError(
            f"the disk holding Sillmark's data folder ({folder.parent}) is full, so the upload "
            "was not kept; free some space and try again (nothing was changed)")
    if exc.errno in (errno.EROFS, errno.EACCES, errno.EPERM):
        return StorageError(
            f"Sillmark cannot write to its data folder ({folder.parent}): it is read-only, or "
            "its permissions forbid writing, so the upload was not kept (nothing was changed)")
    return None


def _shown(name: str) -> str:
    """The user's file name as messages show it: its last part, printable characters only."""
    base = os.path.basename(str(name).replace("\\", "/"))
    return "".join(ch for ch in base if ch.isprintable())[:80] or "upload"


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


#: Fewest rows and columns of a site DEM: the map's hillshade needs a slope across
#: and along the grid, which one row or column does not have.
MIN_SITE_SIDE = 2


def _check_map_size_or_needs(path: Path, name: str, crs, band) -> None:
    """:func:`_check_map_size` with the CRS and band the file needs (ChoiceNeeded without)."""
    chosen_crs, chosen_band = dem_choices(raster_outline(path), name, crs, band)
    _check_map_size(path, crs=chosen_crs, band=chosen_band)


def _check_map_size(path: Path, *, crs=None, band=None) -> None:
    """Refuse a DEM too narrow to map (read from its header; no pixels are read)."""

    grid = read_dem_grid(path, crs=crs, band=band)
    if grid.rows < MIN_SITE_SIDE or grid.cols < MIN_SITE_SIDE:
        raise InvalidDEM(
            f"'{path.name}' is {grid.rows} × {grid.cols} cells; a site needs at least "
            f"{MIN_SITE_SIDE} × {MIN_SITE_SIDE} cells to be mapped (a single row or column has "
            "no ground to either side); give the DEM of an area"
        )


#: A DEM waiting for its CRS or band is kept this long (seconds) under ``uploads/pending/``.
PENDING_SECONDS = 24 * 3600
_PENDING_TOKEN = re.compile(r"^[0-9a-f]{32}$")


def _pending_dir() -> Path:
    return layout.uploads_dir(services().data_dir) / "pending"


def _drop_stale_pending(now: float) -> None:
    folder = _pending_dir()
    if not folder.is_dir():
        return
    for entry in folder.iterdir():
        with contextlib.suppress(OSError):
            if now - entry.stat().st_mtime > PENDING_SECONDS:
                entry.unlink()


def _keep_pending(path: Path, name: str) -> str:
    """Keep a received DEM that needs a choice; the token that names it again."""
    token = secrets.token_hex(16)
    folder = _pending_dir()
    folder.mkdir(parents=True, exist_ok=True)
    os.replace(path, folder / token)
    (folder / (token + ".name")).write_text(_shown(name)[:120], encoding="utf-8")
    return token


@contextlib.contextmanager
def _pending(token: str):
    """Yield (path, original name) of a DEM kept by :func:`_keep_pending`, removed after use
    unless it still needs a choice."""
    if not _PENDING_TOKEN.match(token or ""):
        raise InvalidParameter("the kept upload is named by a token of 32 hex digits; "
                               "choose the DEM file again")
    folder = _pending_dir()
    path, label = folder / token, folder / (token + ".name")
    if not path.is_file():
        raise InvalidParameter("the kept upload is no longer here (it is kept for a day); "
                               "choose the DEM file again")
    name = label.read_text(encoding="utf-8") if label.is_file() else "upload.tif"
    # The readers go by the extension (an ESRI ASCII grid, say): a named link gives it one.
    work = folder / (token + "-" + layout.new_name(Path(name).suffix.lower() or ".tif"))
    os.link(path, work)
    keep = False
    try:
        yield work, name
    except ChoiceNeeded:
        keep = True
        raise
    finally:
        work.unlink(missing_ok=True)
        if not keep:
            path.unlink(missing_ok=True)
            label.unlink(missing_ok=True)


@bp.post("/dem")
def dem():
    """A new DEM: read it, keep it as a draft site, say what was found (201).

    ``?crs=EPSG:n`` gives the CRS of a file that states none, ``?band=N`` picks
    the band of a file of several. A file that needs one of them is answered
    400 with ``needs``, ``bands`` and a ``pending`` token; sending
    ``?pending=TOKEN`` with the choices (and no body) goes on with the kept file.
    """
    svc = services()
    _drop_stale_pending(time.time())
    crs, band = request.args.get("crs"), request.args.get("band")
    token = request.args.get("pending")
    if token is not None:
        with _pending(token) as (path, name):
            _check_map_size_or_needs(path, name, crs, band)
            site_id = svc.registry.register_upload(get_db(), path, name, crs=crs, band=band)
    else:
        with _received("dem", limit=int(current_app.config["MAX_UPLOAD_BYTES"])) as (path, name):
            try:
                _check_map_size_or_needs(path, name, crs, band)
                site_id = svc.registry.register_upload(get_db(), path, name, crs=crs, band=band)
            except ChoiceNeeded as exc:
                exc.details["pending"] = _keep_pending(path, name)
                raise
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
            vertical_datum=form.get("vertical_datum"),
            vertical_accuracy=form.get("vertical_accuracy"),
            crs=form.get("crs"),
            band=form.get("band"),
        )
    svc.runner.submit(run_id)
    response = jsonify({"run_id": run_id, "site_url": url_for("pages.site", site_id=site_id),
                        "status_url": url_for("api.status", site_id=site_id)})
    response.status_code = 202
    return response


ASSET_SUFFIXES = (".csv", ".tsv", ".txt", ".geojson", ".json")


def _starts_with_brace(path: Path) -> bool:
    with open(path, "rb") as fh:
        return fh.read(64).lstrip().startswith(b"{")


def _check_assets_on_dem(path: Path, name: str, dem) -> None:
    """Refuse an asset table none of whose points lies on the DEM (most often: another CRS)."""

    placed = read_assets(path, dem)
    if len(placed) and all(a.status == "outside DEM" for a in placed):
        west, south, east, north = dem.bounds
        raise InvalidAssets(
            f"none of the {len(placed)} assets lies on the DEM ({west:.6g} to {east:.6g} east, "
            f"{south:.6g} to {north:.6g} north in {crs_label(dem)}); check the coordinates: x/y "
            "columns must be in the DEM's CRS, lon/lat columns and GeoJSON in WGS 84 degrees "
            "unless the GeoJSON names its CRS"
        )


@bp.post("/sites/<int:site_id>/assets")
def assets(site_id: int):
    """An asset table (CSV or GeoJSON points) for the site: becomes its active asset set (201)."""
    svc = services()
    row = site_row(site_id)
    if not row["current_run"]:
        raise SiteNotReady("add assets once the site's analysis has finished")
    data = svc.cache.get(site_id, row["current_run"])
    with _received("assets", limit=int(current_app.config["MAX_SIDE_FILE_BYTES"])) as (path, name):
        path = _with_suffix(path, name, ASSET_SUFFIXES, ".geojson" if _starts_with_brace(path) else ".csv")
        _check_assets_on_dem(path, name, data.dem)
        added = svc.registry.add_assets(get_db(), site_id, data.dem, Path(path), name)
    response = jsonify(added)
    response.status_code = 201
    return response
