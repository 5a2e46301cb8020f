"""Sillmark web application (Flask); imports analysis, never the reverse.

:func:`create_app` builds the app: configuration (defaults, then the
instance's ``config.py`` in the data folder, then the test dictionary), the
SQLite metadata, the job runner and the four blueprints (pages, api, tiles,
uploads), and the sign-in of :mod:`sillmark.web.auth` when the operator has set
access secrets. Every response carries a Content-Security-Policy that allows
requests to this origin only.
"""

from __future__ import annotations

import dataclasses
import logging
import re
import secrets
from pathlib import Path

from flask import Flask, current_app, g, jsonify, render_template, request, session
from werkzeug.exceptions import HTTPException, RequestEntityTooLarge

from sillmark import SCREENING_CAUTION
from sillmark.errors import LocationOutsideDEM, SillmarkError
from sillmark.grid.raster_files import forbid_remote_access
from sillmark.units import VerticalUnit, datum_phrase, unit_words
from sillmark.web import config as _config
from sillmark.web import db, layout
from sillmark.web.exports import ExportCache, ExportSpaceError
from sillmark.web.jobs import JobRunner
from sillmark.web.mapview import online_base_layer
from sillmark.web.render import TileIndexCache
from sillmark.web.site_data import SiteCache, parse_level
from sillmark.web.sites import Registry, SiteNotReady, UnknownSite

log = logging.getLogger("sillmark.web")

#: Every page and fetch may reach this origin only (folium's inline map script
#: and style need 'unsafe-inline'; nothing may come from elsewhere).
CONTENT_SECURITY_POLICY = (
    "default-src 'self'; script-src 'self' 'unsafe-inline'; style-src 'self' 'unsafe-inline'; "
    "img-src 'self' data: blob:; font-src 'self'; connect-src 'self'; object-src 'none'; "
    "frame-ancestors 'self'; base-uri 'self'; form-action 'self'"
)


def content_security_policy(extra_image_origin: str | None = None) -> str:
    """The policy, with the origin of an operator-configured online base layer allowed for images."""
    if not extra_image_origin:
        return CONTENT_SECURITY_POLICY
    return CONTENT_SECURITY_POLICY.replace("img-src 'self' data: blob:",
                                           f"img-src 'self' data: blob: {extra_image_origin}")


CSRF_HEADER = "X-Sillmark-Token"
CSRF_FIELD = "csrf_token"


@dataclasses.dataclass
class Services:
    """What the views share, kept in ``app.extensions["sillmark"]``."""

    data_dir: Path
    db_path: Path
    registry: Registry
    cache: SiteCache
    tiles: TileIndexCache
    runner: JobRunner
    exports: ExportCache


def services():
    return current_app.extensions["sillmark"]


def get_db():
    """The request's SQLite connection (opened on first use, closed at teardown)."""
    if "db" not in g:
        g.db = db.connect(services().db_path)
    return g.db


def error_status(exc: SillmarkError) -> int:
    if isinstance(exc, UnknownSite):
        return 404
    if isinstance(exc, SiteNotReady):
        return 409
    if isinstance(exc, ExportSpaceError):
        return 507
    return 400


def wants_json() -> bool:
    p = request.path
    return (p.startswith("/api/") or p.startswith("/uploads/") or p.startswith("/tiles/")
            or request.accept_mimetypes.best == "application/json")


def create_app(test_config: dict | None = None) -> Flask:
    """Build the Sillmark browser app.

    Parameters
    ----------
    test_config : dict, optional
        Settings applied last (over the defaults and the instance config),
        e.g. ``{"DATA_DIR": tmp, "JOB_RUNNER": "inline", "REGISTER_DEMO": False}``.
    """

    forbid_remote_access()  # GDAL fetches nothing over the network in this process or its workers
    settings = dict(_config.DEFAULTS)
    early = dict(test_config or {})
    data_dir = _config.data_dir_from({**settings, **early})
    data_dir.mkdir(parents=True, exist_ok=True)
    app = Flask(
        __name__,
        instance_path=str(data_dir),
        instance_relative_config=True,
    )
    app.config.update(settings)
    app.config.from_pyfile(_config.INSTANCE_CONFIG, silent=True)
    _config.access_secrets_from_env(app.config)
    if test_config:
        app.config.update(test_config)
    app.config["DATA_DIR"] = str(data_dir)

    base_layer = online_base_layer(app.config)  # refuses a malformed URL before serving
    app.config["CONTENT_SECURITY_POLICY"] = content_security_policy(base_layer.origin if base_layer else None)
    if not app.config.get("SECRET_KEY"):
        app.config["SECRET_KEY"] = _config.installation_secret(data_dir)
    # Werkzeug refuses bodies beyond this before a view reads them (multipart forms);
    # raw uploads are counted as they stream (see sillmark.web.uploads).
    app.config["MAX_CONTENT_LENGTH"] = int(app.config["MAX_UPLOAD_BYTES"]) + 1024 * 1024
    # Flask's own default is None (no SameSite attribute), so setdefault would keep it.
    if not app.config.get("SESSION_COOKIE_SAMESITE"):
        app.config["SESSION_COOKIE_SAMESITE"] = "Lax"
    app.config["SESSION_COOKIE_HTTPONLY"] = True
    app.json.sort_keys = False

    layout.uploads_dir(data_dir).mkdir(exist_ok=True)
    db_path = data_dir / layout.DB_NAME
    db.initialise(db_path)
    runner = JobRunner(db_path, data_dir, mode=app.config["JOB_RUNNER"],
                       workers=int(app.config["JOB_WORKERS"]),
                       memory_budget=int(app.config["ANALYSIS_MEMORY_BUDGET"]),
                       bytes_per_cell=int(app.config["ANALYSIS_BYTES_PER_CELL"]))
    app.extensions["sillmark"] = Services(
        data_dir=data_dir,
        db_path=db_path,
        registry=Registry(data_dir, db_path, app.config),
        cache=SiteCache(data_dir, int(app.config["SITE_CACHE_SIZE"]), int(app.config["LEVEL_CACHE"])),
        tiles=TileIndexCache(int(app.config["TILE_INDEX_CACHE"])),
        runner=runner,
        exports=ExportCache(data_dir, int(app.config["LEVEL_EXPORT_CACHE_BYTES"])),
    )

    from sillmark.web import (
        api,
        auth,
        pages,
        reach,
        scenarios,
        site_admin,
        tiles,
        uploads,
    )

    auth.init_app(app)  # first: its check runs before every other hook
    app.register_blueprint(pages.bp)
    app.register_blueprint(api.bp)
    app.register_blueprint(tiles.bp)
    app.register_blueprint(uploads.bp)
    app.register_blueprint(reach.bp)
    app.register_blueprint(site_admin.bp)
    app.register_blueprint(scenarios.bp)
    _install_handlers(app)

    runner.start()
    if app.config["REGISTER_DEMO"]:
        conn = db.connect(db_path)
        try:
            queued = app.extensions["sillmark"].registry.register_demo(conn)
        finally:
            conn.close()
        for run_id in queued:
            runner.submit(run_id)
    return app


def _install_handlers(app: Flask) -> None:
    @app.teardown_appcontext
    def close_db(_exc):
        conn = g.pop("db", None)
        if conn is not None:
            conn.close()

    @app.context_processor
    def globals_for_templates():
        return {"caution": SCREENING_CAUTION, "csrf_token": csrf_token,
                "datum_phrase": datum_phrase}

    app.add_template_filter(unit_words, "unit_words")

    @app.before_request
    def check_csrf():
        if request.method in ("GET", "HEAD", "OPTIONS") or not app.config["CSRF_ENABLED"]:
            return None
        expected = session.get("csrf")
        sent = request.headers.get(CSRF_HEADER)
        if sent is None and request.mimetype in ("multipart/form-data", "application/x-www-form-urlencoded"):
            sent = request.form.get(CSRF_FIELD)
        if not expected or not sent or not secrets.compare_digest(str(expected), str(sent)):
            return _error(403, "the page's form token is missing or out of date; reload the page and try again")
        return None

    @app.before_request
    def check_level_argument():
        """Every ``level`` a request carries (URL part or ``?level=``), checked in one place:
        a finite number, and not absurdly far from the site's ground."""
        view_args = request.view_args or {}
        text = view_args.get("level", request.args.get("level"))
        if text is None:
            return None

        level = parse_level(text)
        site_id = view_args.get("site_id")
        if site_id is not None:
            refusal = level_refusal(get_db(), int(site_id), float(level))
            if refusal is not None:
                return _error(400, refusal)
        return None

    @app.after_request
    def security_headers(response):
        response.headers.setdefault("Content-Security-Policy", app.config["CONTENT_SECURITY_POLICY"])
        response.headers.setdefault("X-Content-Type-Options", "nosniff")
        response.headers.setdefault("Referrer-Policy", "same-origin")
        response.headers.setdefault("X-Frame-Options", "SAMEORIGIN")
        return response

    @app.errorhandler(SillmarkError)
    def sillmark_error(exc: SillmarkError):
        message = without_server_paths(" ".join(str(exc).split()), services().data_dir)
        return _error(error_status(exc), message, getattr(exc, "details", None))

    @app.errorhandler(RequestEntityTooLarge)
    def too_large(_exc):
        limit = int(app.config["MAX_UPLOAD_BYTES"])
        return _error(413, f"the file is larger than the upload limit of {_size(limit)}; "
                           "crop the DEM to the site or resample it to coarser cells")

    @app.errorhandler(HTTPException)
    def http_error(exc: HTTPException):
        return _error(exc.code or 500, exc.description or exc.name)

    @app.errorhandler(Exception)
    def internal_error(exc: Exception):  # pragma: no cover - exercised only by bugs
        log.exception("unhandled error on %s", request.path)
        return _error(500, "something went wrong inside Sillmark; the details are in the server log")


def without_server_paths(message: str, data_dir: Path) -> str:
    """``message`` with the server's own folders named in words, never as paths.

    The command line names the data folder so that an operator can find it;
    a web answer must not tell a visitor how the server's disk is laid out.

    Examples
    --------
    >>> without_server_paths("the disk holding Sillmark's data folder (/srv) is full", Path("/srv/data"))
    "the disk holding Sillmark's data folder is full"
    >>> without_server_paths("cannot write to /srv/data/sites/3", Path("/srv/data"))
    'cannot write to the data folder'
    """
    folder, parent = str(Path(data_dir).resolve()), str(Path(data_dir).resolve().parent)
    for path in (folder, str(data_dir), parent, str(Path(data_dir).parent)):
        if len(path) > 1:
            message = message.replace(f" ({path})", "")
            message = re.sub(re.escape(path) + r"[^\s'\"),;]*", "the data folder", message)
    return message


def _error(status: int, message: str, details: dict | None = None):
    if wants_json():
        response = jsonify({**(details or {}), "error": message, "status": status})
        response.status_code = status
        return response
    return render_template("error.html", status=status, message=message), status


#: A level farther than this many times the site's elevation range (at least 1 unit)
#: from its ground is refused as a mistake (the same rule as ``sillmark stage``).
LEVEL_MARGIN_FACTOR = 10.0


def level_refusal(conn, site_id: int, level: float) -> str | None:
    """Why ``level`` makes no sense for the site's current results, or None.

    Levels more than :data:`LEVEL_MARGIN_FACTOR` times the elevation range above
    the highest ground or below the lowest are refused (1e30, a level in the
    wrong unit). A site without results is left to the view (409).
    """

    if not 0 < site_id < 2**63:  # no such site in SQLite; the view answers 404
        return None
    row = conn.execute("SELECT r.summary FROM sites s JOIN runs r ON r.id = s.current_run "
                       "WHERE s.id = ?", (site_id,)).fetchone()
    summary = db.loads(row["summary"], {}) if row is not None else {}
    lo, hi = summary.get("elevation_min"), summary.get("elevation_max")
    if lo is None or hi is None:
        return None
    margin = LEVEL_MARGIN_FACTOR * max(hi - lo, 1.0)
    if lo - margin <= level <= hi + margin:
        return None
    try:
        sym = VerticalUnit.parse(summary.get("vertical_unit") or "m").symbol
    except SillmarkError:  # pragma: no cover - a summary always names its unit
        sym = ""
    return (f"the water level {level:g} {sym} is far from this site's ground ({lo:.2f} to "
            f"{hi:.2f} {sym}); give a level between {lo - margin:.2f} and {hi + margin:.2f} "
            f"{sym} (in the site's vertical unit)")


def csrf_token() -> str:
    token = session.get("csrf")
    if not token:
        token = secrets.token_urlsafe(24)
        session["csrf"] = token
    return token


def _size(n: int) -> str:
    if n >= 2**30:
        return f"{n / 2**30:.1f} GiB"
    if n >= 2**20:
        return f"{n / 2**20:.0f} MiB"
    return f"{n / 2**10:.0f} KiB"


__all__ = ["create_app", "services", "get_db", "LocationOutsideDEM"]
