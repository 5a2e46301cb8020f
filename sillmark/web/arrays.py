"""The result arrays of a run as .npy files, and reading them back memory-mapped.

The worker writes every array field of :class:`sillmark.engine.flood.SpillResult`, the
depression table, the DEM's georeferencing and the hillshade pyramid into
``runs/<run>/arrays/`` with :class:`ArrayWriter`, block by block (a DEM larger
than the worker's memory never exists whole in it); the server maps them read-only (``numpy.load`` with
``mmap_mode="r"``), so a site opens in milliseconds and its pages share the
operating system's file cache instead of a copy per request.

The SpillResult is rebuilt field by field from what was stored; if the engine
has gained or lost a field since the run, :class:`StaleArrays` says so and the
site asks for the analysis to be run again.
"""

from __future__ import annotations

import dataclasses
import json
import os
import shutil
from collections.abc import Callable
from pathlib import Path

import numpy as np
from affine import Affine
from rasterio.crs import CRS

from sillmark.engine.flood import DepressionTable, SpillResult
from sillmark.grid.dem import DEM
from sillmark.grid.elevations import nodata_as_json, nodata_from_json
from sillmark.units import VerticalUnit

META = "meta.json"
FORMAT = 1


class StaleArrays(Exception):
    """The stored arrays do not fit the current engine (or are missing)."""


#: Cells per block when an array is written row block by row block: at most
#: this many cells of any one array are held in memory at a time.
BLOCK_CELLS = 1 << 18


def block_rows(cols: int, *, limit: int | None = None) -> int:
    """Rows per block for a grid ``cols`` wide: an even number, at least 2.

    About :data:`BLOCK_CELLS` cells per block, never more than ``limit`` rows
    (e.g. :data:`sillmark.io.geotiff.BLOCK_ROWS`, the rows of one row of
    GeoTIFF tiles). Even, so that a pyramid level may be halved block by block.
    """
    rows = max(2, BLOCK_CELLS // max(1, int(cols)))
    if limit is not None:
        rows = min(rows, max(2, int(limit)))
    return rows - rows % 2


#: ``block(r0, r1)``: rows ``r0:r1`` of an array, as a numpy array of full width.
Rows = Callable[[int, int], np.ndarray]


class ArrayWriter:
    """Builds a run's ``arrays/`` folder under a temporary name, one array at a time.

    Every grid-sized array is an ``.npy`` file written block by block in row
    order (:meth:`write_rows`: the ``.npy`` header, then each block's bytes),
    so writing it holds one block in memory, never the array. The blocks are
    written to the file, not through a writable memory map: on a full disk a
    write then fails with ``ENOSPC``, which the worker reports, where a page of
    a memory map would kill the process with ``SIGBUS``. :meth:`commit` writes ``meta.json`` and renames the folder into
    place (an earlier folder of that name is replaced whole); until then
    nothing is visible under the final name, and :meth:`discard` removes the
    temporary folder.

    Memory: one block of the array being written (about :data:`BLOCK_CELLS`
    cells) beyond what ``block`` itself allocates.
    """

    def __init__(self, folder: Path) -> None:
        self.folder = Path(folder)
        self.tmp = self.folder.with_name(self.folder.name + ".tmp")
        if self.tmp.exists():
            shutil.rmtree(self.tmp)
        self.tmp.mkdir(parents=True)
        self.shapes: dict[str, tuple[int, ...]] = {}

    def path(self, name: str) -> Path:
        return self.tmp / f"{name}.npy"

    def write_rows(self, name: str, shape: tuple[int, int], block: Rows, *, rows: int,
                   progress: Callable[[float], None] | None = None) -> None:
        """Write ``name.npy`` of ``shape`` from ``block(r0, r1)``, ``rows`` rows at a time.

        The dtype is that of the first block. ``progress(fraction)`` after each block.
        """
        n_rows, n_cols = int(shape[0]), int(shape[1])
        with open(self.path(name), "wb") as fh:
            dtype = None
            for r0 in range(0, n_rows, rows):
                r1 = min(n_rows, r0 + rows)
                data = np.asarray(block(r0, r1))
                if data.shape != (r1 - r0, n_cols):
                    raise ValueError(f"rows {r0}:{r1} of {name} came as {data.shape}, "
                                     f"not {(r1 - r0, n_cols)}")
                if dtype is None:
                    dtype = data.dtype
                    np.lib.format.write_array_header_1_0(fh, {
                        "descr": np.lib.format.dtype_to_descr(dtype),
                        "fortran_order": False, "shape": (n_rows, n_cols)})
                fh.write(np.ascontiguousarray(data, dtype=dtype).tobytes())
                if progress is not None:
                    progress(r1 / n_rows)
        if dtype is None:  # no rows: an empty array of the declared shape
            np.save(self.path(name), np.zeros((n_rows, n_cols), np.float32), allow_pickle=False)
        self.shapes[name] = (n_rows, n_cols)

    def read(self, name: str) -> np.ndarray:
        """An array already written, mapped read-only."""
        return np.load(self.path(name), mmap_mode="r", allow_pickle=False)

    def save(self, name: str, value: np.ndarray) -> None:
        """A small array (per row, per depression), written whole."""
        np.save(self.path(name), np.ascontiguousarray(value), allow_pickle=False)
        self.shapes[name] = np.shape(value)

    def commit(self, grid, *, depressions: DepressionTable, scalars: dict, pyramid_levels: int,
               extra: dict) -> None:
        """Write the depression table and ``meta.json``, then move the folder into place.

        ``grid`` (a :class:`~sillmark.grid.dem.DEM` or
        :class:`~sillmark.grid.dem_grid.DEMGrid`) gives the georeferencing; the
        arrays of :class:`SpillResult` must all be written, and ``scalars``
        hold its other fields, or :class:`TypeError` (refused rather than lost).
        """
        kinds: dict[str, str] = {}
        stored_scalars: dict = {}
        for f in dataclasses.fields(SpillResult):
            if f.name in self.shapes:
                kinds[f.name] = "array"
            elif f.name == "depressions":
                np.savez(self.tmp / f"{f.name}.npz",
                         **{c: getattr(depressions, c) for c in depressions.columns})
                kinds[f.name] = "depressions"
            elif f.name in scalars:
                value = scalars[f.name]
                if not (isinstance(value, (bool, int, float, str)) or value is None):
                    raise TypeError(f"cannot store SpillResult.{f.name} of type "
                                    f"{type(value).__name__}")
                stored_scalars[f.name] = value
                kinds[f.name] = "scalar"
            else:
                raise TypeError(f"SpillResult.{f.name} was neither written nor given")
        self.save("row_areas", grid.row_areas)
        t = grid.transform
        meta = {
            "format": FORMAT,
            "result_fields": kinds,
            "result_scalars": stored_scalars,
            "dem": {
                "transform": [t.a, t.b, t.c, t.d, t.e, t.f],
                "crs_wkt": grid.crs.to_wkt(),
                "vertical_unit": grid.vertical_unit.value,
                "vertical_unit_source": grid.vertical_unit_source,
                "nodata": nodata_as_json(grid.nodata),
                "source_dtype": grid.source_dtype,
                "path": grid.path,
                "shape": list(grid.shape),
            },
            "hillshade_levels": int(pyramid_levels),
            "tint_levels": int(pyramid_levels),
            **extra,
        }
        (self.tmp / META).write_text(json.dumps(meta, allow_nan=False), encoding="utf-8")
        old = self.folder.with_name(self.folder.name + ".old")
        if self.folder.exists():
            os.replace(self.folder, old)
        os.replace(self.tmp, self.folder)
        if old.exists():
            shutil.rmtree(old, ignore_errors=True)

    def discard(self) -> None:
        shutil.rmtree(self.tmp, ignore_errors=True)


@dataclasses.dataclass(frozen=True, eq=False)
class Stored:
    dem: DEM
    result: SpillResult
    pyramid: list
    tints: list
    meta: dict


def load(folder: Path) -> Stored:
    """Map the arrays of ``folder`` read-only and rebuild the DEM and SpillResult."""
    folder = Path(folder)
    try:
        meta = json.loads((folder / META).read_text(encoding="utf-8"))
    except (OSError, ValueError) as exc:
        raise StaleArrays(f"the stored results cannot be read ({exc.__class__.__name__})") from None
    if meta.get("format") != FORMAT:
        raise StaleArrays("the stored results are in an older format")
    kinds = meta["result_fields"]
    wanted = {f.name for f in dataclasses.fields(SpillResult)}
    if set(kinds) != wanted:
        raise StaleArrays("the spill engine changed since these results were made")

    def array(name: str) -> np.ndarray:
        a = np.load(folder / f"{name}.npy", mmap_mode="r", allow_pickle=False)
        return a.view(np.ndarray)  # a plain read-only ndarray over the mapping

    try:
        d = meta["dem"]
        elevation = array("elevation")
        dem = DEM(
            elevation=elevation,
            transform=Affine(*d["transform"]),
            crs=CRS.from_wkt(d["crs_wkt"]),
            vertical_unit=VerticalUnit(d["vertical_unit"]),
            nodata=nodata_from_json(d["nodata"]),
            source_dtype=d["source_dtype"],
            path=d["path"],
            vertical_unit_source=d["vertical_unit_source"],
        )
        values: dict = {}
        for name, kind in kinds.items():
            if kind == "array":
                values[name] = elevation if name == "elevation" else array(name)
            elif kind == "depressions":
                with np.load(folder / f"{name}.npz", allow_pickle=False) as z:
                    cols = {c.name: np.array(z[c.name]) for c in dataclasses.fields(DepressionTable)}
                values[name] = DepressionTable(**cols)
            else:
                values[name] = meta["result_scalars"][name]
        result = SpillResult(**values)
        pyramid = [array(f"hillshade_{k}") for k in range(int(meta["hillshade_levels"]))]
        tints = [array(f"tint_{k}") for k in range(int(meta["tint_levels"]))]
        row_areas = array("row_areas")
    except (OSError, KeyError, ValueError, TypeError):
        raise StaleArrays("the stored results were made by another version of Sillmark "
                          "or are incomplete") from None
    if row_areas.shape != (dem.rows,):
        raise StaleArrays("the stored cell areas do not match the grid")
    # Seed the DEM's cached cell areas with the stored ones (same values, no recomputation).
    dem.__dict__["row_areas"] = row_areas
    if len(tints) != len(pyramid):
        raise StaleArrays("the stored relief tint does not match the hillshade")
    return Stored(dem=dem, result=result, pyramid=pyramid, tints=tints, meta=meta)
