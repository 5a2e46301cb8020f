"""A results folder on disk, read block by block: the result source of DEMs larger than memory.

:func:`open_result_folder` opens a folder that ``sillmark analyse`` wrote (in
memory or by tiles on a cluster): it reads ``summary.json`` and
``depressions.csv``, opens the DEM the summary names without its cells, and
checks, block by block, that the DEM still gives the folder's fill depth. The
:class:`ResultFolder` it returns is a result source
(:class:`sillmark.products.source.ResultSource`): the products read its
``onset_stage.tif``, ``depression_id.tif`` and the DEM one window at a time.

Memory: the depression table, and one block of :data:`BLOCK_ROWS` rows across
the grid per layer read.
"""

from __future__ import annotations

import csv
import dataclasses
import decimal
import json
import math
import os
from collections.abc import Callable, Iterator, Sequence
from pathlib import Path
from typing import Any

import numpy as np
import rasterio
import rasterio.windows

from sillmark.errors import InvalidDEM, InvalidParameter
from sillmark.grid.dem_grid import DEMGrid, read_dem_grid
from sillmark.grid.edits import edited_grid, read_edits
from sillmark.io.geotiff import BLOCK_ROWS
from sillmark.io.hierarchy_files import HIERARCHY_FILE_NAMES
from sillmark.io.hierarchy_writer import (
    DEFAULT_WINDOW_CELLS,
    HierarchyFiles,
    write_hierarchy_files,
)
from sillmark.io.json_values import write_json
from sillmark.io.reach_files import INPUT_COPIES
from sillmark.io.summary import file_rank, read_summary, write_table_summary
from sillmark.io.vector_layers import write_depression_layer
from sillmark.products.inventory import table_columns
from sillmark.products.outlines import DEFAULT_WINDOW
from sillmark.products.source import LAYERS
from sillmark.units import VerticalUnit, unit_suffix

__all__ = [
    "FolderLayers",
    "ResultFolder",
    "add_depression_outlines",
    "add_hierarchy_files",
    "open_result_folder",
    "read_depression_columns",
]

# Columns of depressions.csv (sillmark.products.inventory.table_columns) held as float32:
# the elevations and depths, stored as float32 by the engine.
_FLOAT32_PREFIXES = ("pit_elevation_", "spill_elevation_", "max_depth_")
_INTEGER_COLUMNS = ("id", "pit_row", "pit_col", "spill_row", "spill_col", "spills_to", "cell_count")
#: The GeoTIFF of each layer a folder source reads (the elevation comes from the DEM).
LAYER_FILES = {"onset_stage": "onset_stage.tif", "depression_id": "depression_id.tif"}


def _float32_from_text(texts: Sequence[str]) -> np.ndarray:
    """Decimal texts to the nearest float32 (NaN for ''), correctly rounded.

    Parsing to float64 first and rounding that to float32 is right except when
    the float64 lands exactly halfway between two float32 values; those few are
    settled by comparing the text itself with the halfway point.
    """
    d = np.array([float(t) if t else math.nan for t in texts], dtype=np.float64)
    f = d.astype(np.float32)
    with np.errstate(over="ignore", invalid="ignore"):
        for side in (1, -1):
            other = np.nextafter(f, np.float32(side * np.inf))
            half = (f.astype(np.float64) + other.astype(np.float64)) / 2.0  # exact in float64
            for k in np.flatnonzero(d == half):
                # Which side of the halfway point is the text itself on?
                beyond = (decimal.Decimal(texts[k]) - decimal.Decimal(float(half[k]))) * side
                if beyond > 0:
                    f[k] = other[k]
    return f


def read_depression_columns(path: str | os.PathLike) -> dict[str, np.ndarray]:
    """The columns of a ``depressions.csv``, as :func:`sillmark.io.csv_tables.table_columns` made them.

    Integers as int64, elevations and depths as float32, everything else as
    float64 (empty fields NaN); each value is the number the file was written
    from, so writing it again gives the same text.
    """

    with open(path, encoding="utf-8", newline="") as f:
        lines = [line for line in f if not line.startswith("#")]
    rows = list(csv.reader(lines))
    if not rows:
        raise InvalidParameter(f"{Path(path).name} holds no header; run the analysis again")
    header, body = rows[0], rows[1:]
    out: dict[str, np.ndarray] = {}
    for j, name in enumerate(header):
        texts = [row[j] for row in body]
        if name in _INTEGER_COLUMNS:
            out[name] = np.array([int(t) for t in texts], dtype=np.int64)
        elif name.startswith(_FLOAT32_PREFIXES):
            out[name] = _float32_from_text(texts)
        else:
            out[name] = np.array([float(t) if t else math.nan for t in texts], dtype=np.float64)
    return out


@dataclasses.dataclass(frozen=True)
class FolderLayers:
    """The layers of a results folder, read window by window, without its depression table.

    What a task on another process gets to read windows through (it pickles
    small: the folder's path and the DEM's grid, no cells).
    """

    folder: Path
    grid: DEMGrid

    def window(self, layer: str, r0: int, r1: int, c0: int, c1: int) -> np.ndarray:
        """``layer`` over rows ``r0:r1`` and columns ``c0:c1``, read from the folder's files."""
        if layer == "elevation":
            return self.grid.read_window(r0, r1, c0, c1)
        if layer not in LAYER_FILES:
            raise ValueError(f"unknown layer {layer!r}; a source has {', '.join(LAYERS)}")
        with rasterio.open(self.folder / LAYER_FILES[layer]) as ds:
            return ds.read(1, window=rasterio.windows.Window(c0, r0, c1 - c0, r1 - r0))


@dataclasses.dataclass(frozen=True)
class ResultFolder:
    """A results folder on disk with its DEM: a result source read block by block.

    Attributes
    ----------
    folder : Path
    grid : DEMGrid
        The DEM named in ``summary.json``, opened without its cells.
    connectivity : int
    outlet_sources : tuple of str
    outlet_count : int
    depressions : dict of numpy arrays
        :func:`read_depression_columns` of ``depressions.csv``.
    elevation_min, elevation_max : float
        Lowest and highest valid ground (NaN when there is none).
    onset_min, onset_max : float
        Lowest and highest onset stage (NaN when no cell is reached).
    """

    folder: Path
    grid: DEMGrid
    connectivity: int
    outlet_sources: tuple
    outlet_count: int
    depressions: dict
    elevation_min: float
    elevation_max: float
    onset_min: float
    onset_max: float

    @property
    def unit(self) -> VerticalUnit:
        return VerticalUnit.parse(self.grid.vertical_unit)

    @property
    def spill_elevation(self) -> np.ndarray:
        return self.depressions[f"spill_elevation_{unit_suffix(self.unit)}"]

    @property
    def pit_elevation(self) -> np.ndarray:
        return self.depressions[f"pit_elevation_{unit_suffix(self.unit)}"]

    @property
    def depression_columns(self) -> dict[str, np.ndarray]:
        return self.depressions

    @property
    def onset_range(self) -> tuple[float, float]:
        return self.onset_min, self.onset_max

    @property
    def elevation_range(self) -> tuple[float, float]:
        return self.elevation_min, self.elevation_max

    def blocks(self) -> Iterator[tuple[int, int]]:
        """Blocks of :data:`BLOCK_ROWS` rows, top to bottom."""
        return _strips(self.grid.rows)

    @property
    def layers(self) -> FolderLayers:
        """The folder's layers without the depression table (for tasks elsewhere)."""
        return FolderLayers(self.folder, self.grid)

    def window(self, layer: str, r0: int, r1: int, c0: int, c1: int) -> np.ndarray:
        """``layer`` over rows ``r0:r1`` and columns ``c0:c1``, read from the folder's files."""
        return self.layers.window(layer, r0, r1, c0, c1)


def _strips(rows: int) -> Iterator[tuple[int, int]]:
    for r0 in range(0, rows, BLOCK_ROWS):
        yield r0, min(rows, r0 + BLOCK_ROWS)


def _read_rows(ds, r0: int, r1: int) -> np.ndarray:
    return ds.read(1, window=rasterio.windows.Window(0, r0, ds.width, r1 - r0))


def _with_folder_edits(out: Path, grid: DEMGrid) -> DEMGrid:
    """The DEM grid with the barriers and breaches of the edits the analysis kept
    (``edits_input.geojson``), so every window read is the ground the engine saw."""
    member = json.loads((out / "summary.json").read_text(encoding="utf-8")).get("edits")
    if member is None:
        return grid
    copy = out / INPUT_COPIES["edits"]
    if not copy.is_file():
        raise InvalidParameter(
            f"the analysis in {out} was made with edits (see 'edits' in its summary.json) but "
            f"the folder lacks their copy {copy.name}; run 'sillmark analyse' again")
    return edited_grid(grid, read_edits(copy, grid))


def open_result_folder(folder: str | os.PathLike, *, band: int | None = None) -> ResultFolder:
    """Open the folder ``sillmark analyse`` (with or without ``--tiles``) wrote.

    Reads ``summary.json`` (DEM path, vertical unit, CRS, grid, outlets,
    connectivity) and ``depressions.csv``, opens the DEM with
    :func:`sillmark.grid.dem_grid.read_dem_grid`, and passes once over the DEM,
    ``onset_stage.tif`` and ``fill_depth.tif`` block by block: every cell's
    ``onset_stage - elevation`` must be the stored fill depth, or the DEM has
    changed since the analysis.

    Raises
    ------
    InvalidParameter
        The folder lacks a file, or its summary is not one Sillmark wrote.
    InvalidDEM
        The DEM is missing, has another grid, or no longer gives the stored results.
    """
    out = Path(folder)
    summary = read_summary(out)
    for name in ("onset_stage.tif", "fill_depth.tif", "depressions.csv"):
        if not (out / name).is_file():
            raise InvalidParameter(
                f"the folder {out} lacks {name}; give a folder written by 'sillmark analyse' "
                "(run it again if it was interrupted)"
            )
    rows, cols = summary.shape
    dem_text = summary.dem_file()
    unit, crs, connectivity = summary.vertical_unit, summary.crs, summary.connectivity
    sources, outlet_count = summary.outlet_sources, summary.outlet_cells
    grid = read_dem_grid(dem_text, band=band, vertical_unit=unit, crs=crs)
    if not summary.same_grid(grid.shape, grid.transform):
        raise InvalidDEM(
            f"the DEM {dem_text} no longer has the grid of the analysis in {out}; run "
            "'sillmark analyse' again"
        )
    grid = _with_folder_edits(out, grid)
    lows, highs, onsets_lo, onsets_hi = [], [], [], []
    differ = 0
    with rasterio.open(out / "onset_stage.tif") as s_ds, rasterio.open(out / "fill_depth.tif") as f_ds:
        for ds in (s_ds, f_ds):
            if (ds.height, ds.width) != (rows, cols):
                raise InvalidParameter(f"{ds.name} does not match summary.json's grid; run "
                                       "'sillmark analyse' again")
        for r0, r1 in _strips(rows):
            s = _read_rows(s_ds, r0, r1)
            fill = _read_rows(f_ds, r0, r1)
            z = grid.read_window(r0, r1, 0, cols)
            recomputed = np.subtract(s, z, dtype=np.float32)
            differ += int(np.count_nonzero(~((recomputed == fill)
                                              | (np.isnan(recomputed) & np.isnan(fill)))))
            valid = ~np.isnan(z)
            if valid.any():
                lows.append(float(z[valid].min()))
                highs.append(float(z[valid].max()))
            reached = ~np.isnan(s)
            if reached.any():
                onsets_lo.append(float(s[reached].min()))
                onsets_hi.append(float(s[reached].max()))
    if differ:
        raise InvalidDEM(
            f"the DEM {dem_text} no longer gives the fill depth stored in {out} ({differ:,} "
            "cells differ), so it changed after the analysis; run 'sillmark analyse' again"
        )
    return ResultFolder(
        folder=out, grid=grid, connectivity=connectivity, outlet_sources=sources,
        outlet_count=outlet_count, depressions=read_depression_columns(out / "depressions.csv"),
        elevation_min=min(lows) if lows else math.nan,
        elevation_max=max(highs) if highs else math.nan,
        onset_min=min(onsets_lo) if onsets_lo else math.nan,
        onset_max=max(onsets_hi) if onsets_hi else math.nan,
    )


def add_depression_outlines(run: Any, grid: DEMGrid, out_dir: str | os.PathLike, *,
                            window: int = DEFAULT_WINDOW, rows: np.ndarray | None = None,
                            extra: dict | None = None, map: Callable | None = None,
                            vector_format: str = "geojson") -> list[Path]:
    """Write the depression outlines into a folder :func:`sillmark.run.analyse` wrote tile by tile.

    ``run`` is that call's :class:`sillmark.run.Analysis` (its depressions,
    connectivity, cell counts, outlets and files).

    The outlines are traced from the folder's ``depression_id.tif`` window by
    window and written as ``depressions.geojson`` or ``depressions.gpkg`` by
    ``vector_format`` (:func:`sillmark.io.vector_layers.write_depression_layer`);
    ``rows`` (boolean per depression) picks those written, e.g. the significant
    ones, and ``extra`` adds properties, as there; ``map(fn, calls)`` (e.g. the
    run's executor) traces the windows, whose pieces are joined here. Then
    ``summary.json`` is written again, last, listing the outlines among the
    files (its ``engine`` member kept). Returns every file of the folder's run
    in the order of :data:`sillmark.io.summary.FILE_NAMES`.
    """
    out = Path(out_dir)
    source = ResultFolder(
        folder=out, grid=grid, connectivity=run.connectivity, outlet_sources=run.outlet_sources,
        outlet_count=run.outlet_cells, depressions=table_columns(run.depressions, grid),
        elevation_min=math.nan, elevation_max=math.nan, onset_min=math.nan, onset_max=math.nan,
    )
    outlines = write_depression_layer(source, out, window=window, rows=rows, extra=extra,
                                      map=map, vector_format=vector_format)
    summary_path = out / "summary.json"
    layer_names = {f"{outlines.stem}{suffix}" for suffix in (".geojson", ".gpkg")}
    by_name = {p.name: Path(p) for p in run.files
               if p.name not in layer_names and p.name != summary_path.name}
    by_name[outlines.name] = outlines
    files = sorted(by_name.values(), key=lambda p: file_rank(p.name))
    engine = json.loads(summary_path.read_text(encoding="utf-8")).get("engine")
    summary = write_table_summary(
        run.depressions, grid, summary_path, connectivity=run.connectivity,
        unreached_cells=run.unreached_cells, valid_cells=run.valid_cells,
        outlet_sources=run.outlet_sources, outlet_count=run.outlet_cells,
        files=[p.name for p in files], engine=engine,
    )
    return files + [summary]


def add_hierarchy_files(out_dir: str | os.PathLike, *, grid: DEMGrid | None = None,
                        band: int | None = None, map: Callable | None = None,
                        progress: Callable[[str, int, int], None] | None = None,
                        window_cells: int = DEFAULT_WINDOW_CELLS,
                        minimum: Any = None, full_inventory: bool = False,
                        depressions: dict[str, np.ndarray] | None = None) -> HierarchyFiles:
    """Write the three depression-hierarchy files into a folder ``sillmark analyse`` wrote.

    The files come from :func:`sillmark.io.hierarchy_writer.write_hierarchy_files`
    on the folder as a result source (the depression hierarchy of Barnes,
    Callaghan & Wickert 2020, built in windows of depressions), the same bytes
    as for the result in memory. Then ``summary.json`` is written again,
    listing them among its files (every other member kept).

    Parameters
    ----------
    out_dir : path
        The folder: ``summary.json``, ``depression_id.tif``, ``depressions.csv``
        and the DEM the summary names are read.
    grid : DEMGrid, optional, keyword-only
        The DEM the folder was computed from, when the caller has it open
        (right after the analysis). Without it the folder is opened with
        :func:`open_result_folder`, which checks the DEM against the folder's
        fill depth block by block.
    band : int, optional, keyword-only
        Band of the DEM, without ``grid``.
    map, progress, window_cells, minimum, full_inventory
        As for :func:`~sillmark.io.hierarchy_writer.write_hierarchy_files`: with
        a significance ``minimum`` each window of depressions decides its own
        significant nodes, and the result says which depressions are listed
        as a whole (``whole``). ``depressions.csv`` must still hold every
        depression (as the engine wrote it), unless ``depressions`` is given.
    depressions : dict of arrays, optional, keyword-only
        With ``grid``: the columns of the run's whole depression table, as
        :func:`sillmark.products.inventory.table_columns` gives them (the
        numbers ``depressions.csv`` is written from), when the caller holds
        the table (right after the analysis); then ``depressions.csv`` is
        not read, and need not be written yet.

    Returns
    -------
    HierarchyFiles

    Raises
    ------
    InvalidParameter
        The folder lacks a file, or its files do not belong together.
    InvalidDEM
        The DEM is missing or changed since the analysis.
    """
    out = Path(out_dir)
    if grid is None and depressions is not None:
        raise InvalidParameter("give the depression table's columns with the DEM's grid")
    if grid is None:
        source = open_result_folder(out, band=band)
    else:
        summary = read_summary(out)
        needed = (LAYER_FILES["depression_id"],) + (("depressions.csv",) if depressions is None
                                                    else ())
        for name in needed:
            if not (out / name).is_file():
                raise InvalidParameter(
                    f"the folder {out} lacks {name}; give a folder written by 'sillmark analyse' "
                    "(run it again if it was interrupted)"
                )
        if not summary.same_grid(grid.shape, grid.transform):
            raise InvalidDEM(f"the DEM {grid.path} does not have the grid of the analysis in {out}")
        source = ResultFolder(
            folder=out, grid=grid, connectivity=summary.connectivity,
            outlet_sources=summary.outlet_sources, outlet_count=summary.outlet_cells,
            depressions=(read_depression_columns(out / "depressions.csv") if depressions is None
                         else depressions),
            elevation_min=math.nan, elevation_max=math.nan, onset_min=math.nan, onset_max=math.nan,
        )
    written = write_hierarchy_files(source, out, map=map, progress=progress,
                                    window_cells=window_cells, minimum=minimum,
                                    full_inventory=full_inventory)
    _list_in_summary(out, list(HIERARCHY_FILE_NAMES))
    return written


def _list_in_summary(out: Path, names: list[str]) -> None:
    """Write ``summary.json`` again with ``names`` among its files, in the order of
    :data:`sillmark.io.summary.FILE_NAMES`; every other member is kept as it was."""
    path = out / "summary.json"
    summary = json.loads(path.read_text(encoding="utf-8"))
    listed = set(summary.get("files", [])) | set(names)
    summary["files"] = sorted(listed, key=lambda n: (file_rank(n), n))
    write_json(path, summary)
