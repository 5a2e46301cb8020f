"""Open sites: one analysed site held in the server process, and the cache of open sites.

:class:`SiteData` holds a run's result arrays memory-mapped (see
:mod:`sillmark.web.arrays`) and the figures the map asks for again and again (per
water level, the stage table, the depression list, the asset tables), cached, so
the slider and the map tiles never recompute the flood. :class:`SiteCache` keeps
the most recently used sites open. Every cache is a :class:`sillmark.web.caches.LockedLRU`.
"""

from __future__ import annotations

import csv
import dataclasses
import functools
import math
import os
import threading
from pathlib import Path
from typing import Any

import numpy as np
import pyproj
import rasterio.features
import shapely.geometry

from sillmark import SCREENING_CAUTION
from sillmark.engine.flood import OUTLET_CODE, SpillResult
from sillmark.errors import (
    InvalidParameter,
    LocationOutsideDEM,
)
from sillmark.grid.assets import read_assets
from sillmark.grid.crs import LonLatTransformer, crs_label
from sillmark.grid.geojson import CRS84
from sillmark.grid.ground import ground_unit, path_length
from sillmark.io import geojson as geojson_files
from sillmark.products.assets import assess_assets
from sillmark.products.hierarchy_sweep import site_hierarchy
from sillmark.products.source import ArraySource
from sillmark.products.stage import (
    StageTable,
    checked_level,
    stage_table,
    water_level_map,
)
from sillmark.units import VerticalUnit, area_units, own_unit_columns
from sillmark.web import arrays, layout, render
from sillmark.web.caches import LockedLRU
from sillmark.web.depression_index import (
    STATE_CUT_OFF,
    STATE_OVERTOPPED,
    DepressionIndex,
)
from sillmark.web.depression_tiles import DepressionTiles
from sillmark.web.sites import SiteNotReady, UnknownSite

#: Most points of a stage chart.
CHART_POINTS = 240
#: The site stage table as the worker stores it, inside the run folder.
STAGE_TABLE_FILE = "stage_chart.npz"
_STAGE_COLUMNS = ("flooded_area_m2", "flooded_volume_m3", "shielded_area_m2", "shielded_volume_m3")
#: Encoded map tiles kept per open site run, in bytes (see render.ImageCache).
TILE_IMAGE_BYTES = 48 * 2**20


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
        object.__setattr__(made, "_routes", LockedLRU(capacity))  # the dataclass is frozen
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
        self._levels = LockedLRU(level_cache)
        self.images = render.ImageCache(TILE_IMAGE_BYTES)
        self._asset_tables = LockedLRU(64)
        self._routed = RememberingRoutes.of(self.result)
        self.barrier_plans = LockedLRU(32)  # see sillmark.web.barriers
        self._lock = threading.RLock()
        self._engine_lock = threading.Lock()
        self.engine_lock = self._engine_lock
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

    @functools.cached_property
    def crs_text(self) -> str:
        """The DEM's CRS as pages name it beside coordinates (``EPSG:32633 (WGS 84 / UTM zone 33N)``)."""
        return crs_label(self.dem)

    @property
    def unit_symbol(self) -> str:
        return self.unit.symbol

    def level_range(self) -> dict:
        """Slider range and step in the site's unit: lowest outlet to highest ground.

        The lowest onset stage is the lowest outlet's ground (every cell's onset
        stage is at least the elevation of the outlet its route starts from), so
        the range runs from the lowest outlet, rounded down to a step, to the
        highest ground, rounded up: below it nothing is wet, above it all is.

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
            states = self.depressions.states(level)
            listed = self.depressions.listed
            if listed is not None:  # counted as the table lists them
                states = states[listed]
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
                # The listed (significant) depressions, as the table and the map tiles
                # show them; below_minimum counts the others.
                "depressions": {
                    "total": int(len(states)),
                    "overtopped": int(np.count_nonzero(states == STATE_OVERTOPPED)),
                    "cut_off": int(np.count_nonzero(states == STATE_CUT_OFF)),
                    "below_minimum": self.depressions.count - int(len(states)),
                },
                "assets": None,
                "caution": SCREENING_CAUTION,
            }
            base["areas"] = area_units(self.unit).as_dict()
            for name in ("flooded", "shielded"):
                base.update(own_unit_columns(
                    self.unit, area_m2=base[f"{name}_area_m2"], volume_m3=base[f"{name}_volume_m3"],
                    area_name=f"{name}_area", volume_name=f"{name}_volume"))
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

    def chart_levels(self) -> np.ndarray:
        """The levels of the site stage table: the slider's range at a round step,
        about :data:`CHART_POINTS` of them (float32, ascending)."""
        rng = self.level_range()
        lo, hi = rng["min"], rng["max"]
        step = _nice_step(hi - lo, CHART_POINTS)
        levels = np.arange(math.floor(lo / step) * step, hi + step * 0.5, step, dtype=np.float64)
        return np.unique(levels.astype(np.float32))

    @functools.cached_property
    def stage_table(self) -> StageTable:
        """The site stage table (sillmark.products.stage.StageTable) at :meth:`chart_levels`.

        Read from the run's :data:`STAGE_TABLE_FILE` when the worker stored it (see
        :meth:`store_stage_table`) for the same levels, else computed (one pass over
        the grid: about half a second at 10^7 cells, which the first map of a large
        site would otherwise wait for)."""
        levels = self.chart_levels()
        path = self.folder / STAGE_TABLE_FILE
        if path.is_file():
            try:
                with np.load(path, allow_pickle=False) as f:
                    if np.array_equal(f["level"], levels):
                        return StageTable(level=levels, unit=self.unit, **{
                            name: np.asarray(f[name], dtype=np.float64) for name in _STAGE_COLUMNS})
            except (OSError, KeyError, ValueError):
                pass  # unreadable or of another layout: computed again below
        with self._engine_lock:
            return stage_table(ArraySource(self.dem, self.result), levels)

    def store_stage_table(self) -> Path:
        """Compute the site stage table and keep it in the run's folder (written under a
        temporary name, then renamed), so the server's first map reads it."""
        table = self.stage_table
        path = self.folder / STAGE_TABLE_FILE
        tmp = path.with_name(path.name + ".tmp.npz")
        np.savez(tmp, level=table.level, **{name: getattr(table, name) for name in _STAGE_COLUMNS})
        os.replace(tmp, path)
        return path

    @functools.cached_property
    def stage_chart(self) -> dict:
        """The stage table as JSON-ready lists."""
        table = self.stage_table
        step = float(table.level[1] - table.level[0]) if len(table) > 1 else 0.0
        out = {
            "unit": self.unit.value,
            "unit_symbol": self.unit.symbol,
            "areas": area_units(self.unit).as_dict(),
            "step": round(step, 6),
            "level": [float(v) for v in table.level],
            "flooded_area_m2": [float(v) for v in table.flooded_area_m2],
            "flooded_volume_m3": [float(v) for v in table.flooded_volume_m3],
            "shielded_area_m2": [float(v) for v in table.shielded_area_m2],
            "shielded_volume_m3": [float(v) for v in table.shielded_volume_m3],
            "caution": SCREENING_CAUTION,
        }
        for name in ("flooded", "shielded"):
            extra = own_unit_columns(self.unit, area_m2=out[f"{name}_area_m2"],
                                     volume_m3=out[f"{name}_volume_m3"],
                                     area_name=f"{name}_area", volume_name=f"{name}_volume")
            out.update({k: [float(v) for v in values] for k, values in extra.items()})
        return out

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
    def depressions(self) -> DepressionIndex:
        """The depression table as columns for paged, sorted, filtered and map-extent
        queries (:class:`sillmark.web.depression_index.DepressionIndex`)."""
        return DepressionIndex(self.result.depressions, self.result.depression_id, self.dem,
                               self.lonlat, listed=self.listed)

    @functools.cached_property
    def listed(self) -> np.ndarray | None:
        """Per depression, whether the run lists it on its own under its significance
        minimum (from the run's ``depressions.csv``: its rows, or its ``significant``
        column for a full inventory); None for a run without a minimum."""
        sig = self.summary.get("significance")
        if not sig:
            return None
        listed = np.zeros(len(self.result.depressions), dtype=bool)
        with open(self.folder / "results" / "depressions.csv", encoding="utf-8", newline="") as f:
            for row in csv.DictReader(f):
                listed[int(row["id"]) - 1] = row.get("significant", "True").lower() in ("true", "1")
        return listed

    @functools.cached_property
    def depression_tiles(self) -> DepressionTiles:
        """Draws the depression and spill-point map tiles (sillmark.web.depression_tiles)."""
        return DepressionTiles(self.depressions, self.result.depression_id.reshape(-1),
                               self.dem.horizontal_crs)

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
        own = own_unit_columns(self.unit, area_m2=curve.area_m2, volume_m3=curve.storage_m3,
                               volume_name="storage")
        return {
            "id": depression_id,
            "unit": self.unit.value,
            "unit_symbol": self.unit.symbol,
            "areas": area_units(self.unit).as_dict(),
            "level": [float(v) for v in curve.elevation],
            "area_m2": [_finite(v) for v in curve.area_m2],
            "storage_m3": [_finite(v) for v in curve.storage_m3],
            **{k: [_finite(v) for v in values] for k, values in own.items()},
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
        length = path_length(self.dem, route.rows, route.cols)
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
            # What people read: the route's length on the ground, never a count of cells.
            "route_length": length.value,
            "route_length_unit": length.unit,
            "route_length_m": length.metres,
            "crs": self.crs_text,
            "xy_unit": "°" if self.dem.is_geographic else ground_unit(self.dem)[0],
            "xy_decimals": 7 if self.dem.is_geographic else 2,
            "reaches_outlet": bool(route.reaches_outlet),
            "sill": {
                "row": int(route.sill_row), "col": int(route.sill_col),
                "lon": float(slon), "lat": float(slat),
                "x": float(sx), "y": float(sy),
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
        self._open = LockedLRU(self.capacity)
        self._lock = threading.Lock()
        self._loading: dict = {}

    def get(self, site_id: int, run_id: int) -> SiteData:
        key = (int(site_id), int(run_id))
        data = self._open.get(key)
        if data is not None:
            return data
        with self._lock:
            gate = self._loading.setdefault(key, threading.Lock())
        with gate:
            data = self._open.get(key)
            if data is not None:
                return data
            try:
                data = SiteData(site_id, run_id, layout.run_dir(self.data, site_id, run_id),
                                level_cache=self.level_cache)
            except arrays.StaleArrays as exc:
                raise SiteNotReady(f"{exc}; run the analysis again") from None
            # A newer run of the same site replaces the older one.
            self._open.discard_where(lambda k: k[0] == key[0])
            self._open.put(key, data)
            with self._lock:
                self._loading.pop(key, None)
            return data

    def drop(self, site_id: int) -> None:
        self._open.discard_where(lambda k: k[0] == int(site_id))
