"""The files of a scenario compared with the base at one level.

:func:`write_comparison` writes, into one folder:

- ``scenario_compare_<level>.tif``: a Cloud-Optimized GeoTIFF (uint8) of the
  compare codes of :mod:`sillmark.products.scenario_compare` (0 nodata, 1 dry
  in both, 2 wet in both, 3 newly flooded, 4 newly protected), the caution,
  level, datum and code meanings in its tags;
- ``scenario_areas_<level>.csv``: cells and area of each code (m², ha, and
  ft², acres on a site whose heights are in feet);
- ``scenario_assets_<level>.csv`` (when the site has assets) and
  ``scenario_depressions.csv``: onset stage in the base and in the scenario
  and its change, for every asset and every listed depression of the base;
- ``scenario_edits.geojson``: the edits the scenario was analysed with;
- ``README.txt``: what each file holds, units, datum and the caution.

Every CSV has its header on the first line (:func:`sillmark.io.csv_tables.write_table_csv`).
"""

from __future__ import annotations

import dataclasses
import json
import os
import secrets
import zipfile
from pathlib import Path
from typing import Any, Callable

import numpy as np

from sillmark import SCREENING_CAUTION
from sillmark.io.atomic import atomic_output
from sillmark.io.csv_tables import write_table_csv
from sillmark.io.geotiff import write_geotiff
from sillmark.io.readme import README_NAME, write_readme
from sillmark.io.stage_files import level_label
from sillmark.products.scenario_compare import (
    COMPARE_CODE_NAMES,
    OnsetChanges,
    ScenarioComparison,
)
from sillmark.units import NO_DATUM, area_units, unit_of, unit_suffix

__all__ = ["ScenarioFileNames", "scenario_file_names", "write_comparison", "zip_folder",
           "CODES_TAG"]

#: The ``COMPARE_CODES`` tag of the compare GeoTIFF: each code and its meaning.
CODES_TAG = "; ".join(f"{k} {v}" for k, v in COMPARE_CODE_NAMES.items())


@dataclasses.dataclass(frozen=True)
class ScenarioFileNames:
    """File names of one comparison, in the order they are written."""

    raster: str
    areas: str
    assets: str
    depressions: str = "scenario_depressions.csv"
    edits: str = "scenario_edits.geojson"


def scenario_file_names(level, unit) -> ScenarioFileNames:
    """The names of the files of a comparison at ``level``.

    >>> scenario_file_names(47.6, "m").raster
    'scenario_compare_47.60m.tif'
    """
    label = level_label(level, unit)
    return ScenarioFileNames(raster=f"scenario_compare_{label}.tif",
                             areas=f"scenario_areas_{label}.csv",
                             assets=f"scenario_assets_{label}.csv")


def _areas_columns(comparison: ScenarioComparison, unit) -> dict:
    names = list(COMPARE_CODE_NAMES.values())
    m2 = np.array([comparison.area_m2[n] for n in names])
    units = area_units(unit)
    columns = {
        "code": np.array(list(COMPARE_CODE_NAMES), np.int64),
        "ground": np.array(names, dtype=object),
        "cells": np.array([comparison.cells[n] for n in names], np.int64),
        "area_m2": m2,
        "area_ha": m2 / 1e4,
    }
    if not units.is_metric:
        columns[f"area_{units.small_area_key}"] = units.small(m2)
        columns[f"area_{units.large_area_key}"] = units.large(m2)
    return columns


def _state_words(wet: np.ndarray, known: np.ndarray) -> np.ndarray:
    return np.where(~known, "", np.where(wet, "wet", "dry")).astype(object)


def change_columns(changes: OnsetChanges, level, unit, lead: dict[str, Any]) -> dict:
    """The columns of a change table: ``lead`` (names, positions), then the onset stage
    in the base and the scenario, its change and the state of each place at ``level``."""
    v = unit_suffix(unit)
    wet_before, wet_after = changes.states(level)
    return {
        **{k: np.asarray(val) for k, val in lead.items()},
        f"onset_base_{v}": changes.before,
        f"onset_scenario_{v}": changes.after,
        f"change_{v}": changes.change,
        "state_base": _state_words(wet_before, ~np.isnan(changes.before)),
        "state_scenario": _state_words(wet_after, ~np.isnan(changes.after)),
    }


def write_comparison(
    folder: str | os.PathLike,
    *,
    grid: Any,
    comparison: ScenarioComparison,
    codes: Callable[[int, int], np.ndarray],
    scenario_name: str,
    edits: dict,
    depressions: tuple[dict, OnsetChanges],
    assets: tuple[dict, OnsetChanges] | None = None,
    vertical_datum: str | None = None,
    connectivity: int | None = None,
) -> list[Path]:
    """Write every file of one comparison into ``folder`` (see the module docstring).

    Parameters
    ----------
    folder : path
        Created if missing.
    grid : DEM or DEMGrid
        The site's grid (CRS, transform, vertical unit).
    comparison : ScenarioComparison
        Counts and areas at the level.
    codes : callable
        ``codes(r0, r1)``: rows ``r0:r1`` of the compare codes.
    scenario_name : str
    edits : dict
        The scenario's edits as a GeoJSON FeatureCollection.
    depressions, assets : (lead columns, OnsetChanges)
        Names and positions of the places (``lead``), and their changes.
    vertical_datum : str, optional
    connectivity : int, optional

    Returns
    -------
    list of Path
        The files written, README.txt last.
    """
    out = Path(folder)
    out.mkdir(parents=True, exist_ok=True)
    unit = unit_of(grid)
    level = comparison.level
    names = scenario_file_names(level, unit)
    datum = vertical_datum or NO_DATUM
    paths = [write_geotiff(
        out / names.raster, grid, dtype="uint8", nodata=0, block=codes,
        layer="scenario_compare",
        description=f"scenario {scenario_name!r} against the base at {level:.2f} {unit.symbol} "
                    f"({datum}): {CODES_TAG}",
        band_unit="",
        extra_tags={"COMPARE_CODES": CODES_TAG, "COMPARE_LEVEL": f"{level:.6g}",
                    "SCENARIO": scenario_name, "VERTICAL_DATUM": datum})]
    paths.append(write_table_csv(out / names.areas, _areas_columns(comparison, unit)))
    if assets is not None:
        lead, changes = assets
        paths.append(write_table_csv(out / names.assets, change_columns(changes, level, unit, lead)))
    lead, changes = depressions
    paths.append(write_table_csv(out / names.depressions, change_columns(changes, level, unit, lead)))
    with atomic_output(out / names.edits) as tmp:
        document = {**edits, "caution": SCREENING_CAUTION}
        tmp.write_text(json.dumps(document, indent=1), encoding="utf-8")
    paths.append(out / names.edits)
    notes = [f"Scenario {scenario_name!r} compared with the base analysis of the same DEM and "
             f"outlets at the outlet water level {level:.2f} {unit.symbol} ({datum}).",
             "A cell is wet when its onset stage is at most the level. Newly flooded: dry in "
             "the base, wet with the edits; newly protected: wet in the base, dry with the edits.",
             "Depressions are those of the base, each matched in the scenario by its pit (its "
             "lowest cell): the onset stages are read at the pit in both."]
    paths.append(write_readme(out, [p.name for p in paths], grid=grid,
                              title=f"scenario {scenario_name!r} compared with the base",
                              vertical_datum=vertical_datum, connectivity=connectivity,
                              notes=notes))
    return paths


def zip_folder(folder: str | os.PathLike, path: str | os.PathLike) -> Path:
    """Zip the files directly in ``folder`` (README.txt first) into ``path``, atomically."""
    folder, path = Path(folder), Path(path)
    files = sorted((f for f in folder.iterdir()
                    if f.is_file() and not f.name.startswith(".") and f.suffix != ".zip"),
                   key=lambda f: (f.name != README_NAME, f.name))
    tmp = path.with_name(f".{path.stem}.{secrets.token_hex(6)}.tmp")
    try:
        with zipfile.ZipFile(tmp, "w", compression=zipfile.ZIP_DEFLATED) as zf:
            for f in files:
                zf.write(f, arcname=f.name)
        os.replace(tmp, path)
    finally:
        tmp.unlink(missing_ok=True)
    return path
