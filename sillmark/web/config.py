"""Configuration of the browser app: defaults, the data folder and the secret key.

:func:`sillmark.web.create_app` applies, in order, :data:`DEFAULTS`, the instance
configuration (``config.py`` in the data folder, if there is one) and the
test dictionary. The data folder holds the SQLite metadata (``sillmark.sqlite3``),
the per-installation secret key (``secret_key``) and every site's files
(``sites/<id>/``).
"""

from __future__ import annotations

import os
import secrets
from pathlib import Path

from flask import Config

#: Environment variable that names the data folder when no other setting does.
DATA_ENV = "SILLMARK_DATA"
#: Name of the file in the data folder that holds the installation's secret key.
SECRET_KEY_FILE = "secret_key"
#: Name of the optional instance configuration file in the data folder.
INSTANCE_CONFIG = "config.py"

#: The checkout the package runs from, where demo_dem/ sits (absent in an installed wheel).
ROOT = Path(__file__).resolve().parents[2]

DEFAULTS: dict = {
    # Where metadata and results live; None: $SILLMARK_DATA, else ~/.sillmark.
    "DATA_DIR": None,
    # Largest DEM or asset/outlet file accepted, in bytes (streamed to disk and
    # refused with 413 as soon as the body passes the limit).
    "MAX_UPLOAD_BYTES": 512 * 2**20,
    # Largest side file (outlet GeoJSON, asset table) accepted, in bytes.
    "MAX_SIDE_FILE_BYTES": 64 * 2**20,
    # Largest DEM read, in cells (sillmark.grid.dem.read_dem's max_cells).
    "MAX_DEM_CELLS": 60_000_000,
    # DEMs of more cells than this are analysed by the tiled engine
    # (sillmark.run.analyse with a file store, tile by tile in the worker process; see sillmark.web.tiled_run),
    # in tiles of TILED_TILE_SIZE x TILED_TILE_SIZE cells.
    "TILED_ABOVE_CELLS": 40_000_000,
    "TILED_TILE_SIZE": 2048,
    # Most cells of one window of depressions the tiled run builds the
    # depression hierarchy in (sillmark.run.analyse's window_cells): the
    # hierarchy's memory grows with it, not with the DEM.
    "TILED_WINDOW_CELLS": 1 << 24,
    # How analyses run: "process" (a separate worker process per analysis,
    # supervised by a thread), "thread" (a thread in the server process) or
    # "inline" (inside the request; for tests).
    "JOB_RUNNER": "process",
    # Analyses run at the same time (at most; see ANALYSIS_MEMORY_BUDGET).
    "JOB_WORKERS": 1,
    # Memory set aside for the analyses running at the same time, in bytes. A
    # queued analysis starts only when its estimate (cells × ANALYSIS_BYTES_PER_CELL)
    # fits beside those running; one larger than the whole budget runs alone.
    "ANALYSIS_MEMORY_BUDGET": 4 * 2**30,
    "ANALYSIS_BYTES_PER_CELL": 64,
    # DEMs of up to this many cells are read whole by the upload request (the page
    # then shows their elevation range and nodata share, and refuses a DEM without
    # ground at once); larger ones only from their header, their cells being read
    # by the analysis worker. Reading takes about 9 bytes a cell at peak.
    "UPLOAD_READ_CELLS": 4_000_000,
    # Register and analyse the demo site on first start.
    "REGISTER_DEMO": True,
    "DEMO_DIR": str(ROOT / "demo_dem"),
    # Cached per server process.
    "SITE_CACHE_SIZE": 4,  # sites whose arrays are held open
    "TILE_INDEX_CACHE": 768,  # tiles whose pixel-to-cell lookup is kept (256 KiB each)
    "LEVEL_CACHE": 256,  # water levels whose figures are kept per site
    # Disk space kept for the downloads of water levels (each level asked for is
    # written once into a folder of its own), in bytes, over all sites; past it the
    # folders used least recently are removed (and written again when asked for).
    "LEVEL_EXPORT_CACHE_BYTES": 1 * 2**30,
    # Ask for a token on every state-changing request (forms and XHR).
    "CSRF_ENABLED": True,
    # Tiles: how long browsers may keep a tile (seconds); the run id in the
    # tile URL changes whenever results change.
    "TILE_MAX_AGE": 3600,
    # Zoom levels warmed in the background when a site is first opened
    # (the site's fitting zoom and this many above it).
    "WARM_ZOOMS": 2,
    "SECRET_KEY": None,
    # An optional online base layer the operator chooses (an XYZ tile URL with
    # {z}, {x}, {y}, http or https), offered beside the hillshade; None: none,
    # and the app makes no request beyond this server. Also $SILLMARK_BASE_LAYER_URL.
    "BASE_LAYER_URL": None,
    # Its attribution as its provider asks for it (required with a URL).
    "BASE_LAYER_ATTRIBUTION": None,
    "BASE_LAYER_NAME": "Online base map",
    # Access secrets chosen by the operator (see sillmark.web.auth). With none set the
    # app is open, as suits 127.0.0.1; `sillmark serve` refuses any other host
    # without EDITOR_SECRET. With one set, every request needs a sign-in: the
    # viewer secret lets one look (GET), the editor secret also lets one change
    # things. Also $SILLMARK_VIEWER_SECRET and $SILLMARK_EDITOR_SECRET.
    "VIEWER_SECRET": None,
    "EDITOR_SECRET": None,
    # Wait after a wrong secret, in seconds, growing with each further wrong
    # attempt from the same address (up to SIGNIN_MAX_DELAY); a try that comes
    # sooner is refused at once with 429 and Retry-After (nothing sleeps).
    "SIGNIN_DELAY": 0.5,
    "SIGNIN_MAX_DELAY": 5.0,
    # How long a sign-in lasts, in seconds.
    "SIGNIN_LIFETIME": 12 * 3600,
}

#: Environment variables that may hold the access secrets when the configuration does not.
SECRET_ENV = {"VIEWER_SECRET": "SILLMARK_VIEWER_SECRET", "EDITOR_SECRET": "SILLMARK_EDITOR_SECRET"}


def data_dir_from(config: dict) -> Path:
    """The data folder: DATA_DIR, else $SILLMARK_DATA, else ~/.sillmark."""
    value = config.get("DATA_DIR") or os.environ.get(DATA_ENV) or "~/.sillmark"
    return Path(value).expanduser().resolve()


def instance_settings(data_dir: Path, test_config: dict | None = None) -> dict:
    """The settings an app on ``data_dir`` would have, without building it.

    Defaults, then the data folder's ``config.py``, then ``test_config``, then
    the access secrets from the environment where none is configured: what
    ``sillmark serve`` checks before it starts anything.
    """

    config = Config(str(data_dir), DEFAULTS)
    config.from_pyfile(INSTANCE_CONFIG, silent=True)
    config.update(test_config or {})
    return access_secrets_from_env(dict(config))


def access_secrets_from_env(config: dict) -> dict:
    """``config`` with VIEWER_SECRET / EDITOR_SECRET taken from the environment where unset."""
    for key, env in SECRET_ENV.items():
        if not config.get(key) and os.environ.get(env):
            config[key] = os.environ[env]
    return config


def installation_secret(data_dir: Path) -> str:
    """The secret key of this installation, made on first use and kept in the data folder.

    The file is created with mode 0600 and never overwritten, so sessions stay
    valid across restarts; each installation has its own key.
    """
    path = data_dir / SECRET_KEY_FILE
    try:
        text = path.read_text(encoding="ascii").strip()
        if len(text) >= 32:
            return text
    except FileNotFoundError:
        pass
    key = secrets.token_hex(32)
    tmp = data_dir / f".{SECRET_KEY_FILE}.{os.getpid()}.tmp"
    fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o600)
    with os.fdopen(fd, "w", encoding="ascii") as fh:
        fh.write(key + "\n")
    try:
        # Hard link: fails if another process made the key first; keep theirs.
        os.link(tmp, path)
    except FileExistsError:
        pass
    finally:
        tmp.unlink(missing_ok=True)
    return path.read_text(encoding="ascii").strip()
