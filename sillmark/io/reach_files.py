"""Rasters of a sloped water-surface profile and of the cut-off stage.

``sillmark analyse --profile FILE`` adds two rasters to a results folder:

======================  =============================================================
``onset_offset.tif``    float32: the rise of the whole profile at which the cell first
                        gets wet (:mod:`sillmark.products.profile`); NaN on nodata and
                        on cells no path from the river reaches
``profile_level.tif``   float32: ``W0``, the profile's level at the centreline point
                        nearest the cell (:mod:`sillmark.grid.profiles`)
======================  =============================================================

and ``--refuge FILE`` adds ``cutoff_stage.tif`` (float32, the level at which the
cell's last dry route to a refuge goes under, :mod:`sillmark.products.cutoff`;
``+inf`` never cut off, ``-inf`` no route at all, NaN on nodata and off the roads).
They follow :mod:`sillmark.io.geotiff`: tiled, compressed, CRS kept, with the
caution and the vertical unit in their tags.
"""

from __future__ import annotations

import json
import os
from collections.abc import Callable
from pathlib import Path

import numpy as np

from sillmark.io.geotiff import FLOAT_NODATA, write_geotiff
from sillmark.io.json_values import write_json
from sillmark.units import unit_name, unit_of

__all__ = ["OFFSET_FILES", "CUTOFF_FILE", "write_offset_rasters", "write_cutoff_raster",
           "add_to_summary"]

#: The files ``--profile`` adds, in this order.
OFFSET_FILES = ("onset_offset.tif", "profile_level.tif")
#: The file ``--refuge`` adds.
CUTOFF_FILE = "cutoff_stage.tif"


def write_offset_rasters(grid, folder: str | os.PathLike, *,
                         offset: Callable[[int, int], np.ndarray],
                         reference: Callable[[int, int], np.ndarray],
                         profile_label: str) -> list[Path]:
    """Write :data:`OFFSET_FILES` from blocks of rows; return their paths."""
    unit = unit_of(grid)
    out = Path(folder)
    tags = {"PROFILE": os.path.basename(profile_label.strip("'\"")) or profile_label}
    return [
        write_geotiff(out / OFFSET_FILES[0], grid, dtype="float32", nodata=FLOAT_NODATA,
                      block=offset, layer="onset_offset", band_unit=unit_name(unit), extra_tags=tags,
                      description=f"onset offset: rise of the whole water-surface profile at which "
                      f"surface water first reaches the cell ({unit.symbol})"),
        write_geotiff(out / OFFSET_FILES[1], grid, dtype="float32", nodata=FLOAT_NODATA,
                      block=reference, layer="profile_level", band_unit=unit_name(unit),
                      extra_tags=tags,
                      description=f"profile level: design water level at the nearest point of the "
                      f"river's centreline ({unit.symbol})"),
    ]


def write_cutoff_raster(grid, folder: str | os.PathLike, *,
                        stage: Callable[[int, int], np.ndarray], roads: bool) -> Path:
    """Write :data:`CUTOFF_FILE` from blocks of rows; return its path."""
    unit = unit_of(grid)
    tags = {"CUTOFF_CODES": "+inf: never cut off; -inf: no dry route to a refuge at any level",
            "ROUTES": "along the roads given" if roads else "across any cell with data"}
    return write_geotiff(Path(folder) / CUTOFF_FILE, grid, dtype="float32", nodata=FLOAT_NODATA,
                         block=stage, layer="cutoff_stage", band_unit=unit_name(unit),
                         extra_tags=tags,
                         description=f"cut-off stage: water level at which the last dry route "
                         f"to a refuge goes under ({unit.symbol})")


def add_to_summary(path: str | os.PathLike, files: list[str], **members) -> Path:
    """Add ``files`` (before ``summary.json`` itself) and top-level ``members`` to a summary."""
    path = Path(path)
    payload = json.loads(path.read_text(encoding="utf-8"))
    listed = [f for f in payload.get("files", []) if f != path.name]
    listed += [f for f in files if f not in listed]
    payload["files"] = listed + [path.name]
    payload.update(members)
    return write_json(path, payload)


def cutoff_level_names(level, unit) -> tuple[str, str]:
    """Names of the cut-off ground files at one level.

    >>> cutoff_level_names(47.6, "m")
    ('cut_off_47.60m.tif', 'cut_off_47.60m.geojson')
    """
    from sillmark.io.stage_files import level_label

    h = level_label(level, unit)
    return f"cut_off_{h}.tif", f"cut_off_{h}.geojson"


#: Codes of ``cut_off_{h}.tif``.
CUT_OFF_CODES = "0 = not cut off (flooded, or a dry route to a refuge remains), 1 = cut off: " \
    "dry but every route to a refuge is under water, 255 = nodata or off the routes allowed"


def write_cutoff_level(grid, out_dir: str | os.PathLike, level, *,
                       cutoff_rows: Callable[[int, int], np.ndarray],
                       onset_rows: Callable[[int, int], np.ndarray],
                       connectivity: int, window: int | None = None) -> list[Path]:
    """Write the ground cut off at ``level``: ``cut_off_{h}.tif`` and ``cut_off_{h}.geojson``.

    A cell is cut off when its cut-off stage ``k`` and onset stage ``s``
    satisfy ``k <= h < s``: still dry, but its last dry route to a refuge is
    under water (:mod:`sillmark.products.cutoff`). ``cutoff_rows(r0, r1)`` and
    ``onset_rows(r0, r1)`` give rows of the two rasters (in memory or read from
    a folder). Memory: one block of rows, then one outline window.
    """
    from functools import partial

    from sillmark import SCREENING_CAUTION
    from sillmark.grid import crs
    from sillmark.io import geojson as geojson_files
    from sillmark.io.geotiff import read_window
    from sillmark.io.json_values import json_number
    from sillmark.products.outlines import DEFAULT_WINDOW, label_outlines
    from sillmark.products.stage import checked_level

    h = checked_level(level)
    unit = unit_of(grid)
    tif_name, geojson_name = cutoff_level_names(h, unit)
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    transformer = crs.wgs84_transformer(grid)  # fails before writing if there is no CRS
    areas = np.asarray(grid.row_areas, dtype=np.float64)
    total = [0.0]

    def block(r0: int, r1: int) -> np.ndarray:
        k = cutoff_rows(r0, r1)
        s = onset_rows(r0, r1)
        wet_at = np.where(np.isnan(s), np.float32(np.inf), s)
        island = (k <= h) & (h < wet_at)
        code = np.where(np.isnan(k), np.uint8(255), island.astype(np.uint8))
        total[0] += float(np.count_nonzero(island, axis=1) @ areas[r0:r1])
        return code

    from sillmark.io.stage_files import level_text

    tif = write_geotiff(out / tif_name, grid, dtype="uint8", nodata=255, block=block,
                        layer="cut_off", band_unit="",
                        description=f"ground cut off at water level {level_text(h)} {unit.symbol}: "
                        + CUT_OFF_CODES,
                        extra_tags={"WATER_LEVEL": level_text(h), "WATER_LEVEL_UNIT": unit.value,
                                    "CUT_OFF_CODES": CUT_OFF_CODES})

    def select(values: np.ndarray):
        return values == 1, values.astype(np.int32)

    size = window or min(max(grid.shape), DEFAULT_WINDOW)
    found = label_outlines(partial(read_window, tif), tuple(grid.shape), grid.transform, select,
                           window=size)
    polygon = found.get(1)
    properties = {"level": json_number(np.float32(h)), "unit": unit.value, "class": "cut off",
                  "area_m2": json_number(total[0]), "area_ha": json_number(total[0] / 1e4),
                  "caution": SCREENING_CAUTION}

    def features():
        if polygon is not None:
            yield {"type": "Feature", "id": "cut off", "properties": properties,
                   "geometry": geojson_files.wgs84_geometry(polygon, grid, transformer=transformer)}

    path = geojson_files.write_feature_collection(out / geojson_name,
                                                  {"name": "cut_off", **properties}, features())
    return [tif, path]


#: Copies of the inputs kept beside the results, so that later commands can use them.
INPUT_COPIES = {"profile": "profile_input.geojson", "refuges": "refuges_input.geojson",
                "roads": "roads_input.geojson", "edits": "edits_input.geojson"}


def keep_input(source, folder: str | os.PathLike, what: str) -> Path:
    """Copy an input GeoJSON (path, text or dict) into the folder as :data:`INPUT_COPIES`[what]."""
    import shutil

    from sillmark.io.atomic import atomic_output

    path = Path(folder) / INPUT_COPIES[what]
    if isinstance(source, dict):
        return write_json(path, source)
    if isinstance(source, str) and source.lstrip().startswith("{"):
        with atomic_output(path) as tmp:
            Path(tmp).write_text(source, encoding="utf-8")
        return path
    with atomic_output(path) as tmp:
        shutil.copyfile(os.fspath(source), tmp)
    return path
