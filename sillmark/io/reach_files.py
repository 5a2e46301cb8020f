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
