"""Result files of the spill engine: GeoTIFF rasters, a CSV table, GeoJSON and a summary.

:func:`write_results` writes everything a site run produces into one folder:

==========================  ==========================================================
``onset_stage.tif``         float32, the onset stage in the site's vertical unit
``fill_depth.tif``          float32, onset stage minus elevation (0 outside depressions)
``depression_id.tif``       int32, depression of each cell (0 = in no depression)
``flood_tree.tif``          uint8, flood-tree codes (see :mod:`sillmark.engine.flood`)
``depressions.csv``         one row per listed depression, units in the column names
``depressions.geojson``     one (Multi)Polygon per listed depression, WGS84 lon/lat
                            (``.gpkg`` in the DEM's CRS for large sets, see
                            :mod:`sillmark.io.vector_layers`)
``spill_points.geojson``    one Point per listed depression at its spill cell centre
                            (``.gpkg`` likewise)
``depression_hierarchy.*``  the nested depressions, ``.csv`` and ``.json`` (see
                            :mod:`sillmark.io.hierarchy_files`, written by
                            :func:`sillmark.io.hierarchy_writer.write_hierarchy_files`)
``depression_curves.csv``   stage–area and stage–storage of every hierarchy node
``README.txt``              what each file holds, units, datum, minimum, caution
``summary.json``            grid, outlets, totals, version, time and the list of files
==========================  ==========================================================

Which depressions are listed: every one, unless a significance minimum is
given (:mod:`sillmark.products.significance`). Then the tables and layers list
the depressions whose whole region reaches the minimum, the curves file the
significant nodes of the hierarchy, and ``summary.json`` and ``README.txt`` say
the minimum, its source and the counts; with ``full_inventory`` every
depression is listed still, marked ``significant`` or not. The rasters, areas
and volumes are exact either way.

Nodata: the float rasters use NaN (the IEEE value, declared as the GeoTIFF nodata)
on DEM nodata and on cells no outlet reaches. ``depression_id.tif`` uses -1 there,
so that 0 keeps its meaning "valid cell in no depression". ``flood_tree.tif`` uses
0, which is already the code for "no parent" (nodata or unreached).

Every file carries :data:`sillmark.SCREENING_CAUTION` where its format has a
place for it: as GeoTIFF tags (``SILLMARK_CAUTION``), as a property of every
GeoJSON feature, in a GeoPackage's metadata and as a member of the summary; the
CSV tables start with their header row, so the caution is in ``README.txt``. The formats themselves live in
:mod:`sillmark.io.geotiff`, :mod:`sillmark.io.csv_tables`,
:mod:`sillmark.io.geojson` and :mod:`sillmark.io.summary`; every file is written
atomically (:mod:`sillmark.io.atomic`).
"""

from __future__ import annotations

import concurrent.futures
import threading
import dataclasses
import os
from collections.abc import Callable
from pathlib import Path
from typing import TYPE_CHECKING

from sillmark.errors import InvalidParameter
from sillmark.grid.crs import horizontal_crs
from sillmark.io.csv_tables import write_depression_table_csv
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
from sillmark.io.readme import README_NAME, write_readme
from sillmark.io.summary import FILE_NAMES, significance_member, write_summary
from sillmark.io.vector_layers import write_depression_layer, write_spill_point_layer
from sillmark.products.hierarchy_windows import whole_hierarchy
from sillmark.products.significance import SiteMinimum, significance
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
    significance: dict | None = None


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
    minimum: SiteMinimum | None = None,
    accuracy_stated: bool = False,
    full_inventory: bool = False,
    vector_format: str = "geojson",
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
    minimum : SiteMinimum, optional, keyword-only
        The significance minimum (:func:`sillmark.products.significance.site_minimum`);
        None lists every depression and writes no significance.
    accuracy_stated : bool, keyword-only
        The minimum's vertical accuracy was given by the user (said in the summary).
    full_inventory : bool, keyword-only
        With a minimum: still list and map every depression, with a
        ``significant`` column.
    vector_format : {"geojson", "gpkg", "auto"}, keyword-only
        Of the outline and spill-point layers (:mod:`sillmark.io.vector_layers`).

    Returns
    -------
    ResultFiles
        The paths in the order of :data:`FILE_NAMES` (the layers under the
        suffix written), ``README.txt`` before ``summary.json``, the hierarchy's
        counts and the ``significance`` member of the summary (None without a
        minimum).

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

    if progress is not None:
        progress = _one_at_a_time(progress)

    def step(name: str, writer: Callable[[], Path]) -> Path:
        if progress is not None:
            progress(name, 0, 1)
        written = writer()
        if progress is not None:
            progress(name, 1, 1)
        return written

    with concurrent.futures.ThreadPoolExecutor(2, thread_name_prefix="sillmark-write") as pool:
        # The four rasters are written on a thread of their own while this one
        # builds the hierarchy and the tables, and the hierarchy files on another
        # beside the outlines: GDAL and the compiled kernels release the GIL, so
        # on two cores the steps overlap.
        rasters = pool.submit(lambda: [
            write_onset_stage(result, dem, out / FILE_NAMES[0], progress=progress),
            write_fill_depth(result, dem, out / FILE_NAMES[1], progress=progress),
            write_depression_ids(result, dem, out / FILE_NAMES[2], progress=progress),
            write_flood_tree(result, dem, out / FILE_NAMES[3], progress=progress),
        ])
        try:
            return _write_tables(result, dem, outlets, out, step, progress, rasters, pool,
                                 minimum=minimum, accuracy_stated=accuracy_stated,
                                 full_inventory=full_inventory, vector_format=vector_format)
        except BaseException:
            rasters.cancel()
            raise


def _one_at_a_time(progress: Progress) -> Progress:
    """``progress`` behind a lock: the raster thread and this one both report."""
    lock = threading.Lock()

    def report(name: str, done: int, total: int) -> None:
        with lock:
            progress(name, done, total)

    return report


def _write_tables(result, dem, outlets, out: Path, step, progress, rasters, pool, *, minimum,
                  accuracy_stated, full_inventory, vector_format) -> ResultFiles:
    """Every file but the four rasters (``rasters``, a future of their paths); the
    hierarchy files on ``pool`` beside the tables and outlines."""
    source = ArraySource(dem, result)
    rows = listed = extra = member = built = None
    if minimum is not None:
        step_name = "significance"
        if progress is not None:
            progress(step_name, 0, 1)
        built = whole_hierarchy(source)  # built once: for significance and the writer
        sig = significance(built[0], minimum)
        whole = sig.depression_to_significant[1:] > 0  # engine depressions listed as a whole
        member = significance_member(sig, all_depressions=len(result.depressions),
                                     accuracy_stated=accuracy_stated,
                                     full_inventory=full_inventory)
        if full_inventory:
            extra = {"significant": whole}
        else:
            rows, listed = whole, sig.significant
        del sig
        if progress is not None:
            progress(step_name, 1, 1)

    names = HIERARCHY_FILE_NAMES

    def hierarchy_step(step: str, done: int, total: int) -> None:
        # One file after another, as for the other files.
        if progress is None or step != "hierarchy_write":
            return
        if done > 0:
            progress(names[done - 1], 1, 1)
        if done < total:
            progress(names[done], 0, 1)

    hierarchy_files = pool.submit(write_hierarchy_files, source, out, progress=hierarchy_step,
                                  listed=listed, hierarchy=built)
    del built
    paths = [
        step(FILE_NAMES[4], lambda: write_depression_table_csv(
            result.depressions, dem, out / FILE_NAMES[4], rows=rows, extra=extra)),
        step(FILE_NAMES[5], lambda: write_depression_layer(
            source, out, rows=rows, extra=extra, vector_format=vector_format)),
        step(FILE_NAMES[6], lambda: write_spill_point_layer(
            result.depressions, dem, out, rows=rows, vector_format=vector_format)),
    ]
    written = hierarchy_files.result()
    paths = rasters.result() + paths + written.files
    summary_name = FILE_NAMES[-1]
    paths.append(step(README_NAME, lambda: write_readme(
        out, [p.name for p in paths] + [summary_name], grid=dem,
        title=f"analysis of {Path(dem.path).name if getattr(dem, 'path', None) else 'a DEM'}",
        connectivity=result.connectivity, significance=member)))
    paths.append(
        step(
            summary_name,
            lambda: write_summary(result, dem, outlets, out / summary_name,
                                  files=[p.name for p in paths], significance=member,
                                  curves=curves_summary(written)),
        )
    )
    return ResultFiles(paths=paths, hierarchy=written, significance=member)


