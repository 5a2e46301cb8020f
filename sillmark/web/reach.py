"""A sloped river profile and the cut-off stage in the web app.

- ``POST /uploads/sites/<id>/reach``: a river profile, refuges and roads
  (GeoJSON, form fields ``profile``, ``refuges``, ``roads``; ``clear`` names
  inputs to drop), checked on the site's DEM, then the analysis runs again.
- ``GET /api/sites/<id>/reach``: what the site's results hold: the profile
  along the river (level against chainage, stations marked) and the offset
  slider's range; whether cut-off stages are there, and the legend entry.
- ``GET /api/sites/<id>/reach/assets?level=&offset=``: each asset's onset
  offset, cut-off stage and island window.
- ``GET /tiles/<id>/offset/<D>/<z>/<x>/<y>.png``: the water-level map of the
  profile raised by ``D`` (flooded where the onset offset is at most ``D``,
  depth ``W0 + D - z``), drawn like the level maps.
- ``GET /tiles/<id>/cutoff/<h>/<z>/<x>/<y>.png``: the ground cut off at level
  ``h``: cells whose cut-off stage ``k`` and onset stage ``s`` satisfy
  ``k <= h < s`` (:mod:`sillmark.products.cutoff`).

The rasters are read from the run's results folder (``onset_offset.tif``,
``profile_level.tif``, ``cutoff_stage.tif``); the cut-off stage is also
computed again from the refuges and roads kept beside them, for the routes
that name where each asset's last route goes under, and must equal the file.
"""

from __future__ import annotations

import contextlib
import math
import os
import threading
from pathlib import Path

import numpy as np
import rasterio
from flask import Blueprint, current_app, jsonify, request, url_for

from sillmark import SCREENING_CAUTION
from sillmark.errors import InvalidParameter
from sillmark.grid.dem import read_dem
from sillmark.grid.ground import ground_unit
from sillmark.grid.profiles import read_profile
from sillmark.grid.refuges import read_refuges, read_roads
from sillmark.io.reach_files import CUTOFF_FILE, INPUT_COPIES, OFFSET_FILES
from sillmark.products.cutoff import asset_cutoff, cutoff_stage
from sillmark.units import datum_phrase
from sillmark.web import db, get_db, layout, reach_inputs, render, services
from sillmark.web.access import open_site, site_assets, site_row
from sillmark.web.site_data import parse_level
from sillmark.web.sites import SiteNotReady
from sillmark.web.tiles import _check_tile, _tile
from sillmark.web.uploads import _received

bp = Blueprint("reach", __name__)

#: Colour of cut-off ground on the map (a plum wash), with its opacity (0-255).
CUT_OFF_COLOUR = (122, 62, 140)
CUT_OFF_ALPHA = 150
_CUT_PLTE = bytes((0, 0, 0)) + bytes(CUT_OFF_COLOUR)
_CUT_TRNS = bytes((0, CUT_OFF_ALPHA))

#: Wording of the legend entry.
CUT_OFF_LEGEND = ("cut off: still dry, but every route to a refuge is under water "
                  "(evacuate before this level)")


class ReachData:
    """The profile and cut-off rasters of one run, read once."""

    def __init__(self, data) -> None:
        results = Path(data.folder) / "results"
        dem = data.dem
        self.offset = self.height = self.profile = None
        if (results / OFFSET_FILES[0]).is_file():
            offset = _read(results / OFFSET_FILES[0])
            level = _read(results / OFFSET_FILES[1])
            self.offset = offset.reshape(-1)
            # z - W0: depth at offset D is D - (z - W0) = W0 + D - z.
            self.height = (dem.elevation - level).astype(np.float32).reshape(-1)
            self.profile = read_profile(results / INPUT_COPIES["profile"], dem)
            finite = offset[np.isfinite(offset)]
            self.offset_range = ((float(finite.min()), float(finite.max())) if finite.size
                                 else (0.0, 0.0))
        self.cut = None
        if (results / CUTOFF_FILE).is_file():
            stored = _read(results / CUTOFF_FILE)
            roads = results / INPUT_COPIES["roads"]
            cut = cutoff_stage(data.result.onset_stage,
                               read_refuges(results / INPUT_COPIES["refuges"], dem)[0],
                               valid=dem.valid,
                               passable=read_roads(roads, dem)[0] if roads.is_file() else None,
                               connectivity=data.result.connectivity)
            if not np.array_equal(cut.stage, stored, equal_nan=True):
                raise SiteNotReady(f"{CUTOFF_FILE} no longer matches the refuges kept beside it; "
                                   "run the analysis again")
            self.cut = cut
            self.cut_flat = stored.reshape(-1)
            onset = data.result.onset_stage
            self.wet_flat = np.where(np.isnan(onset), np.float32(np.inf), onset).reshape(-1)
            self.with_roads = roads.is_file()

    def profile_chart(self) -> dict | None:
        """The design profile along the river: level against chainage, stations marked."""
        p = self.profile
        if p is None:
            return None
        chainage = np.unique(np.concatenate([[0.0, p.length], p.chainage]))
        return {
            "chainage": [float(c) for c in chainage],
            "level": [float(v) for v in p.level_at(chainage)],
            "stations": [{"name": n, "chainage": float(c), "level": float(v)}
                         for n, c, v in zip(p.names, p.chainage, p.level)],
            "length": float(p.length),
        }


def _read(path: Path) -> np.ndarray:
    with rasterio.open(path) as ds:
        return ds.read(1, masked=True).filled(np.nan).astype(np.float32)


_OPEN_LOCK = threading.Lock()


def reach_of(data) -> ReachData:
    """The :class:`ReachData` of an open site run, kept with it (and dropped with it)."""
    found = getattr(data, "_reach_data", None)
    if found is None:
        with _OPEN_LOCK:
            found = getattr(data, "_reach_data", None)
            if found is None:
                found = ReachData(data)
                data._reach_data = found
    return found


def _finite(v) -> float | None:
    v = float(v)
    return v if math.isfinite(v) else None


def _stage_text(v: float) -> str | None:
    """Infinite cut-off stages as words, for tables."""
    if math.isnan(v):
        return None
    if v == math.inf:
        return "never"
    if v == -math.inf:
        return "always"
    return None


# --------------------------------------------------------------------------- API


@bp.get("/api/sites/<int:site_id>/reach")
def describe(site_id: int):
    row, data = open_site(site_id)
    reach = reach_of(data)
    unit = data.unit.symbol
    files = reach_inputs.stored(layout.site_dir(services().data_dir, site_id))
    out = {
        "unit": unit,
        "datum": datum_phrase(row["vertical_datum"]),
        "inputs": {k: v["name"] for k, v in files.items()},
        "profile": reach.profile_chart(),
        "chainage_unit": ground_unit(data.dem)[0],
        "offset_range": list(reach.offset_range) if reach.offset is not None else None,
        "cutoff": None if reach.cut is None else {
            "roads": reach.with_roads,
            "legend": {"label": CUT_OFF_LEGEND,
                       "colour": "#%02x%02x%02x" % CUT_OFF_COLOUR,
                       "opacity": round(CUT_OFF_ALPHA / 255, 2)},
        },
        "caution": SCREENING_CAUTION,
    }
    return jsonify(out)


@bp.get("/api/sites/<int:site_id>/reach/assets")
def assets(site_id: int):
    _, data = open_site(site_id)
    reach = reach_of(data)
    level = parse_level(request.args.get("level", "0"))
    key, placed = site_assets(site_id, data)
    rows: list[dict] = []
    if placed is not None:
        table = data.asset_table(key, placed, level)
        ok = np.array([table.has_figures(k) for k in range(len(table))], bool)
        r = np.where(ok, table.row, -1).astype(np.int64)
        c = np.where(ok, table.col, -1).astype(np.int64)
        figures = asset_cutoff(reach.cut, r, c, float(level)) if reach.cut is not None else None
        offsets = reach.offset.reshape(data.dem.shape) if reach.offset is not None else None
        for k in range(len(table)):
            item = {"index": k, "name": table.name[k]}
            if offsets is not None:
                item["onset_offset"] = _finite(offsets[r[k], c[k]]) if ok[k] else None
            if figures is not None and ok[k]:
                stage = float(figures.stage[k])
                cut_at = None
                if figures.cut_row[k] >= 0:
                    x, y = data.dem.transform @ (int(figures.cut_col[k]) + 0.5,
                                                 int(figures.cut_row[k]) + 0.5)
                    lon, lat = data.lonlat(x, y)
                    cut_at = {"x": float(x), "y": float(y), "lon": float(lon), "lat": float(lat)}
                item.update(cutoff_stage=_finite(stage), cutoff_words=_stage_text(stage),
                            island_from=_finite(figures.island_from[k]),
                            island_to=_finite(figures.island_to[k]),
                            island_now=bool(figures.is_island[k]), cut_at=cut_at)
            rows.append(item)
    return jsonify({"level": float(level), "unit": data.unit.symbol, "assets": rows,
                    "caution": SCREENING_CAUTION})


# --------------------------------------------------------------------------- map tiles


def _layer_tile(site_id: int, kind: str, text: str, z: int, x: int, y: int, *,
                layer: str, missing: str, paint) -> object:
    """A map tile of one of the site's reach layers at a level or offset ``text``:
    ``paint(index, reach, value, data)`` draws the tile's cells (``index``), which a
    tile wholly off the grid never reaches. ``layer`` names the attribute of the
    site's reach data the tile needs; without it the site is told so (``missing``)."""
    _check_tile(z, x, y)
    value = parse_level(text)
    _, data = open_site(site_id)
    reach = reach_of(data)
    if getattr(reach, layer) is None:
        raise SiteNotReady(missing)

    def draw() -> bytes:
        index = services().tiles.get(data.grid, z, x, y)
        if index is None:
            return render.BLANK_PNG
        return paint(index, reach, value, data)

    return _tile(data, (kind, repr(float(value)), z, x, y), draw)


def _paint_offset(index, reach, offset, data) -> bytes:
    return render.water_tile(index, reach.offset, reach.height, offset, data.depth_bounds)


def cut_off_codes(index: np.ndarray, cut_flat: np.ndarray, wet_flat: np.ndarray,
                  level: np.float32) -> np.ndarray:
    """1 where the pixel's cell is cut off at ``level`` (``k <= h < s``), else 0."""
    out = np.zeros(index.shape, np.uint8)
    inside = index >= 0
    cells = index[inside]
    with np.errstate(invalid="ignore"):
        island = (cut_flat[cells] <= level) & (level < wet_flat[cells])  # NaN k: False
    out[inside] = island.astype(np.uint8)
    return out


def _paint_cut_off(index, reach, level, data) -> bytes:
    codes = cut_off_codes(index, reach.cut_flat, reach.wet_flat, level)
    if not codes.any():
        return render.BLANK_PNG
    return render.encode_palette_png(codes.reshape(render.TILE, render.TILE), _CUT_PLTE, _CUT_TRNS)


@bp.get("/tiles/<int:site_id>/offset/<offset>/<int:z>/<int:x>/<int:y>.png")
def offset_tile(site_id: int, offset: str, z: int, x: int, y: int):
    return _layer_tile(site_id, "offset", offset, z, x, y, layer="offset", paint=_paint_offset,
                       missing="this site has no river profile; add one on its settings page")


@bp.get("/tiles/<int:site_id>/cutoff/<level>/<int:z>/<int:x>/<int:y>.png")
def cutoff_tile(site_id: int, level: str, z: int, x: int, y: int):
    return _layer_tile(site_id, "cutoff", level, z, x, y, layer="cut", paint=_paint_cut_off,
                       missing="this site has no refuges; add them on its settings page")


# --------------------------------------------------------------------------- uploads


def _is_geojson(path: Path, name: str) -> bool:
    suffix = os.path.splitext(name or "")[1].lower()
    with open(path, "rb") as fh:
        start = fh.read(64).lstrip()
    return suffix in (".geojson", ".json", "") and start.startswith(b"{")


@bp.post("/uploads/sites/<int:site_id>/reach")
def upload(site_id: int):
    """Store a site's river profile, refuges and roads, then run its analysis again (202)."""
    svc = services()
    conn = get_db()
    row = site_row(site_id)
    if not row["confirmed"]:
        raise SiteNotReady("confirm the site's settings first, then add a river profile or refuges")
    latest = db.latest_run(conn, site_id)
    if latest is not None and latest["status"] in (db.QUEUED, db.RUNNING):
        raise SiteNotReady("the site's analysis is running; add these files once it has finished")
    folder = layout.site_dir(svc.data_dir, site_id)
    files = reach_inputs.stored(folder)
    for kind in request.form.getlist("clear"):
        if kind not in reach_inputs.KINDS:
            raise InvalidParameter(f"unknown input {kind[:30]!r}; clear profile, refuges or roads")
        files.pop(kind, None)
    limit = int(current_app.config["MAX_SIDE_FILE_BYTES"])
    dem = read_dem(folder / row["dem_file"], vertical_unit=row["vertical_unit"])
    readers = {"profile": read_profile, "refuges": read_refuges, "roads": read_roads}
    with contextlib.ExitStack() as stack:
        received = {}
        for kind in reach_inputs.KINDS:
            path, name = stack.enter_context(_received(kind, limit=limit, required=False))
            if path is None:
                continue
            if not _is_geojson(path, name):
                raise InvalidParameter(
                    f"the {reach_inputs.KINDS[kind]} file must be GeoJSON (a .geojson file "
                    "holding one FeatureCollection)")
            readers[kind](Path(path), dem)  # refuses, with the reason, what it cannot use
            received[kind] = (path, name)
        if "roads" in {**files, **received} and "refuges" not in {**files, **received}:
            raise InvalidParameter("roads limit the routes to refuges; give the refuges with them")
        if not received and not request.form.getlist("clear"):
            raise InvalidParameter("choose a river profile, refuges or roads file (GeoJSON)")
        for kind, (path, name) in received.items():
            rel = reach_inputs.new_file()
            (folder / rel).parent.mkdir(parents=True, exist_ok=True)
            os.replace(path, folder / rel)
            files[kind] = {"file": rel, "name": os.path.basename(name)[:120]}
        reach_inputs.store(folder, files)
    run_id = svc.registry.rerun(conn, site_id)
    svc.runner.submit(run_id)
    response = jsonify({"run_id": run_id, "inputs": {k: v["name"] for k, v in files.items()},
                        "site_url": url_for("pages.site", site_id=site_id)})
    response.status_code = 202
    return response
