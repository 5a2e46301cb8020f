"""Water-level maps and the site stage table, read off the onset stage.

At an outlet water level (stage) ``h`` a cell is *flooded* from the outlets when
its onset stage ``s <= h``, with depth ``h - z``; it is *shielded low ground*
when ``z < h < s``: below the water level, but no surface path reaches it yet.
Nothing is re-flooded per level: every map is a threshold of the onset stage
computed once by :func:`sillmark.engine.flood.priority_flood`.

The stage table gives flooded area and volume and shielded area and volume
against level for many levels from one pass over the cells (each cell adds its
area where its flooded or shielded range of levels begins and removes it where
the range ends; cumulative sums over the level axis finish the job), so its
cost does not grow with the number of levels beyond a binary search per cell.

The stage table and the block-by-block map are written once against a result
source (:mod:`sillmark.products.source`): arrays in memory, or a results folder
read block by block. :func:`water_level_map` classifies a whole grid held in
memory at once, for the web app's map tiles.
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np

from sillmark.engine.flood import SpillResult
from sillmark.errors import InvalidParameter
from sillmark.products import _stage_kernels
from sillmark.products.source import ResultSource, rows
from sillmark.units import VerticalUnit

#: Cell classes of a water-level map.
NODATA, DRY, FLOODED, SHIELDED = _stage_kernels.NODATA, _stage_kernels.DRY, _stage_kernels.FLOODED, _stage_kernels.SHIELDED
CLASS_NAMES = {NODATA: "nodata", DRY: "dry", FLOODED: "flooded", SHIELDED: "shielded"}


@dataclasses.dataclass(frozen=True)
class WaterLevelMap:
    """The site at one outlet water level.

    Attributes
    ----------
    level : float
        Water level, in the site's vertical unit (float32 precision).
    state : uint8 array
        :data:`NODATA`, :data:`DRY`, :data:`FLOODED` or :data:`SHIELDED` per cell.
    depth : float32 array
        ``level - elevation`` on flooded cells, NaN elsewhere (vertical unit).
    flooded_area_m2, shielded_area_m2 : float
    flooded_volume_m3, shielded_volume_m3 : float
        Water volume on flooded cells; volume below the level on shielded ones
        (what they would hold if reached).
    """

    level: float
    unit: VerticalUnit
    state: np.ndarray
    depth: np.ndarray
    flooded_area_m2: float
    flooded_volume_m3: float
    shielded_area_m2: float
    shielded_volume_m3: float


@dataclasses.dataclass(frozen=True)
class StageTable:
    """Site totals against outlet water level (one row per level)."""

    level: np.ndarray
    unit: VerticalUnit
    flooded_area_m2: np.ndarray
    flooded_volume_m3: np.ndarray
    shielded_area_m2: np.ndarray
    shielded_volume_m3: np.ndarray

    def __len__(self) -> int:
        return int(self.level.shape[0])


def checked_level(level) -> np.float32:
    """A water level as float32, or InvalidParameter for text, NaN, inf or huge values."""
    if isinstance(level, bool):
        raise InvalidParameter(f"the water level must be a number, not {level!r}")
    try:
        value = float(level)
    except (TypeError, ValueError):
        raise InvalidParameter(f"the water level must be a number, not {level!r}") from None
    if not math.isfinite(value):
        raise InvalidParameter(f"the water level must be a finite number, not {level!r}")
    if abs(value) > float(np.finfo(np.float32).max):
        raise InvalidParameter(
            f"the water level {level!r} is beyond the range of elevations a DEM can hold"
        )
    return np.float32(value)


def _check_areas(result: SpillResult, row_areas) -> np.ndarray:
    rows = result.onset_stage.shape[0]
    if row_areas is None:
        return np.ones(rows, np.float64)
    areas = np.ascontiguousarray(row_areas, dtype=np.float64)
    if areas.shape != (rows,):
        raise InvalidParameter(f"row_areas must hold one cell area per row ({rows} values)")
    return areas


def water_level_map(
    result: SpillResult,
    level,
    *,
    row_areas=None,
    unit: VerticalUnit | str = VerticalUnit.METRE,
    out: tuple[np.ndarray, np.ndarray] | None = None,
) -> WaterLevelMap:
    """Flooded cells, depth and shielded low ground at outlet water level ``level``.

    Parameters
    ----------
    result : SpillResult
    level : float
        Outlet water level in the site's vertical unit; compared at float32
        precision, the precision of the onset stage.
    row_areas : (rows,) array, optional
        Cell area per row in m² (default 1, i.e. areas count cells).
    unit : VerticalUnit or str
        Vertical unit of the site, for the volume in m³.
    out : (state, depth), optional
        uint8 and float32 arrays of the grid's shape to write into, to reuse
        memory between levels.

    Notes
    -----
    Memory: 5 bytes per cell (state and depth), unless ``out`` is given. One
    parallel pass over the onset stage and the DEM.
    """
    unit = VerticalUnit.parse(unit)
    h = checked_level(level)
    areas = _check_areas(result, row_areas)
    shape = result.onset_stage.shape
    if out is None:
        state = np.empty(shape, np.uint8)
        depth = np.empty(shape, np.float32)
    else:
        state, depth = out
        if state.shape != shape or state.dtype != np.uint8 or depth.shape != shape or depth.dtype != np.float32:
            raise InvalidParameter("out must be (uint8, float32) arrays of the grid's shape")
    sums = np.empty((shape[0], 4), np.float64)
    _stage_kernels.water_level_map(result.onset_stage, result.elevation, areas, h, depth, state, sums)
    total = sums.sum(axis=0)
    return WaterLevelMap(
        level=float(h),
        unit=unit,
        state=state,
        depth=depth,
        flooded_area_m2=float(total[0]),
        flooded_volume_m3=float(total[1]) * unit.metres,
        shielded_area_m2=float(total[2]),
        shielded_volume_m3=float(total[3]) * unit.metres,
    )


def level_blocks(source: "ResultSource", level) -> "LevelBlocks":
    """The water-level map at ``level``, classified one block of rows at a time (see :class:`LevelBlocks`)."""
    return LevelBlocks(source, checked_level(level))


class LevelBlocks:
    """The water-level map of a result source at one level, made block by block.

    :meth:`classify` gives rows ``r0:r1`` of the state and depth rasters with
    the kernel of :func:`water_level_map` and keeps each row's totals, so that
    after a pass over every row :attr:`totals` are the map's flooded and
    shielded area and volume. A writer asks for the blocks it writes; nothing
    holds the whole map.
    """

    def __init__(self, source: "ResultSource", level: np.float32) -> None:
        self.source = source
        self.level = np.float32(level)
        self.unit = source.unit
        self.areas = np.ascontiguousarray(source.grid.row_areas, dtype=np.float64)
        self.sums = np.zeros((source.grid.shape[0], 4), np.float64)

    def classify(self, r0: int, r1: int) -> tuple[np.ndarray, np.ndarray]:
        """(state, depth) of rows ``r0:r1``: uint8 classes and float32 depth (NaN off the water)."""
        s = np.ascontiguousarray(rows(self.source, "onset_stage", r0, r1), dtype=np.float32)
        z = np.ascontiguousarray(rows(self.source, "elevation", r0, r1), dtype=np.float32)
        state = np.empty(s.shape, np.uint8)
        depth = np.empty(s.shape, np.float32)
        _stage_kernels.water_level_map(s, z, self.areas[r0:r1], self.level, depth, state, self.sums[r0:r1])
        return state, depth

    @property
    def totals(self) -> tuple[float, float, float, float]:
        """Flooded area (m²) and volume (m³), shielded area and volume, of the rows classified."""
        total = self.sums.sum(axis=0)
        return (float(total[0]), float(total[1]) * self.unit.metres,
                float(total[2]), float(total[3]) * self.unit.metres)


def stage_levels(source: "ResultSource", *, step, start=None, stop=None) -> np.ndarray:
    """Levels from ``start`` (default: the lowest onset stage, i.e. the lowest
    outlet) to ``stop`` (default: the highest spill elevation, or the highest
    onset stage when there is no depression) every ``step``."""
    step = float(checked_level(step))
    if step <= 0:
        raise InvalidParameter(f"the level step must be positive, not {step}")
    low, high = source.onset_range
    if start is None:
        start = low
    if stop is None:
        spills = source.spill_elevation
        stop = float(spills.max()) if len(spills) else high
    start, stop = float(checked_level(start)), float(checked_level(stop))
    if stop < start:
        raise InvalidParameter(f"the top level {stop} is below the bottom level {start}")
    count = int(math.floor((stop - start) / step + 1e-9)) + 1
    if count > 100_000:
        raise InvalidParameter(
            f"{count} levels is too many for one table; use a step of at least "
            f"{(stop - start) / 100_000:.3g}"
        )
    levels = start + step * np.arange(count)
    if levels[-1] < stop:
        levels = np.append(levels, stop)
    return levels.astype(np.float32)


#: Accumulator rows of the stage table's binning pass: the grid's rows are cut
#: into this many runs, each summed on its own (in parallel), then the runs are
#: added. Fixed, so the figures do not depend on the machine.
STAGE_TABLE_CHUNKS = 2


def stage_table(source: "ResultSource", levels) -> StageTable:
    """Flooded and shielded area and volume at each of ``levels`` (ascending).

    Exact for the DEM: the same totals as :func:`water_level_map` at each
    level, from one pass over the cells whatever the number of levels, block by
    block in raster order; the sums are the same bits for any blocks (see
    :func:`sillmark.products._stage_kernels.add_stage_bins`).
    """
    lv = np.asarray([checked_level(v) for v in np.atleast_1d(np.asarray(levels, dtype=object))],
                    dtype=np.float32)
    if lv.size == 0:
        raise InvalidParameter("give at least one water level")
    if np.any(np.diff(lv) <= 0):
        raise InvalidParameter("water levels must be strictly ascending")
    n_rows = source.grid.shape[0]
    per = (n_rows + STAGE_TABLE_CHUNKS - 1) // STAGE_TABLE_CHUNKS
    acc = [np.zeros((STAGE_TABLE_CHUNKS, lv.size + 1), np.float64) for _ in range(4)]
    areas = np.ascontiguousarray(source.grid.row_areas, dtype=np.float64)
    for r0, r1 in source.blocks():
        s = np.ascontiguousarray(rows(source, "onset_stage", r0, r1), dtype=np.float32)
        z = np.ascontiguousarray(rows(source, "elevation", r0, r1), dtype=np.float32)
        _stage_kernels.add_stage_bins(s, z, areas[r0:r1], lv, np.int64(r0), np.int64(per), *acc)
    return stage_table_from_bins(lv, source.unit, *(a.sum(axis=0) for a in acc))


def stage_table_from_bins(lv: np.ndarray, unit: VerticalUnit, fa, fz, sa, sz) -> StageTable:
    """The stage table from the binning pass's per-level sums (see :func:`stage_table`).

    ``fa``/``sa``: area (m²) whose flooded / shielded range starts (+) or ends (-)
    at each level bin; ``fz``/``sz``: the same weighted by elevation. Their
    running sums give the area at each level, and ``h * area - sum(area * z)`` the
    volume. 
    """
    h = lv.astype(np.float64)
    flooded_area = np.cumsum(fa)[:-1]
    flooded_volume = (h * flooded_area - np.cumsum(fz)[:-1]) * unit.metres
    shielded_area = np.cumsum(sa)[:-1]
    shielded_volume = (h * shielded_area - np.cumsum(sz)[:-1]) * unit.metres
    return StageTable(
        level=lv,
        unit=unit,
        flooded_area_m2=flooded_area,
        flooded_volume_m3=np.maximum(flooded_volume, 0.0),
        shielded_area_m2=np.maximum(shielded_area, 0.0),
        shielded_volume_m3=np.maximum(shielded_volume, 0.0),
    )


#: States of a depression at a water level.
DEPRESSION_DRY = "dry"
DEPRESSION_CUT_OFF = "below level, cut off"
DEPRESSION_OVERTOPPED = "overtopped"


def depression_states(depressions, level) -> tuple[np.ndarray, np.ndarray]:
    """State of every depression at outlet water level ``level``, and its freeboard.

    A depression is *dry* while the level is at or below its pit, *below level,
    cut off* while the level lies between its pit and its spill elevation (part
    of its ground is below the water, but no surface path reaches it), and
    *overtopped* once the level reaches its spill elevation (filled from the
    outlets). Freeboard is ``spill_elevation - level`` (negative once overtopped).

    ``depressions`` is anything with ``pit_elevation`` and ``spill_elevation``
    arrays: a :class:`~sillmark.engine.flood.DepressionTable` or a result source.
    """
    h = checked_level(level)
    t = depressions
    states = np.where(
        t.spill_elevation <= h,
        DEPRESSION_OVERTOPPED,
        np.where(t.pit_elevation < h, DEPRESSION_CUT_OFF, DEPRESSION_DRY),
    )
    return states, (t.spill_elevation - h).astype(np.float32)
