"""The result arrays of a run as .npy files, and reading them back memory-mapped.

The worker saves every array field of :class:`sillmark.engine.flood.SpillResult`, the
depression table, the DEM's georeferencing and the hillshade pyramid into
``runs/<run>/arrays/``; the server maps them read-only (``numpy.load`` with
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


def save(folder: Path, dem: DEM, result: SpillResult, pyramid: list[np.ndarray],
         tints: list[np.ndarray], extra: dict) -> None:
    """Write everything into ``folder`` atomically (a temporary folder, then a rename)."""
    folder = Path(folder)
    tmp = folder.with_name(folder.name + ".tmp")
    if tmp.exists():
        shutil.rmtree(tmp)
    tmp.mkdir(parents=True)
    kinds: dict[str, str] = {}
    scalars: dict = {}
    for f in dataclasses.fields(SpillResult):
        value = getattr(result, f.name)
        if isinstance(value, np.ndarray):
            np.save(tmp / f"{f.name}.npy", np.ascontiguousarray(value), allow_pickle=False)
            kinds[f.name] = "array"
        elif isinstance(value, DepressionTable):
            np.savez(tmp / f"{f.name}.npz", **{c: getattr(value, c) for c in value.columns})
            kinds[f.name] = "depressions"
        elif isinstance(value, (bool, int, float, str)) or value is None:
            scalars[f.name] = value
            kinds[f.name] = "scalar"
        else:  # pragma: no cover - a new kind of field: refuse rather than lose it
            raise TypeError(f"cannot store SpillResult.{f.name} of type {type(value).__name__}")
    np.save(tmp / "row_areas.npy", np.ascontiguousarray(dem.row_areas), allow_pickle=False)
    for k, level in enumerate(pyramid):
        np.save(tmp / f"hillshade_{k}.npy", level, allow_pickle=False)
    for k, level in enumerate(tints):
        np.save(tmp / f"tint_{k}.npy", level, allow_pickle=False)
    t = dem.transform
    meta = {
        "format": FORMAT,
        "result_fields": kinds,
        "result_scalars": scalars,
        "dem": {
            "transform": [t.a, t.b, t.c, t.d, t.e, t.f],
            "crs_wkt": dem.crs.to_wkt(),
            "vertical_unit": dem.vertical_unit.value,
            "vertical_unit_source": dem.vertical_unit_source,
            "nodata": nodata_as_json(dem.nodata),
            "source_dtype": dem.source_dtype,
            "path": dem.path,
            "shape": list(dem.shape),
        },
        "hillshade_levels": len(pyramid),
        "tint_levels": len(tints),
        **extra,
    }
    (tmp / META).write_text(json.dumps(meta, allow_nan=False), encoding="utf-8")
    old = folder.with_name(folder.name + ".old")
    if folder.exists():
        os.replace(folder, old)
    os.replace(tmp, folder)
    if old.exists():
        shutil.rmtree(old, ignore_errors=True)


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
