"""Result files of a water-level map and of the site stage table.

For one outlet water level ``h`` (see :mod:`sillmark.products.stage`), :func:`write_level`
writes, with ``{h}`` the :func:`level_label` of the level (``47.60m``,
``-1.25m``, ``152.50ft``):

==============================  ======================================================
``depth_{h}.tif``               float32, ``h - elevation`` on flooded cells, NaN elsewhere
``water_state_{h}.tif``         uint8, 0 nodata, 1 dry, 2 flooded, 3 shielded low ground
``flood_extent_{h}.geojson``    the flooded cells as one (Multi)Polygon, WGS84 lon/lat
``shielded_{h}.geojson``        the shielded low ground as one (Multi)Polygon, WGS84
``depressions_at_{h}.csv``      every depression with its state and freeboard at ``h``
==============================  ======================================================

and :func:`write_stage_table_csv` writes ``stage_table.csv``, flooded and
shielded area and volume against level. :func:`write_stage_results` writes the
lot for several levels into one folder.

The files follow the conventions of :mod:`sillmark.io.export`: GeoTIFFs tiled and
compressed with the CRS kept, GeoJSON after RFC 7946, CSV with ``# `` comment
lines before the header; every file carries :data:`sillmark.SCREENING_CAUTION`
and is written atomically (temporary name, then rename). The files hold nothing
about how the result was obtained (no paths, no clock time), so the same site and
levels always give byte-identical files.
"""

from __future__ import annotations

import dataclasses
import os
from collections.abc import Iterator, Sequence
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np
import rasterio.features
import shapely.geometry

from sillmark import SCREENING_CAUTION, __version__, units
from sillmark.errors import InvalidParameter
from sillmark.grid import crs
from sillmark.io import csv_tables, geotiff, json_values
from sillmark.io import geojson as geojson_files
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
    WaterLevelMap,
    checked_level,
    depression_states,
    stage_table,
    water_level_map,
)
from sillmark.units import ACRE_FOOT_M3, VerticalUnit

if TYPE_CHECKING:  # pragma: no cover
    from sillmark.engine.flood import SpillResult
    from sillmark.grid.dem import DEM

__all__ = [
    "DEPTH_NODATA",
    "STAGE_TABLE_NAME",
    "STATE_NODATA",
    "LevelFileNames",
    "LevelFiles",
    "StageFiles",
    "class_polygon",
    "level_file_names",
    "level_label",
    "level_text",
    "write_depressions_at_csv",
    "write_depth",
    "write_flood_extent_geojson",
    "write_level",
    "write_shielded_geojson",
    "write_stage_results",
    "stage_table_columns",
    "unique_levels",
    "write_stage_table_csv",
    "write_water_state",
]

#: Nodata of ``depth_{h}.tif`` (the IEEE NaN, declared as the GeoTIFF nodata).
DEPTH_NODATA = float("nan")
#: Nodata of ``water_state_{h}.tif``: the class code of DEM nodata and unreached cells.
STATE_NODATA = NODATA
#: File name of the stage table.
STAGE_TABLE_NAME = "stage_table.csv"

_STATE_CODES = ", ".join(f"{code} = {CLASS_NAMES[code]}" for code in (NODATA, DRY, FLOODED, SHIELDED))
_STATE_MEANING = (
    "flooded: reached from the outlets at this water level (onset stage <= level); "
    "shielded: ground below the level that no surface path from the outlets reaches "
    "(elevation < level < onset stage), still at risk from seepage, local rain or a "
    "breach; dry: ground at or above the level; nodata: DEM nodata or not reached "
    "by any outlet"
)


# --------------------------------------------------------------------------- names


def level_text(level) -> str:
    """A water level as written in file names and messages: the shortest decimal
    that reads back as the same float32, with at least two decimals.

    >>> level_text(47.6), level_text(3), level_text(-1.255), level_text(-0.0)
    ('47.60', '3.00', '-1.255', '0.00')
    """
    h = checked_level(level) + np.float32(0.0)  # adding 0 turns -0.0 into 0.0
    return np.format_float_positional(h, unique=True, min_digits=2)


def level_label(level, unit: VerticalUnit | str) -> str:
    """The ``{h}`` part of the file names of one level: value and unit suffix.

    Distinct float32 levels get distinct labels; the characters are digits,
    ``.``, ``-``, letters and ``_``, safe in file names on every common file system.

    >>> level_label(47.6, "m"), level_label(-1.25, "m"), level_label(152.5, "us-ft")
    ('47.60m', '-1.25m', '152.50us_ft')
    """
    return f"{level_text(level)}{units.unit_suffix(unit)}"


@dataclasses.dataclass(frozen=True)
class LevelFileNames:
    """File names of the results at one water level, in the order they are written."""

    depth: str
    water_state: str
    flood_extent: str
    shielded: str
    depressions: str

    def __iter__(self) -> Iterator[str]:
        return iter(dataclasses.astuple(self))


def level_file_names(level, unit: VerticalUnit | str) -> LevelFileNames:
    """Names of the five files :func:`write_level` writes for ``level``.

    >>> list(level_file_names(47.6, "m"))[:2]
    ['depth_47.60m.tif', 'water_state_47.60m.tif']
    """
    h = level_label(level, unit)
    return LevelFileNames(
        depth=f"depth_{h}.tif",
        water_state=f"water_state_{h}.tif",
        flood_extent=f"flood_extent_{h}.geojson",
        shielded=f"shielded_{h}.geojson",
        depressions=f"depressions_at_{h}.csv",
    )


# --------------------------------------------------------------------------- checks


def _unit(dem: "DEM") -> VerticalUnit:
    return VerticalUnit.parse(dem.vertical_unit)


def _check_map(water_map: WaterLevelMap, dem: "DEM") -> None:
    shape = tuple(dem.elevation.shape)
    got = tuple(water_map.state.shape)
    if got != shape or tuple(water_map.depth.shape) != shape:
        raise InvalidParameter(
            f"the water-level map is {got[0]} x {got[1]} cells but the DEM is "
            f"{shape[0]} x {shape[1]}; export a map computed on this DEM"
        )
    if VerticalUnit.parse(water_map.unit) is not _unit(dem):
        raise InvalidParameter(
            f"the water-level map is in {water_map.unit.value} but the DEM in "
            f"{_unit(dem).value}; compute the map with the DEM's vertical unit"
        )


def _check_result(result: "SpillResult", dem: "DEM") -> None:
    shape = tuple(dem.elevation.shape)
    got = tuple(result.onset_stage.shape)
    if got != shape:
        raise InvalidParameter(
            f"the result is {got[0]} x {got[1]} cells but the DEM is {shape[0]} x "
            f"{shape[1]}; export a result computed on this DEM"
        )


def _level_tags(water_map: WaterLevelMap, result: "SpillResult") -> dict[str, str]:
    unit = VerticalUnit.parse(water_map.unit)
    return {
        "WATER_LEVEL": level_text(water_map.level),
        "WATER_LEVEL_UNIT": unit.value,
        "CONNECTIVITY": str(result.connectivity),
    }


# --------------------------------------------------------------------------- rasters


def write_depth(
    result: "SpillResult",
    dem: "DEM",
    water_map: WaterLevelMap,
    path: str | os.PathLike,
    *,
    progress: geotiff.Progress | None = None,
) -> Path:
    """Write ``depth_{h}.tif``: water depth at the map's level, float32, NaN nodata.

    Depth is ``level - elevation`` on flooded cells, in the site's vertical unit;
    every other cell (dry, shielded, DEM nodata) is NaN, the declared nodata.
    Tags: those of :func:`sillmark.io.geotiff.write_geotiff` plus ``WATER_LEVEL``,
    ``WATER_LEVEL_UNIT`` and ``CONNECTIVITY``.
    """
    _check_result(result, dem)
    _check_map(water_map, dem)
    unit = _unit(dem)
    depth = water_map.depth
    return geotiff.write_geotiff(
        path, dem, dtype="float32", nodata=DEPTH_NODATA,
        block=lambda r0, r1: depth[r0:r1],
        layer="depth",
        description=f"depth of water reached from the outlets at water level "
        f"{level_text(water_map.level)} {unit.symbol} ({unit.symbol})",
        band_unit=units.unit_name(unit),
        extra_tags=_level_tags(water_map, result),
        progress=progress,
    )


def write_water_state(
    result: "SpillResult",
    dem: "DEM",
    water_map: WaterLevelMap,
    path: str | os.PathLike,
    *,
    progress: geotiff.Progress | None = None,
) -> Path:
    """Write ``water_state_{h}.tif``: the class of every cell at the map's level, uint8.

    Codes are those of :mod:`sillmark.products.stage`: 0 nodata (the declared nodata),
    1 dry, 2 flooded, 3 shielded low ground. The tag ``WATER_STATE_CLASSES``
    lists them (``0 = nodata, 1 = dry, ...``), ``CLASS_1`` ... ``CLASS_3`` name
    each and ``WATER_STATE_MEANING`` explains them.
    """
    _check_result(result, dem)
    _check_map(water_map, dem)
    unit = _unit(dem)
    state = water_map.state
    tags = _level_tags(water_map, result)
    tags["WATER_STATE_CLASSES"] = _STATE_CODES
    tags.update({f"CLASS_{code}": CLASS_NAMES[code] for code in (NODATA, DRY, FLOODED, SHIELDED)})
    tags["WATER_STATE_MEANING"] = _STATE_MEANING
    return geotiff.write_geotiff(
        path, dem, dtype="uint8", nodata=STATE_NODATA,
        block=lambda r0, r1: state[r0:r1],
        layer="water_state",
        description=f"water state at water level {level_text(water_map.level)} {unit.symbol}: "
        + _STATE_CODES,
        band_unit="",
        extra_tags=tags,
        progress=progress,
    )


# --------------------------------------------------------------------------- vectors


def class_polygon(water_map: WaterLevelMap, dem: "DEM", state: int):
    """The cells of class ``state`` as one shapely (Multi)Polygon in the DEM's CRS.

    None when no cell has the class. The class raster is vectorised with
    :func:`rasterio.features.shapes` (4-connected, cell edges as outlines); the
    pieces are distinct 4-connected regions of one class, so they meet at most at
    corners and their MultiPolygon is already their union (and valid).

    Notes
    -----
    Memory: a boolean mask of the grid (1 byte per cell) plus the outline vertices.
    """
    _check_map(water_map, dem)
    classes = np.ascontiguousarray(water_map.state, dtype=np.uint8)
    mask = classes == np.uint8(state)
    if not mask.any():
        return None
    parts = [
        shapely.geometry.shape(geom)
        for geom, _ in rasterio.features.shapes(classes, mask=mask, connectivity=4, transform=dem.transform)
    ]
    return parts[0] if len(parts) == 1 else shapely.geometry.MultiPolygon(parts)


def _write_class_geojson(
    result: "SpillResult", dem: "DEM", water_map: WaterLevelMap, path, state: int, name: str
) -> Path:
    _check_result(result, dem)
    _check_map(water_map, dem)
    if state == FLOODED:
        totals = water_map.flooded_area_m2, water_map.flooded_volume_m3
    else:
        totals = water_map.shielded_area_m2, water_map.shielded_volume_m3
    return write_class_collection(
        path, dem, level=water_map.level, state=state, name=name, totals=totals,
        connectivity=result.connectivity, outline=lambda: class_polygon(water_map, dem, state),
    )


def write_class_collection(path, grid, *, level, state: int, name: str, totals: tuple[float, float],
                           connectivity: int, outline) -> Path:
    """Write one water class at a level (flooded or shielded) as a GeoJSON FeatureCollection.

    ``grid`` is the DEM or a :class:`~sillmark.grid.dem.DEMGrid` (CRS, vertical unit);
    ``totals`` the class's area (m²) and volume (m³); ``outline()`` gives its
    (Multi)Polygon in the DEM's CRS or None when no cell has the class (it is
    called after the CRS is checked, so a grid without one fails before any work).
    The in-memory and the out-of-core exports both write through here.
    """
    unit = _unit(grid)
    transformer = crs.wgs84_transformer(grid)  # fails before writing if there is no CRS
    area, volume = totals
    properties = {
        "level": json_values.json_number(np.float32(level)),
        "unit": unit.value,
        "class": CLASS_NAMES[state],
        "area_m2": json_values.json_number(area),
        "area_ha": json_values.json_number(area / 1e4),
        "volume_m3": json_values.json_number(volume),
    }
    if unit.is_feet:
        properties["volume_acre_ft"] = json_values.json_number(volume / ACRE_FOOT_M3)
    properties["connectivity"] = int(connectivity)
    properties["caution"] = SCREENING_CAUTION
    polygon = outline()

    def features() -> Iterator[dict]:
        if polygon is None:
            return
        yield {
            "type": "Feature",
            "id": CLASS_NAMES[state],
            "geometry": geojson_files.wgs84_geometry(polygon, grid, transformer=transformer),
            "properties": properties,
        }

    # Foreign members (RFC 7946, section 6.1): the totals stay readable when no
    # cell has the class and the collection holds no feature.
    members = {"name": name, **{k: v for k, v in properties.items() if k != "connectivity"}}
    return geojson_files.write_feature_collection(path, members, features())


def write_flood_extent_geojson(
    result: "SpillResult", dem: "DEM", water_map: WaterLevelMap, path: str | os.PathLike
) -> Path:
    """Write ``flood_extent_{h}.geojson``: the flooded cells as one Feature, WGS84.

    RFC 7946 as in :func:`sillmark.io.geojson.write_depressions_geojson` (lon/lat,
    counterclockwise exteriors, clockwise holes, coordinates rounded to
    :data:`sillmark.io.geojson.COORDINATE_DECIMALS` places). Properties: ``level``,
    ``unit``, ``class`` (``"flooded"``), ``area_m2``, ``area_ha``, ``volume_m3``
    (water on the flooded cells; plus ``volume_acre_ft`` for sites in feet),
    ``connectivity`` and ``caution``; the same (but connectivity) are members of
    the collection. When nothing floods the collection holds no feature.
    """
    return _write_class_geojson(result, dem, water_map, path, FLOODED, "flood_extent")


def write_shielded_geojson(
    result: "SpillResult", dem: "DEM", water_map: WaterLevelMap, path: str | os.PathLike
) -> Path:
    """Write ``shielded_{h}.geojson``: shielded low ground as one Feature, WGS84.

    As :func:`write_flood_extent_geojson`, with ``class`` ``"shielded"`` and
    ``volume_m3`` the volume between the ground and the level on the shielded
    cells (what they would hold if water reached them).
    """
    return _write_class_geojson(result, dem, water_map, path, SHIELDED, "shielded")


# --------------------------------------------------------------------------- tables


def _comment_head(title: str, dem: "DEM", result: "SpillResult") -> list[str]:
    unit = _unit(dem)
    return [
        f"Sillmark {__version__} {title}",
        f"CAUTION: {SCREENING_CAUTION}",
        f"vertical unit: {unit.value} ({units.unit_name(unit)})",
        f"CRS: {crs.crs_label(dem)}",
        f"connectivity: {result.connectivity}",
    ]


def stage_table_columns(table: StageTable) -> dict[str, np.ndarray]:
    """The stage table with units in the column names, in file order.

    ``level_{u}`` (float32, the vertical unit's suffix), flooded and shielded
    area in m² and ha and volume in m³; for sites in feet each volume also in
    acre-feet (43 560 international cubic feet, :data:`sillmark.units.ACRE_FOOT_M3`).
    """
    unit = VerticalUnit.parse(table.unit)
    cols: dict[str, np.ndarray] = {f"level_{units.unit_suffix(unit)}": np.asarray(table.level, np.float32)}
    for prefix, area, volume in (
        ("flooded", table.flooded_area_m2, table.flooded_volume_m3),
        ("shielded", table.shielded_area_m2, table.shielded_volume_m3),
    ):
        area = np.asarray(area, np.float64)
        volume = np.asarray(volume, np.float64)
        cols[f"{prefix}_area_m2"] = area
        cols[f"{prefix}_area_ha"] = area / 1e4
        cols[f"{prefix}_volume_m3"] = volume
        if unit.is_feet:
            cols[f"{prefix}_volume_acre_ft"] = volume / ACRE_FOOT_M3
    return cols


def write_stage_table_csv(
    result: "SpillResult", dem: "DEM", table: StageTable, path: str | os.PathLike
) -> Path:
    """Write ``stage_table.csv``: one row per level of ``table`` (:func:`sillmark.products.stage.stage_table`).

    ``# `` comment lines (caution, vertical unit, CRS, connectivity, what the
    columns mean), then the columns of :func:`stage_table_columns`.
    """
    _check_result(result, dem)
    crs.horizontal_crs(dem)
    if VerticalUnit.parse(table.unit) is not _unit(dem):
        raise InvalidParameter(
            f"the stage table is in {table.unit.value} but the DEM in {_unit(dem).value}; "
            "compute the table with the DEM's vertical unit"
        )
    comments = _comment_head("stage table", dem, result) + [
        "flooded: cells reached from the outlets at the level; volume = water above the ground on them",
        "shielded: ground below the level that no surface path reaches; volume = what it would hold if reached",
    ]
    return csv_tables.write_table_csv(path, comments, stage_table_columns(table))


_DEPRESSION_STATE_NOTE = (
    f"state: '{DEPRESSION_DRY}' (level at or below the pit), '{DEPRESSION_CUT_OFF}' "
    f"(level between pit and spill elevation, no surface path reaches it), "
    f"'{DEPRESSION_OVERTOPPED}' (level at or above the spill elevation, filled from the outlets)"
)


def write_depressions_at_csv(
    result: "SpillResult", dem: "DEM", level, path: str | os.PathLike
) -> Path:
    """Write ``depressions_at_{h}.csv``: every depression's state and freeboard at ``level``.

    Columns: ``id``, ``state`` (:func:`sillmark.products.stage.depression_states`),
    ``freeboard_{u}`` (spill elevation minus level; negative once overtopped),
    ``pit_elevation_{u}``, ``spill_elevation_{u}``, ``max_depth_{u}``,
    ``spills_to``, ``spill_lon_deg``, ``spill_lat_deg``, ``area_m2``,
    ``area_ha``, ``volume_m3`` (storage at the spill elevation; plus
    ``volume_acre_ft`` for sites in feet), as in ``depressions.csv``.
    """
    _check_result(result, dem)
    unit = _unit(dem)
    v = units.unit_suffix(unit)
    states, freeboard = depression_states(result, level)
    table = csv_tables.depression_columns(result, dem)
    cols: dict[str, np.ndarray] = {
        "id": table["id"],
        "state": np.asarray(states, dtype=str),
        f"freeboard_{v}": freeboard,
    }
    for name in (f"pit_elevation_{v}", f"spill_elevation_{v}", f"max_depth_{v}", "spills_to",
                 "spill_lon_deg", "spill_lat_deg", "area_m2", "area_ha", "volume_m3", "volume_acre_ft"):
        if name in table:
            cols[name] = table[name]
    comments = _comment_head("depressions at one water level", dem, result) + [
        f"water level: {level_text(level)} {unit.value}",
        _DEPRESSION_STATE_NOTE,
        f"freeboard_{v}: spill elevation minus the water level (negative once overtopped)",
        "volume_m3: storage of the depression full to its spill elevation",
    ]
    return csv_tables.write_table_csv(path, comments, cols)


# --------------------------------------------------------------------------- one level, all levels


@dataclasses.dataclass(frozen=True)
class LevelFiles:
    """What :func:`write_level` wrote for one level, with the figures to report.

    ``water_map`` holds the totals (its arrays are those :func:`write_level`
    filled, and may be overwritten when buffers are reused for the next level).
    """

    level: float
    unit: VerticalUnit
    water_map: WaterLevelMap
    paths: tuple[Path, ...]
    depressions_overtopped: int
    depressions_cut_off: int
    depressions_dry: int

    @property
    def flooded_area_m2(self) -> float:
        return self.water_map.flooded_area_m2

    @property
    def flooded_volume_m3(self) -> float:
        return self.water_map.flooded_volume_m3

    @property
    def shielded_area_m2(self) -> float:
        return self.water_map.shielded_area_m2

    @property
    def shielded_volume_m3(self) -> float:
        return self.water_map.shielded_volume_m3


def _out_folder(out_dir: str | os.PathLike) -> Path:
    out = Path(out_dir)
    if out.exists() and not out.is_dir():
        raise InvalidParameter(f"the output path {out} is a file; give a folder (new or existing)")
    out.mkdir(parents=True, exist_ok=True)
    return out


def write_level(
    result: "SpillResult",
    dem: "DEM",
    level,
    out_dir: str | os.PathLike,
    *,
    out: tuple[np.ndarray, np.ndarray] | None = None,
    progress: geotiff.Progress | None = None,
) -> LevelFiles:
    """Write the five files of one water level into ``out_dir`` (see :func:`level_file_names`).

    Parameters
    ----------
    result : SpillResult
        From :func:`sillmark.engine.flood.analyse_site` on ``dem``.
    dem : DEM
    level : float
        Outlet water level in the DEM's vertical unit (compared at float32 precision).
    out_dir : path
        Created if missing; files of these names are replaced, nothing else is touched.
    out : (uint8, float32) arrays, optional
        Buffers for the map, as in :func:`sillmark.products.stage.water_level_map`.
    progress : callable, optional
        ``progress(file_name, done, total)`` as in :func:`sillmark.io.export.write_results`.

    Notes
    -----
    Memory: the map (5 bytes per cell unless ``out`` is given), a boolean mask of
    the grid while outlining, and the outlines.
    """
    _check_result(result, dem)
    crs.horizontal_crs(dem)  # fail before writing anything if there is no CRS
    unit = _unit(dem)
    folder = _out_folder(out_dir)
    water_map = water_level_map(result, level, row_areas=dem.row_areas, unit=unit, out=out)
    names = level_file_names(water_map.level, unit)

    def step(name: str, write) -> Path:
        if progress is not None:
            progress(name, 0, 1)
        written = write()
        if progress is not None:
            progress(name, 1, 1)
        return written

    paths = (
        write_depth(result, dem, water_map, folder / names.depth, progress=progress),
        write_water_state(result, dem, water_map, folder / names.water_state, progress=progress),
        step(names.flood_extent,
             lambda: write_flood_extent_geojson(result, dem, water_map, folder / names.flood_extent)),
        step(names.shielded,
             lambda: write_shielded_geojson(result, dem, water_map, folder / names.shielded)),
        step(names.depressions,
             lambda: write_depressions_at_csv(result, dem, water_map.level, folder / names.depressions)),
    )
    states, _ = depression_states(result, water_map.level)
    return LevelFiles(
        level=water_map.level,
        unit=unit,
        water_map=water_map,
        paths=paths,
        depressions_overtopped=int(np.count_nonzero(states == DEPRESSION_OVERTOPPED)),
        depressions_cut_off=int(np.count_nonzero(states == DEPRESSION_CUT_OFF)),
        depressions_dry=int(np.count_nonzero(states == DEPRESSION_DRY)),
    )


@dataclasses.dataclass(frozen=True)
class StageFiles:
    """What :func:`write_stage_results` wrote: one :class:`LevelFiles` per level
    (ascending) and the stage table with its path (None when no table was asked for)."""

    levels: tuple[LevelFiles, ...]
    table: StageTable | None
    table_path: Path | None

    @property
    def paths(self) -> list[Path]:
        out = [p for level in self.levels for p in level.paths]
        if self.table_path is not None:
            out.append(self.table_path)
        return out


def unique_levels(levels: Sequence) -> np.ndarray:
    """The distinct float32 values of ``levels``, ascending (each checked as a water level)."""
    return np.unique(np.asarray([checked_level(v) for v in levels], dtype=np.float32))


def write_stage_results(
    result: "SpillResult",
    dem: "DEM",
    out_dir: str | os.PathLike,
    *,
    levels: Sequence = (),
    table_levels=None,
    progress: geotiff.Progress | None = None,
) -> StageFiles:
    """Write the files of every level in ``levels`` and, if ``table_levels`` is
    given, ``stage_table.csv`` at those levels (e.g. from :func:`sillmark.products.stage.stage_levels`).

    Levels equal at float32 precision are written once; levels are written in
    ascending order. One pair of map buffers serves every level.
    """
    _check_result(result, dem)
    crs.horizontal_crs(dem)
    unique = unique_levels(levels) if len(levels) else np.empty(0, np.float32)
    if table_levels is not None:
        table_levels = unique_levels(table_levels)
    if not len(unique) and table_levels is None:
        raise InvalidParameter("give at least one water level or the levels of a stage table")
    folder = _out_folder(out_dir)
    shape = dem.elevation.shape
    buffers = (np.empty(shape, np.uint8), np.empty(shape, np.float32)) if len(unique) else None
    written = tuple(
        write_level(result, dem, h, folder, out=buffers, progress=progress) for h in unique
    )
    table = table_path = None
    if table_levels is not None:
        if progress is not None:
            progress(STAGE_TABLE_NAME, 0, 1)
        table = stage_table(result, table_levels, row_areas=dem.row_areas, unit=_unit(dem))
        table_path = write_stage_table_csv(result, dem, table, folder / STAGE_TABLE_NAME)
        if progress is not None:
            progress(STAGE_TABLE_NAME, 1, 1)
    return StageFiles(levels=written, table=table, table_path=table_path)
