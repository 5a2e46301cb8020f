"""The depressions of an open site as columns: paged, sorted and filtered tables, and
bounded queries by map extent.

A survey DEM holds tens of thousands of depressions or more, so nothing here
hands out the whole inventory: :meth:`DepressionIndex.page` gives one page of a
sorted, filtered table with the counts, and :meth:`DepressionIndex.in_view`
gives at most ``limit`` depressions whose extent meets a lon/lat box, largest
first, each with its outline, and says how many more are not shown. Every
answer also keeps to a byte budget (:data:`OUTLINE_BUDGET_POSITIONS`). The
full inventory stays a download (the result files).

The columns are numpy arrays built once per open site run; a query costs a
mask, one sort and the dictionaries of the rows it returns. Depression extents
come from :func:`sillmark.products.extents.label_extents` (one compiled pass over
the id raster, which lets the server's other threads run meanwhile);
outlines are traced on demand from the id raster inside that extent with
:func:`rasterio.features.shapes` and kept in a small cache.

No Flask in this module.
"""

from __future__ import annotations

import dataclasses
import math
import threading
from typing import Any, Callable

import numpy as np
import rasterio.features
import shapely
import shapely.geometry
from affine import Affine

from sillmark.errors import InvalidParameter
from sillmark.grid.crs import wgs84_transformer
from sillmark.io import geojson as geojson_files
from sillmark.products.extents import label_extents
from sillmark.units import own_unit_columns
from sillmark.web.caches import LockedLRU

#: Rows of one table page unless asked otherwise, and the most one page may hold.
PER_PAGE = 50
MAX_PER_PAGE = 500
#: Depressions one map-extent query returns unless asked otherwise, and at most.
VIEW_LIMIT = 200
MAX_VIEW_LIMIT = 500
#: Spill points one query returns at most (points are small).
MAX_SPILL_POINTS = 5000
#: Outline positions (lon/lat pairs) one answer may carry in all: about 25 bytes
#: each, so the outlines stay near 1 MB whatever the depressions look like.
OUTLINE_BUDGET_POSITIONS = 40_000

#: Depressions of at most this many cells are outlined as the union of their cell
#: squares (shapely); larger ones are traced with rasterio.features.shapes.
SMALL_CELLS = 64

#: State codes per depression at a level (0 also stands for "no depression").
STATE_DRY, STATE_CUT_OFF, STATE_OVERTOPPED = 0, 1, 2
STATE_NAMES = ("dry", "cut off", "overtopped")
_STATE_ARGS = {"dry": STATE_DRY, "cut_off": STATE_CUT_OFF, "cut off": STATE_CUT_OFF,
               "overtopped": STATE_OVERTOPPED}

#: Sort keys a request may name -> column (area_ha and area_m2 sort alike).
SORT_KEYS = {
    "id": "id", "pit_elevation": "pit_elevation", "spill_elevation": "spill_elevation",
    "max_depth": "max_depth", "area_m2": "area_m2", "area_ha": "area_m2", "volume_m3": "volume_m3",
    "cell_count": "cell_count", "state": "state",
}


@dataclasses.dataclass(frozen=True)
class TableQuery:
    """What a table request asks for (see :func:`table_query`)."""

    page: int = 1
    per_page: int = PER_PAGE
    sort: str = "id"
    descending: bool = False
    q: int | None = None
    min_depth: float | None = None
    min_area_m2: float | None = None
    min_volume_m3: float | None = None
    state: int | None = None
    level: float | None = None
    every: bool = False


def whole_arg(args, name: str, default: int, lo: int, hi: int) -> int:
    """The whole-number request argument ``name`` in [lo, hi], or ``default`` when absent."""
    text = args.get(name)
    if text is None or str(text).strip() == "":
        return default
    text = str(text).strip()
    if not text.isdigit() or len(text) > 9 or not lo <= int(text) <= hi:
        raise InvalidParameter(f"{name} must be a whole number from {lo} to {hi}, not {text[:20]!r}")
    return int(text)


def number_arg(args, name: str, what: str) -> float | None:
    """The finite-number request argument ``name``, or None when absent."""
    text = args.get(name)
    if text is None or str(text).strip() == "":
        return None
    try:
        value = float(str(text).strip())
    except ValueError:
        value = math.nan
    if not math.isfinite(value):
        raise InvalidParameter(f"{name} must be a finite number ({what}), not {str(text)[:20]!r}")
    return value


def table_query(args, level: float | None) -> TableQuery:
    """A :class:`TableQuery` from request arguments (a mapping of text).

    ``page`` (from 1), ``per_page`` (1..:data:`MAX_PER_PAGE`), ``sort`` (one of
    :data:`SORT_KEYS`), ``order`` (``asc`` or ``desc``), ``q`` (a depression id),
    ``min_depth`` (site's vertical unit), ``min_area_m2``, ``min_volume_m3``
    and ``state`` (``dry``, ``cut_off`` or ``overtopped``; needs ``level``);
    ``inventory`` ``all`` for every depression, the ones below the site's
    significance minimum too (default ``listed``).
    Raises InvalidParameter, naming what would be accepted.
    """
    sort = str(args.get("sort") or "id").strip()
    if sort not in SORT_KEYS:
        raise InvalidParameter(f"sort must be one of {', '.join(SORT_KEYS)}, not {sort[:30]!r}")
    order = str(args.get("order") or "asc").strip().lower()
    if order not in ("asc", "desc"):
        raise InvalidParameter("order must be asc or desc")
    state_text = args.get("state")
    state = None
    if state_text is not None and str(state_text).strip():
        state = _STATE_ARGS.get(str(state_text).strip().lower())
        if state is None:
            raise InvalidParameter("state must be dry, cut_off or overtopped")
    if (state is not None or sort == "state") and level is None:
        raise InvalidParameter("give the water level (?level=...) to sort or filter by the state at it")
    q_text = str(args.get("q") or "").strip().lstrip("#")
    q = None
    if q_text:
        if not q_text.isdigit() or len(q_text) > 9:
            raise InvalidParameter(f"q is a depression id (a whole number), not {q_text[:20]!r}")
        q = int(q_text)
    return TableQuery(
        page=whole_arg(args, "page", 1, 1, 10**9),
        per_page=whole_arg(args, "per_page", PER_PAGE, 1, MAX_PER_PAGE),
        sort=SORT_KEYS[sort], descending=order == "desc", q=q,
        min_depth=number_arg(args, "min_depth", "a depth in the site's vertical unit"),
        min_area_m2=number_arg(args, "min_area_m2", "an area in m²"),
        min_volume_m3=number_arg(args, "min_volume_m3", "a volume in m³"),
        state=state, level=level, every=_inventory(args),
    )


def _inventory(args) -> bool:
    text = str(args.get("inventory") or "listed").strip().lower()
    if text not in ("listed", "all"):
        raise InvalidParameter("inventory must be listed (the significant depressions, the "
                               "default) or all (every depression)")
    return text == "all"


def parse_bbox(text: str | None) -> tuple[float, float, float, float] | None:
    """``west,south,east,north`` in WGS 84 degrees, or None when not given."""
    if text is None or not str(text).strip():
        return None
    parts = str(text).split(",")
    try:
        values = [float(p) for p in parts]
    except ValueError:
        values = []
    if len(values) != 4 or not all(math.isfinite(v) for v in values):
        raise InvalidParameter("bbox is west,south,east,north in WGS 84 degrees, e.g. "
                               "bbox=8.55,48.84,8.58,48.86")
    w, s, e, n = values
    if w > e or s > n:
        raise InvalidParameter("bbox must give west before east and south before north")
    return w, s, e, n


class DepressionIndex:
    """Columns of a site's depression table with extents in lon/lat, for bounded queries.

    Parameters
    ----------
    table : DepressionTable
        The run's depressions (ids 1..n).
    depression_id : (rows, cols) integer array
        The run's depression id raster (may be memory-mapped).
    dem : DEM
        The site's DEM (transform, CRS, vertical unit).
    lonlat : callable
        ``lonlat(x, y) -> (lon, lat)`` for arrays in the DEM's CRS (thread-safe).
    listed : bool array, optional
        Per depression (index ``id - 1``): listed on its own under the run's
        significance minimum (:mod:`sillmark.products.significance`). The table
        pages and the map-extent queries give only these (``inventory="all"``
        in a table query gives every one); None lists every depression.

    Notes
    -----
    Memory: about 150 bytes per depression, plus one pass over the id raster
    when built (:func:`sillmark.products.extents.label_extents` allocates nothing per cell).
    """

    def __init__(self, table, depression_id: np.ndarray, dem, lonlat: Callable,
                 listed: np.ndarray | None = None) -> None:
        self.table = table
        if listed is not None:
            listed = np.asarray(listed, dtype=bool)
            if listed.shape != (len(table),):
                raise InvalidParameter(f"listed holds {listed.shape} values for {len(table)} "
                                       "depressions; the run's files do not belong together")
        self.listed = listed
        self.listed_count = len(table) if listed is None else int(np.count_nonzero(listed))
        self.ids_raster = depression_id
        self.dem = dem
        self.unit = dem.vertical_unit
        n = len(table)
        self.count = n
        self.id = np.asarray(table.id, dtype=np.int64)
        self.pit_elevation = np.asarray(table.pit_elevation, dtype=np.float64)
        self.spill_elevation = np.asarray(table.spill_elevation, dtype=np.float64)
        self.max_depth = np.asarray(table.max_depth, dtype=np.float64)
        self.area_m2 = np.asarray(table.area_m2, dtype=np.float64)
        self.volume_m3 = np.asarray(table.volume_m2_vu, dtype=np.float64) * self.unit.metres
        self.cell_count = np.asarray(table.cell_count, dtype=np.int64)
        self.spills_to = np.asarray(table.spills_to, dtype=np.int64)
        self.spill_lon, self.spill_lat = (np.asarray(v, dtype=np.float64) for v in
                                          lonlat(np.asarray(table.spill_x), np.asarray(table.spill_y)))
        tr = dem.transform
        self.pit_lon, self.pit_lat = (np.asarray(v, dtype=np.float64) for v in lonlat(
            tr.c + (np.asarray(table.pit_col) + 0.5) * tr.a, tr.f + (np.asarray(table.pit_row) + 0.5) * tr.e))
        self.extents = label_extents(depression_id, n)
        e = self.extents
        r0, r1 = e.row0.astype(np.float64), e.row1.astype(np.float64)
        c0, c1 = e.col0.astype(np.float64), e.col1.astype(np.float64)
        # The four corners of each extent, in lon/lat (a projected box is not a lon/lat box).
        xs = np.concatenate([tr.c + c0 * tr.a, tr.c + c1 * tr.a, tr.c + c0 * tr.a, tr.c + c1 * tr.a])
        ys = np.concatenate([tr.f + r0 * tr.e, tr.f + r0 * tr.e, tr.f + r1 * tr.e, tr.f + r1 * tr.e])
        lon, lat = (np.asarray(v, dtype=np.float64).reshape(4, n) if n else np.zeros((4, 0))
                    for v in lonlat(xs, ys))
        self.west, self.east = lon.min(axis=0), lon.max(axis=0)
        self.south, self.north = lat.min(axis=0), lat.max(axis=0)
        self._states = LockedLRU(64)
        self._outlines = LockedLRU(4096)
        self._lock = threading.Lock()  # the memory map and the transformer: one thread at a time
        self._to_wgs84 = wgs84_transformer(dem)

    # -- states ---------------------------------------------------------------------

    def states(self, level: float) -> np.ndarray:
        """uint8 state code per depression at ``level`` (index k for id k + 1), cached.

        The states of :func:`sillmark.products.stage.depression_states` (overtopped
        once the level reaches the spill elevation, cut off while it lies above the
        pit, else dry), compared at float32 as there, but as codes: no text per
        depression, which counts at 10^5 depressions and a new level per request.
        """
        h = np.float32(level)
        key = float(h)
        hit = self._states.get(key)
        if hit is None:
            hit = np.where(self.spill_elevation <= h, STATE_OVERTOPPED,
                           np.where(self.pit_elevation < h, STATE_CUT_OFF, STATE_DRY)).astype(np.uint8)
            hit.setflags(write=False)
            self._states.put(key, hit)
        return hit

    # -- rows -----------------------------------------------------------------------

    def row(self, k: int, level: float | None = None, states: np.ndarray | None = None) -> dict:
        """The depression at index ``k`` (id ``k + 1``) as a JSON-ready dict."""
        item = {
            "id": int(self.id[k]),
            "pit_elevation": float(self.pit_elevation[k]),
            "spill_elevation": float(self.spill_elevation[k]),
            "max_depth": float(self.max_depth[k]),
            "area_m2": float(self.area_m2[k]),
            "area_ha": float(self.area_m2[k]) / 1e4,
            "volume_m3": float(self.volume_m3[k]),
            "cell_count": int(self.cell_count[k]),
            "spills_to": int(self.spills_to[k]),
            "spill_lon": _finite(self.spill_lon[k]), "spill_lat": _finite(self.spill_lat[k]),
            "pit_lon": _finite(self.pit_lon[k]), "pit_lat": _finite(self.pit_lat[k]),
            "bounds": [float(self.west[k]), float(self.south[k]), float(self.east[k]), float(self.north[k])],
        }
        item.update({name: float(value) for name, value in own_unit_columns(
            self.unit, area_m2=item["area_m2"], volume_m3=item["volume_m3"]).items()})
        if states is not None:
            item["state"] = STATE_NAMES[int(states[k])]
        return item

    def matching(self, query: TableQuery) -> np.ndarray:
        """Indices of the depressions the query's filters keep, in its order."""
        keep = np.ones(self.count, dtype=bool)
        if self.listed is not None and not query.every:
            keep &= self.listed
        states = self.states(query.level) if query.level is not None else None
        if query.q is not None:
            keep &= self.id == query.q
        if query.min_depth is not None:
            keep &= self.max_depth >= query.min_depth
        if query.min_area_m2 is not None:
            keep &= self.area_m2 >= query.min_area_m2
        if query.min_volume_m3 is not None:
            keep &= self.volume_m3 >= query.min_volume_m3
        if query.state is not None:
            keep &= states == query.state
        idx = np.flatnonzero(keep)
        key = states[idx] if query.sort == "state" else getattr(self, query.sort)[idx]
        # Ties go by id, ascending, whichever way the key runs: the order is total.
        order = np.lexsort((self.id[idx], -key.astype(np.float64) if query.descending else key))
        return idx[order]

    def page(self, query: TableQuery) -> dict:
        """One page of the table: rows, the counts and the page actually given."""
        idx = self.matching(query)
        matched = int(idx.shape[0])
        pages = max(1, math.ceil(matched / query.per_page))
        page = min(query.page, pages)
        chosen = idx[(page - 1) * query.per_page: page * query.per_page]
        states = self.states(query.level) if query.level is not None else None
        return {
            "total": self.count,
            "listed": self.listed_count,
            "below_minimum": self.count - self.listed_count,
            "every": bool(query.every),
            "matched": matched,
            "page": page,
            "pages": pages,
            "per_page": query.per_page,
            "sort": query.sort,
            "order": "desc" if query.descending else "asc",
            "level": query.level,
            "depressions": [self.row(int(k), states=states) for k in chosen],
            "not_shown": matched - int(chosen.shape[0]),
        }

    # -- by map extent ---------------------------------------------------------------

    def in_box(self, bbox: tuple[float, float, float, float] | None, min_area_m2: float | None = None) -> np.ndarray:
        """Indices of the depressions whose extent meets ``bbox`` (and with at least
        ``min_area_m2`` of area), largest area first."""
        keep = np.ones(self.count, dtype=bool) if self.listed is None else self.listed.copy()
        if bbox is not None:
            w, s, e, n = bbox
            keep &= (self.east >= w) & (self.west <= e) & (self.north >= s) & (self.south <= n)
        if min_area_m2 is not None:
            keep &= self.area_m2 >= min_area_m2
        idx = np.flatnonzero(keep)
        return idx[np.lexsort((self.id[idx], -self.area_m2[idx]))]

    def in_view(self, bbox, *, limit: int = VIEW_LIMIT, level: float | None = None,
                outlines: bool = True, whole: bool = False, min_area_m2: float | None = None) -> dict:
        """At most ``limit`` depressions meeting ``bbox``, largest first, as GeoJSON features.

        Each feature is the depression's outline (WGS 84) with its row as
        properties. Outlines stop at :data:`OUTLINE_BUDGET_POSITIONS` positions
        in all; ``in_view``, ``shown`` and ``more_not_shown`` say what was left out.
        With ``whole``, no feature is given unless every depression meeting the box is;
        ``min_area_m2`` leaves out the smaller ones (e.g. those too small to pick at a zoom).
        """
        idx = self.in_box(bbox, min_area_m2)
        if whole and idx.shape[0] > limit:
            idx_shown = idx[:0]
        else:
            idx_shown = idx[:limit]
        states = self.states(level) if level is not None else None
        features, budget = [], OUTLINE_BUDGET_POSITIONS
        for k in idx_shown:
            k = int(k)
            geometry = None
            if outlines:
                geometry, positions = self.outline(k)
                if positions > budget:
                    break
                budget -= positions
            features.append({"type": "Feature", "properties": self.row(k, states=states), "geometry": geometry})
        return {
            "type": "FeatureCollection",
            "in_view": int(idx.shape[0]),
            "shown": len(features),
            "more_not_shown": int(idx.shape[0]) - len(features),
            "total": self.count,
            "features": features,
        }

    def spill_points(self, bbox, *, limit: int = MAX_SPILL_POINTS) -> dict:
        """Spill points of at most ``limit`` depressions meeting ``bbox``, largest first."""
        idx = self.in_box(bbox)
        chosen = [int(k) for k in idx[:limit] if math.isfinite(self.spill_lon[k])]
        return {
            "type": "FeatureCollection",
            "in_view": int(idx.shape[0]),
            "shown": len(chosen),
            "more_not_shown": int(idx.shape[0]) - len(chosen),
            "total": self.count,
            "features": [{
                "type": "Feature",
                "properties": {"id": int(self.id[k]), "spill_elevation": float(self.spill_elevation[k]),
                               "spills_to": int(self.spills_to[k]), "area_m2": float(self.area_m2[k])},
                "geometry": {"type": "Point", "coordinates": [round(float(self.spill_lon[k]), 8),
                                                              round(float(self.spill_lat[k]), 8)]},
            } for k in chosen],
        }

    def outline(self, k: int) -> tuple[dict | None, int]:
        """(GeoJSON geometry in WGS 84, number of positions) of depression index ``k``.

        Traced from the id raster inside the depression's extent (cell edges,
        8-connected), simplified by a quarter of a cell (never more than the
        staircase of the cell edges) and cached.
        """
        hit = self._outlines.get(k)
        if hit is not None:
            return hit
        rs, cs = self.extents.window(k)
        if rs.stop <= rs.start:
            found = (None, 0)
        else:
            with self._lock:
                window = np.asarray(self.ids_raster[rs, cs])
            mask = window == self.id[k]
            tr = self.dem.transform @ Affine.translation(cs.start, rs.start)
            if int(self.cell_count[k]) <= SMALL_CELLS:
                # Few cells: the union of their squares (GDAL's tracer costs more to start).
                r, c = np.nonzero(mask)
                xa, ya = tr.c + c * tr.a + r * tr.b, tr.f + c * tr.d + r * tr.e
                xb, yb = xa + tr.a + tr.b, ya + tr.d + tr.e
                geom = shapely.union_all(shapely.box(np.minimum(xa, xb), np.minimum(ya, yb),
                                                     np.maximum(xa, xb), np.maximum(ya, yb)))
            else:
                parts = [shapely.geometry.shape(g) for g, _ in rasterio.features.shapes(
                    mask.astype(np.uint8), mask=mask, connectivity=8, transform=tr)]
                geom = parts[0] if len(parts) == 1 else shapely.geometry.MultiPolygon(parts)
            geom = geom.simplify(0.25 * min(abs(tr.a), abs(tr.e)), preserve_topology=True)
            with self._lock:
                geometry = geojson_files.wgs84_geometry(geom, self.dem, transformer=self._to_wgs84)
            found = (geometry, _positions(geometry["coordinates"]))
        self._outlines.put(k, found)
        return found


def _positions(coords: Any) -> int:
    """How many positions a GeoJSON coordinates array holds."""
    if coords and isinstance(coords[0], (int, float)):
        return 1
    return sum(_positions(c) for c in coords)


def _finite(v) -> float | None:
    v = float(v)
    return v if math.isfinite(v) else None
