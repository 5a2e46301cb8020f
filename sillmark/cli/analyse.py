"""``sillmark analyse``: read a DEM, mark its outlets, run the engine and write every
result file once (:func:`sillmark.run.analyse`), in memory or tile by tile on Dask.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
from pathlib import Path

from sillmark.cli.common import EXIT_OK
from sillmark.cli.reports import Progress, summary_lines


def site_from_dem(dem_path: str, args: argparse.Namespace, progress: Progress):
    """Read a DEM, mark its outlets and run the spill engine: the start of every command."""
    from sillmark.engine.flood import analyse_site

    dem, outlets, connectivity = _read_site(dem_path, args, progress)
    progress.start("flood")
    result = analyse_site(dem, outlets, connectivity=connectivity)
    progress.done()
    return dem, outlets, result


def _read_site(dem_path: str, args: argparse.Namespace, progress: Progress):
    """Read a DEM and mark its outlets; return them and the connectivity.

    The DEM is read by its absolute path, so that ``summary.json`` records a path
    that still leads to it from another working folder.
    """
    from sillmark.grid.dem import read_dem
    from sillmark.grid.outlets import build_outlets

    connectivity = 8 if args.connectivity is None else args.connectivity
    progress.start("read")
    options = {}
    if args.max_cells is not None:
        options["max_cells"] = args.max_cells
    dem = read_dem(os.path.abspath(dem_path), band=args.band, vertical_unit=args.vertical_unit,
                   crs=args.crs, **options)
    progress.done()
    progress.start("outlets")
    outlets = build_outlets(dem, tuple(args.outlets or ("edge",)), connectivity=connectivity)
    progress.done()
    return dem, outlets, connectivity


def site_from_folder(folder: Path, args: argparse.Namespace, progress: Progress):
    """The site of a folder written by ``sillmark analyse``, engine re-run and checked.

    ``summary.json`` gives the DEM's path, its vertical unit, CRS and grid, the
    outlet sources and the connectivity. The outlet cells are those of
    ``flood_tree.tif`` (code 9), whatever made them (the DEM edge, nodata, a
    GeoJSON file). The DEM is read again and the engine re-run on it with those
    outlets (a second or so for a few million cells), and the onset stage
    compared cell by cell with ``onset_stage.tif``: if the DEM changed since the
    analysis, the run stops rather than mixing old and new results. So the
    result, and every file written from it, is the same as from the DEM itself.
    An analysis made with edits kept a copy of them (``edits_input.geojson``):
    they are placed again, so the engine sees the same edited ground and the
    same culverts as the first run.
    """
    import numpy as np
    import rasterio

    from sillmark.engine.flood import OUTLET_CODE, analyse_site
    from sillmark.errors import InvalidDEM, InvalidParameter
    from sillmark.grid.dem import read_dem
    from sillmark.grid.outlets import Outlets

    given = [option for option, value in (
        ("--outlet", args.outlets), ("--connectivity", args.connectivity),
        ("--vertical-unit", args.vertical_unit), ("--crs", args.crs),
    ) if value is not None]
    if given:
        raise InvalidParameter(
            f"{', '.join(given)} {'applies' if len(given) == 1 else 'apply'} only when SOURCE "
            f"is a DEM; the analysis in {folder} keeps its own settings: drop "
            f"{'it' if len(given) == 1 else 'them'}, or give the DEM file as SOURCE"
        )
    from sillmark.io.summary import read_summary

    summary = read_summary(folder)
    edits_member = json.loads((folder / "summary.json").read_text(encoding="utf-8")).get("edits")
    rows, cols = summary.shape
    dem_text = summary.dem_file(instead="give the DEM file as SOURCE")
    unit, crs, sources = summary.vertical_unit, summary.crs, list(summary.outlet_sources)
    connectivity = summary.connectivity

    progress.start("read")
    options = {}
    if args.max_cells is not None:
        options["max_cells"] = args.max_cells
    dem = read_dem(dem_text, band=args.band, vertical_unit=unit, crs=crs, **options)
    if not summary.same_grid(dem.shape, dem.transform):
        raise InvalidDEM(
            f"the DEM {dem_text} no longer has the grid of the analysis in {folder}; "
            "run 'sillmark analyse' again, or give the DEM file as SOURCE"
        )
    stored = {}
    for name in ("onset_stage.tif", "flood_tree.tif"):
        path = folder / name
        if not path.is_file():
            raise InvalidParameter(
                f"the folder {folder} lacks {name}; run 'sillmark analyse' again, or give "
                "the DEM file as SOURCE"
            )
        with rasterio.open(path) as ds:
            if (ds.height, ds.width) != (rows, cols):
                raise InvalidParameter(f"{path} does not match summary.json's grid; run 'sillmark analyse' again")
            stored[name] = ds.read(1)
    dem, culverts = _folder_edits(folder, edits_member, dem)
    progress.done()
    progress.start("outlets")
    mask = (stored["flood_tree.tif"] == OUTLET_CODE) & dem.valid
    outlets = Outlets(mask=mask, sources=tuple(sources))
    progress.done()
    progress.start("flood")
    result = analyse_site(dem, outlets, connectivity=connectivity, culverts=culverts)
    differ = int(np.count_nonzero(
        ~((result.onset_stage == stored["onset_stage.tif"])
          | (np.isnan(result.onset_stage) & np.isnan(stored["onset_stage.tif"])))
    ))
    if differ:
        raise InvalidDEM(
            f"the DEM {dem_text} no longer gives the onset stage stored in {folder} "
            f"({differ:,} cells differ), so it changed after the analysis; run "
            "'sillmark analyse' again, or give the DEM file as SOURCE"
        )
    progress.done()
    return dem, outlets, result


def _folder_edits(folder: Path, member, dem):
    """The DEM with the edits an analysis was made with, and its culverts.

    The edits are read again from the copy the analysis kept in the folder
    (``edits_input.geojson``) and placed on the DEM as before: barriers and
    breaches change a copy of the elevations, culverts become extra edges of
    the flood graph. Without edits, the DEM as it is and no culverts.
    """
    import dataclasses

    from sillmark.engine.culverts import culvert_edges
    from sillmark.errors import InvalidParameter
    from sillmark.grid.edits import read_edits
    from sillmark.io.reach_files import INPUT_COPIES

    if member is None:
        return dem, None
    copy = folder / INPUT_COPIES["edits"]
    if not copy.is_file():
        raise InvalidParameter(
            f"the analysis in {folder} was made with edits (see 'edits' in its summary.json) "
            f"but the folder lacks their copy {copy.name}; run 'sillmark analyse DEM --edits "
            "FILE' again, or give the DEM file as SOURCE to work on the ground as it is")
    placed = read_edits(copy, dem)
    edited, _ = placed.apply(dem.elevation)
    culverts = None
    if placed.culverts:
        culverts = culvert_edges(dem.shape, **placed.culvert_ends(), elevation=edited)
    return dataclasses.replace(dem, elevation=edited), culverts


def run_analyse(args: argparse.Namespace) -> int:
    from sillmark.errors import InvalidParameter
    from sillmark.products.significance import site_minimum
    from sillmark.run import analyse

    if args.tiles is not None:
        return _run_analyse_tiled(args)
    if args.scheduler is not None or args.workers is not None:
        option = "--scheduler" if args.scheduler is not None else "--workers"
        raise InvalidParameter(f"{option} runs the tiled engine; give --tiles N with it (e.g. --tiles 4096)")
    show = not args.quiet and sys.stderr.isatty()
    progress = Progress(show)
    writing = []

    def step(name: str, done: int, total: int) -> None:
        # The in-memory run reports the files it writes, after the flood.
        if not writing:
            writing.append(name)
            progress.done()
            progress.start("export")
        progress.file(name, done, total)

    try:
        dem, outlets, connectivity = _read_site(args.dem, args, progress)
        minimum = site_minimum(vertical_accuracy=args.vertical_accuracy, unit=dem.vertical_unit)
        progress.start("flood")
        out_dir = Path(args.out)
        run = analyse(dem, outlets, out_dir, connectivity=connectivity, progress=step,
                      minimum=minimum, accuracy_stated=args.vertical_accuracy is not None,
                      full_inventory=args.full_inventory, vector_format=args.vector_format,
                      profile=args.profile, refuges=args.refuge, roads=args.roads,
                      edits=args.edits)
        progress.done()
    finally:
        progress.close()
    lines = summary_lines(run.result, dem, outlets, out_dir, run.files, sys.stdout,
                          run.hierarchy, significance=run.significance)
    for line in lines[:2] + edit_lines(run) + lines[2:-1] + reach_lines(run, dem) + lines[-1:]:
        print(line)
    return EXIT_OK


def edit_lines(run) -> list[str]:
    """What each edit of a run was and the cells it touched (nothing without edits)."""
    if run.edits is None:
        return []
    head = f"Edits: {len(run.edits)} from {run.edits.source}"
    return [head] + ["  " + line for line in run.edits.describe(
        run.grid.vertical_unit, None, run.edit_changes)]


def reach_lines(run, dem) -> list[str]:
    """What the profile and the refuges added, for the printed report."""
    from sillmark.io.stage_files import level_text

    reach = getattr(run, "reach", None)
    if reach is None:
        return []
    sym = dem.vertical_unit.symbol
    lines = []
    if reach.profile is not None:
        p = reach.profile
        stations = ", ".join(f"{s['name']} {level_text(s['level'])} {sym}" for s in p["stations"])
        lines.append(f"Profile: {p['file']}: {len(p['stations'])} stations ({stations}); the "
                     f"centreline ({p['centreline_cells']:,} cells) is an outlet too")
        if "onset_offset_range" in p:
            low, high = p["onset_offset_range"]
            lines.append(f"  cells get wet from offset {level_text(low)} to {level_text(high)} {sym} "
                         "(onset_offset.tif; 0 is the design profile, profile_level.tif its level)")
    if reach.cutoff is not None:
        import numpy as np

        stage = reach.cutoff.stage
        finite = stage[np.isfinite(stage)]
        never = int(np.count_nonzero(stage == np.inf))
        none = int(np.count_nonzero(stage == -np.inf))
        text = (f"from {level_text(finite.min())} to {level_text(finite.max())} {sym}"
                if finite.size else "at no finite level")
        lines.append(f"Cut-off stage (cutoff_stage.tif): places lose their last dry route to a "
                     f"refuge {text}; {never:,} cells never, {none:,} cells have no route at all")
    return lines


TILED_STEPS = {"flood": "flood tiles", "graph": "seed graph", "finish": "finish tiles",
                 "join": "join depressions", "totals": "depression totals", "write": "write"}


#: Steps of sillmark.io.results_folder.add_hierarchy_files (``analyse --tiles``).
_HIERARCHY_STEPS = {"hierarchy": "depression hierarchy", "hierarchy_files": "format hierarchy",
                    "hierarchy_write": "write hierarchy files"}


def tiled_engine(args: argparse.Namespace, dem_path: str, out_dir: Path, progress: Progress,
                  *, derived: bool = False, listing: dict | None = None):
    """Run :func:`sillmark.run.analyse` tile by tile on the cluster the options name; return
    the run, the DEM's grid and a line naming the engine.

    ``derived``: also write the depression outlines and the hierarchy files (on
    the same cluster); ``listing``: the significance options of
    :func:`sillmark.run.analyse` (``minimum``, ``accuracy_stated``,
    ``full_inventory``) for them, and ``vector_format`` for the vector layers."""
    from sillmark.engine.executors import dask_executor
    from sillmark.errors import InvalidParameter
    from sillmark.run import analyse

    if args.max_cells is not None:
        raise InvalidParameter("--max-cells guards the memory of the in-memory engine; the tiled "
                               "engine (--tiles) holds one tile at a time: drop --max-cells")
    connectivity = 8 if args.connectivity is None else args.connectivity
    names = {**TILED_STEPS, "outlines": "outline depressions", **_HIERARCHY_STEPS}

    def step(name: str, done: int, total: int) -> None:
        if name in _HIERARCHY_STEPS:
            progress.file(_HIERARCHY_STEPS[name], done, total)  # batches done
        if done == 0:
            progress.start(names[name])
        elif done == total:
            progress.done()

    workers = args.workers if args.workers is not None else (os.cpu_count() or 1)
    with dask_executor(scheduler=args.scheduler,
                       workers=None if args.scheduler else workers) as executor:
        n_workers = executor.worker_count()
        run = analyse(
            os.path.abspath(dem_path), tuple(args.outlets or ("edge",)), out_dir,
            executor=executor, store="files", tile_size=args.tiles, connectivity=connectivity,
            band=args.band, vertical_unit=args.vertical_unit, crs=args.crs, progress=step,
            derived=derived, profile=getattr(args, "profile", None),
            refuges=getattr(args, "refuge", None), roads=getattr(args, "roads", None),
            edits=getattr(args, "edits", None), **(listing or {}),
        )
    where = f"the cluster at {args.scheduler}" if args.scheduler else "a local cluster"
    engine = (f"Engine: tiled, {run.tiles:,} tiles of up to {run.tile_size:,} x "
              f"{run.tile_size:,} cells on {where} ({n_workers} workers)")
    return run, run.grid, engine


def _run_analyse_tiled(args: argparse.Namespace) -> int:
    """``analyse --tiles N``: the pipeline tile by tile on a Dask cluster (local or given),
    then the depression outlines from depression_id.tif window by window, then the
    hierarchy files in windows of depressions on the same cluster."""
    import types

    from sillmark.grid.dem_grid import read_dem_grid
    from sillmark.products.significance import site_minimum

    show = not args.quiet and sys.stderr.isatty()
    progress = Progress(show, phases=(*TILED_STEPS, "outlines", *_HIERARCHY_STEPS))
    out_dir = Path(args.out)
    # The minimum is in the DEM's vertical unit: read it from the file's header.
    unit = read_dem_grid(args.dem, band=args.band, vertical_unit=args.vertical_unit,
                         crs=args.crs).vertical_unit
    listing = {"minimum": site_minimum(vertical_accuracy=args.vertical_accuracy, unit=unit),
               "accuracy_stated": args.vertical_accuracy is not None,
               "full_inventory": args.full_inventory, "vector_format": args.vector_format}
    try:
        run, grid, engine = tiled_engine(args, args.dem, out_dir, progress, derived=True,
                                         listing=listing)
    finally:
        progress.close()
    outlets = types.SimpleNamespace(sources=run.outlet_sources, count=run.outlet_cells)
    lines = summary_lines(run, grid, outlets, out_dir, run.files, sys.stdout, run.hierarchy,
                          significance=run.significance)
    lines[2:2] = [engine] + edit_lines(run)
    lines[-1:-1] = reach_lines(run, grid)
    for line in lines:
        print(line)
    return EXIT_OK
