"""``summary.json``: what a results folder holds (grid, outlets, totals, version, time,
files), written last, and read back in one place.
"""

from __future__ import annotations

import dataclasses
import datetime
import json
import os
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from sillmark import SCREENING_CAUTION, __version__
from sillmark.errors import InvalidParameter
from sillmark.grid.crs import crs_unit_name, full_crs, horizontal_crs
from sillmark.io.geotiff import DEPRESSION_ID_NODATA, FLOOD_TREE_NODATA
from sillmark.io.json_values import shortest_float32, write_json
from sillmark.units import ACRE_FOOT_M3, unit_of

if TYPE_CHECKING:  # pragma: no cover
    from sillmark.engine.flood import SpillResult
    from sillmark.grid.dem import DEM
    from sillmark.grid.outlets import Outlets


#: File names :func:`write_results` writes, in the order it writes them.
FILE_NAMES = (
    "onset_stage.tif",
    "fill_depth.tif",
    "depression_id.tif",
    "flood_tree.tif",
    "depressions.csv",
    "depressions.geojson",
    "spill_points.geojson",
    "depression_hierarchy.csv",
    "depression_hierarchy.json",
    "depression_curves.csv",
    "summary.json",
)


def _summary(result: "SpillResult", dem: "DEM", outlets: "Outlets", files: list[str]) -> dict:
    return _summary_payload(
        result.depressions, dem, connectivity=result.connectivity,
        unreached_cells=result.unreached_cells,
        valid_cells=int(np.count_nonzero(~np.isnan(result.elevation))),
        outlet_sources=outlets.sources, outlet_count=outlets.count, files=files,
    )


def _summary_payload(table, dem: "DEM", *, connectivity: int, unreached_cells: int,
                     valid_cells: int, outlet_sources, outlet_count: int, files: list[str],
                     engine: dict | None = None) -> dict:
    t = table
    unit = unit_of(dem)
    crs = horizontal_crs(dem)
    full = full_crs(dem)
    rows, cols = dem.shape
    tr = dem.transform
    area_m2 = float(np.sum(t.area_m2, dtype=np.float64))
    volume_m3 = float(np.sum(t.volume_m2_vu, dtype=np.float64)) * unit.metres
    if len(t):
        k = int(np.argmax(t.spill_elevation))
        highest = {
            "value": shortest_float32(t.spill_elevation[k]),
            "unit": unit.value,
            "depression_id": int(t.id[k]),
        }
    else:
        highest = None
    depressions = {
        "count": len(t),
        "total_area_m2": area_m2,
        "total_area_ha": area_m2 / 1e4,
        "total_volume_m3": volume_m3,
        "highest_spill_elevation": highest,
    }
    if unit.is_feet:
        depressions["total_volume_acre_ft"] = volume_m3 / ACRE_FOOT_M3
    return {
        "sillmark_version": __version__,
        "created_utc": datetime.datetime.now(datetime.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ"),
        "caution": SCREENING_CAUTION,
        "dem": None if getattr(dem, "path", None) is None else str(dem.path),
        "grid": {
            "rows": rows,
            "cols": cols,
            "cell_size": {"x": abs(tr.a), "y": abs(tr.e), "unit": crs_unit_name(crs)},
            "transform": [tr.a, tr.b, tr.c, tr.d, tr.e, tr.f],
            "crs": {"epsg": full.to_epsg(), "name": full.name, "wkt": full.to_wkt()},
            "horizontal_crs_epsg": crs.to_epsg(),
            "is_geographic": bool(crs.is_geographic),
            "vertical_unit": unit.value,
            "valid_cells": int(valid_cells),
        },
        "outlets": {"sources": list(outlet_sources), "cell_count": int(outlet_count)},
        "connectivity": int(connectivity),
        "depressions": depressions,
        "unreached_cells": int(unreached_cells),
        "nodata": {
            "onset_stage.tif": "NaN",
            "fill_depth.tif": "NaN",
            "depression_id.tif": DEPRESSION_ID_NODATA,
            "flood_tree.tif": FLOOD_TREE_NODATA,
        },
        "files": files,
        **({"engine": engine} if engine else {}),
    }


def write_table_summary(
    table, dem: "DEM", path: str | os.PathLike, *, connectivity: int, unreached_cells: int,
    valid_cells: int, outlet_sources, outlet_count: int, files: list[str] | None = None,
    engine: dict | None = None,
) -> Path:
    """:func:`write_summary` from a :class:`~sillmark.engine.flood.DepressionTable` and counts.

    For engines that never hold a :class:`~sillmark.engine.flood.SpillResult` (the tiled
    engine); ``engine`` is written as the member ``engine`` (how the run was made).
    """
    final = Path(path)
    names = list(files or [])
    if final.name not in names:
        names.append(final.name)
    return write_json(final, _summary_payload(
        table, dem, connectivity=connectivity, unreached_cells=unreached_cells,
        valid_cells=valid_cells, outlet_sources=outlet_sources, outlet_count=outlet_count,
        files=names, engine=engine,
    ))


def write_summary(
    result: "SpillResult", dem: "DEM", outlets: "Outlets", path: str | os.PathLike,
    *, files: list[str] | None = None, curves: dict | None = None,
) -> Path:
    """Write ``summary.json``: grid, outlets, totals in SI, caution, version, time, files.

    ``files`` lists the names of the other files of the run; the summary adds its own.
    ``curves`` (e.g. :func:`sillmark.io.hierarchy_writer.curves_summary`) goes in as
    ``depression_curves``: the rows of the curves file, its cap and any thinning.
    """
    final = Path(path)
    names = list(files or [])
    if final.name not in names:
        names.append(final.name)
    payload = _summary(result, dem, outlets, names)
    if curves is not None:
        payload["depression_curves"] = curves
    return write_json(final, payload)


@dataclasses.dataclass(frozen=True)
class RunSummary:
    """What a folder's ``summary.json`` says about the analysis that wrote it."""

    path: Path
    dem: str
    shape: tuple[int, int]
    transform: tuple[float, ...]
    vertical_unit: str
    crs: str
    connectivity: int
    outlet_sources: tuple[str, ...]
    outlet_cells: int

    def dem_file(self, *, instead: str = "give the DEM file") -> str:
        """The DEM's path, checked to exist; InvalidParameter if it cannot be found from here.

        ``instead`` ends the message with what the caller can do instead.
        """
        if not self.dem:
            raise InvalidParameter(f"{self.path} records no DEM file; {instead}")
        if not os.path.isfile(self.dem):
            raise InvalidParameter(
                f"the DEM recorded in {self.path} ({self.dem}) is not found from here; run "
                f"from the folder 'sillmark analyse' ran in, or {instead}"
            )
        return self.dem

    def same_grid(self, shape: tuple[int, int], transform) -> bool:
        """Whether a DEM's shape and affine transform are the analysed grid's."""
        tr = transform
        return (tuple(shape) == self.shape
                and (tr.a, tr.b, tr.c, tr.d, tr.e, tr.f) == self.transform)


def read_summary(folder: str | os.PathLike) -> RunSummary:
    """Read the ``summary.json`` that :func:`write_summary` (or the tiled engine) wrote.

    Raises InvalidParameter when the folder has none or it is not one Sillmark wrote.
    """
    path = Path(folder) / "summary.json"
    if not path.is_file():
        raise InvalidParameter(
            f"the folder {Path(folder)} holds no summary.json; give a DEM file or a folder "
            "written by 'sillmark analyse'"
        )
    try:
        summary = json.loads(path.read_text(encoding="utf-8"))
        grid = summary["grid"]
        epsg = grid["crs"]["epsg"]
        return RunSummary(
            path=path,
            dem=str(summary["dem"] or ""),
            shape=(int(grid["rows"]), int(grid["cols"])),
            transform=tuple(float(v) for v in grid["transform"]),
            vertical_unit=str(grid["vertical_unit"]),
            crs=f"EPSG:{int(epsg)}" if epsg is not None else str(grid["crs"]["wkt"]),
            connectivity=int(summary["connectivity"]),
            outlet_sources=tuple(str(v) for v in summary["outlets"]["sources"]),
            outlet_cells=int(summary["outlets"]["cell_count"]),
        )
    except (ValueError, KeyError, TypeError, UnicodeDecodeError, AttributeError):
        raise InvalidParameter(
            f"{path} is not a summary written by 'sillmark analyse'; run the analysis again, "
            "or give the DEM file"
        ) from None


