"""Water-level exports and the stage table out of core, from an analysis folder on disk.

:mod:`sillmark.io.stage_files` writes the exports of a water level from a
:class:`~sillmark.engine.flood.SpillResult` in memory. For DEMs larger than memory
(the folders :func:`sillmark.engine.tiled.analyse_tiled` writes) this module writes the
same files from ``onset_stage.tif``, ``depressions.csv`` and the DEM file,
reading them block by block (:data:`sillmark.io.geotiff.BLOCK_ROWS` rows across the
grid), never the whole raster:

- ``depth_{h}.tif`` and ``water_state_{h}.tif``: each block is classified by the
  very kernel of :func:`sillmark.products.stage.water_level_map` (flooded where the onset
  stage ``s <= h``, depth ``h - z``; shielded low ground where ``z < h < s``;
  dry otherwise), so the files are byte for byte those of
  :func:`sillmark.io.stage_files.write_depth` and
  :func:`~sillmark.io.stage_files.write_water_state`. The per-row totals are kept
  (32 bytes a row) and summed as the in-memory map sums them.
- ``flood_extent_{h}.geojson`` and ``shielded_{h}.geojson``: the classes of the
  written ``water_state_{h}.tif`` outlined window by window
  (:mod:`sillmark.products.tiled_outlines`).
- ``depressions_at_{h}.csv``: from the depression table in ``depressions.csv``.
- ``stage_table.csv``: one binning pass, block by block (each cell adds its
  area where its flooded or shielded range of levels starts and removes it
  where it ends; cumulative sums over the levels finish the table), with the
  accumulators of :func:`sillmark.products.stage.stage_table` and the same order of
  additions, so the figures are the same bits.

:func:`open_result_folder` reads a folder's ``summary.json`` and
``depressions.csv``, opens the DEM it names and checks, block by block, that the
DEM still gives the folder's fill depth (``onset_stage - elevation``); the
figures the command line prints (lowest and highest ground, lowest onset stage)
come from the same pass.

Memory: a few arrays of :data:`~sillmark.io.geotiff.BLOCK_ROWS` rows across the
grid, 32 bytes a row of totals, the depression table and, while outlining, one
window and the outlines.
"""

from __future__ import annotations

import csv
import dataclasses
import decimal
import math
import os
import types
from collections.abc import Sequence
from pathlib import Path

import numpy as np
import rasterio
import rasterio.windows

from sillmark import units
from sillmark.errors import InvalidDEM, InvalidParameter
from sillmark.grid.crs import horizontal_crs
from sillmark.grid.dem import DEMGrid, read_dem_grid
from sillmark.io import csv_tables, geotiff
from sillmark.io import stage_files as stage_export
from sillmark.io.stage_files import (
    _DEPRESSION_STATE_NOTE,
    _STATE_CODES,
    _STATE_MEANING,
    DEPTH_NODATA,
    STAGE_TABLE_NAME,
    STATE_NODATA,
    _comment_head,
    level_file_names,
    level_text,
    stage_table_columns,
    unique_levels,
)
from sillmark.io.summary import read_summary
from sillmark.products import _stage_kernels as _sk
from sillmark.products import _tiled_stage_kernels
from sillmark.products.stage import (
    CLASS_NAMES,
    DEPRESSION_CUT_OFF,
    DEPRESSION_DRY,
    DEPRESSION_OVERTOPPED,
    DRY,
    FLOODED,
    NODATA,
    SHIELDED,
    StageTable,
    checked_level,
    depression_states,
    stage_levels,
    stage_table_from_bins,
)
from sillmark.products.tiled_outlines import DEFAULT_WINDOW, label_outlines
from sillmark.units import VerticalUnit

__all__ = [
    "ResultFolder",
    "TiledLevelFiles",
    "TiledStageFiles",
    "open_result_folder",
    "read_depression_columns",
    "tiled_stage_levels",
    "tiled_stage_table",
    "write_tiled_level",
    "write_tiled_stage_results",
]

#: Accumulator rows of :func:`sillmark.products.stage.stage_table`'s binning pass: the
#: grid's rows are cut into this many runs, each summed on its own, then the
#: runs added. It must stay equal to the in-memory pass for the same bits.
STAGE_TABLE_CHUNKS = 2

# Columns of depressions.csv (sillmark.io.csv_tables.table_columns) held as float32:
# the elevations and depths, stored as float32 by the engine.
_FLOAT32_PREFIXES = ("pit_elevation_", "spill_elevation_", "max_depth_")
_INTEGER_COLUMNS = ("id", "pit_row", "pit_col", "spill_row", "spill_col", "spills_to", "cell_count")


# --------------------------------------------------------------------------- the folder


def _float32_from_text(texts: Sequence[str]) -> np.ndarray:
    """Decimal texts to the nearest float32 (NaN for ''), correctly rounded.

    Parsing to float64 first and rounding that to float32 is right except when
    the float64 lands exactly halfway between two float32 values; those few are
    settled by comparing the text itself with the halfway point.
    """
    d = np.array([float(t) if t else math.nan for t in texts], dtype=np.float64)
    f = d.astype(np.float32)
    with np.errstate(over="ignore", invalid="ignore"):
        for side in (1, -1):
            other = np.nextafter(f, np.float32(side * np.inf))
            half = (f.astype(np.float64) + other.astype(np.float64)) / 2.0  # exact in float64
            for k in np.flatnonzero(d == half):
                # Which side of the halfway point is the text itself on?
                beyond = (decimal.Decimal(texts[k]) - decimal.Decimal(float(half[k]))) * side
                if beyond > 0:
                    f[k] = other[k]
    return f


def read_depression_columns(path: str | os.PathLike) -> dict[str, np.ndarray]:
    """The columns of a ``depressions.csv``, as :func:`sillmark.io.csv_tables.table_columns` made them.

    Integers as int64, elevations and depths as float32, everything else as
    float64 (empty fields NaN); each value is the number the file was written
    from, so writing it again gives the same text.
    """

    with open(path, encoding="utf-8", newline="") as f:
        lines = [line for line in f if not line.startswith("#")]
    rows = list(csv.reader(lines))
    if not rows:
        raise InvalidParameter(f"{Path(path).name} holds no header; run the analysis again")
    header, body = rows[0], rows[1:]
    out: dict[str, np.ndarray] = {}
    for j, name in enumerate(header):
        texts = [row[j] for row in body]
        if name in _INTEGER_COLUMNS:
            out[name] = np.array([int(t) for t in texts], dtype=np.int64)
        elif name.startswith(_FLOAT32_PREFIXES):
            out[name] = _float32_from_text(texts)
        else:
            out[name] = np.array([float(t) if t else math.nan for t in texts], dtype=np.float64)
    return out


@dataclasses.dataclass(frozen=True)
class ResultFolder:
    """An analysis folder on disk with its DEM, for the out-of-core exports.

    Attributes
    ----------
    folder : Path
    grid : DEMGrid
        The DEM named in ``summary.json``, opened without its cells.
    connectivity : int
    outlet_sources : tuple of str
    outlet_count : int
    depressions : dict of numpy arrays
        :func:`read_depression_columns` of ``depressions.csv``.
    elevation_min, elevation_max : float
        Lowest and highest valid ground (NaN when there is none).
    onset_min, onset_max : float
        Lowest and highest onset stage (NaN when no cell is reached).
    """

    folder: Path
    grid: DEMGrid
    connectivity: int
    outlet_sources: tuple
    outlet_count: int
    depressions: dict
    elevation_min: float
    elevation_max: float
    onset_min: float
    onset_max: float

    @property
    def onset_path(self) -> Path:
        return self.folder / "onset_stage.tif"

    @property
    def unit(self) -> VerticalUnit:
        return VerticalUnit.parse(self.grid.vertical_unit)

    @property
    def spill_elevation(self) -> np.ndarray:
        return self.depressions[f"spill_elevation_{units.unit_suffix(self.unit)}"]

    @property
    def pit_elevation(self) -> np.ndarray:
        return self.depressions[f"pit_elevation_{units.unit_suffix(self.unit)}"]


def _strips(rows: int):
    for r0 in range(0, rows, geotiff.BLOCK_ROWS):
        yield r0, min(rows, r0 + geotiff.BLOCK_ROWS)


def _read_rows(ds, r0: int, r1: int) -> np.ndarray:
    return ds.read(1, window=rasterio.windows.Window(0, r0, ds.width, r1 - r0))


def open_result_folder(folder: str | os.PathLike, *, band: int | None = None) -> ResultFolder:
    """Open the folder ``sillmark analyse`` (with or without ``--tiles``) wrote.

    Reads ``summary.json`` (DEM path, vertical unit, CRS, grid, outlets,
    connectivity) and ``depressions.csv``, opens the DEM with
    :func:`sillmark.grid.dem.read_dem_grid`, and passes once over the DEM,
    ``onset_stage.tif`` and ``fill_depth.tif`` block by block: every cell's
    ``onset_stage - elevation`` must be the stored fill depth, or the DEM has
    changed since the analysis.

    Raises
    ------
    InvalidParameter
        The folder lacks a file, or its summary is not one Sillmark wrote.
    InvalidDEM
        The DEM is missing, has another grid, or no longer gives the stored results.
    """
    out = Path(folder)
    summary = read_summary(out)
    for name in ("onset_stage.tif", "fill_depth.tif", "depressions.csv"):
        if not (out / name).is_file():
            raise InvalidParameter(
                f"the folder {out} lacks {name}; give a folder written by 'sillmark analyse' "
                "(run it again if it was interrupted)"
            )
    rows, cols = summary.shape
    dem_text = summary.dem_file()
    unit, crs, connectivity = summary.vertical_unit, summary.crs, summary.connectivity
    sources, outlet_count = summary.outlet_sources, summary.outlet_cells
    grid = read_dem_grid(dem_text, band=band, vertical_unit=unit, crs=crs)
    if not summary.same_grid(grid.shape, grid.transform):
        raise InvalidDEM(
            f"the DEM {dem_text} no longer has the grid of the analysis in {out}; run "
            "'sillmark analyse' again"
        )
    lows, highs, onsets_lo, onsets_hi = [], [], [], []
    differ = 0
    with rasterio.open(out / "onset_stage.tif") as s_ds, rasterio.open(out / "fill_depth.tif") as f_ds:
        for ds in (s_ds, f_ds):
            if (ds.height, ds.width) != (rows, cols):
                raise InvalidParameter(f"{ds.name} does not match summary.json's grid; run "
                                       "'sillmark analyse' again")
        for r0, r1 in _strips(rows):
            s = _read_rows(s_ds, r0, r1)
            fill = _read_rows(f_ds, r0, r1)
            z = grid.read_window(r0, r1, 0, cols)
            recomputed = np.subtract(s, z, dtype=np.float32)
            differ += int(np.count_nonzero(~((recomputed == fill)
                                              | (np.isnan(recomputed) & np.isnan(fill)))))
            valid = ~np.isnan(z)
            if valid.any():
                lows.append(float(z[valid].min()))
                highs.append(float(z[valid].max()))
            reached = ~np.isnan(s)
            if reached.any():
                onsets_lo.append(float(s[reached].min()))
                onsets_hi.append(float(s[reached].max()))
    if differ:
        raise InvalidDEM(
            f"the DEM {dem_text} no longer gives the fill depth stored in {out} ({differ:,} "
            "cells differ), so it changed after the analysis; run 'sillmark analyse' again"
        )
    return ResultFolder(
        folder=out, grid=grid, connectivity=connectivity, outlet_sources=sources,
        outlet_count=outlet_count, depressions=read_depression_columns(out / "depressions.csv"),
        elevation_min=min(lows) if lows else math.nan,
        elevation_max=max(highs) if highs else math.nan,
        onset_min=min(onsets_lo) if onsets_lo else math.nan,
        onset_max=max(onsets_hi) if onsets_hi else math.nan,
    )


def _site_like(site: ResultFolder) -> types.SimpleNamespace:
    """The parts of a SpillResult that sillmark.products.stage reads for the depression rules:
    the onset stage's range (its lowest and highest value) and the depression table's
    pit and spill elevations, so those rules are not written twice."""
    table = types.SimpleNamespace(spill_elevation=site.spill_elevation,
                                  pit_elevation=site.pit_elevation)
    onset = np.array([site.onset_min, site.onset_max], dtype=np.float32)
    return types.SimpleNamespace(onset_stage=onset, depressions=table,
                                 connectivity=site.connectivity)


def tiled_stage_levels(site: ResultFolder, *, step, start=None, stop=None) -> np.ndarray:
    """:func:`sillmark.products.stage.stage_levels` for a folder: the same levels, same defaults."""
    return stage_levels(_site_like(site), step=step, start=start, stop=stop)


# --------------------------------------------------------------------------- one level


@dataclasses.dataclass(frozen=True)
class TiledLevelFiles:
    """What :func:`write_tiled_level` wrote for one level, with its totals
    (the figures of :class:`sillmark.io.stage_files.LevelFiles`)."""

    level: float
    unit: VerticalUnit
    paths: tuple[Path, ...]
    flooded_area_m2: float
    flooded_volume_m3: float
    shielded_area_m2: float
    shielded_volume_m3: float
    depressions_overtopped: int
    depressions_cut_off: int
    depressions_dry: int


def _level_tags(level, unit: VerticalUnit, connectivity: int) -> dict[str, str]:
    return {"WATER_LEVEL": level_text(level), "WATER_LEVEL_UNIT": unit.value,
            "CONNECTIVITY": str(connectivity)}


class _LevelBlocks:
    """Classifies blocks of rows at one level with the in-memory map's kernel; keeps row totals."""

    def __init__(self, site: ResultFolder, level: np.float32, s_ds) -> None:
        self.site = site
        self.level = level
        self.s_ds = s_ds
        self.areas = np.ascontiguousarray(site.grid.row_areas, dtype=np.float64)
        self.sums = np.zeros((site.grid.rows, 4), np.float64)

    def classify(self, r0: int, r1: int) -> tuple[np.ndarray, np.ndarray]:
        s = np.ascontiguousarray(_read_rows(self.s_ds, r0, r1), dtype=np.float32)
        z = self.site.grid.read_window(r0, r1, 0, self.site.grid.cols)
        state = np.empty(s.shape, np.uint8)
        depth = np.empty(s.shape, np.float32)
        _sk.water_level_map(s, z, self.areas[r0:r1], self.level, depth, state, self.sums[r0:r1])
        return state, depth


def _write_class_geojson(site: ResultFolder, level: float, totals: tuple[float, float],
                         state_path: Path, path: Path, state: int, name: str,
                         window: int) -> Path:
    """The file of :func:`sillmark.io.stage_files.write_flood_extent_geojson` (or the
    shielded one), its outline from ``water_state_{h}.tif`` window by window."""

    def select(block: np.ndarray):
        return block == np.uint8(state), block.astype(np.int32)

    return stage_export.write_class_collection(
        path, site.grid, level=level, state=state, name=name, totals=totals,
        connectivity=site.connectivity,
        outline=lambda: label_outlines(state_path, select, window=window).get(state),
    )


def _write_depressions_at(site: ResultFolder, level: float, path: Path) -> Path:
    """The file of :func:`sillmark.io.stage_files.write_depressions_at_csv`, from ``depressions.csv``."""
    unit = site.unit
    v = units.unit_suffix(unit)
    states, freeboard = depression_states(_site_like(site), level)
    table = site.depressions
    cols: dict[str, np.ndarray] = {
        "id": table["id"],
        "state": np.asarray(states, dtype=str),
        f"freeboard_{v}": freeboard,
    }
    for name in (f"pit_elevation_{v}", f"spill_elevation_{v}", f"max_depth_{v}", "spills_to",
                 "spill_lon_deg", "spill_lat_deg", "area_m2", "area_ha", "volume_m3", "volume_acre_ft"):
        if name in table:
            cols[name] = table[name]
    comments = _comment_head("depressions at one water level", site.grid, _site_like(site)) + [
        f"water level: {level_text(level)} {unit.value}",
        _DEPRESSION_STATE_NOTE,
        f"freeboard_{v}: spill elevation minus the water level (negative once overtopped)",
        "volume_m3: storage of the depression full to its spill elevation",
    ]
    return csv_tables.write_table_csv(path, comments, cols)


def _out_folder(out_dir: str | os.PathLike) -> Path:
    out = Path(out_dir)
    if out.exists() and not out.is_dir():
        raise InvalidParameter(f"the output path {out} is a file; give a folder (new or existing)")
    out.mkdir(parents=True, exist_ok=True)
    return out


def write_tiled_level(site: ResultFolder, level, out_dir: str | os.PathLike, *,
                      window: int = DEFAULT_WINDOW,
                      progress: geotiff.Progress | None = None) -> TiledLevelFiles:
    """Write the five files of one water level (:func:`sillmark.io.stage_files.level_file_names`)
    block by block; the same files as :func:`sillmark.io.stage_files.write_level`.

    Notes
    -----
    Reads ``onset_stage.tif`` and the DEM twice (once per raster), then the
    written ``water_state_{h}.tif`` twice (once per outline file).
    """
    grid = site.grid
    horizontal_crs(grid)  # fail before writing anything if there is no CRS
    unit = site.unit
    h = checked_level(level)
    folder = _out_folder(out_dir)
    names = level_file_names(h, unit)
    tags = _level_tags(h, unit, site.connectivity)
    with rasterio.open(site.onset_path) as s_ds:
        blocks = _LevelBlocks(site, h, s_ds)
        depth_path = geotiff.write_geotiff(
            folder / names.depth, grid, dtype="float32", nodata=DEPTH_NODATA,
            block=lambda r0, r1: blocks.classify(r0, r1)[1],
            layer="depth",
            description=f"depth of water reached from the outlets at water level "
            f"{level_text(h)} {unit.symbol} ({unit.symbol})",
            band_unit=units.unit_name(unit), extra_tags=tags, progress=progress,
        )
        state_tags = dict(tags)
        state_tags["WATER_STATE_CLASSES"] = _STATE_CODES
        state_tags.update({f"CLASS_{code}": CLASS_NAMES[code]
                           for code in (NODATA, DRY, FLOODED, SHIELDED)})
        state_tags["WATER_STATE_MEANING"] = _STATE_MEANING
        state_path = geotiff.write_geotiff(
            folder / names.water_state, grid, dtype="uint8", nodata=STATE_NODATA,
            block=lambda r0, r1: blocks.classify(r0, r1)[0],
            layer="water_state",
            description=f"water state at water level {level_text(h)} {unit.symbol}: " + _STATE_CODES,
            band_unit="", extra_tags=state_tags, progress=progress,
        )
    total = blocks.sums.sum(axis=0)
    flooded = (float(total[0]), float(total[1]) * unit.metres)
    shielded = (float(total[2]), float(total[3]) * unit.metres)

    def step(name: str, write) -> Path:
        if progress is not None:
            progress(name, 0, 1)
        written = write()
        if progress is not None:
            progress(name, 1, 1)
        return written

    paths = (
        depth_path,
        state_path,
        step(names.flood_extent, lambda: _write_class_geojson(
            site, float(h), flooded, state_path, folder / names.flood_extent, FLOODED,
            "flood_extent", window)),
        step(names.shielded, lambda: _write_class_geojson(
            site, float(h), shielded, state_path, folder / names.shielded, SHIELDED,
            "shielded", window)),
        step(names.depressions, lambda: _write_depressions_at(site, float(h), folder / names.depressions)),
    )
    states, _ = depression_states(_site_like(site), h)
    return TiledLevelFiles(
        level=float(h), unit=unit, paths=paths,
        flooded_area_m2=flooded[0], flooded_volume_m3=flooded[1],
        shielded_area_m2=shielded[0], shielded_volume_m3=shielded[1],
        depressions_overtopped=int(np.count_nonzero(states == DEPRESSION_OVERTOPPED)),
        depressions_cut_off=int(np.count_nonzero(states == DEPRESSION_CUT_OFF)),
        depressions_dry=int(np.count_nonzero(states == DEPRESSION_DRY)),
    )


# --------------------------------------------------------------------------- the stage table


def tiled_stage_table(site: ResultFolder, levels) -> StageTable:
    """:func:`sillmark.products.stage.stage_table` of a folder, from one pass over its blocks.

    The same figures, to the bit: the cells are binned with the in-memory
    pass's accumulators (:data:`STAGE_TABLE_CHUNKS` runs of rows) in the same
    order, then finished with the same cumulative sums.
    """
    unit = site.unit
    lv = np.asarray([checked_level(v) for v in np.atleast_1d(np.asarray(levels, dtype=object))],
                    dtype=np.float32)
    if lv.size == 0:
        raise InvalidParameter("give at least one water level")
    if np.any(np.diff(lv) <= 0):
        raise InvalidParameter("water levels must be strictly ascending")
    grid = site.grid
    rows, cols = grid.shape
    per = (rows + STAGE_TABLE_CHUNKS - 1) // STAGE_TABLE_CHUNKS
    acc = [np.zeros((STAGE_TABLE_CHUNKS, lv.size + 1), np.float64) for _ in range(4)]
    areas = np.ascontiguousarray(grid.row_areas, dtype=np.float64)
    with rasterio.open(site.onset_path) as s_ds:
        for r0, r1 in _strips(rows):
            s = np.ascontiguousarray(_read_rows(s_ds, r0, r1), dtype=np.float32)
            z = grid.read_window(r0, r1, 0, cols)
            _tiled_stage_kernels.add_stage_bins(s, z, areas[r0:r1], lv, np.int64(r0), np.int64(per), *acc)
    return stage_table_from_bins(lv, unit, *(a.sum(axis=0) for a in acc))


def _write_stage_table_csv(site: ResultFolder, table: StageTable, path: Path) -> Path:
    """The file of :func:`sillmark.io.stage_files.write_stage_table_csv`."""
    comments = _comment_head("stage table", site.grid, _site_like(site)) + [
        "flooded: cells reached from the outlets at the level; volume = water above the ground on them",
        "shielded: ground below the level that no surface path reaches; volume = what it would hold if reached",
    ]
    return csv_tables.write_table_csv(path, comments, stage_table_columns(table))


# --------------------------------------------------------------------------- all levels


@dataclasses.dataclass(frozen=True)
class TiledStageFiles(stage_export.StageFiles):
    """What :func:`write_tiled_stage_results` wrote: a :class:`sillmark.io.stage_files.StageFiles`
    whose levels are :class:`TiledLevelFiles`."""


def write_tiled_stage_results(
    site: ResultFolder,
    out_dir: str | os.PathLike,
    *,
    levels: Sequence = (),
    table_levels=None,
    window: int = DEFAULT_WINDOW,
    progress: geotiff.Progress | None = None,
) -> TiledStageFiles:
    """:func:`sillmark.io.stage_files.write_stage_results` out of core: every level's
    files (distinct float32 levels, ascending) and, with ``table_levels``,
    ``stage_table.csv``; the same files."""
    horizontal_crs(site.grid)
    unique = unique_levels(levels) if len(levels) else np.empty(0, np.float32)
    if table_levels is not None:
        table_levels = unique_levels(table_levels)
    if not len(unique) and table_levels is None:
        raise InvalidParameter("give at least one water level or the levels of a stage table")
    folder = _out_folder(out_dir)
    written = tuple(write_tiled_level(site, h, folder, window=window, progress=progress)
                    for h in unique)
    table = table_path = None
    if table_levels is not None:
        if progress is not None:
            progress(STAGE_TABLE_NAME, 0, 1)
        table = tiled_stage_table(site, table_levels)
        table_path = _write_stage_table_csv(site, table, folder / STAGE_TABLE_NAME)
        if progress is not None:
            progress(STAGE_TABLE_NAME, 1, 1)
    return TiledStageFiles(levels=written, table=table, table_path=table_path)
