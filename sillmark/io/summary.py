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
from sillmark.units import own_unit_columns, unit_of

if TYPE_CHECKING:  # pragma: no cover
    from sillmark.engine.flood import SpillResult
    from sillmark.grid.dem import DEM
    from sillmark.grid.outlets import Outlets
    from sillmark.products.significance import Significance, SiteMinimum


#: Prefix of the temporary folder a run writes into before its files are moved
#: into the output folder (:func:`sillmark.run.analyse`); a summary written
#: there describes the output folder, its parent.
RUN_FOLDER_PREFIX = ".sillmark-run-"


def dem_reference(dem_path, summary_path: str | os.PathLike) -> str | None:
    """How ``summary.json`` names the DEM: its path relative to the results folder.

    Never an absolute path, so a summary handed to someone else (or served by
    the web app) does not show where the files sit on the machine that wrote
    it; ``../dem.tif`` still finds the DEM from the folder. Where no relative
    path exists (another drive), only the file name is kept. None without a DEM file.
    """
    if dem_path is None:
        return None
    folder = Path(os.path.abspath(summary_path)).parent
    if folder.name.startswith(RUN_FOLDER_PREFIX):
        folder = folder.parent
    try:
        return Path(os.path.relpath(os.path.abspath(dem_path), folder)).as_posix()
    except ValueError:
        return Path(dem_path).name


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


_FILE_ORDER = {name: k for k, name in enumerate(FILE_NAMES)}


def file_rank(name: str) -> float:
    """Where ``name`` stands in :data:`FILE_NAMES`: a vector layer written as GeoPackage
    (``depressions.gpkg``) where its GeoJSON name does; any other file just before
    ``summary.json``.

    >>> [file_rank(n) for n in ("onset_stage.tif", "depressions.gpkg", "x.csv", "summary.json")]
    [0, 5, 9.5, 10]
    """
    stem = name[: -len(".gpkg")] if name.endswith(".gpkg") else None
    if stem is not None and f"{stem}.geojson" in _FILE_ORDER:
        return _FILE_ORDER[f"{stem}.geojson"]
    return _FILE_ORDER.get(name, len(FILE_NAMES) - 1.5)


def _summary(result: "SpillResult", dem: "DEM", outlets: "Outlets", files: list[str],
             path: Path, significance: dict | None = None) -> dict:
    return _summary_payload(
        path, result.depressions, dem, connectivity=result.connectivity,
        unreached_cells=result.unreached_cells,
        valid_cells=int(np.count_nonzero(~np.isnan(result.elevation))),
        outlet_sources=outlets.sources, outlet_count=outlets.count, files=files,
        significance=significance,
    )


def significance_member(sig: "Significance", *, all_depressions: int, accuracy_stated: bool,
                        full_inventory: bool = False) -> dict:
    """The ``significance`` member of ``summary.json``: the minimum, where it comes from,
    and the counts.

    ``accuracy_stated``: the vertical accuracy was given by the user (else it is
    :data:`sillmark.products.significance.DEFAULT_VERTICAL_ACCURACY_M`).
    """
    return significance_counts_member(
        sig.minimum, significant=len(sig),
        significant_top=int(np.count_nonzero(sig.table.parent == 0)),
        hierarchy_nodes=int(sig.significant.shape[0]), all_depressions=all_depressions,
        accuracy_stated=accuracy_stated, full_inventory=full_inventory)


def significance_counts_member(minimum: "SiteMinimum", *, significant: int, significant_top: int,
                               hierarchy_nodes: int, all_depressions: int,
                               accuracy_stated: bool, full_inventory: bool = False) -> dict:
    """:func:`significance_member` from the minimum and the counts alone.

    For a hierarchy built in windows of depressions (the tiled engine), where
    no one process holds the whole :class:`~sillmark.products.significance.Significance`:
    ``significant`` depressions in all, ``significant_top`` of them not nested
    in another, of ``hierarchy_nodes`` nodes and ``all_depressions`` depressions.
    """
    from sillmark.products.significance import (
        DEFAULT_VERTICAL_ACCURACY_M,
        DEPTH_PER_ACCURACY,
    )

    m = minimum
    unit = m.unit
    if np.isnan(m.vertical_accuracy):
        source = "given directly as a depth"
        accuracy = None
    else:
        factor = m.min_depth / m.vertical_accuracy
        times = f"{factor:.6g} x" if not np.isclose(factor, DEPTH_PER_ACCURACY) else \
            f"{DEPTH_PER_ACCURACY:g} x"
        if accuracy_stated:
            source = (f"{times} the stated vertical accuracy of the DEM, "
                      f"{m.vertical_accuracy:.6g} {unit.value}")
        else:
            source = (f"{times} the default vertical accuracy {DEFAULT_VERTICAL_ACCURACY_M:g} m, "
                      "usual for airborne lidar (a value recalled from memory, not a cited "
                      "standard); state the survey's own accuracy to change it")
        accuracy = {"value": float(m.vertical_accuracy), "unit": unit.value,
                    "stated": bool(accuracy_stated)}
    return {
        "min_depth": {"value": float(m.min_depth), "unit": unit.value},
        "min_area_m2": float(m.min_area_m2),
        "min_volume_m3": float(m.min_volume_m3),
        "vertical_accuracy": accuracy,
        "source": source,
        "full_inventory": bool(full_inventory),
        "counts": {
            "significant": int(significant),
            "significant_top": int(significant_top),
            "all_depressions": int(all_depressions),
            "hierarchy_nodes": int(hierarchy_nodes),
        },
    }


def _summary_payload(path: Path, table, dem: "DEM", *, connectivity: int, unreached_cells: int,
                     valid_cells: int, outlet_sources, outlet_count: int, files: list[str],
                     engine: dict | None = None, significance: dict | None = None) -> dict:
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
    depressions.update(own_unit_columns(unit, area_m2=area_m2, volume_m3=volume_m3,
                                        area_name="total_area", volume_name="total_volume"))
    return {
        "sillmark_version": __version__,
        "created_utc": datetime.datetime.now(datetime.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ"),
        "caution": SCREENING_CAUTION,
        "dem": dem_reference(getattr(dem, "path", None), path),
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
        **({"significance": significance} if significance else {}),
    }


def write_table_summary(
    table, dem: "DEM", path: str | os.PathLike, *, connectivity: int, unreached_cells: int,
    valid_cells: int, outlet_sources, outlet_count: int, files: list[str] | None = None,
    engine: dict | None = None, significance: dict | None = None, curves: dict | None = None,
) -> Path:
    """:func:`write_summary` from a :class:`~sillmark.engine.flood.DepressionTable` and counts.

    For engines that never hold a :class:`~sillmark.engine.flood.SpillResult` (the tiled
    engine); ``engine`` is written as the member ``engine`` (how the run was made).
    ``significance`` and ``curves`` as for :func:`write_summary`.
    """
    final = Path(path)
    names = list(files or [])
    if final.name not in names:
        names.append(final.name)
    payload = _summary_payload(
        final, table, dem, connectivity=connectivity, unreached_cells=unreached_cells,
        valid_cells=valid_cells, outlet_sources=outlet_sources, outlet_count=outlet_count,
        files=names, engine=engine, significance=significance,
    )
    if curves is not None:
        payload["depression_curves"] = curves
    return write_json(final, payload)


def write_summary(
    result: "SpillResult", dem: "DEM", outlets: "Outlets", path: str | os.PathLike,
    *, files: list[str] | None = None, significance: dict | None = None,
    curves: dict | None = None,
) -> Path:
    """Write ``summary.json``: grid, outlets, totals in SI, caution, version, time, files.

    ``files`` lists the names of the other files of the run; the summary adds its own.
    ``significance`` (from :func:`significance_member`) is written as the member
    ``significance``. The depression totals are over every depression, whatever
    the significance minimum: they are exact.
    ``curves`` (e.g. :func:`sillmark.io.hierarchy_writer.curves_summary`) goes in as
    ``depression_curves``: the rows of the curves file, its cap and any thinning.
    """
    final = Path(path)
    names = list(files or [])
    if final.name not in names:
        names.append(final.name)
    payload = _summary(result, dem, outlets, names, final, significance)
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

        The summary names the DEM relative to its own folder
        (:func:`dem_reference`); an older summary's path relative to where
        the analysis ran is tried too. ``instead`` ends the message with what
        the caller can do instead.
        """
        if not self.dem:
            raise InvalidParameter(f"{self.path} records no DEM file; {instead}")
        beside = self.path.parent / self.dem
        if os.path.isfile(beside):
            return str(beside)
        if not os.path.isfile(self.dem):
            raise InvalidParameter(
                f"the DEM recorded in {self.path} ({self.dem}, from the results folder) is "
                f"not found from here; move it back, or {instead}"
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


