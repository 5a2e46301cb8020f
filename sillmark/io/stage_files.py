"""Result files of a water-level map and of the site stage table.

For one outlet water level ``h`` (see :mod:`sillmark.products.stage`), :func:`write_level`
writes, with ``{h}`` the :func:`level_label` of the level (``47.60m``,
``-1.25m``, ``152.50ft``):

==============================  ======================================================
``depth_{h}.tif``               float32, ``h - elevation`` on flooded cells, NaN elsewhere
``water_state_{h}.tif``         uint8, 0 nodata, 1 dry, 2 flooded, 3 shielded low ground
``flood_extent_{h}.geojson``    the flooded cells as one (Multi)Polygon, WGS84 lon/lat
                                (``.gpkg`` in the DEM's CRS when asked for, or by size)
``shielded_{h}.geojson``        the shielded low ground as one (Multi)Polygon, WGS84
``depressions_at_{h}.csv``      every depression with its state and freeboard at ``h``
==============================  ======================================================

with an OGC SLD style beside each map layer (``depth_{h}.sld``, ...;
:mod:`sillmark.io.styles`), and :func:`write_stage_table_csv` writes ``stage_table.csv``, flooded and
shielded area and volume against level. :func:`write_stage_results` writes the
lot for several levels into one folder.

Every function takes a result source (:mod:`sillmark.products.source`): a result
in memory, or a results folder on disk read block by block, with the same files.
The files follow the conventions of :mod:`sillmark.io.geotiff`, :mod:`sillmark.io.csv_tables`
and :mod:`sillmark.io.geojson`: Cloud-Optimized GeoTIFFs (tiled, with
overviews, compressed) with the CRS kept, GeoJSON after RFC 7946, CSV with the header on
the first line; every file carries :data:`sillmark.SCREENING_CAUTION` where its
format has a place for it (the CSVs through the folder's ``README.txt``) and
is written atomically (temporary name, then rename). The files hold nothing
about how the result was obtained (no paths, no clock time), so the same site and
levels always give byte-identical files.
"""

from __future__ import annotations

import dataclasses
import os
from collections.abc import Iterator, Sequence
from functools import partial
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np
import shapely

from sillmark import SCREENING_CAUTION, units
from sillmark.errors import InvalidParameter
from sillmark.grid import crs
from sillmark.io import csv_tables, geotiff, json_values, styles, vector_layers
from sillmark.io import geojson as geojson_files
from sillmark.io.geopackage import write_geopackage_layer
from sillmark.products.outlines import DEFAULT_WINDOW, label_outlines
from sillmark.products.source import ArraySource
from sillmark.products.stage import (
    CLASS_NAMES,
    DEPRESSION_CUT_OFF,
    DEPRESSION_DRY,
    DEPRESSION_OVERTOPPED,
    DRY,
    FLOODED,
    NODATA,
    SHIELDED,
    LevelBlocks,
    StageTable,
    checked_level,
    depression_states,
    level_blocks,
    stage_table,
)
from sillmark.units import VerticalUnit

if TYPE_CHECKING:  # pragma: no cover
    from sillmark.products.source import ResultSource

__all__ = [
    "DEPTH_NODATA",
    "STAGE_TABLE_NAME",
    "STATE_NODATA",
    "LevelFileNames",
    "LevelFiles",
    "StageFiles",
    "level_file_names",
    "level_label",
    "level_text",
    "stage_table_columns",
    "unique_levels",
    "write_class_collection",
    "write_depressions_at_csv",
    "write_level",
    "write_stage_results",
    "write_stage_table_csv",
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


def level_file_names(level, unit: VerticalUnit | str, *, kind: str = "") -> LevelFileNames:
    """Names of the five files :func:`write_level` writes for ``level``.

    ``kind`` names what the level is when it is not one water level across the
    site: ``"offset"`` for a rise of a water-surface profile
    (:class:`sillmark.products.profile.OffsetSource`).

    >>> list(level_file_names(47.6, "m"))[:2]
    ['depth_47.60m.tif', 'water_state_47.60m.tif']
    >>> level_file_names(0.5, "m", kind="offset").depth
    'depth_offset_0.50m.tif'
    """
    h = f"{kind}_{level_label(level, unit)}" if kind else level_label(level, unit)
    return LevelFileNames(
        depth=f"depth_{h}.tif",
        water_state=f"water_state_{h}.tif",
        flood_extent=f"flood_extent_{h}.geojson",
        shielded=f"shielded_{h}.geojson",
        depressions=f"depressions_at_{h}.csv",
    )


# --------------------------------------------------------------------------- one level


def _level_tags(level, unit: VerticalUnit, connectivity: int, kind: str = "") -> dict[str, str]:
    tags = {"WATER_LEVEL": level_text(level), "WATER_LEVEL_UNIT": unit.value,
            "CONNECTIVITY": str(connectivity)}
    if kind == "offset":
        tags["WATER_LEVEL_MEANING"] = ("offset: rise of the whole water-surface profile; the water "
                                       "surface is the profile level plus this offset")
    return tags


def _write_depth(source: "ResultSource", blocks: LevelBlocks, path: Path,
                 progress: geotiff.Progress | None) -> Path:
    """``depth_{h}.tif``: ``level - elevation`` on flooded cells, NaN (the declared nodata) elsewhere."""
    unit = source.unit
    return geotiff.write_geotiff(
        path, source.grid, dtype="float32", nodata=DEPTH_NODATA,
        block=lambda r0, r1: blocks.classify(r0, r1)[1],
        layer="depth",
        description=f"depth of water reached from the outlets at water level "
        f"{level_text(blocks.level)} {unit.symbol} ({unit.symbol})",
        band_unit=units.unit_name(unit), extra_tags=_level_tags(blocks.level, unit, source.connectivity,
                                                               getattr(source, "level_kind", "")),
        progress=progress,
    )


def _write_water_state(source: "ResultSource", blocks: LevelBlocks, path: Path,
                       progress: geotiff.Progress | None) -> Path:
    """``water_state_{h}.tif``: 0 nodata (declared), 1 dry, 2 flooded, 3 shielded low ground.

    The tag ``WATER_STATE_CLASSES`` lists the codes (``0 = nodata, 1 = dry,
    ...``), ``CLASS_0`` ... ``CLASS_3`` name each and ``WATER_STATE_MEANING``
    explains them.
    """
    unit = source.unit
    tags = _level_tags(blocks.level, unit, source.connectivity, getattr(source, "level_kind", ""))
    tags["WATER_STATE_CLASSES"] = _STATE_CODES
    tags.update({f"CLASS_{code}": CLASS_NAMES[code] for code in (NODATA, DRY, FLOODED, SHIELDED)})
    tags["WATER_STATE_MEANING"] = _STATE_MEANING
    return geotiff.write_geotiff(
        path, source.grid, dtype="uint8", nodata=STATE_NODATA,
        block=lambda r0, r1: blocks.classify(r0, r1)[0],
        layer="water_state",
        description=f"water state at water level {level_text(blocks.level)} {unit.symbol}: " + _STATE_CODES,
        band_unit="", extra_tags=tags, progress=progress,
    )


def write_class_collection(path, grid, *, level, state: int, name: str, totals: tuple[float, float],
                           connectivity: int, outline) -> Path:
    """Write one water class at a level (flooded or shielded) as a GeoJSON FeatureCollection.

    ``grid`` is the DEM or a :class:`~sillmark.grid.dem_grid.DEMGrid` (CRS, vertical unit);
    ``totals`` the class's area (m²) and volume (m³); ``outline()`` gives its
    (Multi)Polygon in the DEM's CRS or None when no cell has the class (it is
    called after the CRS is checked, so a grid without one fails before any work).

    RFC 7946 as ``depressions.geojson`` (lon/lat, counterclockwise exteriors,
    clockwise holes, coordinates rounded). Properties: ``level``, ``unit``,
    ``class``, ``area_m2``, ``area_ha``, ``volume_m3`` (plus ``area_ft2``,
    ``area_acres`` and ``volume_acre_ft`` for sites in feet), ``connectivity`` and ``caution``; the same (but
    connectivity) are members of the collection, so the totals stay readable
    when no cell has the class and the collection holds no feature.
    """
    unit = units.unit_of(grid)
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
    for key, value in units.own_unit_columns(unit, area_m2=area, volume_m3=volume).items():
        properties[key] = json_values.json_number(value)
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

    # Foreign members (RFC 7946, section 6.1).
    members = {"name": name, **{k: v for k, v in properties.items() if k != "connectivity"}}
    return geojson_files.write_feature_collection(path, members, features())


def _write_class_geojson(source: "ResultSource", level: float, totals: tuple[float, float],
                         state_path: Path, path: Path, state: int, name: str, window: int,
                         vector_format: str = "geojson") -> Path:
    """``flood_extent_{h}`` or ``shielded_{h}``: the class's cells of the written
    ``water_state_{h}.tif``, outlined window by window; ``.geojson``, or ``.gpkg``
    in the DEM's CRS when ``vector_format`` asks for it (``"auto"``: more than
    :data:`sillmark.io.vector_layers.GEOJSON_MAX_FEATURES` polygon parts)."""
    crs.horizontal_crs(source.grid)  # fails before tracing if there is no CRS

    def select(block: np.ndarray):
        return block == np.uint8(state), block.astype(np.int32)

    polygon = label_outlines(partial(geotiff.read_window, state_path), tuple(source.grid.shape),
                             source.grid.transform, select, window=window).get(state)
    parts = 0 if polygon is None else int(shapely.get_num_geometries(polygon))
    suffix = vector_layers.vector_suffix(vector_format, parts)
    if suffix == ".geojson":
        return write_class_collection(path, source.grid, level=level, state=state, name=name,
                                      totals=totals, connectivity=source.connectivity,
                                      outline=lambda: polygon)
    unit = units.unit_of(source.grid)
    area, volume = totals
    attributes = {"level": [np.float32(level)], "class": [CLASS_NAMES[state]],
                  "area_m2": [float(area)], "area_ha": [float(area) / 1e4],
                  "volume_m3": [float(volume)]}
    if unit.is_feet:
        attributes["volume_acre_ft"] = [float(volume) / units.ACRE_FOOT_M3]
    shapes = [] if polygon is None else [polygon]
    if polygon is None:
        attributes = {k: v[:0] for k, v in attributes.items()}
    what = "flooded from the outlets" if name == "flood_extent" else "shielded low ground"
    return write_geopackage_layer(
        path.with_suffix(".gpkg"), shapes, attributes, crs=source.grid, layer=name,
        geometry_type="MultiPolygon",
        description=f"Ground {what} at water level {level_text(level)} {unit.value} "
                    f"({len(shapes)} feature; area in m2, volume in m3).",
    )


# --------------------------------------------------------------------------- tables


def stage_table_columns(table: StageTable) -> dict[str, np.ndarray]:
    """The stage table with units in the column names, in file order.

    ``level_{u}`` (float32, the vertical unit's suffix), flooded and shielded
    area in m² and ha and volume in m³; for sites in feet each area also in ft²
    and acres and each volume in acre-feet (43 560 international cubic feet,
    :data:`sillmark.units.ACRE_FOOT_M3`; :func:`sillmark.units.own_unit_columns`).
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
        cols.update(units.own_unit_columns(unit, area_m2=area, volume_m3=volume,
                                           area_name=f"{prefix}_area", volume_name=f"{prefix}_volume"))
    return cols


def write_stage_table_csv(source: "ResultSource", table: StageTable, path: str | os.PathLike) -> Path:
    """Write ``stage_table.csv``: the columns of :func:`stage_table_columns`, one row per level."""
    if VerticalUnit.parse(table.unit) is not source.unit:
        raise InvalidParameter(
            f"the stage table is in {VerticalUnit.parse(table.unit).value} but the site in "
            f"{source.unit.value}; compute the table with the site's vertical unit"
        )
    return csv_tables.write_table_csv(path, stage_table_columns(table))


_DEPRESSION_STATE_NOTE = (
    f"state: '{DEPRESSION_DRY}' (level at or below the pit), '{DEPRESSION_CUT_OFF}' "
    f"(level between pit and spill elevation, no surface path reaches it), "
    f"'{DEPRESSION_OVERTOPPED}' (level at or above the spill elevation, filled from the outlets)"
)


def write_depressions_at_csv(source: "ResultSource", level, path: str | os.PathLike) -> Path:
    """Write ``depressions_at_{h}.csv``: every depression's state and freeboard at ``level``.

    Columns: ``id``, ``state`` (:func:`sillmark.products.stage.depression_states`),
    ``freeboard_{u}`` (spill elevation minus level; negative once overtopped),
    ``pit_elevation_{u}``, ``spill_elevation_{u}``, ``max_depth_{u}``,
    ``spills_to``, ``spill_lon_deg``, ``spill_lat_deg``, ``area_m2``,
    ``area_ha``, ``volume_m3`` (storage at the spill elevation; plus
    ``area_ft2``, ``area_acres`` and ``volume_acre_ft`` for sites in feet), as
    in ``depressions.csv``.
    """
    unit = source.unit
    v = units.unit_suffix(unit)
    states, freeboard = depression_states(source, level)
    table = source.depression_columns
    cols: dict[str, np.ndarray] = {
        "id": table["id"],
        "state": np.asarray(states, dtype=str),
        f"freeboard_{v}": freeboard,
    }
    for name in (f"pit_elevation_{v}", f"spill_elevation_{v}", f"max_depth_{v}", "spills_to",
                 "spill_lon_deg", "spill_lat_deg", "area_m2", "area_ha", "volume_m3",
                 "area_ft2", "area_acres", "volume_acre_ft"):
        if name in table:
            cols[name] = table[name]
    return csv_tables.write_table_csv(path, cols)


# --------------------------------------------------------------------------- one level, all levels


@dataclasses.dataclass(frozen=True)
class LevelFiles:
    """What :func:`write_level` wrote for one level, with the figures to report."""

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


def _out_folder(out_dir: str | os.PathLike) -> Path:
    out = Path(out_dir)
    if out.exists() and not out.is_dir():
        raise InvalidParameter(f"the output path {out} is a file; give a folder (new or existing)")
    out.mkdir(parents=True, exist_ok=True)
    return out


def _outline_window(source: "ResultSource", window: int | None) -> int:
    if window is not None:
        return window
    return max(source.grid.shape) if isinstance(source, ArraySource) else DEFAULT_WINDOW


def write_level(source: "ResultSource", level, out_dir: str | os.PathLike, *,
                window: int | None = None, progress: geotiff.Progress | None = None,
                vector_format: str = "geojson") -> LevelFiles:
    """Write the five files of one water level into ``out_dir`` (see :func:`level_file_names`),
    and an SLD style beside each map layer (:mod:`sillmark.io.styles`).

    Parameters
    ----------
    source : ResultSource
        A result in memory (:class:`sillmark.products.source.ArraySource`) or a
        results folder (:func:`sillmark.io.results_folder.open_result_folder`).
    level : float
        Outlet water level in the site's vertical unit (compared at float32 precision).
    out_dir : path
        Created if missing; files of these names are replaced, nothing else is touched.
    window : int, optional
        Side of the windows the outlines are traced in (default: the whole grid
        in memory, :data:`sillmark.products.outlines.DEFAULT_WINDOW` on disk).
    progress : callable, optional
        ``progress(file_name, done, total)``.
    vector_format : {"geojson", "gpkg", "auto"}
        Of the flooded and shielded outlines (:mod:`sillmark.io.vector_layers`;
        ``"auto"`` by their number of polygon parts). A GeoPackage replaces the
        ``.geojson`` of :func:`level_file_names` under the same stem.

    Notes
    -----
    The rasters are classified block by block (:class:`sillmark.products.stage.LevelBlocks`)
    as they are written; the outlines are traced from the written
    ``water_state_{h}.tif``. Memory: a block of :data:`sillmark.io.geotiff.BLOCK_ROWS`
    rows, one outline window, and the outlines.
    """
    grid = source.grid
    crs.horizontal_crs(grid)  # fail before writing anything if there is no CRS
    unit = source.unit
    h = checked_level(level)
    folder = _out_folder(out_dir)
    kind = getattr(source, "level_kind", "")
    names = level_file_names(h, unit, kind=kind)
    blocks = level_blocks(source, h)
    depth_path = _write_depth(source, blocks, folder / names.depth, progress)
    state_path = _write_water_state(source, blocks, folder / names.water_state, progress)
    flooded_area, flooded_volume, shielded_area, shielded_volume = blocks.totals
    size = _outline_window(source, window)

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
            source, float(h), (flooded_area, flooded_volume), state_path,
            folder / names.flood_extent, FLOODED, "flood_extent", size, vector_format)),
        step(names.shielded, lambda: _write_class_geojson(
            source, float(h), (shielded_area, shielded_volume), state_path,
            folder / names.shielded, SHIELDED, "shielded", size, vector_format)),
    )
    if not kind:  # depressions belong to one water level across the site
        paths += (step(names.depressions, lambda: write_depressions_at_csv(
            source, float(h), folder / names.depressions)),)
    styled = [p for p in paths if styles.layer_kind(p.name) is not None]
    paths += tuple(step(styles.style_path(p).name, lambda p=p: styles.write_style(p, unit))
                   for p in styled)
    states, _ = depression_states(source, h)
    return LevelFiles(
        level=float(h), unit=unit, paths=paths,
        flooded_area_m2=flooded_area, flooded_volume_m3=flooded_volume,
        shielded_area_m2=shielded_area, shielded_volume_m3=shielded_volume,
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
    source: "ResultSource",
    out_dir: str | os.PathLike,
    *,
    levels: Sequence = (),
    table_levels=None,
    window: int | None = None,
    progress: geotiff.Progress | None = None,
    vector_format: str = "geojson",
) -> StageFiles:
    """Write the files of every level in ``levels`` and, if ``table_levels`` is
    given, ``stage_table.csv`` at those levels (e.g. from :func:`sillmark.products.stage.stage_levels`).

    Levels equal at float32 precision are written once; levels are written in
    ascending order. ``vector_format`` as for :func:`write_level`.
    """
    crs.horizontal_crs(source.grid)
    unique = unique_levels(levels) if len(levels) else np.empty(0, np.float32)
    if table_levels is not None:
        table_levels = unique_levels(table_levels)
    if not len(unique) and table_levels is None:
        raise InvalidParameter("give at least one water level or the levels of a stage table")
    folder = _out_folder(out_dir)
    vector_layers.vector_suffix(vector_format, 0)  # an unknown format fails before any work
    written = tuple(write_level(source, h, folder, window=window, progress=progress,
                                vector_format=vector_format) for h in unique)
    table = table_path = None
    if table_levels is not None:
        if progress is not None:
            progress(STAGE_TABLE_NAME, 0, 1)
        table = stage_table(source, table_levels)
        table_path = write_stage_table_csv(source, table, folder / STAGE_TABLE_NAME)
        if progress is not None:
            progress(STAGE_TABLE_NAME, 1, 1)
    return StageFiles(levels=written, table=table, table_path=table_path)
