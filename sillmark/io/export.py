"""Result files of the spill engine: GeoTIFF rasters, a CSV table, GeoJSON and a summary.

:func:`write_results` writes everything a site run produces into one folder:

==========================  ==========================================================
``onset_stage.tif``         float32, the onset stage in the site's vertical unit
``fill_depth.tif``          float32, onset stage minus elevation (0 outside depressions)
``depression_id.tif``       int32, depression of each cell (0 = in no depression)
``flood_tree.tif``          uint8, flood-tree codes (see :mod:`sillmark.engine.flood`)
``depressions.csv``         one row per depression, units in the column names
``depressions.geojson``     one (Multi)Polygon per depression, WGS84 lon/lat
``spill_points.geojson``    one Point per depression at its spill cell centre, WGS84
``depression_hierarchy.*``  the nested depressions, ``.csv`` and ``.json`` (see
                            :mod:`sillmark.io.hierarchy_files`, written by
                            :func:`sillmark.io.hierarchy_writer.write_hierarchy_files`)
``depression_curves.csv``   stage–area and stage–storage of every hierarchy node
``summary.json``            grid, outlets, totals, version, time and the list of files
==========================  ==========================================================

Nodata: the float rasters use NaN (the IEEE value, declared as the GeoTIFF nodata)
on DEM nodata and on cells no outlet reaches. ``depression_id.tif`` uses -1 there,
so that 0 keeps its meaning "valid cell in no depression". ``flood_tree.tif`` uses
0, which is already the code for "no parent" (nodata or unreached).

Every file carries :data:`sillmark.SCREENING_CAUTION`: as GeoTIFF tags
(``SILLMARK_CAUTION``), as ``#`` comment lines of the CSV, as a property of every
GeoJSON feature and as a member of the summary. The formats themselves live in
:mod:`sillmark.io.geotiff`, :mod:`sillmark.io.csv_tables`,
:mod:`sillmark.io.geojson` and :mod:`sillmark.io.summary`; every file is written
atomically (:mod:`sillmark.io.atomic`).
"""

from __future__ import annotations

import dataclasses
import os
from collections.abc import Callable
from pathlib import Path
from typing import TYPE_CHECKING

from sillmark.errors import InvalidParameter
from sillmark.grid.crs import horizontal_crs
from sillmark.io.csv_tables import write_depressions_csv
from sillmark.io.geojson import write_depressions_geojson, write_spill_points_geojson
from sillmark.io.geotiff import (
    Progress,
    check_result_grid,
    write_depression_ids,
    write_fill_depth,
    write_flood_tree,
    write_onset_stage,
)
from sillmark.io.hierarchy_files import HIERARCHY_FILE_NAMES
from sillmark.io.hierarchy_writer import (
    HierarchyFiles,
    curves_summary,
    write_hierarchy_files,
)
from sillmark.io.summary import FILE_NAMES, write_summary
from sillmark.products.source import ArraySource

if TYPE_CHECKING:  # pragma: no cover
    from sillmark.engine.flood import SpillResult
    from sillmark.grid.dem import DEM
    from sillmark.grid.outlets import Outlets

__all__ = ["ResultFiles", "write_result_files", "write_results"]


# --------------------------------------------------------------------------- all


@dataclasses.dataclass(frozen=True)
class ResultFiles:
    """What :func:`write_result_files` wrote: the paths in the order of
    :data:`FILE_NAMES`, and the counts of the depression hierarchy it wrote."""

    paths: list
    hierarchy: HierarchyFiles


def write_results(
    result: "SpillResult",
    dem: "DEM",
    outlets: "Outlets",
    out_dir: str | os.PathLike,
    *,
    progress: Progress | None = None,
) -> list[Path]:
    """:func:`write_result_files`, returning the paths only."""
    return write_result_files(result, dem, outlets, out_dir, progress=progress).paths


def write_result_files(
    result: "SpillResult",
    dem: "DEM",
    outlets: "Outlets",
    out_dir: str | os.PathLike,
    *,
    progress: Progress | None = None,
) -> ResultFiles:
    """Write every result file of one site run into ``out_dir``.

    The folder is created if missing. Files of the names in :data:`FILE_NAMES`
    are replaced; nothing else in the folder is touched. ``summary.json`` comes
    last, so its presence means the set is complete.

    Parameters
    ----------
    result : SpillResult
        From :func:`sillmark.engine.flood.analyse_site` on ``dem`` and ``outlets``.
    dem : DEM
    outlets : Outlets
    out_dir : path
    progress : callable, optional, keyword-only
        ``progress(file_name, done, total)``, see :data:`Progress`.

    Returns
    -------
    ResultFiles
        The paths in the order of :data:`FILE_NAMES`, and the hierarchy's counts.

    Raises
    ------
    InvalidDEM
        If the DEM has no CRS.
    InvalidParameter
        If the result does not belong to the DEM, or ``out_dir`` is not a folder.
    OSError
        If the folder cannot be created or written.

    Notes
    -----
    Memory: one block of :data:`BLOCK_ROWS` rows per raster, a boolean mask of
    the grid while outlining depressions, and the outlines themselves; the
    depression hierarchy, built in one window of the grid (see
    :func:`sillmark.io.hierarchy_writer.write_hierarchy_files`).
    """
    check_result_grid(result, dem)
    horizontal_crs(dem)  # fail before writing anything if there is no CRS
    out = Path(out_dir)
    if out.exists() and not out.is_dir():
        raise InvalidParameter(f"the output path {out} is a file; give a folder (new or existing)")
    out.mkdir(parents=True, exist_ok=True)

    def step(name: str, writer: Callable[[], Path]) -> Path:
        if progress is not None:
            progress(name, 0, 1)
        written = writer()
        if progress is not None:
            progress(name, 1, 1)
        return written

    paths = [
        write_onset_stage(result, dem, out / FILE_NAMES[0], progress=progress),
        write_fill_depth(result, dem, out / FILE_NAMES[1], progress=progress),
        write_depression_ids(result, dem, out / FILE_NAMES[2], progress=progress),
        write_flood_tree(result, dem, out / FILE_NAMES[3], progress=progress),
        step(FILE_NAMES[4], lambda: write_depressions_csv(result, dem, out / FILE_NAMES[4])),
        step(FILE_NAMES[5], lambda: write_depressions_geojson(ArraySource(dem, result), out / FILE_NAMES[5])),
        step(FILE_NAMES[6], lambda: write_spill_points_geojson(result, dem, out / FILE_NAMES[6])),
    ]
    names = HIERARCHY_FILE_NAMES

    def hierarchy_step(step: str, done: int, total: int) -> None:
        # One file after another, as for the other files.
        if progress is None or step != "hierarchy_write":
            return
        if done > 0:
            progress(names[done - 1], 1, 1)
        if done < total:
            progress(names[done], 0, 1)

    written = write_hierarchy_files(ArraySource(dem, result), out, progress=hierarchy_step)
    paths.extend(written.files)
    summary_name = FILE_NAMES[-1]
    paths.append(
        step(
            summary_name,
            lambda: write_summary(result, dem, outlets, out / summary_name, files=[p.name for p in paths],
                                  curves=curves_summary(written)),
        )
    )
    return ResultFiles(paths=paths, hierarchy=written)


