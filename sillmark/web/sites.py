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

import collections
import dataclasses
import functools
import math
import os
import shutil
import sqlite3
import threading
import weakref
from pathlib import Path
from typing import Any

import numpy as np
import pyproj
import rasterio.features
import shapely.geometry

from sillmark import SCREENING_CAUTION
from sillmark.engine.flood import OUTLET_CODE, SpillResult
from sillmark.errors import (
    InvalidDEM,
    InvalidParameter,
    LocationOutsideDEM,
    SillmarkError,
)
from sillmark.grid.assets import read_assets
from sillmark.grid.crs import LonLatTransformer, crs_label
from sillmark.grid.dem import DEM, read_dem, read_dem_grid
from sillmark.grid.elevations import nodata_as_json
from sillmark.grid.outlets import build_outlets
from sillmark.io import geojson as geojson_files
from sillmark.products.assets import assess_assets
from sillmark.products.hierarchy import site_hierarchy
from sillmark.products.source import ArraySource
from sillmark.products.stage import (
    DEPRESSION_CUT_OFF,
    DEPRESSION_OVERTOPPED,
    checked_level,
    depression_states,
    stage_table,
    water_level_map,
)
from sillmark.products.what_if import raise_sill
from sillmark.units import ACRE_FOOT_M3, VerticalUnit
from sillmark.web import arrays, db, layout, render
from sillmark.web.tiled_run import engine_settings

CRS84 = pyproj.CRS("OGC:CRS84")
OUTLET_KINDS = ("edge", "nodata", "file")
#: Most points of a stage chart.
CHART_POINTS = 240
#: Encoded map tiles kept per open site run, in bytes (see render.ImageCache).
TILE_IMAGE_BYTES = 48 * 2**20


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


def parse_level(text: Any) -> np.float32:
    """A water level from a request (text or number) as float32; InvalidParameter if not."""
    if isinstance(text, str):
        text = text.strip()
        if not text:
            raise InvalidParameter("give a water level, e.g. level=47.6 (in the site's vertical unit)")
    try:
        return checked_level(text)
    except InvalidParameter:
        raise InvalidParameter(
            f"the water level must be a finite number in the site's vertical unit, e.g. 47.6, "
            f"not {str(text)[:40]!r}"
        ) from None


def _finite(v: float | None) -> float | None:
    if v is None:
        return None
    v = float(v)
    return v if math.isfinite(v) else None


def _nice_step(span: float, count: int) -> float:
    raw = max(span, 1e-6) / max(count, 1)
    mag = 10 ** math.floor(math.log10(raw))
    for m in (1, 2, 2.5, 5, 10):
        if m * mag >= raw:
            return m * mag
    return 10 * mag  # pragma: no cover


class _LRU:
    def __init__(self, capacity: int) -> None:
        self.capacity = max(1, int(capacity))
        self._d: collections.OrderedDict = collections.OrderedDict()
        self._lock = threading.Lock()

    def get(self, key):
        with self._lock:
            if key in self._d:
                self._d.move_to_end(key)
                return self._d[key]
        return None

    def put(self, key, value) -> None:
        with self._lock:
            self._d[key] = value
            self._d.move_to_end(key)
            while len(self._d) > self.capacity:
                self._d.popitem(last=False)

    def __len__(self) -> int:
        return len(self._d)


#: Routes kept per open site run for the asset tables (they do not depend on the level).
ASSET_ROUTES = 1024


class RememberingRoutes(SpillResult):
    """The same :class:`~sillmark.engine.flood.SpillResult` (its arrays shared, not copied), whose
    :meth:`route` remembers the last ``capacity`` routes it found.

    A cell's route and controlling sill depend on the result only, not on the
    water level, so the asset table at each new level of the stage control
    reuses them instead of walking every asset's route again.
    """

    @classmethod
    def of(cls, result: SpillResult, capacity: int = ASSET_ROUTES) -> "RememberingRoutes":
        made = cls(**{f.name: getattr(result, f.name) for f in dataclasses.fields(result)})
        object.__setattr__(made, "_routes", _LRU(capacity))  # the dataclass is frozen
        return made

    def route(self, row: int, col: int):
        key = (int(row), int(col))
        found = self._routes.get(key)
        if found is None:
            found = super().route(row, col)
            found.rows.setflags(write=False)  # shared by every later caller
            found.cols.setflags(write=False)
            self._routes.put(key, found)
        return found


class SiteData:
    """One analysed site (one run) open in the server, with its caches."""

    def __init__(self, site_id: int, run_id: int, folder: Path, *, level_cache: int = 256) -> None:
        stored = arrays.load(folder / "arrays")
        self.site_id = site_id
        self.run_id = run_id
        self.folder = folder
        self.dem = stored.dem
        self.result = stored.result
        self.pyramid = stored.pyramid
        self.tints = stored.tints
        self.meta = stored.meta
        self.summary = stored.meta.get("summary", {})
        self.unit = self.dem.vertical_unit
        t = self.dem.transform
        self.grid = render.Grid(
            crs_wkt=self.dem.horizontal_crs.to_wkt(),
            transform=(t.a, t.b, t.c, t.d, t.e, t.f),
            rows=self.dem.rows,
            cols=self.dem.cols,
        )
        self.onset_flat = self.result.onset_stage.reshape(-1)
        self.elevation_flat = self.dem.elevation.reshape(-1)
        self.depth_bounds = render.depth_bounds(self.unit.value)
        self._levels = _LRU(level_cache)
        self.images = render.ImageCache(TILE_IMAGE_BYTES)
        self._asset_tables = _LRU(64)
        self._routed = RememberingRoutes.of(self.result)
        self._what_ifs = _LRU(32)
        self._lock = threading.RLock()
        self._engine_lock = threading.Lock()
        self._buffers: tuple | None = None

        self._to_lonlat = LonLatTransformer(self.dem.horizontal_crs)
        self._from_lonlat = pyproj.Transformer.from_crs(CRS84, self.dem.horizontal_crs, always_xy=True)
        self._proj_lock = threading.Lock()
        self._assets: dict = {}

    # -- coordinates -------------------------------------------------------------

    def lonlat(self, x, y):
        with self._proj_lock:
            return self._to_lonlat.transform(x, y)

    def cell_at(self, lon: float, lat: float) -> tuple[int, int]:
        for v, what in ((lon, "lon"), (lat, "lat")):
            if not math.isfinite(v):
                raise InvalidParameter(f"{what} must be a finite number of degrees")
        if not (-180.0 <= lon <= 180.0 and -90.0 <= lat <= 90.0):
            raise InvalidParameter("lon must lie in [-180, 180] and lat in [-90, 90] (WGS 84 degrees)")
        with self._proj_lock:
            x, y = self._from_lonlat.transform(lon, lat)
        if not (math.isfinite(x) and math.isfinite(y)):
            raise LocationOutsideDEM("that point cannot be placed on the DEM's grid")
        try:
            return self.dem.rowcol(x, y)
        except LocationOutsideDEM:
            raise LocationOutsideDEM("that point lies outside the DEM") from None

    @property
    def unit_symbol(self) -> str:
        return self.unit.symbol

    def level_range(self) -> dict:
        """Slider range and step in the site's unit: lowest onset stage to highest ground.

        The first level shown is just below the spill elevation of the largest
        depression, where its shielded low ground is widest.
        """
        s = self.summary
        lo = s.get("onset_min")
        hi = s.get("elevation_max")
        if lo is None or hi is None:
            lo, hi = 0.0, 1.0
        step = 0.01 if self.unit is VerticalUnit.METRE else 0.05
        lo_r = math.floor(lo / step) * step
        hi_r = max(math.ceil(hi / step) * step, lo_r + step)
        t = self.result.depressions
        if len(t):
            k = int(np.argmax(t.area_m2))
            start = float(t.spill_elevation[k]) - 10 * step
        else:
            start = lo_r + 0.25 * (hi_r - lo_r)
        start = min(max(start, lo_r), hi_r)
        return {"min": round(lo_r, 4), "max": round(hi_r, 4), "step": step,
                "initial": round(start, 2)}

    # -- figures at a level ------------------------------------------------------

    def figures(self, level: np.float32, assets_key: Any = None, assets=None) -> dict:
        """Flooded and shielded totals, depression states and asset counts at ``level`` (cached)."""

        key = (float(level), assets_key)
        hit = self._levels.get(key)
        if hit is not None:
            return hit
        base = self._levels.get((float(level), None)) if assets_key is not None else None
        if base is None:
            with self._engine_lock:
                shape = self.dem.shape
                if self._buffers is None:
                    self._buffers = (np.empty(shape, np.uint8), np.empty(shape, np.float32))
                wm = water_level_map(self.result, level, row_areas=self.dem.row_areas,
                                     unit=self.unit, out=self._buffers)
            states, _ = depression_states(self.result.depressions, level)
            base = {
                "level": float(level),
                "unit": self.unit.value,
                "unit_symbol": self.unit.symbol,
                "flooded_area_m2": wm.flooded_area_m2,
                "flooded_area_ha": wm.flooded_area_m2 / 1e4,
                "flooded_volume_m3": wm.flooded_volume_m3,
                "shielded_area_m2": wm.shielded_area_m2,
                "shielded_area_ha": wm.shielded_area_m2 / 1e4,
                "shielded_volume_m3": wm.shielded_volume_m3,
                "depressions": {
                    "total": int(len(states)),
                    "overtopped": int(np.count_nonzero(states == DEPRESSION_OVERTOPPED)),
                    "cut_off": int(np.count_nonzero(states == DEPRESSION_CUT_OFF)),
                },
                "assets": None,
                "caution": SCREENING_CAUTION,
            }
            if self.unit.is_feet:
                base["flooded_volume_acre_ft"] = wm.flooded_volume_m3 / ACRE_FOOT_M3
                base["shielded_volume_acre_ft"] = wm.shielded_volume_m3 / ACRE_FOOT_M3
            self._levels.put((float(level), None), base)
        out = dict(base)
        if assets is not None:
            table = self.asset_table(assets_key, assets, level)
            st = table.state
            out["assets"] = {
                "total": len(table),
                "flooded": sum(1 for v in st if v == "flooded"),
                "shielded": sum(1 for v in st if v == "shielded"),
                "dry": sum(1 for v in st if v == "dry"),
                "without_figures": sum(1 for v in st if v == ""),
            }
        self._levels.put(key, out)
        return out

    # -- stage table -------------------------------------------------------------------

    @functools.cached_property
    def stage_table(self):
        """The site stage table (sillmark.products.stage.StageTable) over the slider's range,
        about :data:`CHART_POINTS` rows."""

        rng = self.level_range()
        lo, hi = rng["min"], rng["max"]
        step = _nice_step(hi - lo, CHART_POINTS)
        levels = np.arange(math.floor(lo / step) * step, hi + step * 0.5, step, dtype=np.float64)
        levels = np.unique(levels.astype(np.float32))
        with self._engine_lock:
            return stage_table(ArraySource(self.dem, self.result), levels)

    @functools.cached_property
    def stage_chart(self) -> dict:
        """The stage table as JSON-ready lists."""
        table = self.stage_table
        step = float(table.level[1] - table.level[0]) if len(table) > 1 else 0.0
        return {
            "unit": self.unit.value,
            "unit_symbol": self.unit.symbol,
            "step": round(step, 6),
            "level": [float(v) for v in table.level],
            "flooded_area_m2": [float(v) for v in table.flooded_area_m2],
            "flooded_volume_m3": [float(v) for v in table.flooded_volume_m3],
            "shielded_area_m2": [float(v) for v in table.shielded_area_m2],
            "shielded_volume_m3": [float(v) for v in table.shielded_volume_m3],
            "caution": SCREENING_CAUTION,
        }

    # -- outlets ----------------------------------------------------------------------

    @functools.cached_property
    def outlet_outline(self) -> dict:
        """The run's outlet cells (flood-tree code 9) as a GeoJSON FeatureCollection in WGS84.

        One feature: the cells vectorised along their edges (rasterio.features.shapes),
        so the map shows exactly the cells the flood started from, whatever marked
        them (the DEM edge, nodata, a water-body file or a traced shape).
        """


        mask = np.ascontiguousarray(self.result.flood_tree == OUTLET_CODE, dtype=np.uint8)
        features = []
        if mask.any():
            parts = [shapely.geometry.shape(g) for g, _ in rasterio.features.shapes(
                mask, mask=mask.astype(bool), connectivity=4, transform=self.dem.transform)]
            geom = parts[0] if len(parts) == 1 else shapely.geometry.MultiPolygon(parts)
            features.append({
                "type": "Feature",
                "properties": {"cells": int(mask.sum()),
                               "sources": list(self.summary.get("outlet_sources") or [])},
                "geometry": geojson_files.wgs84_geometry(geom, self.dem),
            })
        return {"type": "FeatureCollection", "caution": SCREENING_CAUTION, "features": features}

    # -- depressions ------------------------------------------------------------------

    @functools.cached_property
    def depression_list(self) -> list[dict]:
        """Every depression with its figures and its extent in lon/lat (for zooming)."""
        t = self.result.depressions
        n = len(t)
        if n == 0:
            return []
        ids = self.result.depression_id
        rows_idx, cols_idx = np.nonzero(ids > 0)
        labels = ids[rows_idx, cols_idx]
        rmin = np.full(n + 1, np.iinfo(np.int64).max)
        rmax = np.full(n + 1, -1)
        cmin = np.full(n + 1, np.iinfo(np.int64).max)
        cmax = np.full(n + 1, -1)
        np.minimum.at(rmin, labels, rows_idx)
        np.maximum.at(rmax, labels, rows_idx)
        np.minimum.at(cmin, labels, cols_idx)
        np.maximum.at(cmax, labels, cols_idx)
        tr = self.dem.transform
        out = []
        slon, slat = self.lonlat(t.spill_x, t.spill_y)
        plon, plat = self.lonlat(tr.c + (t.pit_col + 0.5) * tr.a, tr.f + (t.pit_row + 0.5) * tr.e)
        for k in range(n):
            d = k + 1
            xs = [tr.c + cmin[d] * tr.a, tr.c + (cmax[d] + 1) * tr.a]
            ys = [tr.f + rmin[d] * tr.e, tr.f + (rmax[d] + 1) * tr.e]
            lon, lat = self.lonlat([xs[0], xs[1], xs[0], xs[1]], [ys[0], ys[0], ys[1], ys[1]])
            vol_m3 = float(t.volume_m2_vu[k]) * self.unit.metres
            item = {
                "id": d,
                "pit_elevation": float(t.pit_elevation[k]),
                "spill_elevation": float(t.spill_elevation[k]),
                "max_depth": float(t.max_depth[k]),
                "area_m2": float(t.area_m2[k]),
                "area_ha": float(t.area_m2[k]) / 1e4,
                "volume_m3": vol_m3,
                "cell_count": int(t.cell_count[k]),
                "spills_to": int(t.spills_to[k]),
                "spill_lon": _finite(slon[k]),
                "spill_lat": _finite(slat[k]),
                "pit_lon": _finite(plon[k]),
                "pit_lat": _finite(plat[k]),
                "bounds": [float(min(lon)), float(min(lat)), float(max(lon)), float(max(lat))],
            }
            if self.unit.is_feet:
                item["volume_acre_ft"] = vol_m3 / ACRE_FOOT_M3
            out.append(item)
        return out

    @functools.cached_property
    def hierarchy(self):
        """The depression hierarchy of the site (sillmark.products.hierarchy)."""
        with self._engine_lock:
            return site_hierarchy(self.dem, self.result)

    def depression_curve(self, depression_id: int, points: int = 120) -> dict:
        """Stage–area and stage–storage of one depression, pit to spill elevation."""
        t = self.result.depressions
        if not 1 <= depression_id <= len(t):
            raise UnknownSite(f"there is no depression {depression_id} on this site "
                              f"(ids run from 1 to {len(t)})")
        h = self.hierarchy
        node = h.top_node(depression_id)
        k = depression_id - 1
        pit, spill = float(t.pit_elevation[k]), float(t.spill_elevation[k])
        levels = np.linspace(pit, spill, points)
        with self._engine_lock:
            curve = h.curve_at(node, levels)
        children = [int(c) for c in h.children(node)]
        return {
            "id": depression_id,
            "unit": self.unit.value,
            "unit_symbol": self.unit.symbol,
            "level": [float(v) for v in curve.elevation],
            "area_m2": [_finite(v) for v in curve.area_m2],
            "storage_m3": [_finite(v) for v in curve.storage_m3],
            "nested_pools": len(h.subtree(node)) - 1,
            "children": len(children),
            "pit_elevation": pit,
            "spill_elevation": spill,
            "source": "sillmark.products.hierarchy (exact for the DEM)",
        }

    # -- routes -------------------------------------------------------------------------

    def cell_report(self, lon: float, lat: float, level: np.float32) -> dict:
        """Elevation, onset stage, depth at ``level`` and the route of the cell under a point."""
        r, c = self.cell_at(lon, lat)
        z = float(self.dem.elevation[r, c])
        if not math.isfinite(z):
            raise LocationOutsideDEM("there is no elevation here (nodata)")
        s = float(self.result.onset_stage[r, c])
        route = self.result.route(r, c)  # LocationOutsideDEM where no outlet reaches
        h = float(level)
        flooded = s <= level
        shielded = (not flooded) and z < level
        rows, cols = route.rows[::-1], route.cols[::-1]  # outlet first: the way the water comes
        keep = _turns(rows, cols)
        x, y = self.dem.xy(rows[keep], cols[keep])
        lon_r, lat_r = self.lonlat(x, y)
        sx, sy = self.dem.xy(route.sill_row, route.sill_col)
        slon, slat = self.lonlat(sx, sy)
        cx, cy = self.dem.xy(r, c)
        clon, clat = self.lonlat(cx, cy)
        dep = int(self.result.depression_id[r, c])
        return {
            "row": r, "col": c,
            "lon": float(clon), "lat": float(clat),
            "x": float(cx), "y": float(cy),
            "unit": self.unit.value, "unit_symbol": self.unit.symbol,
            "level": h,
            "elevation": z,
            "onset_stage": s,
            "state": "flooded" if flooded else "shielded" if shielded else "dry",
            "depth": float(np.float32(level) - np.float32(z)) if flooded else 0.0,
            "depth_if_reached": max(0.0, float(np.float32(level) - np.float32(z))),
            "freeboard": float(np.float32(s) - np.float32(level)),
            "depression_id": dep,
            "route": {
                "type": "LineString",
                "coordinates": [[round(float(a), 8), round(float(b), 8)] for a, b in zip(lon_r, lat_r)],
            },
            "route_cells": int(len(route)),
            "reaches_outlet": bool(route.reaches_outlet),
            "sill": {
                "row": int(route.sill_row), "col": int(route.sill_col),
                "lon": float(slon), "lat": float(slat),
                "elevation": float(route.sill_elevation),
                "is_own_cell": (int(route.sill_row), int(route.sill_col)) == (r, c),
            },
            "caution": SCREENING_CAUTION,
        }

    # -- assets -------------------------------------------------------------------------

    def assets(self, key: Any, path: Path):
        """The asset set ``key`` (its file ``path``) placed on this DEM (cached)."""

        with self._lock:
            if key not in self._assets:
                self._assets[key] = read_assets(path, self.dem)
            return self._assets[key]

    def asset_table(self, key: Any, assets, level: np.float32):
        cache_key = (key, float(level))
        table = self._asset_tables.get(cache_key)
        if table is None:
            table = assess_assets(assets, self.dem, self._routed, level)
            self._asset_tables.put(cache_key, table)
        return table

    def asset_rows(self, key: Any, assets, level: np.float32) -> list[dict]:
        table = self.asset_table(key, assets, level)
        rows = []
        ok = [table.has_figures(k) for k in range(len(table))]
        slon = np.full(len(table), np.nan)
        slat = np.full(len(table), np.nan)
        if any(ok):
            idx = np.flatnonzero(ok)
            a, b = self.lonlat(table.sill_x[idx], table.sill_y[idx])
            slon[idx], slat[idx] = a, b
        for k in range(len(table)):
            rec = table.record(k)
            rows.append({
                "index": k,
                "name": rec["name"],
                "kind": rec["kind"],
                "status": rec["status"],
                "state": rec["state"],
                "lon": rec["lon"], "lat": rec["lat"],
                "ground_elevation": rec["ground_elevation"],
                "onset_stage": rec["onset_stage"],
                "depth": rec["depth"],
                "depth_if_reached": rec["depth_if_reached"],
                "freeboard": rec["freeboard"],
                "depression_id": rec["depression_id"],
                "sill_elevation": rec["sill_elevation"],
                "sill_is_own_cell": rec["sill_is_own_cell"],
                "sill_lon": _finite(slon[k]), "sill_lat": _finite(slat[k]),
            })
        return rows

    def what_if(self, key: Any, assets, index: int, height: Any) -> dict:
        """Raise the controlling sill of asset ``index`` by ``height`` and flood again."""

        if not 0 <= index < len(assets):
            raise InvalidParameter(f"there is no asset {index}; indices run from 0 to {len(assets) - 1}")
        cache_key = (key, index, str(height).strip())
        hit = self._what_ifs.get(cache_key)
        if hit is not None:
            return hit
        mask = (self.result.flood_tree == OUTLET_CODE) & self.dem.valid
        with self._engine_lock:  # a full flood: one at a time
            w = raise_sill(self.dem, mask, self.result, assets[index], height)
        cells = w.route_after
        keep = _turns(cells[:, 0], cells[:, 1])
        x, y = self.dem.xy(cells[keep, 0].astype(np.int64), cells[keep, 1].astype(np.int64))
        lon, lat = self.lonlat(x, y)

        def sill(s) -> dict:
            a, b = self.lonlat(s.x, s.y)
            return {"row": s.row, "col": s.col, "lon": float(a), "lat": float(b), "elevation": s.elevation}

        out = {
            "asset": index,
            "name": w.name,
            "unit": self.unit.value,
            "unit_symbol": self.unit.symbol,
            "height": w.height,
            "raised": sill(w.raised),
            "raised_elevation": w.raised_elevation,
            "own_sill": w.own_sill,
            "onset_before": w.onset_before,
            "onset_after": w.onset_after,
            "gain": w.gain,
            "sill_after": sill(w.sill_after),
            "raised_cell_controls": w.raised_cell_controls,
            "route_after": {"type": "LineString",
                            "coordinates": [[round(float(a), 8), round(float(b), 8)] for a, b in zip(lon, lat)]},
            "explanation": w.explanation,
            "caution": SCREENING_CAUTION,
        }
        self._what_ifs.put(cache_key, out)
        return out


def _turns(rows: np.ndarray, cols: np.ndarray) -> np.ndarray:
    """Indices of the route cells where it turns (and its ends): the same line, fewer vertices."""
    n = len(rows)
    keep = np.ones(n, dtype=bool)
    if n > 2:
        dr = np.diff(np.asarray(rows, dtype=np.int64))
        dc = np.diff(np.asarray(cols, dtype=np.int64))
        keep[1:-1] = (dr[1:] != dr[:-1]) | (dc[1:] != dc[:-1])
    return np.flatnonzero(keep)


class SiteCache:
    """The most recently used analysed sites, open in this process (thread-safe)."""

    def __init__(self, data_dir: Path, capacity: int, level_cache: int) -> None:
        self.data = Path(data_dir)
        self.capacity = max(1, int(capacity))
        self.level_cache = level_cache
        self._open: collections.OrderedDict = collections.OrderedDict()
        self._lock = threading.Lock()
        self._loading: dict = {}

    def get(self, site_id: int, run_id: int) -> SiteData:
        key = (int(site_id), int(run_id))
        with self._lock:
            if key in self._open:
                self._open.move_to_end(key)
                return self._open[key]
            gate = self._loading.setdefault(key, threading.Lock())
        with gate:
            with self._lock:
                if key in self._open:
                    return self._open[key]
            try:
                data = SiteData(site_id, run_id, layout.run_dir(self.data, site_id, run_id),
                                level_cache=self.level_cache)
            except arrays.StaleArrays as exc:
                raise SiteNotReady(f"{exc}; run the analysis again") from None
            with self._lock:
                # A newer run of the same site replaces the older one.
                for old in [k for k in self._open if k[0] == key[0]]:
                    del self._open[old]
                self._open[key] = data
                while len(self._open) > self.capacity:
                    self._open.popitem(last=False)
                self._loading.pop(key, None)
            return data

    def drop(self, site_id: int) -> None:
        with self._lock:
            for old in [k for k in self._open if k[0] == int(site_id)]:
                del self._open[old]
