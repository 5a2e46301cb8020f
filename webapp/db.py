"""SQLite metadata of the browser app: sites, analysis runs, asset sets, settings.

One database file in the data folder, in WAL mode so the page's polling reads
while a worker writes its progress. Connections run in autocommit mode and
every change goes through :func:`transaction` (``BEGIN IMMEDIATE`` ... ``COMMIT``,
rolled back on any error), so a change is all or nothing. This module has no
Flask in it: the worker process uses it too.
"""

from __future__ import annotations

import contextlib
import datetime as _dt
import json
import sqlite3
from collections.abc import Iterator
from pathlib import Path
from typing import Any

DB_NAME = "sillmark.sqlite3"
SCHEMA_VERSION = 1

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
    is_demo           INTEGER NOT NULL DEFAULT 0
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
    worker_pid    INTEGER
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
"""


def utc_now() -> str:
    return _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")


def connect(path: str | Path) -> sqlite3.Connection:
    """A connection in autocommit mode with WAL, foreign keys and a busy timeout."""
    conn = sqlite3.connect(str(path), timeout=15.0, isolation_level=None, check_same_thread=False)
    conn.row_factory = sqlite3.Row
    conn.execute("PRAGMA foreign_keys = ON")
    conn.execute("PRAGMA busy_timeout = 15000")
    return conn


@contextlib.contextmanager
def transaction(conn: sqlite3.Connection) -> Iterator[sqlite3.Connection]:
    """``BEGIN IMMEDIATE`` ... ``COMMIT``; ``ROLLBACK`` and re-raise on any error."""
    conn.execute("BEGIN IMMEDIATE")
    try:
        yield conn
    except BaseException:
        conn.execute("ROLLBACK")
        raise
    conn.execute("COMMIT")


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
            conn.execute(
                "INSERT OR IGNORE INTO settings(key, value) VALUES ('schema_version', ?)",
                (str(SCHEMA_VERSION),),
            )
    finally:
        conn.close()


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


def update_run(conn: sqlite3.Connection, run_id: int, **fields: Any) -> None:
    """Set some columns of a run in one transaction."""
    allowed = {"status", "phase", "percent", "message", "started_utc", "finished_utc",
               "summary", "worker_pid"}
    bad = set(fields) - allowed
    if bad:
        raise ValueError(f"unknown run columns {sorted(bad)}")
    names = sorted(fields)
    sql = "UPDATE runs SET " + ", ".join(f"{n} = ?" for n in names) + " WHERE id = ?"
    with transaction(conn):
        conn.execute(sql, [fields[n] for n in names] + [run_id])


def latest_run(conn: sqlite3.Connection, site_id: int) -> sqlite3.Row | None:
    return conn.execute(
        "SELECT * FROM runs WHERE site_id = ? ORDER BY id DESC LIMIT 1", (site_id,)
    ).fetchone()


def get_run(conn: sqlite3.Connection, run_id: int) -> sqlite3.Row | None:
    return conn.execute("SELECT * FROM runs WHERE id = ?", (run_id,)).fetchone()


def get_site(conn: sqlite3.Connection, site_id: int) -> sqlite3.Row | None:
    return conn.execute("SELECT * FROM sites WHERE id = ?", (site_id,)).fetchone()
