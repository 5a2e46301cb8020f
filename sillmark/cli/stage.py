"""``sillmark stage``: the water-level files at given levels and the stage table, from a
DEM or from a results folder; with assets, each asset's state at every level and
what raising its controlling sill would change.
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

from sillmark import SCREENING_CAUTION as SCREENING
from sillmark.cli.analyse import (
    TILED_STEPS,
    site_from_dem,
    site_from_folder,
    tiled_engine,
)
from sillmark.cli.common import EXIT_OK, MAX_LEVELS, WRONG_UNIT_FACTOR
from sillmark.cli.reports import Progress, stage_lines


def _stage_request(args: argparse.Namespace) -> None:
    """Checks of the stage options that need no DEM, made before anything is read."""
    from sillmark.errors import InvalidParameter

    if args.offsets:
        if args.levels:
            raise InvalidParameter("give water levels (--level) or offsets of the profile "
                                   "(--offset), not both in one call")
        if args.assets is not None or args.raise_sill is not None:
            raise InvalidParameter("--assets and --raise-sill work on water levels; drop them "
                                   "with --offset")
        if len(args.offsets) > MAX_LEVELS:
            raise InvalidParameter(f"{len(args.offsets)} offsets given; at most {MAX_LEVELS} per call")
        return
    levels = args.levels or []
    if len(levels) > MAX_LEVELS:
        raise InvalidParameter(
            f"{len(levels)} water levels given; at most {MAX_LEVELS} per call (run several "
            "calls, or use --table-step for a stage table over many levels)"
        )
    if args.table_step is None and (args.table_from is not None or args.table_to is not None):
        raise InvalidParameter("--table-from and --table-to set the range of the stage table; "
                               "give --table-step STEP with them")
    if not levels and args.table_step is None:
        raise InvalidParameter("give at least one --level H, or --table-step STEP for a stage table")
    if args.raise_sill is not None and args.assets is None:
        raise InvalidParameter("--raise-sill raises the controlling sills of assets; give "
                               "--assets FILE with it")
    if args.assets is not None and not levels:
        raise InvalidParameter("--assets reports each asset at a water level; give at least "
                               "one --level H with it")


def _level_checks(result, dem, args: argparse.Namespace) -> dict[float, list[str]]:
    """Refuse levels that look like the wrong unit; return notes per level (float32 value)."""
    import numpy as np

    return _level_notes(dem.vertical_unit, float(np.nanmin(dem.elevation)),
                        float(np.nanmax(dem.elevation)), float(np.nanmin(result.onset_stage)), args)


def _level_notes(vertical_unit, z_low: float, z_high: float, lowest: float,
                 args: argparse.Namespace) -> dict[float, list[str]]:
    """:func:`_level_checks` from the lowest and highest ground and the lowest onset stage."""
    from sillmark.errors import InvalidParameter
    from sillmark.io.stage_files import level_text, unique_levels
    from sillmark.units import VerticalUnit

    unit = VerticalUnit.parse(vertical_unit)
    sym = unit.symbol
    # A flat site still allows levels a few units above its ground.
    margin = WRONG_UNIT_FACTOR * max(z_high - z_low, 1.0)
    unit_words = {"m": "metres", "ft": "international feet", "us-ft": "US survey feet"}[unit.value]
    checked = [("level", h) for h in (args.levels or [])]
    if args.table_to is not None:
        checked.append(("--table-to", args.table_to))
    if not args.force:
        for what, h in checked:
            if h > z_high + margin:
                raise InvalidParameter(
                    f"the {what} {level_text(h)} {sym} is more than {WRONG_UNIT_FACTOR:g} times "
                    f"the site's elevation range ({level_text(z_low)} to {level_text(z_high)} {sym}) "
                    f"above its highest ground; it may be in the wrong unit (this site's "
                    f"elevations are in {unit_words}); pass --force to use it anyway"
                )
    notes: dict[float, list[str]] = {}
    for h in unique_levels(args.levels or []):
        h = float(h)
        if h < lowest:
            note = (f"nothing floods at {level_text(h)} {sym}: the lowest onset stage is "
                    f"{level_text(lowest)} {sym}")
            if h < z_low - margin:
                note += f" (is the level in the wrong unit? this site's elevations are in {unit_words})"
            notes.setdefault(h, []).append(note)
        elif h > z_high:
            note = (f"{level_text(h)} {sym} is above the highest ground ({level_text(z_high)} {sym}): "
                    "every cell an outlet reaches floods")
            if h > z_high + (z_high - z_low):
                note += f" (is the level in the wrong unit? this site's elevations are in {unit_words})"
            notes.setdefault(h, []).append(note)
    return notes


def run_stage(args: argparse.Namespace) -> int:
    from sillmark.io.stage_files import write_stage_results
    from sillmark.products.source import ArraySource
    from sillmark.products.stage import stage_levels

    _stage_request(args)
    source = Path(args.source)
    if args.offsets:
        return _run_stage_offsets(args)
    if args.tiles is not None or _tiled_folder(source):
        return _run_stage_tiled(args)
    if args.scheduler is not None or args.workers is not None:
        from sillmark.errors import InvalidParameter

        option = "--scheduler" if args.scheduler is not None else "--workers"
        raise InvalidParameter(f"{option} runs the tiled engine; give --tiles N with it (e.g. --tiles 4096)")
    show = not args.quiet and sys.stderr.isatty()
    progress = Progress(show)
    try:
        if source.is_dir():
            dem, outlets, result = site_from_folder(source, args, progress)
            edited = " with its edits" if (source / "edits_input.geojson").is_file() else ""
            origin = (f"Analysis: {source} (engine re-run on its DEM{edited}; onset stage "
                      "matches onset_stage.tif)")
        else:
            dem, outlets, result = site_from_dem(args.source, args, progress)
            origin = None
        notes = _level_checks(result, dem, args)
        table_levels = None
        if args.table_step is not None:
            table_levels = stage_levels(ArraySource(dem, result), step=args.table_step,
                                        start=args.table_from, stop=args.table_to)
        cut = _site_cutoff(source, dem, result) if source.is_dir() else None
        assets = what_if = None
        if args.assets is not None:
            from sillmark.grid.assets import read_assets

            assets = read_assets(args.assets, dem)
            if args.raise_sill is not None:
                # Every flood of the what-if runs before anything is written, so a
                # failure leaves the output folder as it was.
                progress.start("raise sills")
                what_if = _what_if_rows(result, dem, outlets, assets, args.raise_sill)
        progress.start("export")
        out_dir = Path(args.out)
        written = write_stage_results(ArraySource(dem, result), out_dir, levels=args.levels or [],
                                      table_levels=table_levels, progress=progress.file,
                                      vector_format=args.vector_format)
        asset_levels = []
        if assets is not None:
            asset_levels = _write_asset_levels(result, dem, assets, written, out_dir, progress.file,
                                               cutoff=cut)
        if cut is not None:
            written = _with_cutoff_ground(written, dem, out_dir, result.connectivity, progress.file,
                                          cutoff_rows=lambda r0, r1: cut.stage[r0:r1],
                                          onset_rows=lambda r0, r1: result.onset_stage[r0:r1])
        what_if_path = None
        readme_notes = []
        if what_if is not None:
            what_if_path = _write_what_if(dem, what_if, args.raise_sill, out_dir, progress.file)
            readme_notes = _what_if_notes(what_if)
        files = [*written.paths, *(p for _, paths in asset_levels for p in paths),
                 *([what_if_path] if what_if_path else [])]
        _stage_readme(out_dir, files, dem, result.connectivity, args, readme_notes)
        progress.done()
    finally:
        progress.close()
    lines = stage_lines(result, dem, outlets, out_dir, written, notes, origin, sys.stdout,
                         assets=assets, asset_levels=asset_levels, what_if=what_if,
                         what_if_path=what_if_path)
    lines[-1:-1] = _island_lines(asset_levels)
    for line in lines:
        print(line)
    return EXIT_OK


def _island_lines(asset_levels) -> list[str]:
    """Assets that are islands (dry but cut off from every refuge) at each level."""
    from sillmark.io.stage_files import level_text

    out = []
    for table, _paths in asset_levels:
        cut = table.cutoff
        if cut is None:
            continue
        sym = table.unit.symbol
        names = [f"{table.name[k]} (cut off from {level_text(cut.island_from[k])} {sym}, "
                 f"wet from {level_text(cut.island_to[k])} {sym})"
                 for k in range(len(table)) if cut.is_island[k]]
        head = f"Islands at {level_text(table.level)} {sym}"
        out.append(f"{head}: {'; '.join(names)}" if names else
                   f"{head}: none (no asset is dry but cut off from every refuge)")
    return out


def _tiled_folder(source: Path) -> bool:
    """Whether ``source`` is a folder the tiled engine wrote (its summary says so)."""
    try:
        summary = json.loads((source / "summary.json").read_text(encoding="utf-8"))
        return summary.get("engine", {}).get("kind") == "tiled"
    except (OSError, ValueError, AttributeError):
        return False


def _run_stage_tiled(args: argparse.Namespace) -> int:
    """``stage`` out of core: on a folder of the tiled engine, or on a DEM with --tiles N
    (the tiled engine first, into a scratch folder in --out removed at the end)."""
    import shutil
    import types
    import uuid

    from sillmark.errors import InvalidParameter
    from sillmark.io.results_folder import open_result_folder
    from sillmark.io.stage_files import write_stage_results
    from sillmark.products.stage import stage_levels

    source = Path(args.source)
    if args.assets is not None:
        raise InvalidParameter("--assets follows each asset's route through the whole flood tree, "
                               "which the out-of-core exports do not hold; run 'sillmark stage' "
                               "on the DEM without --tiles for the assets")
    out_dir = Path(args.out)
    show = not args.quiet and sys.stderr.isatty()
    progress = Progress(show, phases=(*TILED_STEPS, "read", "export") if args.tiles else ("read", "export"))
    scratch = None
    try:
        if source.is_dir():
            if args.tiles is not None:
                raise InvalidParameter(f"the folder {source} holds an analysis already; --tiles N "
                                       "runs the tiled engine on a DEM: drop --tiles")
            given = [option for option, value in (
                ("--outlet", args.outlets), ("--connectivity", args.connectivity),
                ("--vertical-unit", args.vertical_unit), ("--crs", args.crs),
                ("--scheduler", args.scheduler), ("--workers", args.workers),
            ) if value is not None]
            if given:
                raise InvalidParameter(f"{', '.join(given)} cannot change the analysis in {source}; "
                                       "drop them, or give the DEM file as SOURCE")
            folder = source
            origin = f"Analysis: {source} (tiled results, read block by block)"
        else:
            out_dir.mkdir(parents=True, exist_ok=True)
            scratch = folder = out_dir / f".sillmark-analysis-{uuid.uuid4().hex[:12]}"
            _run, _grid, engine = tiled_engine(args, args.source, folder, progress)
            origin = f"{engine}; the exports read block by block"
        progress.start("read")
        site = open_result_folder(folder, band=args.band)
        progress.done()
        notes = _level_notes(site.grid.vertical_unit, site.elevation_min, site.elevation_max,
                             site.onset_min, args)
        table_levels = None
        if args.table_step is not None:
            table_levels = stage_levels(site, step=args.table_step, start=args.table_from,
                                        stop=args.table_to)
        progress.start("export")
        written = write_stage_results(site, out_dir, levels=args.levels or [],
                                      table_levels=table_levels, progress=progress.file,
                                      vector_format=args.vector_format)
        if (folder / "cutoff_stage.tif").is_file():
            from functools import partial

            from sillmark.io.geotiff import read_window

            cols = site.grid.shape[1]
            written = _with_cutoff_ground(
                written, site.grid, out_dir, site.connectivity, progress.file,
                cutoff_rows=lambda r0, r1: read_window(folder / "cutoff_stage.tif", r0, r1, 0, cols),
                onset_rows=partial(_rows, site, "onset_stage"))
        _stage_readme(out_dir, written.paths, site.grid, site.connectivity, args, [])
        progress.done()
    finally:
        progress.close()
        if scratch is not None:
            shutil.rmtree(scratch, ignore_errors=True)
    result = types.SimpleNamespace(connectivity=site.connectivity, depressions=site.depressions["id"])
    outlets = types.SimpleNamespace(sources=site.outlet_sources, count=site.outlet_count)
    for line in stage_lines(result, site.grid, outlets, out_dir, written, notes, origin, sys.stdout):
        print(line)
    return EXIT_OK


def _write_asset_levels(result, dem, assets, written, out_dir: Path, progress, *,
                        cutoff=None) -> list:
    """Assess the assets at every written level and write their two files and the map style
    of the GeoJSON; return the tables."""
    from sillmark.io.asset_files import (
        asset_file_names,
        write_assets_csv,
        write_assets_geojson,
    )
    from sillmark.io.styles import write_styles
    from sillmark.products.assets import assess_assets

    tables = []
    for level in written.levels:
        table = assess_assets(assets, dem, result, level.level, cutoff=cutoff)
        csv_name, geojson_name = asset_file_names(level.level, dem.vertical_unit)
        for name, write in ((csv_name, write_assets_csv), (geojson_name, write_assets_geojson)):
            progress(name, 0, 1)
            write(table, out_dir / name)
            progress(name, 1, 1)
        styles = write_styles([out_dir / geojson_name], dem.vertical_unit)
        tables.append((table, (out_dir / csv_name, out_dir / geojson_name, *styles)))
    return tables


class _WhatIfRun:
    """What the --raise-sill run found: CSV rows (asset order) and the sills raised."""

    def __init__(self, rows: list, sills: list, own: int, no_figures: int) -> None:
        self.rows = rows          # what_if_row dicts, in asset order
        self.sills = sills        # per distinct sill, in the order met: its assets' rows
        self.own = own            # assets whose own ground controls
        self.no_figures = no_figures


def _what_if_rows(result, dem, outlets, assets, height: float) -> _WhatIfRun:
    """Raise every distinct controlling sill of the assets once; keep light rows only."""
    from sillmark.grid.assets import STATUS_OK
    from sillmark.io.asset_files import what_if_row
    from sillmark.products.what_if import raise_sills

    behind: dict[tuple[int, int], int] = {}
    own = no_figures = 0
    for a in assets:
        if a.status != STATUS_OK or result.flood_tree[a.row, a.col] == 0:
            no_figures += 1
            continue
        route = result.route(a.row, a.col)
        cell = (int(route.sill_row), int(route.sill_col))
        if cell == (a.row, a.col):
            own += 1
        else:
            behind[cell] = behind.get(cell, 0) + 1
    indexed = []
    sills: dict[tuple[int, int], list] = {}
    for k, w in raise_sills(dem, outlets, result, assets, height):
        cell = (w.raised.row, w.raised.col)
        row = what_if_row(w, dem, kind=assets[k].kind, assets_behind_sill=behind[cell])
        indexed.append((k, row))
        sills.setdefault(cell, []).append(row)
    return _WhatIfRun(rows=[row for _, row in sorted(indexed, key=lambda item: item[0])],
                      sills=list(sills.values()), own=own, no_figures=no_figures)


def _stage_readme(out_dir: Path, paths, grid, connectivity: int, args: argparse.Namespace,
                  notes: list[str]) -> Path:
    """``README.txt`` of a stage folder: the files just written, units, caution, notes."""
    from sillmark.io.readme import write_readme

    return write_readme(out_dir, [Path(p).name for p in paths], grid=grid,
                        title="the site at given outlet water levels", connectivity=connectivity,
                        notes=notes)


def _what_if_notes(run: _WhatIfRun) -> list[str]:
    """What the what-if table leaves out, and why (said in the folder's README)."""
    notes = []
    if run.own:
        notes.append(f"not listed: {run.own} asset(s) whose own ground is the controlling point "
                     "(no sill between them and the water; see sill_is_own_cell in assets_*.csv)")
    if run.no_figures:
        notes.append(f"not listed: {run.no_figures} asset(s) without figures (outside the DEM, "
                     "on nodata, or not reached by any outlet)")
    return notes


def _write_what_if(dem, run: _WhatIfRun, height: float, out_dir: Path, progress) -> Path:
    from sillmark.io.asset_files import what_if_file_name, write_what_if_csv

    name = what_if_file_name(height, dem.vertical_unit)
    progress(name, 0, 1)
    path = write_what_if_csv(run.rows, dem, out_dir / name, height=height)
    progress(name, 1, 1)
    return path


def _run_stage_offsets(args: argparse.Namespace) -> int:
    """``stage FOLDER --offset D``: the water-level files of the profile raised by D,
    read block by block from a folder analysed with ``--profile``."""
    from functools import partial

    from sillmark.errors import InvalidParameter
    from sillmark.io.geotiff import read_window
    from sillmark.io.reach_files import OFFSET_FILES
    from sillmark.io.results_folder import open_result_folder
    from sillmark.io.stage_files import level_text, write_stage_results
    from sillmark.products.profile import OffsetSource
    from sillmark.products.stage import stage_levels

    folder = Path(args.source)
    missing = [n for n in OFFSET_FILES if not (folder / n).is_file()]
    if not folder.is_dir() or missing:
        raise InvalidParameter(
            f"--offset raises a river's water-surface profile; give the folder of 'sillmark "
            f"analyse DEM --profile FILE' as SOURCE ({folder} "
            f"{'is no folder' if not folder.is_dir() else 'lacks ' + ', '.join(missing)})")
    given = [option for option, value in (
        ("--outlet", args.outlets), ("--connectivity", args.connectivity),
        ("--vertical-unit", args.vertical_unit), ("--crs", args.crs), ("--tiles", args.tiles),
    ) if value is not None]
    if given:
        raise InvalidParameter(f"{', '.join(given)} cannot change the analysis in {folder}; drop them")
    show = not args.quiet and sys.stderr.isatty()
    progress = Progress(show, phases=("read", "export"))
    out_dir = Path(args.out)
    try:
        progress.start("read")
        site = open_result_folder(folder, band=args.band)
        source = OffsetSource(base=site, offset_window=partial(read_window, folder / OFFSET_FILES[0]),
                              reference_window=partial(read_window, folder / OFFSET_FILES[1]))
        progress.done()
        table_levels = None
        if args.table_step is not None:
            table_levels = stage_levels(source, step=args.table_step, start=args.table_from,
                                        stop=args.table_to)
        progress.start("export")
        written = write_stage_results(source, out_dir, levels=args.offsets,
                                      table_levels=table_levels, progress=progress.file,
                                      vector_format=args.vector_format)
        _stage_readme(out_dir, written.paths, site.grid, site.connectivity, args, [])
        progress.done()
    finally:
        progress.close()
    sym = source.unit.symbol
    low, high = source.onset_range
    print(f"Profile offsets from {folder}: the design water-surface profile raised by each "
          f"offset (cells get wet from offset {level_text(low)} to {level_text(high)} {sym})")
    for level in written.levels:
        print(f"  offset {level_text(level.level)} {sym}: flooded {level.flooded_area_m2 / 1e4:,.2f} ha, "
              f"{level.flooded_volume_m3:,.0f} m3; shielded low ground "
              f"{level.shielded_area_m2 / 1e4:,.2f} ha")
    for path in written.paths:
        print(f"  wrote {path}")
    print(f"Caution: {SCREENING}")
    return EXIT_OK


def _rows(site, layer: str, r0: int, r1: int):
    return site.window(layer, r0, r1, 0, site.grid.shape[1])


def _site_cutoff(folder: Path, dem, result):
    """The cut-off stage of a folder analysed with ``--refuge`` (recomputed from the
    refuges and roads kept in it, and checked against ``cutoff_stage.tif``), or None."""
    import numpy as np
    import rasterio

    from sillmark.errors import InvalidParameter
    from sillmark.grid.refuges import read_refuges, read_roads
    from sillmark.io.reach_files import CUTOFF_FILE, INPUT_COPIES
    from sillmark.products.cutoff import cutoff_stage

    if not (folder / CUTOFF_FILE).is_file():
        return None
    refuges, roads = folder / INPUT_COPIES["refuges"], folder / INPUT_COPIES["roads"]
    if not refuges.is_file():
        raise InvalidParameter(f"{folder} holds {CUTOFF_FILE} but not {refuges.name}; run "
                               "'sillmark analyse' with --refuge again")
    cut = cutoff_stage(result.onset_stage, read_refuges(refuges, dem)[0], valid=dem.valid,
                       passable=read_roads(roads, dem)[0] if roads.is_file() else None,
                       connectivity=result.connectivity)
    with rasterio.open(folder / CUTOFF_FILE) as ds:
        stored = ds.read(1)
    if not np.array_equal(stored, cut.stage, equal_nan=True):
        raise InvalidParameter(f"{folder / CUTOFF_FILE} no longer matches the refuges and roads "
                               "kept beside it; run 'sillmark analyse' again")
    return cut


def _with_cutoff_ground(written, grid, out_dir: Path, connectivity: int, progress, *,
                        cutoff_rows, onset_rows):
    """Write the ground cut off at each level beside the level's files; return the
    written set with those paths added to each level."""
    import dataclasses

    from sillmark.io.reach_files import cutoff_level_names, write_cutoff_level

    levels = []
    for level in written.levels:
        names = cutoff_level_names(level.level, grid.vertical_unit)
        for name in names:
            progress(name, 0, 1)
        paths = write_cutoff_level(grid, out_dir, level.level, cutoff_rows=cutoff_rows,
                                   onset_rows=onset_rows, connectivity=connectivity)
        for name in names:
            progress(name, 1, 1)
        levels.append(dataclasses.replace(level, paths=(*level.paths, *paths)))
    return dataclasses.replace(written, levels=tuple(levels))
