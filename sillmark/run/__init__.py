"""Analyse a site: run the engine once and write every result file once.

:func:`analyse` is the one entry the command line (``sillmark analyse``, in
memory and with ``--tiles``), the web worker and the web app's large-DEM path
call. It runs the Priority-Flood pipeline (:mod:`sillmark.engine.pipeline`;
Barnes, Lehman & Mulla 2014, tiled after Barnes 2016) with the executor and
store it is given, then writes the result files with the writers of
:mod:`sillmark.io` and :mod:`sillmark.products`:

- a DEM held in memory (:class:`sillmark.grid.dem.DEM`): the rasters, tables,
  outlines and hierarchy of the in-memory result
  (:func:`sillmark.io.export.write_result_files`, the outlines and the
  hierarchy on the result's arrays in one window);
- a DEM file read tile by tile: each raster block by block from the store, the
  table, the spill points, then the outlines and the hierarchy from the
  folder, window by window (:func:`sillmark.io.results_folder.add_depression_outlines`,
  :func:`sillmark.io.results_folder.add_hierarchy_files`).

The outlines and the hierarchy are the same writers either way, against a
result source (:mod:`sillmark.products.source`).

Either way the files are written into a temporary folder inside ``out`` and
moved into place at the end, ``summary.json`` last (an older ``summary.json``
is removed first), so a failure leaves no partial set and keeps what was
there; the tile scratch of a file store lives in that temporary folder too.

References
----------
Barnes, R., Lehman, C., Mulla, D. (2014). Priority-flood: An optimal
depression-filling and watershed-labeling algorithm for digital elevation
models. Computers & Geosciences 62, 117-127. doi:10.1016/j.cageo.2013.04.024
Barnes, R. (2016). Parallel priority-flood depression filling for trillion cell
digital elevation models on desktops or clusters. Computers & Geosciences 96,
56-68. doi:10.1016/j.cageo.2016.07.001
"""

from __future__ import annotations

import dataclasses
import functools
import os
import shutil
import time
import uuid
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np

from sillmark.engine.culverts import CulvertEdges, culvert_edges
from sillmark.engine.depressions import DepressionTable, directions
from sillmark.engine.executors import Executor, ThreadExecutor
from sillmark.engine.flood import DEFAULT_TILE_SIZE as MEMORY_TILE_SIZE
from sillmark.engine.flood import SpillResult, priority_flood
from sillmark.engine.pipeline import TiledFlood, run_pipeline
from sillmark.engine.plan import TilePlan
from sillmark.engine.stores import FileStore, MemoryStore
from sillmark.engine.tile_inputs import RasterTiles
from sillmark.errors import InvalidParameter
from sillmark.grid.dem import DEM
from sillmark.grid.dem_grid import read_dem_grid
from sillmark.grid.edits import Edits, edited_grid, read_edits
from sillmark.grid.outlet_plan import plan_outlets
from sillmark.grid.outlets import Outlets, build_outlets, outlet_specs
from sillmark.grid.profiles import read_profile
from sillmark.io.csv_tables import write_depression_table_csv
from sillmark.io.export import write_result_files
from sillmark.io.geotiff import DEPRESSION_ID_NODATA, RESULT_LAYERS, write_result_layer
from sillmark.io.hierarchy_writer import curves_summary
from sillmark.io.reach_files import INPUT_COPIES, add_to_summary, keep_input
from sillmark.io.readme import README_NAME, write_readme
from sillmark.io.results_folder import add_depression_outlines, add_hierarchy_files
from sillmark.io.styles import write_styles
from sillmark.io.summary import (
    FILE_NAMES,
    RUN_FOLDER_PREFIX,
    file_rank,
    significance_counts_member,
    write_table_summary,
)
from sillmark.io.vector_layers import vector_suffix, write_spill_point_layer
from sillmark.products.inventory import table_columns
from sillmark.products.significance import SiteMinimum
from sillmark.run.reach import (
    add_reach_layers,
    add_tiled_cutoff,
    add_tiled_offset,
    read_reach,
    with_centreline,
)
from sillmark.units import unit_of

__all__ = ["STORES", "TILED_FILE_NAMES", "TILED_TILE_SIZE", "Analysis", "analyse"]

#: Where tiles may be kept: in this process, or in scratch files every worker reaches.
STORES = ("memory", "files")
#: Default tile side for a DEM read tile by tile. A 2048 x 2048 tile keeps a
#: task near 100 MB, and floods about 1.4 times faster per cell than a 4096 x
#: 4096 tile (measured on the terrain of bench/bench_tiled.py).
TILED_TILE_SIZE = 2048
#: Files the engine's own step writes for a DEM read tile by tile, in order
#: (the outlines and the hierarchy follow, from the folder).
TILED_FILE_NAMES = (
    "onset_stage.tif",
    "fill_depth.tif",
    "depression_id.tif",
    "flood_tree.tif",
    "depressions.csv",
    "spill_points.geojson",
    "summary.json",
)
_TEMPORARY_PREFIX = RUN_FOLDER_PREFIX
_LAYER_FILES = dict(zip(RESULT_LAYERS, FILE_NAMES[:4]))

#: ``progress(step, done, total)``: engine steps "flood", "graph", "finish",
#: "join", "totals", then "write", "outlines" and the hierarchy's steps, or the
#: file names of an in-memory write.
Progress = Callable[[str, int, int], None]


@dataclasses.dataclass(frozen=True)
class Analysis:
    """What :func:`analyse` computed and wrote.

    Attributes
    ----------
    depressions : DepressionTable
    connectivity : int
    shape : (int, int)
    tile_size, tiles : int
    valid_cells, unreached_cells, outlet_cells : int
    outlet_sources : tuple of str
    heap_pops : int
    files : list of Path
        Every file written, in the order of :data:`sillmark.io.export.FILE_NAMES`.
    seconds : dict
        Wall time of the engine's steps and of the writing.
    result : SpillResult or None
        The whole result, for a DEM held in memory.
    hierarchy : object
        The depression hierarchy written (in memory, or the tiled summary of it).
    grid : DEM or DEMGrid
        The grid the files describe (with the edits in place, for a DEM in memory).
    reach : object or None
        With a profile or refuges: ``profile`` (what summary.json records of
        it) and ``cutoff`` (the :class:`~sillmark.products.cutoff.CutOff`, in memory).
    significance : dict or None
        The ``significance`` member of ``summary.json`` (minimum, source,
        counts); None when every depression was listed without a minimum.
    edits : Edits or None
        The edits the DEM was analysed with.
    edit_changes : list of int or None
        Per edit, the cells it changed (0 for a culvert).
    """

    depressions: DepressionTable
    connectivity: int
    shape: tuple[int, int]
    tile_size: int
    tiles: int
    valid_cells: int
    unreached_cells: int
    outlet_cells: int
    outlet_sources: tuple[str, ...]
    heap_pops: int
    files: list
    seconds: dict
    result: SpillResult | None
    hierarchy: Any
    grid: Any
    reach: Any = None
    significance: dict | None = None
    edits: Edits | None = None
    edit_changes: list | None = None


def analyse(
    dem: DEM | str | os.PathLike,
    outlets: Outlets | Any,
    out: str | os.PathLike,
    *,
    executor: Executor | None = None,
    store: str = "memory",
    tile_size: int | None = None,
    connectivity: int = 8,
    band: int | None = None,
    vertical_unit: Any = None,
    crs: Any = None,
    progress: Progress | None = None,
    derived: bool = True,
    window_cells: int | None = None,
    minimum: SiteMinimum | None = None,
    accuracy_stated: bool = False,
    full_inventory: bool = False,
    vector_format: str = "geojson",
    profile: Any = None,
    refuges: Any = None,
    roads: Any = None,
    edits: Any = None,
) -> Analysis:
    """Analyse a DEM and write every result file into ``out``.

    Parameters
    ----------
    dem : DEM or path
        A DEM held in memory, or a DEM file read tile by tile (every worker of
        the executor must reach it).
    outlets : Outlets or sequence
        The outlet mask on the DEM's grid (a DEM in memory only), or outlet
        sources as for :func:`sillmark.grid.outlets.build_outlets`.
    out : path
        Output folder, created if missing; files of other names in it are kept.
    executor : Executor, optional
        Runs the tile steps (and, for a DEM file, the writing); default
        threads in this process.
    store : {"memory", "files"}
        Where tiles are kept between the steps; ``"files"`` keeps them in
        scratch files inside ``out`` (needed on a cluster).
    tile_size : int, optional
        Side of the tiles (default 512 in memory, :data:`TILED_TILE_SIZE` for a
        DEM file).
    connectivity : {8, 4}
    band, vertical_unit, crs
        For a DEM file, as for :func:`sillmark.grid.dem_grid.read_dem_grid`.
    progress : callable, optional
        ``progress(step, done, total)``.
    derived : bool
        For a DEM file: also write the depression outlines and the hierarchy
        files from the folder (default). Without them the folder holds
        :data:`TILED_FILE_NAMES`, to which
        :func:`sillmark.io.results_folder.add_depression_outlines` and
        :func:`sillmark.io.results_folder.add_hierarchy_files` add.
    window_cells : int, optional
        For a DEM file: the most cells of one window of depressions the
        hierarchy is built in (default
        :data:`sillmark.products.hierarchy_windows.DEFAULT_WINDOW_CELLS`); the
        hierarchy's memory grows with it, not with the DEM.
    profile : path or GeoJSON dict, optional
        A river's water-surface profile (:mod:`sillmark.grid.profiles`): its
        centreline also serves as an outlet, and ``onset_offset.tif`` and
        ``profile_level.tif`` are added (:mod:`sillmark.products.profile`).
    refuges, roads : path or GeoJSON dict, optional
        Refuges (points, polygons) add ``cutoff_stage.tif``
        (:mod:`sillmark.products.cutoff`); roads (lines) keep the routes to
        them on the road cells. In memory or by tiles alike.
    minimum : SiteMinimum, optional
        The significance minimum (:func:`sillmark.products.significance.site_minimum`):
        depressions below it are not listed or mapped on their own, and only the
        significant nodes get curves. A DEM read tile by tile decides it window
        by window of depressions while its hierarchy is built (needs
        ``derived``), with the same files as in memory. None lists every
        depression.
    accuracy_stated : bool
        The minimum's vertical accuracy was given by the user, not the default.
    full_inventory : bool
        With a minimum: list and map every depression still, marked ``significant``.
    vector_format : {"geojson", "gpkg", "auto"}
        Of the depression outlines and spill points of a DEM in memory
        (:mod:`sillmark.io.vector_layers`); the tiled path writes GeoJSON.

    edits : path, GeoJSON text, dict or Edits, optional
        Culverts, flap valves, barriers and breaches
        (:func:`sillmark.grid.edits.read_edits`). Barriers and breaches change
        a copy of the elevations, which the result files describe; culverts
        are extra edges of the flood graph. ``summary.json`` records them
        under ``edits``, and the folder keeps a copy of the file
        (``edits_input.geojson``). A DEM file read tile by tile gets the
        edited cells in every window it reads
        (:class:`sillmark.grid.edits.EditedDEMGrid`). With a ``profile``,
        barriers and breaches are taken and culverts refused (their invert is
        a level, not a height above the profile).

    Every run also writes ``README.txt`` (:mod:`sillmark.io.readme`).

    Returns
    -------
    Analysis

    Raises
    ------
    InvalidDEM, InvalidOutlets, InvalidParameter
        Bad input, before anything is written.
    OSError
        The folder cannot be written.
    """
    if store not in STORES:
        raise InvalidParameter(f"store must be one of {', '.join(STORES)}, not {store!r}")
    vector_suffix(vector_format, 0)  # refuse an unknown format before any work
    if minimum is not None and not isinstance(minimum, SiteMinimum):
        raise InvalidParameter(
            f"the minimum must come from site_minimum(), not {type(minimum).__name__}")
    if minimum is not None and not isinstance(dem, DEM) and not derived:
        raise InvalidParameter(
            "the significance minimum is decided on the depression hierarchy; a DEM read tile "
            "by tile takes it only with derived=True (the outlines and hierarchy written too)")
    executor = ThreadExecutor() if executor is None else executor
    if roads is not None and refuges is None:
        raise InvalidParameter("roads limit the routes to refuges; give the refuges with them")
    reach = None
    if isinstance(dem, DEM):
        reach = read_reach(dem, profile, refuges, roads)
        if reach.profile is not None:
            outlets = with_centreline(dem, outlets, reach.profile, connectivity)
    target = Path(out)
    if target.exists() and not target.is_dir():
        raise InvalidParameter(f"the output path {target} is a file; give a folder (new or existing)")
    target.mkdir(parents=True, exist_ok=True)
    temporary = target / f"{_TEMPORARY_PREFIX}{uuid.uuid4().hex[:12]}"
    temporary.mkdir()
    try:
        tiles = FileStore(temporary) if store == "files" else MemoryStore()
        try:
            if isinstance(dem, DEM):
                run = _analyse_in_memory(dem, outlets, temporary, executor, tiles, tile_size,
                                         connectivity, progress,
                                         dict(minimum=minimum, accuracy_stated=accuracy_stated,
                                              full_inventory=full_inventory,
                                              vector_format=vector_format), edits,
                                         profile=reach.profile is not None)
                run = add_reach_layers(run, reach, temporary, executor, progress)
            else:
                run = _analyse_by_tiles(dem, outlets, temporary, executor, tiles, tile_size,
                                        connectivity, band, vertical_unit, crs, progress,
                                        profile=profile, edits=edits, minimum=minimum,
                                        vector_format=vector_format)
                if derived:
                    run = _add_derived(run, temporary, executor, progress, window_cells,
                                       dict(minimum=minimum, accuracy_stated=accuracy_stated,
                                            full_inventory=full_inventory,
                                            vector_format=vector_format))
                if profile is not None:
                    run = add_tiled_offset(run, profile, temporary, executor, store,
                                            tile_size, connectivity, progress)
                if refuges is not None:
                    run = add_tiled_cutoff(run, refuges, roads, temporary, executor, store,
                                           connectivity, progress)
            run = _close_folder(_add_styles(_keep_edits(run, temporary)), temporary)
        finally:
            tiles.close()
        files = _move_into_place(temporary, target, [p.name for p in run.files])
    finally:
        shutil.rmtree(temporary, ignore_errors=True)
    return dataclasses.replace(run, files=files)


def _keep_edits(run: Analysis, folder: Path) -> Analysis:
    """A copy of the edits file beside the results (``edits_input.geojson``), so that
    later commands on the folder re-apply the same edits; nothing without edits, or
    for edits made in code (no file to copy)."""
    if run.edits is None or run.edits.document is None:
        return run
    copy = keep_input(run.edits.document, folder, "edits")
    summary = [p for p in run.files if p.name == FILE_NAMES[-1]]
    others = [p for p in run.files if p.name != FILE_NAMES[-1] and p.name != copy.name]
    return dataclasses.replace(run, files=[*others, copy, *summary])


def _add_styles(run: Analysis) -> Analysis:
    """An SLD style beside every raster and vector layer (:mod:`sillmark.io.styles`),
    listed before ``summary.json`` so the summary still comes last."""
    styles = write_styles(run.files, unit_of(run.grid))
    summary = [p for p in run.files if p.name == FILE_NAMES[-1]]
    others = [p for p in run.files if p.name != FILE_NAMES[-1]]
    return dataclasses.replace(run, files=[*others, *styles, *summary])


def _move_into_place(temporary: Path, target: Path, names: list[str]) -> list[Path]:
    """Move the written files into ``target``, ``summary.json`` last; return their paths.

    Nothing is moved when a file cannot go where it belongs (a folder of that
    name in ``target``), so a failure leaves ``target`` as it was.
    """
    blocked = [n for n in names if (target / n).is_dir()]
    if blocked:
        raise InvalidParameter(
            f"{target} holds a folder named {blocked[0]}, where a result file goes; move it "
            "away or give another output folder (nothing was written)")
    summary = FILE_NAMES[-1]
    (target / summary).unlink(missing_ok=True)
    for name in [n for n in names if n != summary] + [n for n in names if n == summary]:
        os.replace(temporary / name, target / name)
    return [target / name for name in names]


def _close_folder(run: Analysis, folder: Path) -> Analysis:
    """The last step: ``summary.json`` lists every file (and the edits), and
    ``README.txt`` describes every file, once all are written.

    Several steps add files after the first summary (the profile and cut-off
    rasters, the input copies, the SLD styles), so both are brought up to date
    here, in one place.
    """
    summary = folder / FILE_NAMES[-1]
    names = [p.name for p in run.files if p.name != summary.name]
    if README_NAME not in names:  # before the styles, as the in-memory writer places it
        styles = [k for k, n in enumerate(names) if n.endswith(".sld")]
        names.insert(styles[0] if styles else len(names), README_NAME)
    members = {} if run.edits is None else {"edits": _edits_member(run.edits, run.edit_changes)}
    add_to_summary(summary, names, **members)
    source = getattr(run.grid, "path", None)
    title = f"analysis of {Path(str(source)).name if source else 'a DEM'}"
    if run.result is None:
        title += " (tiled engine)" if run.significance else " (tiled engine, every depression listed)"
    readme = write_readme(folder, [*names, summary.name], grid=run.grid, title=title,
                          connectivity=run.connectivity, significance=run.significance)
    by_name = {p.name: p for p in run.files}
    by_name[README_NAME] = readme
    return dataclasses.replace(run, files=[*(by_name[n] for n in names), folder / summary.name])

def _placed_edits(edits: Any, grid: Any) -> Edits | None:
    if edits is None or isinstance(edits, Edits):
        if edits is not None and tuple(edits.shape) != tuple(grid.shape):
            raise InvalidParameter(f"the edits were placed on a grid of {edits.shape[0]} x "
                                   f"{edits.shape[1]} cells, not this DEM's")
        return edits
    return read_edits(edits, grid)


def _culverts(placed: Edits, shape, elevation=None) -> CulvertEdges | None:
    """The culverts of placed edits as extra edges of the flood graph (None without any)."""
    if not placed.culverts:
        return None
    return culvert_edges(shape, **placed.culvert_ends(), elevation=elevation)


def _edits_member(placed: Edits, changes: list[int] | None) -> dict:
    member = {"source": placed.source, "features": placed.summary(changes)}
    if placed.document is not None:  # the copy _keep_edits writes
        member["file"] = INPUT_COPIES["edits"]
    return member


def _check_profile_edits(placed: Edits | None, profile: bool) -> None:
    """Barriers and breaches change the ground the profile's offset is measured on,
    which both engines take; a culvert's invert is a level, not a height above the
    profile, so the offset has no edge for it: refused, in memory and by tiles alike."""
    if profile and placed is not None and placed.culverts:
        raise InvalidParameter(
            "the onset offset of a river profile does not take culverts (a culvert's invert "
            "is a level, not a height above the profile); run the profile with the barriers "
            "and breaches only, or the culverts without the profile (nothing was written)")


def _analyse_in_memory(dem, outlets, folder, executor, tiles, tile_size, connectivity,
                       progress, listing: dict, edits=None, profile: bool = False) -> Analysis:
    if not isinstance(outlets, Outlets):
        outlets = build_outlets(dem, tuple(outlets), connectivity=connectivity)
    placed = _placed_edits(edits, dem)
    _check_profile_edits(placed, profile)
    culverts = changes = None
    if placed is not None:
        # The engine and every file see the edited copy; the caller's DEM stays as it was.
        edited, changes = placed.apply(dem.elevation)
        culverts = _culverts(placed, dem.shape, edited)
        dem = dataclasses.replace(dem, elevation=edited)
    tile = MEMORY_TILE_SIZE if tile_size is None else tile_size
    t0 = time.perf_counter()
    result = priority_flood(dem.elevation, outlets.mask, connectivity=connectivity,
                            row_areas=dem.row_areas, transform=dem.transform, tile_size=tile,
                            executor=executor, store=tiles, culverts=culverts)
    seconds = {"engine": time.perf_counter() - t0}
    t0 = time.perf_counter()
    written = write_result_files(result, dem, outlets, folder, progress=progress, **listing)
    files, hierarchy = written.paths, written.hierarchy
    seconds["write"] = time.perf_counter() - t0
    rows, cols = dem.shape
    return Analysis(
        depressions=result.depressions, connectivity=int(connectivity), shape=(rows, cols),
        tile_size=int(tile), tiles=-(-rows // tile) * -(-cols // tile),
        valid_cells=int(np.count_nonzero(dem.valid)), unreached_cells=result.unreached_cells,
        outlet_cells=int(outlets.count), outlet_sources=tuple(outlets.sources),
        heap_pops=result.heap_pops, files=files, seconds=seconds, result=result,
        hierarchy=hierarchy, grid=dem, significance=written.significance, edits=placed,
        edit_changes=changes,
    )


def _analyse_by_tiles(dem_path, outlets, folder, executor, tiles, tile_size, connectivity, band,
                      vertical_unit, crs, progress, *, profile=None, edits=None,
                      minimum=None, vector_format: str = "geojson") -> Analysis:
    tile = TILED_TILE_SIZE if tile_size is None else tile_size
    TilePlan(rows=1, cols=1, tile=tile)  # refuse a bad tile size and connectivity first
    directions(connectivity)
    grid = read_dem_grid(dem_path, band=band, vertical_unit=vertical_unit, crs=crs)
    if minimum is not None and minimum.unit is not unit_of(grid):
        raise InvalidParameter(
            f"the minimum depth is in {minimum.unit.value} but the DEM's elevations are in "
            f"{unit_of(grid).value}; make it with site_minimum(unit={unit_of(grid).value!r}) "
            "(nothing was written)")
    placed = _placed_edits(edits, grid)
    changes = None
    if placed is not None:
        # Barriers and breaches: every window read from here on (the tiles, then the
        # outlines, the hierarchy and the exports) holds the edited cells.
        changes = placed.changes_on(grid.read_window, grid.shape[1])
        if len(placed.culverts) < len(placed):
            grid = edited_grid(grid, placed)
    _check_profile_edits(placed, profile is not None)
    if profile is not None:  # the centreline serves as an outlet too
        outlets = [*outlet_specs(outlets, connectivity), read_profile(profile, grid).as_outlet()]
    plan = plan_outlets(grid, outlets, connectivity=connectivity)
    flood = run_pipeline(RasterTiles(grid, plan), executor=executor, store=tiles,
                         tile_size=tile, connectivity=connectivity, row_areas=grid.row_areas,
                         transform=grid.transform, progress=progress,
                         check_outlets=lambda counts, all_valid: plan.check(
                             counts, all_valid=all_valid),
                         culverts=None if placed is None else _culverts(placed, grid.shape))
    seconds = dict(flood.seconds)

    def report(step: str, done: int, total: int) -> None:
        if progress is not None:
            progress(step, done, total)

    # The rasters and the spill points, one item each (the table with the ids).
    # With a significance minimum, the table and the spill points are written
    # once the hierarchy has decided which depressions are listed (_add_derived),
    # not here with every depression first and then again.
    t0 = time.perf_counter()
    tables = minimum is None
    order = ("depression_id", "onset_stage", "fill_depth", *(("spill_points",) if tables else ()),
             "flood_tree")
    report("write", 0, len(order))
    written = executor.map(functools.partial(_write_file, flood, grid, str(folder),
                                             tables=tables, vector_format=vector_format), order)
    report("write", len(order), len(order))
    files = sorted((Path(p) for paths in written for p in paths), key=lambda p: file_rank(p.name))
    engine = {"kind": "tiled", "tile_size": flood.tile_size, "tiles": flood.tiles}
    files.append(write_table_summary(
        flood.depressions, grid, folder / "summary.json", connectivity=connectivity,
        unreached_cells=flood.unreached_cells, valid_cells=flood.valid_cells,
        outlet_sources=plan.sources, outlet_count=flood.outlet_cells,
        files=[p.name for p in files], engine=engine,
    ))
    seconds["write"] = time.perf_counter() - t0
    return Analysis(
        depressions=flood.depressions, connectivity=int(connectivity), shape=grid.shape,
        tile_size=flood.tile_size, tiles=flood.tiles, valid_cells=flood.valid_cells,
        unreached_cells=flood.unreached_cells, outlet_cells=flood.outlet_cells,
        outlet_sources=plan.sources, heap_pops=flood.heap_pops, files=files, seconds=seconds,
        result=None, hierarchy=None, grid=grid, edits=placed, edit_changes=changes,
    )


def _add_derived(run: Analysis, folder: Path, executor, progress,
                 window_cells: int | None, listing: dict | None = None) -> Analysis:
    """The hierarchy and the outlines, from the folder window by window.

    With a significance minimum, the hierarchy comes first: each window of
    depressions decides its significant nodes (the same answer as the whole
    site's, since each tree is one depression), which gives the depressions
    listed as a whole. Then ``depressions.csv`` and ``spill_points.geojson``
    are written again with those rows (or with a ``significant`` column, for
    the full inventory), the outlines traced for them, and ``summary.json``
    gets the minimum and the counts: the files of the in-memory run.
    """
    listing = listing or {}
    minimum = listing.get("minimum")
    full_inventory = bool(listing.get("full_inventory"))
    vector_format = listing.get("vector_format", "geojson")
    grid = run.grid
    t0 = time.perf_counter()
    windows = {} if window_cells is None else {"window_cells": int(window_cells)}
    hierarchy = add_hierarchy_files(folder, map=executor, progress=progress, grid=grid,
                                    minimum=minimum, full_inventory=full_inventory,
                                    depressions=table_columns(run.depressions, grid), **windows)
    steps = {"hierarchy": time.perf_counter() - t0}
    t0 = time.perf_counter()
    rows = extra = member = None
    if minimum is not None:
        member = significance_counts_member(
            minimum, significant=hierarchy.significant, significant_top=hierarchy.significant_top,
            hierarchy_nodes=hierarchy.nodes, all_depressions=len(run.depressions),
            accuracy_stated=bool(listing.get("accuracy_stated")), full_inventory=full_inventory)
        if full_inventory:
            extra = {"significant": hierarchy.whole}
        else:
            rows = hierarchy.whole
        write_depression_table_csv(run.depressions, grid, folder / "depressions.csv", rows=rows,
                                   extra=extra)
        spill_points = write_spill_point_layer(run.depressions, grid, folder, rows=rows,
                                               vector_format=vector_format)
        replaced = {"depressions.csv", "spill_points.geojson", "spill_points.gpkg"}
        run = dataclasses.replace(run, files=[
            *(p for p in run.files if p.name not in replaced),
            folder / "depressions.csv", spill_points])
    steps["listed_tables"] = time.perf_counter() - t0
    t0 = time.perf_counter()
    if progress is not None:
        progress("outlines", 0, 1)
    files = add_depression_outlines(run, grid, folder, rows=rows, extra=extra, map=executor,
                                    vector_format=vector_format)
    if progress is not None:
        progress("outlines", 1, 1)
    steps["outlines"] = time.perf_counter() - t0
    t0 = time.perf_counter()
    names = {p.name: p for p in [*files, *hierarchy.files]}
    ordered = sorted(names.values(), key=lambda p: file_rank(p.name))
    summary = folder / FILE_NAMES[-1]
    write_table_summary(
        run.depressions, grid, summary, connectivity=run.connectivity,
        unreached_cells=run.unreached_cells, valid_cells=run.valid_cells,
        outlet_sources=run.outlet_sources, outlet_count=run.outlet_cells,
        files=[p.name for p in ordered if p.name != summary.name],
        engine={"kind": "tiled", "tile_size": run.tile_size, "tiles": run.tiles},
        significance=member, curves=curves_summary(hierarchy))
    steps["summary"] = time.perf_counter() - t0
    seconds = {**run.seconds, **steps,
               **{f"hierarchy_{k}": v for k, v in hierarchy.seconds.items()}}
    return dataclasses.replace(run, files=ordered, hierarchy=hierarchy, seconds=seconds,
                               significance=member)


def _write_file(flood: TiledFlood, grid, folder: str, what: str, *,
                tables: bool = True, vector_format: str = "geojson") -> list[str]:
    """Write one raster block by block from the store (the id raster's table beside it,
    with ``tables``), or the spill points (``.geojson`` or ``.gpkg`` by ``vector_format``);
    return the paths written."""
    out = Path(folder)
    if what == "spill_points":
        return [str(write_spill_point_layer(flood.depressions, grid, out,
                                            vector_format=vector_format))]
    if what == "depression_id":
        def block(r0: int, r1: int) -> np.ndarray:
            ids = flood.read("depression_id", r0, r1)
            ids[np.isnan(flood.read("onset_stage", r0, r1))] = DEPRESSION_ID_NODATA
            return ids
    else:
        def block(r0: int, r1: int) -> np.ndarray:
            return flood.read(what, r0, r1)
    paths = [str(write_result_layer(what, grid, out / _LAYER_FILES[what], block=block,
                                    connectivity=flood.connectivity,
                                    depression_count=(len(flood.depressions)
                                                      if what == "depression_id" else None)))]
    if what == "depression_id" and tables:
        paths.append(str(write_depression_table_csv(flood.depressions, grid,
                                                    out / "depressions.csv")))
    return paths
