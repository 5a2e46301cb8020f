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

import math
import os
import shutil
import sqlite3
import weakref
from pathlib import Path
from typing import Any

from sillmark.errors import (
    InvalidDEM,
    InvalidParameter,
    SillmarkError,
)
from sillmark.grid.assets import read_assets
from sillmark.grid.dem import DEM, read_dem
from sillmark.grid.dem_grid import read_dem_grid
from sillmark.grid.edits import read_edits
from sillmark.grid.outlets import build_outlets
from sillmark.grid.raster_files import raster_outline
from sillmark.io.geotiff import write_dem_copy
from sillmark.products.significance import DEFAULT_VERTICAL_ACCURACY_M
from sillmark.units import VerticalUnit, clean_datum, datum_phrase, unit_words
from sillmark.web import db, layout, reach_inputs
from sillmark.web.dem_description import band_choices, crs_code, dem_choices, dem_info
from sillmark.web.tiled_run import engine_settings

OUTLET_KINDS = ("edge", "nodata", "file")


class SiteNotReady(SillmarkError):
    """The site has no finished analysis yet (or its results must be made again)."""


class UnknownSite(SillmarkError, LookupError):
    """No site with that id."""


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
            "vertical_unit_label": unit_words(row["vertical_unit"] or info.get("vertical_unit") or "m"),
            "vertical_datum": row["vertical_datum"],
            "datum_phrase": datum_phrase(row["vertical_datum"]),
            "vertical_accuracy": row["vertical_accuracy"],
            "accuracy_default": accuracy_default_text(row["vertical_unit"] or info.get("vertical_unit")
                                                      or "m"),
            "dem_crs": row["dem_crs"],
            "dem_band": row["dem_band"],
            "outlets": db.loads(row["outlets"], []),
            "connectivity": row["connectivity"],
            "dem": info,
            "current_run": row["current_run"],
            "summary": summary,
            "latest_run": run_dict(latest) if latest is not None else None,
            "state": site_state(row, latest),
        }

    # -- new sites ------------------------------------------------------------

    def register_upload(self, conn: sqlite3.Connection, tmp_path: Path, original_name: str,
                        *, crs: str | None = None, band: Any = None) -> int:
        """Read an uploaded DEM and keep it as a new draft site; return its id.

        The file is read first (``InvalidDEM`` and friends propagate, and the
        caller deletes the temporary file); only a readable DEM becomes a site.
        A DEM of more than ``UPLOAD_READ_CELLS`` cells is read from its header
        only (see :meth:`_dem_for_request`).

        ``crs`` (an EPSG code) is used when the file states none, ``band`` when
        it has several; without the one it needs, :class:`ChoiceNeeded` says
        which. The file is then kept as uploaded (``dem_source``) and the site
        reads a GeoTIFF copy of the chosen band with the given CRS
        (``dem_file``), so the analysis worker needs no further telling.
        """

        outline = raster_outline(tmp_path)
        chosen_crs, chosen_band = dem_choices(outline, Path(original_name).name, crs, band)
        dem = self._dem_for_request(tmp_path, crs=chosen_crs, band=chosen_band)
        info = dem_info(dem, file_bytes=os.path.getsize(tmp_path))
        info["band_count"] = outline.bands
        info["bands"] = band_choices(outline)
        info["band"] = chosen_band or 1
        info["crs_source"] = "you" if chosen_crs is not None else "file"
        suffix = Path(original_name).suffix.lower()
        stored = "dem/" + layout.new_name(suffix if suffix in (".tif", ".tiff", ".img", ".asc") else ".tif")
        copy = "dem/" + layout.new_name(".tif") if (chosen_crs or chosen_band) else None
        name = _site_name(original_name)
        datum = info.get("vertical_datum_from_crs")
        with db.transaction(conn):
            cur = conn.execute(
                "INSERT INTO sites(name, created_utc, dem_file, original_name, dem_info, "
                "vertical_unit, outlets, connectivity, confirmed, vertical_datum, dem_crs, "
                "dem_band, dem_source) VALUES (?, ?, ?, ?, ?, ?, ?, ?, 0, ?, ?, ?, ?)",
                (name, db.utc_now(), copy or stored, _clean_name(original_name), db.dumps(info),
                 info["vertical_unit"], db.dumps([{"kind": "edge"}]), 8, datum,
                 crs_code(chosen_crs), chosen_band, stored if copy else None),
            )
            site_id = int(cur.lastrowid)
            folder = layout.site_dir(self.data, site_id)
            target = folder / stored
            target.parent.mkdir(parents=True, exist_ok=True)
            os.replace(tmp_path, target)
            if copy:
                self._write_copy(target, folder / copy, chosen_crs, chosen_band, None, datum)
        return site_id

    def _write_copy(self, source: Path, target: Path, crs, band, unit, datum) -> None:
        """The GeoTIFF the site reads: ``band`` of ``source`` with ``crs`` (see register_upload)."""
        grid = read_dem_grid(source, crs=crs, band=band, vertical_unit=unit)
        write_dem_copy(target, grid, vertical_datum=datum)

    def _dem_for_request(self, path: Path, vertical_unit: VerticalUnit | None = None, *,
                         crs: Any = None, band: int | None = None):
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
        grid = read_dem_grid(path, vertical_unit=vertical_unit, crs=crs, band=band)
        limit = int(self.config["MAX_DEM_CELLS"])
        cells = grid.rows * grid.cols
        if cells > limit:
            raise InvalidDEM(
                f"'{Path(path).name}' has {grid.rows:,} × {grid.cols:,} = {cells:,} cells, more "
                f"than the limit of {limit:,}; crop it to the site or resample it to coarser cells"
            )
        if cells > int(self.config["UPLOAD_READ_CELLS"]):
            return grid
        return read_dem(path, vertical_unit=vertical_unit, crs=crs, band=band, max_cells=limit)

    def configure(self, conn: sqlite3.Connection, site_id: int, *, name: str | None,
                  vertical_unit: str, outlets: list[str], connectivity: Any,
                  water_file: Path | None, water_name: str | None,
                  vertical_datum: str | None = None, crs: str | None = None,
                  band: Any = None, vertical_accuracy: str | None = None) -> int:
        """Check and store a site's settings, queue an analysis run; return the run id.

        Everything is checked against the DEM before anything is stored: the
        unit against the CRS, the outlets on the grid (a water-body GeoJSON
        that misses the DEM is refused). On any error nothing changes.
        """

        row = self.site(conn, site_id)
        unit = _unit_from_form(vertical_unit)
        # A form without the field keeps the datum; an empty field clears it.
        datum = row["vertical_datum"] if vertical_datum is None else clean_datum(vertical_datum)
        # The same for the vertical accuracy (empty: the default minimum).
        accuracy = (row["vertical_accuracy"] if vertical_accuracy is None
                    else _accuracy_from_form(vertical_accuracy))
        info = db.loads(row["dem_info"], {})
        if info.get("vertical_unit_source") == "crs" and unit.value != info.get("vertical_unit"):
            raise InvalidParameter(
                f"the DEM's CRS states its heights in {unit_words(info['vertical_unit'])}; "
                f"choose {unit_words(info['vertical_unit'])} as the vertical unit"
            )
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
        source_rel = row["dem_source"] or row["dem_file"]
        outline = raster_outline(folder / source_rel)
        new_crs, new_band = dem_choices(
            outline, row["original_name"],
            crs if (crs or "").strip() else row["dem_crs"],
            band if str(band or "").strip() else row["dem_band"])
        dem_rel = row["dem_file"]
        new_copy = None
        if (crs_code(new_crs), new_band) != (row["dem_crs"], row["dem_band"]):
            # Another CRS or band: a new copy, made before anything is stored (the
            # current results keep reading the one they were made from).
            new_copy = "dem/" + layout.new_name(".tif")
            dem = self._dem_for_request(folder / source_rel, unit, crs=new_crs, band=new_band)
            fresh = dem_info(dem, file_bytes=info.get("file_bytes"))
            fresh.update(band_count=outline.bands, band=new_band or 1, bands=band_choices(outline),
                         crs_source="you" if new_crs is not None else "file")
            info = fresh
            dem_rel = new_copy
        else:
            dem = self._dem_for_request(folder / dem_rel, unit)
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
            "dem_file": dem_rel,
            "vertical_unit": unit.value,
            "vertical_datum": datum,
            "vertical_accuracy": accuracy,
            "crs": crs_code(new_crs),
            "band": new_band,
            "outlets": spec_files,
            "connectivity": conn_value,
            "max_cells": int(self.config["MAX_DEM_CELLS"]),
            **engine_settings(self.config),
            **reach_inputs.run_settings(folder),
        }
        new_name = _site_name(name) if name and name.strip() else row["name"]
        with db.transaction(conn):
            conn.execute(
                "UPDATE sites SET name = ?, vertical_unit = ?, outlets = ?, connectivity = ?, "
                "confirmed = 1, vertical_datum = ?, vertical_accuracy = ? WHERE id = ?",
                (new_name, unit.value, db.dumps(spec_files), conn_value, datum, accuracy, site_id),
            )
            if new_copy is not None:
                self._write_copy(folder / source_rel, folder / new_copy, new_crs, new_band, unit, datum)
                conn.execute(
                    "UPDATE sites SET dem_file = ?, dem_source = ?, dem_crs = ?, dem_band = ?, "
                    "dem_info = ? WHERE id = ?",
                    (new_copy, source_rel, crs_code(new_crs), new_band, db.dumps(info), site_id))
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

    def register_demo(self, conn: sqlite3.Connection) -> list[int]:
        """Register the demo site (once per data folder) and queue its analysis;
        returns the runs queued (none when it was registered already).

        Caddlewick on the River Torvey (invented): ``riverbend.tif`` with the DEM
        edge and the river line as outlets, D8, and its asset table; and its
        scenario "Ford Road culvert" (``ford_road_culvert.geojson``), queued
        after the site's own run.
        """
        if db.get_setting(conn, "demo_registered") is not None:
            return []
        demo = Path(self.config["DEMO_DIR"])
        dem_src, river, assets = demo / "riverbend.tif", demo / "river.geojson", demo / "riverbend_assets.csv"
        if not dem_src.is_file():
            with db.transaction(conn):
                db.set_setting(conn, "demo_registered", "missing")
            return []

        dem = read_dem(dem_src)
        info = dem_info(dem, file_bytes=dem_src.stat().st_size)
        dem_rel = "dem/" + layout.new_name(".tif")
        river_rel = "outlets/" + layout.new_name(".geojson")
        assets_rel = "assets/" + layout.new_name(".csv")
        outlets = [{"kind": "edge"}, {"kind": "file", "file": river_rel, "name": "river.geojson"}]
        # The lanes and the refuges, so that the demo's map shows the places that become islands.
        reach = {kind: {"file": reach_inputs.new_file(), "name": f"{kind}.geojson",
                        "src": demo / f"{kind}.geojson"}
                 for kind in ("refuges", "roads") if (demo / f"{kind}.geojson").is_file()}
        settings = {"dem_file": dem_rel, "vertical_unit": dem.vertical_unit.value,
                    "outlets": outlets, "connectivity": 8,
                    "max_cells": int(self.config["MAX_DEM_CELLS"]), **engine_settings(self.config)}
        if "refuges" in reach:
            settings["reach"] = {k: {"file": v["file"], "name": v["name"]} for k, v in reach.items()}
        with db.transaction(conn):
            cur = conn.execute(
                "INSERT INTO sites(name, created_utc, dem_file, original_name, dem_info, vertical_unit, "
                "outlets, connectivity, confirmed, is_demo) VALUES (?, ?, ?, ?, ?, ?, ?, 8, 1, 1)",
                ("Caddlewick on the River Torvey (demo)", db.utc_now(), dem_rel, "riverbend.tif",
                 db.dumps(info), dem.vertical_unit.value, db.dumps(outlets)),
            )
            site_id = int(cur.lastrowid)
            folder = layout.site_dir(self.data, site_id)
            for src, rel in ((dem_src, dem_rel), (river, river_rel), (assets, assets_rel),
                             *((v["src"], v["file"]) for v in reach.values())):
                (folder / rel).parent.mkdir(parents=True, exist_ok=True)
                shutil.copyfile(src, folder / rel)
            if "reach" in settings:
                reach_inputs.store(folder, settings["reach"])

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
            runs = [run_id]
            culvert = demo / "ford_road_culvert.geojson"
            if culvert.is_file():
                edits_rel = "scenarios/" + layout.new_name(".geojson")
                (folder / edits_rel).parent.mkdir(parents=True, exist_ok=True)
                shutil.copyfile(culvert, folder / edits_rel)
                count = len(read_edits(folder / edits_rel, dem))
                cur = conn.execute(
                    "INSERT INTO scenarios(site_id, name, created_utc, edits_file, edits_name, "
                    "edit_count, base_run) VALUES (?, ?, ?, ?, ?, ?, ?)",
                    (site_id, "Ford Road culvert", db.utc_now(), edits_rel, culvert.name, count,
                     run_id))
                runs.append(db.queue_scenario_run(conn, site_id, int(cur.lastrowid), run_id,
                                                  settings, edits_rel, culvert.name))
            db.set_setting(conn, "demo_registered", str(site_id))
        return runs

    def rerun(self, conn: sqlite3.Connection, site_id: int) -> int:
        """Queue the analysis again with the site's current settings."""
        row = self.site(conn, site_id)
        if not row["confirmed"]:
            raise SiteNotReady("confirm the site's settings first")
        settings = {"dem_file": row["dem_file"], "vertical_unit": row["vertical_unit"],
                    "vertical_datum": row["vertical_datum"], "crs": row["dem_crs"],
                    "band": row["dem_band"],
                    "outlets": db.loads(row["outlets"], []), "connectivity": row["connectivity"],
                    "max_cells": int(self.config["MAX_DEM_CELLS"]), **engine_settings(self.config),
                    **reach_inputs.run_settings(layout.site_dir(self.data, site_id))}
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


def _unit_from_form(text: Any) -> VerticalUnit:
    """The vertical unit a form sent; refused in words a person reads (no internal codes)."""
    try:
        return VerticalUnit.parse(text or "")
    except InvalidParameter:
        shown = "".join(ch for ch in str(text) if ch.isprintable())[:20]
        raise InvalidParameter(
            f"unknown vertical unit {shown!r}; choose metres, international feet or US survey feet"
        ) from None


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


def _accuracy_from_form(text: Any) -> float | None:
    """The vertical accuracy field: empty for the default, else an RMSE above 0."""
    value = str(text).strip()
    if not value:
        return None
    try:
        number = float(value)
    except ValueError:
        number = math.nan
    if not math.isfinite(number) or number <= 0 or number > 1000:
        raise InvalidParameter(
            f"the vertical accuracy is the DEM's RMSE, a number above 0 in its vertical unit "
            f"(e.g. 0.10), not {value[:20]!r}; leave it empty for the default")
    return number


def accuracy_default_text(unit: Any) -> str:
    """Where the default vertical accuracy of a site comes from, in words."""
    u = VerticalUnit.parse(unit)
    value = DEFAULT_VERTICAL_ACCURACY_M / u.metres
    return (f"{value:.3g} {u.symbol} ({DEFAULT_VERTICAL_ACCURACY_M:g} m), usual for airborne "
            "lidar: a value recalled from memory, not a cited standard")
