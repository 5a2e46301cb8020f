"""The profile, refuges and roads of a run: read before anything is written, then the
onset offset (:mod:`sillmark.products.profile`) and the cut-off stage
(:mod:`sillmark.products.cutoff`) written beside the usual files, in memory or by tiles.

Called by :func:`sillmark.run.analyse`; the functions take and return its
:class:`~sillmark.run.Analysis` (a frozen dataclass, replaced, never changed).
"""

from __future__ import annotations

import dataclasses
import functools
import time
from pathlib import Path
from typing import Any

import numpy as np

from sillmark.engine.pipeline import run_pipeline
from sillmark.engine.stores import FileStore, MemoryStore
from sillmark.errors import InvalidRefuges
from sillmark.grid.dem import DEM
from sillmark.grid.outlets import Outlets, build_outlets, outlet_specs
from sillmark.grid.profiles import Profile, read_profile, reference_level
from sillmark.grid.refuges import place_shapes, read_refuges, read_roads
from sillmark.io.geotiff import BLOCK_ROWS, read_window
from sillmark.io.reach_files import (
    add_to_summary,
    keep_input,
    write_cutoff_raster,
    write_offset_rasters,
)
from sillmark.io.summary import FILE_NAMES
from sillmark.products.cutoff import CutoffTiles, cutoff_stage, stage_from_widest
from sillmark.products.profile import ProfileTiles, offset_flood

__all__ = ["add_reach_layers", "add_tiled_cutoff", "add_tiled_offset", "read_reach", "with_centreline"]


@dataclasses.dataclass(frozen=True)
class _Reach:
    """The profile, refuges and roads of a run, read before anything is written."""

    profile: Profile | None
    refuges: tuple[np.ndarray, str] | None
    roads: tuple[np.ndarray, str] | None
    sources: dict


def read_reach(dem: DEM, profile, refuges, roads) -> _Reach:
    sources = {k: v for k, v in (("profile", profile), ("refuges", refuges), ("roads", roads))
               if v is not None}
    return _Reach(profile=None if profile is None else read_profile(profile, dem),
                  refuges=None if refuges is None else read_refuges(refuges, dem),
                  roads=None if roads is None else read_roads(roads, dem), sources=sources)


def with_centreline(dem: DEM, outlets, profile: Profile, connectivity: int) -> Outlets:
    if not isinstance(outlets, Outlets):
        outlets = build_outlets(dem, tuple(outlet_specs(outlets, connectivity)),
                                connectivity=connectivity)
    line = profile.centreline_cells(dem) & dem.valid
    return Outlets(mask=outlets.mask | line,
                   sources=(*outlets.sources, f"{profile.label} (centreline)"))


def _profile_member(profile: Profile, unit, cells: int, offset: np.ndarray | None) -> dict:
    finite = None if offset is None else offset[~np.isnan(offset)]
    return {
        "file": profile.label,
        "centreline_length": profile.length,
        "centreline_cells": int(cells),
        "stations": [{"name": n, "chainage": float(c), "level": float(v)}
                     for n, c, v in zip(profile.names, profile.chainage, profile.level)],
        "vertical_unit": unit.value,
        **({"onset_offset_range": [float(finite.min()), float(finite.max())]}
           if finite is not None and finite.size else {}),
        "files": ["onset_offset.tif", "profile_level.tif"],
    }


@dataclasses.dataclass(frozen=True, eq=False)
class _ReachResult:
    profile: dict | None
    cutoff: Any


def add_reach_layers(run, reach: _Reach | None, folder: Path, executor,
                      progress) -> Any:
    """The onset offset of the profile and the cut-off stage, for a DEM in memory."""
    if reach is None or (reach.profile is None and reach.refuges is None):
        return run
    dem, result = run.grid, run.result
    files: list[Path] = []
    members: dict[str, Any] = {}
    seconds = dict(run.seconds)
    if reach.profile is not None:
        t0 = time.perf_counter()
        flood = offset_flood(dem, reach.profile, connectivity=run.connectivity, executor=executor)
        offset, level = flood.onset_offset, flood.reference
        files += write_offset_rasters(dem, folder, offset=lambda r0, r1: offset[r0:r1],
                                      reference=lambda r0, r1: level[r0:r1],
                                      profile_label=reach.profile.label)
        members["profile"] = _profile_member(reach.profile, dem.vertical_unit,
                                             flood.centreline_cells, offset)
        seconds["profile"] = time.perf_counter() - t0
    if reach.refuges is not None:
        t0 = time.perf_counter()
        refuge_cells, refuge_label = reach.refuges
        road_cells = None if reach.roads is None else reach.roads[0]
        cut = cutoff_stage(result.onset_stage, refuge_cells, valid=dem.valid, passable=road_cells,
                           connectivity=run.connectivity)
        stage = cut.stage
        files.append(write_cutoff_raster(dem, folder, stage=lambda r0, r1: stage[r0:r1],
                                         roads=road_cells is not None))
        members["cutoff"] = {
            "refuges": refuge_label, "refuge_cells": int(np.count_nonzero(refuge_cells)),
            "roads": None if reach.roads is None else reach.roads[1],
            "road_cells": None if road_cells is None else int(np.count_nonzero(road_cells)),
            "files": ["cutoff_stage.tif"],
        }
        seconds["cutoff"] = time.perf_counter() - t0
    files += [keep_input(source, folder, what) for what, source in reach.sources.items()]
    summary = folder / FILE_NAMES[-1]
    add_to_summary(summary, [p.name for p in files], **members)
    listed = [p for p in run.files if p.name != summary.name]
    return dataclasses.replace(run, files=[*listed, *files, summary], seconds=seconds,
                               reach=_ReachResult(profile=members.get("profile"),
                                                  cutoff=cut if reach.refuges is not None else None))


def add_tiled_offset(run, profile_source, folder: Path, executor, store: str,
                      tile_size, connectivity: int, progress) -> Any:
    """The onset offset by tiles: the same pipeline on the height above the profile."""
    t0 = time.perf_counter()
    grid = run.grid
    profile = read_profile(profile_source, grid)
    tiles = FileStore(folder / ".offset-tiles") if store == "files" else MemoryStore()
    try:
        flood = run_pipeline(ProfileTiles(grid, profile), executor=executor, store=tiles,
                             tile_size=run.tile_size, connectivity=connectivity,
                             row_areas=grid.row_areas, transform=grid.transform)
        files = write_offset_rasters(
            grid, folder, offset=lambda r0, r1: flood.read("onset_stage", r0, r1),
            reference=lambda r0, r1: _reference_rows(profile, grid, r0, r1),
            profile_label=profile.label)
        files.append(keep_input(profile_source, folder, "profile"))
    finally:
        tiles.close()
    member = _profile_member(profile, grid.vertical_unit, flood.outlet_cells, None)
    summary = folder / FILE_NAMES[-1]
    add_to_summary(summary, [p.name for p in files], profile=member)
    listed = [p for p in run.files if p.name != summary.name]
    seconds = {**run.seconds, "profile": time.perf_counter() - t0}
    return dataclasses.replace(run, files=[*listed, *files, summary], seconds=seconds,
                               reach=_ReachResult(profile=member, cutoff=None))


def _reference_rows(profile: Profile, grid, r0: int, r1: int) -> np.ndarray:
    z = grid.read_window(r0, r1, 0, grid.shape[1])
    level = reference_level(profile, grid, r0, r1)
    level[np.isnan(z)] = np.nan
    return level


def add_tiled_cutoff(run, refuges_source, roads_source, folder: Path, executor, store: str,
                     connectivity: int, progress) -> Any:
    """The cut-off stage by tiles: the same pipeline on the negated onset stage of the
    folder's ``onset_stage.tif``, seeded at the refuges, window by window."""
    t0 = time.perf_counter()
    grid = run.grid
    refuges = place_shapes(refuges_source, grid, "refuges")
    roads = None if roads_source is None else place_shapes(roads_source, grid, "roads")
    onset = functools.partial(read_window, folder / "onset_stage.tif")
    rows, cols = grid.shape
    high, seeds = -np.inf, 0
    probe = CutoffTiles(grid, onset, refuges, roads, 0.0)
    for r0 in range(0, rows, BLOCK_ROWS):
        r1 = min(rows, r0 + BLOCK_ROWS)
        s = onset(r0, r1, 0, cols)
        usable, refuge = probe.usable(r0, r1, 0, cols)
        finite = s[usable & ~np.isnan(s)]
        if finite.size:
            high = max(high, float(finite.max()))
        seeds += int(np.count_nonzero(refuge & usable))
    if seeds == 0:
        raise InvalidRefuges(f"{refuges.label}: no refuge lies on a cell with data (or on the "
                             "roads given); place the refuges on the site")
    top = high + 1.0 if np.isfinite(high) else 1.0
    source = dataclasses.replace(probe, top=top)
    tiles = FileStore(folder / ".cutoff-tiles") if store == "files" else MemoryStore()
    try:
        flood = run_pipeline(source, executor=executor, store=tiles, tile_size=run.tile_size,
                             connectivity=connectivity, row_areas=grid.row_areas,
                             transform=grid.transform)

        def block(r0: int, r1: int) -> np.ndarray:
            usable, _ = source.usable(r0, r1, 0, cols)
            return stage_from_widest(flood.read("onset_stage", r0, r1), usable, top)

        files = [write_cutoff_raster(grid, folder, stage=block, roads=roads is not None)]
    finally:
        tiles.close()
    sources = {"refuges": refuges_source, **({"roads": roads_source} if roads_source else {})}
    files += [keep_input(src, folder, what) for what, src in sources.items()]
    member = {"refuges": refuges.label, "refuge_cells": seeds,
              "roads": None if roads is None else roads.label, "files": ["cutoff_stage.tif"]}
    summary = folder / FILE_NAMES[-1]
    add_to_summary(summary, [p.name for p in files], cutoff=member)
    listed = [p for p in run.files if p.name != summary.name]
    seconds = {**run.seconds, "cutoff": time.perf_counter() - t0}
    reach = getattr(run, "reach", None)
    return dataclasses.replace(run, files=[*listed, *files, summary], seconds=seconds,
                               reach=_ReachResult(profile=None if reach is None else reach.profile,
                                                  cutoff=None))
