"""Where a site's files live in the data folder (no Flask; shared with the worker).

::

    DATA/
      sillmark.sqlite3          metadata (sites, runs, asset sets, settings)
      secret_key                this installation's session key (mode 0600)
      uploads/                  bodies being received (removed when done)
      sites/<site>/
        dem/<token>.<ext>       the uploaded DEM, under a server-made name
        outlets/<token>.geojson water bodies marked as outlets
        assets/<token>.<ext>    asset tables
        runs/<run>/
          results/              what `sillmark analyse` writes (sillmark.io.export)
          arrays/               the result arrays as .npy (memory-mapped by the server)
          levels/<label>/       exports at one water level, made on request
          worker.log            the worker's log of this run
"""

from __future__ import annotations

import secrets
from pathlib import Path

DB_NAME = "sillmark.sqlite3"


def uploads_dir(data: Path) -> Path:
    return data / "uploads"


def site_dir(data: Path, site_id: int) -> Path:
    return data / "sites" / str(int(site_id))


def run_dir(data: Path, site_id: int, run_id: int) -> Path:
    return site_dir(data, site_id) / "runs" / str(int(run_id))


def results_dir(data: Path, site_id: int, run_id: int) -> Path:
    return run_dir(data, site_id, run_id) / "results"


def arrays_dir(data: Path, site_id: int, run_id: int) -> Path:
    return run_dir(data, site_id, run_id) / "arrays"


def levels_dir(data: Path, site_id: int, run_id: int) -> Path:
    return run_dir(data, site_id, run_id) / "levels"


def new_name(suffix: str) -> str:
    """A server-made file name: random, never derived from what the user sent."""
    clean = suffix.lower() if suffix.lower() in _SUFFIXES else ".bin"
    return secrets.token_hex(12) + clean


_SUFFIXES = {".tif", ".tiff", ".img", ".asc", ".geojson", ".json", ".csv", ".tsv", ".txt", ".bin"}
