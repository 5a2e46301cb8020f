"""Sites for the browser app: registering uploads, settings, runs, and the open-site cache.

A *site* is one uploaded DEM with its settings (vertical unit, outlets,
connectivity) and the results of its analysis runs. This module does the work
behind the views without Flask: the views parse the request, call in here and
serialise what comes back.

:class:`SiteData` is one analysed site held open in the server process: the
result arrays memory-mapped (see :mod:`sillmark.web.arrays`) and the figures the map
asks for again and again (per water level, the stage table, the depression
list, the asset tables) cached, so the slider and the tiles never recompute
the flood. :class:`SiteCache` keeps the most recently used sites open.
"""

from __future__ import annotations

import os
import shutil
import sqlite3
import weakref
from pathlib import Path
from typing import Any

import numpy as np

from sillmark.errors import (
    InvalidDEM,
    InvalidParameter,
    SillmarkError,
)
from sillmark.grid.assets import read_assets
from sillmark.grid.crs import crs_label
from sillmark.grid.dem import DEM, read_dem, read_dem_grid
from sillmark.grid.elevations import nodata_as_json
from sillmark.grid.outlets import build_outlets
from sillmark.units import VerticalUnit
from sillmark.web import db, layout
from sillmark.web.tiled_run import engine_settings

OUTLET_KINDS = ("edge", "nodata", "file")


class SiteNotReady(SillmarkError):
    """The site has no finished analysis yet (or its results must be made again)."""


class UnknownSite(SillmarkError, LookupError):
    """No site with that id."""


# --------------------------------------------------------------------------- DEM description


def dem_info(dem, *, file_bytes: int | None = None) -> dict:
    """What the upload page shows about a DEM it read.

    ``dem`` is a :class:`~sillmark.grid.dem.DEM`, or a
    :class:`~sillmark.grid.dem.DEMGrid` (its header only) for a DEM too large to
    read in a request: the elevation range and nodata share are then None until
    an analysis has read the cells (see :meth:`Registry.describe`).
    """

    total = dem.rows * dem.cols
    dx, dy = dem.cell_size
    h = dem.horizontal_crs
    unit_name = h.axis_info[0].unit_name if h.axis_info else ""
    epsg = h.to_epsg()
    z = getattr(dem, "elevation", None)
    return {
        "rows": dem.rows,
        "cols": dem.cols,
        "cells": total,
        "cell_size": [dx, dy],
        "cell_unit": "degree" if dem.is_geographic else unit_name,
        "crs": crs_label(dem),
        "epsg": epsg,
        "is_geographic": bool(dem.is_geographic),
        "vertical_unit": dem.vertical_unit.value,
        "vertical_unit_source": dem.vertical_unit_source,
        "vertical_unit_certain": dem.vertical_unit_source in ("crs", "band-unit"),
        "nodata_value": nodata_as_json(dem.nodata),
        "nodata_share": None if z is None else float(1.0 - np.count_nonzero(dem.valid) / total),
        "elevation_min": None if z is None else float(np.nanmin(z)),
        "elevation_max": None if z is None else float(np.nanmax(z)),
        "source_dtype": dem.source_dtype,
        "file_bytes": file_bytes,
    }


UNIT_SOURCE_TEXT = {
    "crs": "stated by the file's vertical CRS",
    "band-unit": "stated by the band's unit label",
    "horizontal-unit": "assumed from the CRS's horizontal unit (please confirm)",
    "geographic-default": "assumed metres for a lon/lat DEM (please confirm)",
    "argument": "set by you",
}


# --------------------------------------------------------------------------- registry


class Registry:
    """Creates and changes sites and runs in SQLite and in the data folder."""

    def __init__(self, data_dir: Path, db_path: Path, config: dict) -> None:
        self.data = Path(data_dir)
        self.db_path = Path(db_path)
        self.config = config
        # One connection held open for the server's life keeps SQLite's WAL and
        # shared-memory index in place between requests (each request's own
        # connection would otherwise checkpoint and delete them on closing), and
        # lets the server go on reading its metadata if the data folder turns
        # read-only under it.
        self._keeper = db.connect(self.db_path)
        self._keeper.execute("SELECT count(*) FROM settings").fetchone()
        weakref.finalize(self, self._keeper.close)

    # -- reading ------------------------------------------------------------

    def site(self, conn: sqlite3.Connection, site_id: int) -> sqlite3.Row:
        row = db.get_site(conn, site_id)
        if row is None:
            raise UnknownSite(f"there is no site {site_id}")
        return row

    def sites(self, conn: sqlite3.Connection) -> list[dict]:
        out = []
        for row in conn.execute("SELECT * FROM sites ORDER BY id").fetchall():
            out.append(self.describe(conn, row))
        return out

    def describe(self, conn: sqlite3.Connection, row: sqlite3.Row) -> dict:
        latest = db.latest_run(conn, row["id"])
        current = db.get_run(conn, row["current_run"]) if row["current_run"] else None
        info = db.loads(row["dem_info"], {})
        summary = db.loads(current["summary"]) if current is not None else None
        if info.get("elevation_min") is None and summary:
            # A DEM too large to read in the upload request: its analysis has read it.
            info["elevation_min"] = summary.get("elevation_min")
            info["elevation_max"] = summary.get("elevation_max")
            if summary.get("valid_cells") is not None and info.get("cells"):
                info["nodata_share"] = 1.0 - summary["valid_cells"] / info["cells"]
        return {
            "id": row["id"],
            "name": row["name"],
            "created_utc": row["created_utc"],
            "original_name": row["original_name"],
            "confirmed": bool(row["confirmed"]),
            "is_demo": bool(row["is_demo"]),
            "vertical_unit": row["vertical_unit"] or info.get("vertical_unit"),
            "outlets": db.loads(row["outlets"], []),
            "connectivity": row["connectivity"],
            "dem": info,
            "current_run": row["current_run"],
            "summary": summary,
            "latest_run": run_dict(latest) if latest is not None else None,
            "state": site_state(row, latest),
        }

    # -- new sites ------------------------------------------------------------

    def register_upload(self, conn: sqlite3.Connection, tmp_path: Path, original_name: str) -> int:
        """Read an uploaded DEM and keep it as a new draft site; return its id.

        The file is read first (``InvalidDEM`` and friends propagate, and the
        caller deletes the temporary file); only a readable DEM becomes a site.
        A DEM of more than ``UPLOAD_READ_CELLS`` cells is read from its header
        only (see :meth:`_dem_for_request`).
        """

        dem = self._dem_for_request(tmp_path)
        info = dem_info(dem, file_bytes=os.path.getsize(tmp_path))
        suffix = Path(original_name).suffix.lower()
        stored = "dem/" + layout.new_name(suffix if suffix in (".tif", ".tiff", ".img", ".asc") else ".tif")
        name = _site_name(original_name)
        with db.transaction(conn):
            cur = conn.execute(
                "INSERT INTO sites(name, created_utc, dem_file, original_name, dem_info, "
                "vertical_unit, outlets, connectivity, confirmed) VALUES (?, ?, ?, ?, ?, ?, ?, ?, 0)",
                (name, db.utc_now(), stored, _clean_name(original_name), db.dumps(info),
                 info["vertical_unit"], db.dumps([{"kind": "edge"}]), 8),
            )
            site_id = int(cur.lastrowid)
            target = layout.site_dir(self.data, site_id) / stored
            target.parent.mkdir(parents=True, exist_ok=True)
            os.replace(tmp_path, target)
        return site_id

    def _dem_for_request(self, path: Path, vertical_unit: VerticalUnit | None = None):
        """The DEM at ``path`` as far as a request may read it.

        Its header is checked first (``MAX_DEM_CELLS`` among the rest). Up to
        ``UPLOAD_READ_CELLS`` cells it is read whole (a :class:`DEM`: the page
        shows its elevation range and nodata share, and a DEM with no usable
        cell is refused at once); beyond, only its header (a :class:`DEMGrid`):
        a compressed file of tens of millions of cells takes a few hundred KB
        to send but gigabytes to read, so its cells are read by the analysis
        worker, which is admitted by its memory estimate (see
        :class:`sillmark.web.jobs.JobRunner`).
        """
        grid = read_dem_grid(path, vertical_unit=vertical_unit)
        limit = int(self.config["MAX_DEM_CELLS"])
        cells = grid.rows * grid.cols
        if cells > limit:
            raise InvalidDEM(
                f"'{Path(path).name}' has {grid.rows:,} × {grid.cols:,} = {cells:,} cells, more "
                f"than the limit of {limit:,}; crop it to the site or resample it to coarser cells"
            )
        if cells > int(self.config["UPLOAD_READ_CELLS"]):
            return grid
        return read_dem(path, vertical_unit=vertical_unit, max_cells=limit)

    def configure(self, conn: sqlite3.Connection, site_id: int, *, name: str | None,
                  vertical_unit: str, outlets: list[str], connectivity: Any,
                  water_file: Path | None, water_name: str | None) -> int:
        """Check and store a site's settings, queue an analysis run; return the run id.

        Everything is checked against the DEM before anything is stored: the
        unit against the CRS, the outlets on the grid (a water-body GeoJSON
        that misses the DEM is refused). On any error nothing changes.
        """

        row = self.site(conn, site_id)
        unit = VerticalUnit.parse(vertical_unit)
        conn_value = _connectivity(connectivity)
        kinds = [k for k in outlets if k]
        unknown = [k for k in kinds if k not in OUTLET_KINDS]
        if unknown:
            raise InvalidParameter(
                f"unknown outlet kind {unknown[0]!r}; use edge, nodata or a water-body GeoJSON file"
            )
        previous = db.loads(row["outlets"], [])
        kept_file = next((o for o in previous if o["kind"] == "file"), None)
        if "file" in kinds and water_file is None and kept_file is None:
            raise InvalidParameter("you ticked a water body as outlet but gave no GeoJSON file; "
                                   "choose the file, or untick it")
        if water_file is not None and "file" not in kinds:
            kinds.append("file")
        if not kinds:
            raise InvalidParameter(
                "give at least one outlet: the DEM edge, the cells next to nodata, or a water body"
            )
        folder = layout.site_dir(self.data, site_id)
        dem = self._dem_for_request(folder / row["dem_file"], unit)
        specs: list = []
        spec_files: list = []
        for k in ("edge", "nodata"):
            if k in kinds:
                specs.append(k)
                spec_files.append({"kind": k})
        new_file_rel = None
        if "file" in kinds:
            if water_file is not None:
                specs.append(str(water_file))
                new_file_rel = "outlets/" + layout.new_name(".geojson")
                spec_files.append({"kind": "file", "file": new_file_rel,
                                   "name": _clean_name(water_name or "water body.geojson")})
            else:
                specs.append(str(folder / kept_file["file"]))
                spec_files.append(dict(kept_file))
        if isinstance(dem, DEM):  # a large DEM's outlets are checked by its analysis
            build_outlets(dem, tuple(specs), connectivity=conn_value)  # raises with the engine's message
        settings = {
            "dem_file": row["dem_file"],
            "vertical_unit": unit.value,
            "outlets": spec_files,
            "connectivity": conn_value,
            "max_cells": int(self.config["MAX_DEM_CELLS"]),
            **engine_settings(self.config),
        }
        info = db.loads(row["dem_info"], {})
        new_name = _site_name(name) if name and name.strip() else row["name"]
        with db.transaction(conn):
            conn.execute(
                "UPDATE sites SET name = ?, vertical_unit = ?, outlets = ?, connectivity = ?, "
                "confirmed = 1 WHERE id = ?",
                (new_name, unit.value, db.dumps(spec_files), conn_value, site_id),
            )
            if info.get("vertical_unit") != unit.value:
                info["vertical_unit"] = unit.value
                info["vertical_unit_source"] = "argument"
                conn.execute("UPDATE sites SET dem_info = ? WHERE id = ?", (db.dumps(info), site_id))
            cur = conn.execute(
                "INSERT INTO runs(site_id, created_utc, status, phase, settings) VALUES (?, ?, ?, ?, ?)",
                (site_id, db.utc_now(), db.QUEUED, "queued", db.dumps(settings)),
            )
            run_id = int(cur.lastrowid)
            if new_file_rel is not None:
                target = folder / new_file_rel
                target.parent.mkdir(parents=True, exist_ok=True)
                shutil.copyfile(water_file, target)
        return run_id

    def register_demo(self, conn: sqlite3.Connection) -> int | None:
        """Register the demo site (once per data folder) and queue its analysis.

        Caddlewick on the River Torvey (invented): ``riverbend.tif`` with the DEM
        edge and the river line as outlets, D8, and its asset table.
        """
        if db.get_setting(conn, "demo_registered") is not None:
            return None
        demo = Path(self.config["DEMO_DIR"])
        dem_src, river, assets = demo / "riverbend.tif", demo / "river.geojson", demo / "riverbend_assets.csv"
        if not dem_src.is_file():
            with db.transaction(conn):
                db.set_setting(conn, "demo_registered", "missing")
            return None

        dem = read_dem(dem_src)
        info = dem_info(dem, file_bytes=dem_src.stat().st_size)
        dem_rel = "dem/" + layout.new_name(".tif")
        river_rel = "outlets/" + layout.new_name(".geojson")
        assets_rel = "assets/" + layout.new_name(".csv")
        outlets = [{"kind": "edge"}, {"kind": "file", "file": river_rel, "name": "river.geojson"}]
        settings = {"dem_file": dem_rel, "vertical_unit": dem.vertical_unit.value,
                    "outlets": outlets, "connectivity": 8,
                    "max_cells": int(self.config["MAX_DEM_CELLS"]), **engine_settings(self.config)}
        with db.transaction(conn):
            cur = conn.execute(
                "INSERT INTO sites(name, created_utc, dem_file, original_name, dem_info, vertical_unit, "
                "outlets, connectivity, confirmed, is_demo) VALUES (?, ?, ?, ?, ?, ?, ?, 8, 1, 1)",
                ("Caddlewick on the River Torvey (demo)", db.utc_now(), dem_rel, "riverbend.tif",
                 db.dumps(info), dem.vertical_unit.value, db.dumps(outlets)),
            )
            site_id = int(cur.lastrowid)
            folder = layout.site_dir(self.data, site_id)
            for src, rel in ((dem_src, dem_rel), (river, river_rel), (assets, assets_rel)):
                (folder / rel).parent.mkdir(parents=True, exist_ok=True)
                shutil.copyfile(src, folder / rel)

            placed = read_assets(folder / assets_rel, dem)
            conn.execute(
                "INSERT INTO asset_sets(site_id, created_utc, original_name, file_name, count, "
                "status_counts, active) VALUES (?, ?, ?, ?, ?, ?, 1)",
                (site_id, db.utc_now(), "riverbend_assets.csv", assets_rel, len(placed),
                 db.dumps(placed.status_counts)),
            )
            cur = conn.execute(
                "INSERT INTO runs(site_id, created_utc, status, phase, settings) VALUES (?, ?, ?, ?, ?)",
                (site_id, db.utc_now(), db.QUEUED, "queued", db.dumps(settings)),
            )
            run_id = int(cur.lastrowid)
            db.set_setting(conn, "demo_registered", str(site_id))
        return run_id

    def rerun(self, conn: sqlite3.Connection, site_id: int) -> int:
        """Queue the analysis again with the site's current settings."""
        row = self.site(conn, site_id)
        if not row["confirmed"]:
            raise SiteNotReady("confirm the site's settings first")
        settings = {"dem_file": row["dem_file"], "vertical_unit": row["vertical_unit"],
                    "outlets": db.loads(row["outlets"], []), "connectivity": row["connectivity"],
                    "max_cells": int(self.config["MAX_DEM_CELLS"]), **engine_settings(self.config)}
        latest = db.latest_run(conn, site_id)
        if latest is not None and latest["status"] in (db.QUEUED, db.RUNNING):
            return int(latest["id"])
        with db.transaction(conn):
            cur = conn.execute(
                "INSERT INTO runs(site_id, created_utc, status, phase, settings) VALUES (?, ?, ?, ?, ?)",
                (site_id, db.utc_now(), db.QUEUED, "queued", db.dumps(settings)),
            )
        return int(cur.lastrowid)

    # -- assets -------------------------------------------------------------------

    def add_assets(self, conn: sqlite3.Connection, site_id: int, dem, tmp_path: Path,
                   original_name: str) -> dict:
        """Read an asset table on the site's DEM and make it the site's active asset set."""

        suffix = Path(original_name).suffix.lower()
        if suffix not in (".csv", ".tsv", ".txt", ".geojson", ".json"):
            suffix = ".geojson" if _starts_with_brace(tmp_path) else ".csv"
        # read_assets tells CSV from GeoJSON by the extension: give it the right one.
        named = tmp_path.with_suffix(suffix)
        os.replace(tmp_path, named)
        try:
            placed = read_assets(named, dem)
        except BaseException:
            named.unlink(missing_ok=True)
            raise
        rel = "assets/" + layout.new_name(suffix)
        with db.transaction(conn):
            conn.execute("UPDATE asset_sets SET active = 0 WHERE site_id = ?", (site_id,))
            cur = conn.execute(
                "INSERT INTO asset_sets(site_id, created_utc, original_name, file_name, count, "
                "status_counts, active) VALUES (?, ?, ?, ?, ?, ?, 1)",
                (site_id, db.utc_now(), _clean_name(original_name), rel, len(placed),
                 db.dumps(placed.status_counts)),
            )
            target = layout.site_dir(self.data, site_id) / rel
            target.parent.mkdir(parents=True, exist_ok=True)
            os.replace(named, target)
        return {"id": int(cur.lastrowid), "count": len(placed), "status_counts": placed.status_counts,
                "original_name": _clean_name(original_name)}

    def active_assets(self, conn: sqlite3.Connection, site_id: int) -> sqlite3.Row | None:
        return conn.execute(
            "SELECT * FROM asset_sets WHERE site_id = ? AND active = 1 ORDER BY id DESC LIMIT 1",
            (site_id,),
        ).fetchone()


def _starts_with_brace(path: Path) -> bool:
    with open(path, "rb") as fh:
        return fh.read(64).lstrip().startswith(b"{")


def _connectivity(value: Any) -> int:
    text = str(value).strip()
    if text not in ("4", "8"):
        raise InvalidParameter(f"connectivity must be 8 (with diagonals) or 4, not {value!r}")
    return int(text)


def _clean_name(name: str) -> str:
    base = os.path.basename(str(name).replace("\\", "/")).strip()
    base = "".join(ch for ch in base if ch.isprintable())
    return base[:120] or "upload"


def _site_name(text: str) -> str:
    stem = Path(_clean_name(text)).stem if "." in str(text) else _clean_name(text)
    return stem[:80] or "site"


def run_dict(row: sqlite3.Row) -> dict:
    return {
        "id": row["id"],
        "status": row["status"],
        "phase": row["phase"],
        "percent": row["percent"],
        "message": row["message"],
        "created_utc": row["created_utc"],
        "started_utc": row["started_utc"],
        "finished_utc": row["finished_utc"],
    }


def site_state(row: sqlite3.Row, latest: sqlite3.Row | None) -> str:
    """``draft`` (settings not confirmed), ``queued``, ``running``, ``failed`` or ``ready``.

    A site with results is ``ready`` even while a newer run is queued or
    failed: its map keeps showing the last good results.
    """
    if not row["confirmed"]:
        return "draft"
    if row["current_run"]:
        return "ready"
    if latest is None:
        return "draft"
    return {db.QUEUED: "queued", db.RUNNING: "running", db.FAILED: "failed"}.get(latest["status"], "ready")


# --------------------------------------------------------------------------- open sites
















