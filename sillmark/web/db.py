"""SQLite metadata of the browser app: sites, analysis runs, asset sets, settings.

One database file in the data folder, in WAL mode so the page's polling reads
while a worker writes its progress. Connections run in autocommit mode and
every change goes through :func:`transaction` (``BEGIN IMMEDIATE`` ... ``COMMIT``,
rolled back on any error), so a change is all or nothing. A database that
cannot be written (a read-only or full disk) raises :class:`StorageError`,
whose message says so in plain words, instead of SQLite's terse error. This
module has no Flask in it: the worker process uses it too.
"""

from __future__ import annotations

import contextlib
import datetime as _dt
import json
import operator
import sqlite3
from collections.abc import Iterator
from pathlib import Path
from typing import Any

from sillmark.errors import SillmarkError

DB_NAME = "sillmark.sqlite3"
SCHEMA_VERSION = 3

# Run states.
QUEUED = "queued"
RUNNING = "running"
DONE = "done"
FAILED = "failed"

_SCHEMA = """
CREATE TABLE IF NOT EXISTS settings (
    key   TEXT PRIMARY KEY,
    value TEXT NOT NULL
);
CREATE TABLE IF NOT EXISTS sites (
    id                INTEGER PRIMARY KEY,
    name              TEXT NOT NULL,
    created_utc       TEXT NOT NULL,
    dem_file          TEXT NOT NULL,   -- path inside the site folder
    original_name     TEXT NOT NULL,   -- the name the user's file had
    dem_info          TEXT NOT NULL,   -- JSON: what read_dem found
    vertical_unit     TEXT,            -- confirmed by the user (NULL while a draft)
    outlets           TEXT,            -- JSON list of outlet specs
    connectivity      INTEGER,
    confirmed         INTEGER NOT NULL DEFAULT 0,
    current_run       INTEGER,         -- the run whose results are shown
    is_demo           INTEGER NOT NULL DEFAULT 0,
    vertical_datum    TEXT,            -- named by the user (NULL: not stated)
    dem_crs           TEXT,            -- CRS the user gave a DEM without one ("EPSG:n")
    dem_band          INTEGER,         -- band the user chose in a file of several
    dem_source        TEXT,            -- the file as uploaded, when dem_file is a copy
    vertical_accuracy REAL             -- the DEM's RMSE as stated by the user (NULL: the default)
);
CREATE TABLE IF NOT EXISTS runs (
    id            INTEGER PRIMARY KEY,
    site_id       INTEGER NOT NULL REFERENCES sites(id) ON DELETE CASCADE,
    created_utc   TEXT NOT NULL,
    started_utc   TEXT,
    finished_utc  TEXT,
    status        TEXT NOT NULL,
    phase         TEXT NOT NULL DEFAULT '',
    percent       REAL NOT NULL DEFAULT 0,
    message       TEXT NOT NULL DEFAULT '',
    settings      TEXT NOT NULL,       -- JSON snapshot of the site settings used
    summary       TEXT,                -- JSON figures after success
    worker_pid    INTEGER,
    scenario_id   INTEGER              -- set for the run of a scenario (never a site's current run)
);
CREATE INDEX IF NOT EXISTS runs_by_site ON runs(site_id, id);
CREATE TABLE IF NOT EXISTS asset_sets (
    id             INTEGER PRIMARY KEY,
    site_id        INTEGER NOT NULL REFERENCES sites(id) ON DELETE CASCADE,
    created_utc    TEXT NOT NULL,
    original_name  TEXT NOT NULL,
    file_name      TEXT NOT NULL,      -- path inside the site folder
    count          INTEGER NOT NULL,
    status_counts  TEXT NOT NULL,      -- JSON
    active         INTEGER NOT NULL DEFAULT 1
);
CREATE TABLE IF NOT EXISTS scenarios (
    id             INTEGER PRIMARY KEY,
    site_id        INTEGER NOT NULL REFERENCES sites(id) ON DELETE CASCADE,
    name           TEXT NOT NULL,
    created_utc    TEXT NOT NULL,
    edits_file     TEXT NOT NULL,      -- path inside the site folder
    edits_name     TEXT NOT NULL,      -- the name the user's file had, or where the edits came from
    edit_count     INTEGER NOT NULL,
    base_run       INTEGER NOT NULL,   -- the site run whose settings the scenario was analysed with
    run_id         INTEGER             -- the scenario's own run
);
CREATE INDEX IF NOT EXISTS scenarios_by_site ON scenarios(site_id, id);
"""


#: Columns added to ``runs`` in schema version 3.
_RUN_COLUMNS_V3 = (("scenario_id", "INTEGER"),)

#: Columns added to ``sites`` after schema version 1: (name, declaration). A database
#: made by an earlier version gets them on start (see :func:`initialise`).
_SITE_COLUMNS_V2 = (
    ("vertical_datum", "TEXT"),
    ("dem_crs", "TEXT"),
    ("dem_band", "INTEGER"),
    ("dem_source", "TEXT"),
    ("vertical_accuracy", "REAL"),  # version 3
)


class StorageError(SillmarkError, OSError):
    """The data folder cannot be written: a read-only file system, no permission, a full disk.

    Nothing was changed; the message says what to do.
    """


def storage_error(exc: BaseException, where: str | Path | None = None) -> StorageError | None:
    """The :class:`StorageError` that SQLite's ``exc`` amounts to, or None if it is something else."""
    text = str(exc).lower()
    folder = f" ({Path(where).parent})" if where else ""
    if "disk is full" in text or "no space" in text:
        return StorageError(
            f"the disk holding Sillmark's data folder{folder} is full; free some space and try "
            "again (nothing was changed)")
    if "readonly" in text or "read-only" in text or "unable to open database" in text:
        return StorageError(
            f"Sillmark cannot write to its data folder{folder}: it is read-only, or its "
            "permissions forbid writing. Make it writable, or start Sillmark with another "
            "data folder, and try again (nothing was changed)")
    if "disk i/o error" in text:
        return StorageError(
            f"the disk holding Sillmark's data folder{folder} reported an input/output error; "
            "check the disk and try again (nothing was changed)")
    return None


def utc_now() -> str:
    return _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")


def connect(path: str | Path) -> sqlite3.Connection:
    """A connection in autocommit mode with WAL, foreign keys and a busy timeout."""
    try:
        conn = sqlite3.connect(str(path), timeout=15.0, isolation_level=None, check_same_thread=False)
        conn.row_factory = sqlite3.Row
        conn.execute("PRAGMA foreign_keys = ON")
        conn.execute("PRAGMA busy_timeout = 15000")
    except sqlite3.OperationalError as exc:
        raise (storage_error(exc, path) or exc) from exc
    return conn


@contextlib.contextmanager
def transaction(conn: sqlite3.Connection) -> Iterator[sqlite3.Connection]:
    """``BEGIN IMMEDIATE`` ... ``COMMIT``; ``ROLLBACK`` and re-raise on any error.

    SQLite errors that mean the disk cannot take the change (read-only, full)
    come out as :class:`StorageError`.
    """
    try:
        conn.execute("BEGIN IMMEDIATE")
        try:
            yield conn
            conn.execute("COMMIT")
        except BaseException:
            # SQLite may have rolled back already (e.g. on a full disk).
            if conn.in_transaction:
                conn.execute("ROLLBACK")
            raise
    except sqlite3.OperationalError as exc:
        raise (storage_error(exc, _file_of(conn)) or exc) from exc


def _file_of(conn: sqlite3.Connection) -> str | None:
    try:
        row = conn.execute("PRAGMA database_list").fetchone()
        return row[2] or None
    except sqlite3.Error:  # pragma: no cover
        return None


def initialise(path: str | Path) -> None:
    """Create the database (WAL mode) and its tables if they are missing."""
    conn = connect(path)
    try:
        mode = conn.execute("PRAGMA journal_mode = WAL").fetchone()[0]
        if str(mode).lower() != "wal":  # pragma: no cover - e.g. a network file system
            raise RuntimeError(f"SQLite refused WAL mode for {path} (got {mode})")
        # executescript() issues its own COMMIT, so run the DDL statements one by one
        # inside a transaction instead.
        with transaction(conn):
            for statement in _SCHEMA.split(";"):
                if statement.strip():
                    conn.execute(statement)
            _migrate(conn)
            conn.execute(
                "INSERT INTO settings(key, value) VALUES ('schema_version', ?) "
                "ON CONFLICT(key) DO UPDATE SET value = excluded.value",
                (str(SCHEMA_VERSION),),
            )
    except sqlite3.OperationalError as exc:
        raise (storage_error(exc, path) or exc) from exc
    finally:
        conn.close()


def _migrate(conn: sqlite3.Connection) -> None:
    """Bring a database of an earlier schema up to :data:`SCHEMA_VERSION` (in a transaction).

    Version 2 adds the vertical datum and the DEM's chosen CRS and band to
    ``sites``; existing sites keep NULL there (datum not stated; the file's own
    CRS and its single band). Version 3 adds the ``scenarios`` table (made by
    the schema script), ``runs.scenario_id`` (NULL for the runs of a site) and
    ``sites.vertical_accuracy``, the DEM's vertical accuracy as the user stated
    it (NULL: the default of the significance minimum).
    """
    for table, columns in (("sites", _SITE_COLUMNS_V2), ("runs", _RUN_COLUMNS_V3)):
        have = {row["name"] for row in conn.execute(f"PRAGMA table_info({table})").fetchall()}
        for name, declaration in columns:
            if name not in have:
                conn.execute(f"ALTER TABLE {table} ADD COLUMN {name} {declaration}")


def get_setting(conn: sqlite3.Connection, key: str, default: str | None = None) -> str | None:
    row = conn.execute("SELECT value FROM settings WHERE key = ?", (key,)).fetchone()
    return default if row is None else row["value"]


def set_setting(conn: sqlite3.Connection, key: str, value: str) -> None:
    """Set a setting; call inside :func:`transaction`."""
    conn.execute(
        "INSERT INTO settings(key, value) VALUES (?, ?) "
        "ON CONFLICT(key) DO UPDATE SET value = excluded.value",
        (key, value),
    )


def loads(text: str | None, default: Any = None) -> Any:
    if text is None or text == "":
        return default
    return json.loads(text)


def dumps(value: Any) -> str:
    return json.dumps(value, separators=(",", ":"), allow_nan=False)


# --------------------------------------------------------------------------- runs


def update_run(conn: sqlite3.Connection, run_id: int, *, while_status: str | None = None,
               **fields: Any) -> bool:
    """Set some columns of a run in one transaction; whether the run's row was changed.

    With ``while_status``, only if the run's status is still that (a worker
    writes its progress ``while_status=RUNNING``, so it learns when the server
    has taken the run back).
    """
    allowed = {"status", "phase", "percent", "message", "started_utc", "finished_utc",
               "summary", "worker_pid"}
    bad = set(fields) - allowed
    if bad:
        raise ValueError(f"unknown run columns {sorted(bad)}")
    names = sorted(fields)
    sql = "UPDATE runs SET " + ", ".join(f"{n} = ?" for n in names) + " WHERE id = ?"
    values = [fields[n] for n in names] + [run_id]
    if while_status is not None:
        sql += " AND status = ?"
        values.append(while_status)
    with transaction(conn):
        return conn.execute(sql, values).rowcount == 1


#: SQLite's INTEGER range: ids outside it cannot name a row.
_ID_MIN, _ID_MAX = -(2**63), 2**63 - 1


def _storable(row_id: Any) -> bool:
    try:
        return _ID_MIN <= operator.index(row_id) <= _ID_MAX
    except TypeError:  # not an integer: let SQLite compare it as it is
        return True


def latest_run(conn: sqlite3.Connection, site_id: int) -> sqlite3.Row | None:
    """The site's latest analysis run (scenario runs are not the site's own)."""
    if not _storable(site_id):
        return None
    return conn.execute(
        "SELECT * FROM runs WHERE site_id = ? AND scenario_id IS NULL ORDER BY id DESC LIMIT 1",
        (site_id,)).fetchone()


def get_run(conn: sqlite3.Connection, run_id: int) -> sqlite3.Row | None:
    """The run's row, or None (also for an id no row can have, such as 2**70 from a URL)."""
    if not _storable(run_id):
        return None
    return conn.execute("SELECT * FROM runs WHERE id = ?", (run_id,)).fetchone()


def get_site(conn: sqlite3.Connection, site_id: int) -> sqlite3.Row | None:
    """The site's row, or None (also for an id no row can have)."""
    if not _storable(site_id):
        return None
    return conn.execute("SELECT * FROM sites WHERE id = ?", (site_id,)).fetchone()


def queue_scenario_run(conn: sqlite3.Connection, site_id: int, scenario_id: int,
                       base_run_id: int, base_settings: dict, edits_file: str,
                       edits_name: str) -> int:
    """Queue a scenario's run with its base run's settings and the scenario's
    edits file; returns the run's id. Call inside a transaction."""
    settings = dict(base_settings)
    settings["scenario"] = {"id": scenario_id, "edits_file": edits_file, "edits_name": edits_name}
    cur = conn.execute(
        "INSERT INTO runs(site_id, created_utc, status, phase, settings, scenario_id) "
        "VALUES (?, ?, ?, ?, ?, ?)",
        (site_id, utc_now(), QUEUED, "queued", dumps(settings), scenario_id))
    run_id = int(cur.lastrowid)
    conn.execute("UPDATE scenarios SET run_id = ?, base_run = ? WHERE id = ?",
                 (run_id, int(base_run_id), scenario_id))
    return run_id
