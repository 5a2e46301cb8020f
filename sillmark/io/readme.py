"""``README.txt``: the plain-text guide written into every results folder and ZIP.

The CSV tables start with their header row, so that a spreadsheet or
``pandas.read_csv`` opens them as they are; what they and the other files hold,
the units, the vertical datum, the significance minimum of the run and the
screening caution are said once, here, in a short text beside them.

:func:`readme_text` builds the text from the names of the files it describes
(known names and name patterns of :mod:`sillmark.io.export`,
:mod:`sillmark.io.stage_files` and :mod:`sillmark.io.asset_files`; any other
name is listed without a description), and :func:`write_readme` writes it
atomically.
"""

from __future__ import annotations

import os
import re
import textwrap
from collections.abc import Iterable, Mapping
from pathlib import Path
from typing import Any

from sillmark import SCREENING_CAUTION, __version__
from sillmark.grid.crs import crs_label
from sillmark.io.atomic import atomic_output
from sillmark.units import VerticalUnit, unit_name, unit_suffix

__all__ = ["README_NAME", "NO_DATUM_TEXT", "describe_file", "readme_text", "write_readme"]

#: Name of the guide in a results folder and in a ZIP.
README_NAME = "README.txt"
#: What a level is measured from when the user named no vertical datum.
NO_DATUM_TEXT = "datum not stated"

_WIDTH = 78

# (pattern of the file name, description). ``{v}`` is the vertical unit's column
# suffix, ``{u}`` its name. The first pattern that matches a name describes it.
_DESCRIPTIONS: tuple[tuple[str, str], ...] = (
    (r"onset_stage\.tif", "GeoTIFF, float32: the onset stage of every cell, the outlet water "
     "level ({u}) at which surface water first reaches it. NaN on nodata and on cells no "
     "outlet reaches."),
    (r"fill_depth\.tif", "GeoTIFF, float32: onset stage minus ground ({u}); 0 outside "
     "depressions."),
    (r"depression_id\.tif", "GeoTIFF, int32: the depression each cell lies in (its id in the "
     "full inventory of the engine; -1 on nodata, 0 in none). Every depression is kept here, "
     "also those below the significance minimum."),
    (r"flood_tree\.tif", "GeoTIFF, uint8: direction code of the neighbour each cell is "
     "flooded from (9 = an outlet, 0 = none)."),
    (r"depressions\.csv", "The listed depressions, one row each (see Significance): pit and "
     "spill point with their elevations (_{v}), spill coordinates in the CRS and in WGS 84 "
     "degrees, spills_to (the depression its overflow reaches next, 0 = an outlet), depth, "
     "plan area (area_m2, area_ha) and storage (volume_m3) full to the spill elevation. "
     "pit_row/pit_col/spill_row/spill_col are 0-based cell indices, rows from the top, for "
     "programs; people read the coordinates."),
    (r"depressions\.(geojson|gpkg)", "The outline of each listed depression, with its row of "
     "depressions.csv. GeoJSON in WGS 84 longitude/latitude (RFC 7946); GeoPackage in the "
     "DEM's CRS, with a spatial index."),
    (r"spill_points\.(geojson|gpkg)", "The spill point of each listed depression (the rim "
     "cell where it overflows) with its spill elevation (_{v}) and spills_to."),
    (r"depression_hierarchy\.csv", "The nested depressions: one row per pit and per pool "
     "formed where pools meet, ids in post-order (children before parent); parent = the node "
     "it merges into, 0 for a whole depression; depression = its id in depression_id.tif."),
    (r"depression_hierarchy\.json", "The same nested depressions as a JSON tree."),
    (r"depression_curves\.csv", "Stage-area and stage-storage curves of the hierarchy's "
     "nodes: area (m2) and storage (m3) of each node's region at each elevation (_{v}) from "
     "its pit to its spill elevation."),
    (r"onset_offset\.tif", "GeoTIFF, float32: the onset offset, how far the whole "
     "water-surface profile must rise ({u}) for surface water to reach the cell; 0 is the "
     "design profile. NaN on nodata and where no path from the river leads."),
    (r"profile_level\.tif", "GeoTIFF, float32: the profile's design water level ({u}) at the "
     "point of the river's centreline nearest the cell."),
    (r"cutoff_stage\.tif", "GeoTIFF, float32: the cut-off stage, the water level ({u}) at "
     "which the cell's last dry route to a refuge goes under (inf: never; -inf: no route at "
     "any level; NaN: nodata, or off the roads given)."),
    (r"cut_off_.+\.tif", "GeoTIFF, uint8: 1 where the ground is dry at that level but every "
     "route from it to a refuge is under water (an island), 0 elsewhere, 255 nodata."),
    (r"cut_off_.+\.geojson", "The ground cut off from every refuge at that level as one "
     "(Multi)Polygon, with its area."),
    (r"(profile|refuges|roads|edits)_input\.geojson", "A copy of the input file the analysis used, "
     "kept so that later commands on this folder use the same one."),
    (r".+\.sld", "OGC SLD 1.0 style of the layer of the same name: the app's depth classes, "
     "colours and symbols, so a desktop GIS opens the layer looking like the map in the app."),
    (r"summary\.json", "Grid, CRS, outlets, connectivity, totals, the significance minimum "
     "and its source, the counts, the caution and the list of files (written last)."),
    (r"depth_.+\.tif", "GeoTIFF, float32: depth of water ({u}) on the ground reached from "
     "the outlets at that water level (level minus ground); NaN elsewhere."),
    (r"water_state_.+\.tif", "GeoTIFF, uint8: 0 nodata, 1 dry, 2 flooded from the outlets, "
     "3 shielded low ground (below the level but no surface path reaches it yet: still at "
     "risk from seepage, local rain or a breach)."),
    (r"flood_extent_.+\.(geojson|gpkg)", "The flooded ground at that level as one "
     "(Multi)Polygon, with its area and volume."),
    (r"shielded_.+\.(geojson|gpkg)", "The shielded low ground at that level as one "
     "(Multi)Polygon, with its area and the volume it would hold if reached."),
    (r"depressions_at_.+\.csv", "Every depression of the analysis with its state at that level "
     " (dry: level at or below the pit; cut-off: between pit and spill elevation, "
     "no surface path reaches it; overtopped: at or above the spill elevation) and its "
     "freeboard_{v} (spill elevation minus level, negative once overtopped)."),
    (r"stage_table\.csv", "Flooded and shielded area (m2, ha) and volume (m3) against the "
     "outlet water level (level_{v})."),
    (r"assets_.+\.csv", "One row per asset at that level: state (dry, flooded, shielded), "
     "depth_{v}, onset stage, freeboard_{v}, and the controlling sill (the highest point "
     "of the route from the outlets). Empty figures: outside the DEM, on nodata or not "
     "reached (see status). route_length: the route's length on the ground (diagonal "
     "steps count the cell diagonal; true distance on a lon/lat DEM). With refuges: cutoff_stage_{v}, the island window island_from_{v} "
     "to island_to_{v} (dry but cut off from every refuge), island_now, and cut_at_x/y, where "
     "the last route goes under first."),
    (r"assets_.+\.geojson", "The assets as points (WGS 84), with their routes from the "
     "outlets and controlling sills; feature_kind tells them apart."),
    (r"scenario_compare_.+\.tif", "GeoTIFF, uint8: a scenario (the DEM with its edits) against "
     "the base at that level: 0 nodata, 1 dry in both, 2 wet in both, 3 newly flooded (dry in "
     "the base, wet with the edits), 4 newly protected (wet in the base, dry with the edits)."),
    (r"scenario_areas_.+\.csv", "Cells and area (m2, ha) of each code of the compare raster "
     "at that level."),
    (r"scenario_(assets_.+|depressions)\.csv", "One row per asset or per depression of the "
     "base: onset stage in the base (onset_base_{v}) and with the edits (onset_scenario_{v}), "
     "change_{v} (positive: water reaches it later, negative: sooner) and its state (wet or "
     "dry) at that level in each. A depression is read at its pit (lowest cell)."),
    (r"scenario_edits\.geojson", "The edits (culverts, flap valves, barriers, breaches) the "
     "scenario was analysed with, as sillmark analyse --edits reads them."),
    (r"what_if_raise_.+\.csv", "For each asset behind a controlling sill: its onset stage "
     "now and with that sill raised (onset_before_{v}, onset_after_{v}, gain_{v}), one sill "
     "at a time."),
)
_COMPILED = tuple((re.compile(pattern + r"\Z"), text) for pattern, text in _DESCRIPTIONS)


def describe_file(name: str, unit: VerticalUnit | str) -> str:
    """What the result file ``name`` holds, in a sentence or two ("" for an unknown name).

    Examples
    --------
    >>> describe_file("stage_table.csv", "m")[:38]
    'Flooded and shielded area (m2, ha) and'
    >>> describe_file("notes.docx", "m")
    ''
    """
    unit = VerticalUnit.parse(unit)
    for pattern, text in _COMPILED:
        if pattern.match(name):
            return text.format(v=unit_suffix(unit), u=unit_name(unit))
    return ""


def readme_text(
    files: Iterable[str],
    *,
    grid: Any,
    title: str,
    vertical_datum: str | None = None,
    connectivity: int | None = None,
    significance: Mapping[str, Any] | None = None,
    notes: Iterable[str] = (),
) -> str:
    """The text of ``README.txt`` for a folder (or ZIP) holding ``files``.

    Parameters
    ----------
    files : iterable of str
        The names of the files beside the guide, in the order to list them.
    grid : DEM or DEMGrid
        The site's grid: its vertical unit and CRS.
    title : str
        What the folder is (e.g. ``"analysis of site.tif"``).
    vertical_datum : str, optional
        What the levels are measured from; :data:`NO_DATUM_TEXT` when None or empty.
    connectivity : int, optional
    significance : mapping, optional
        The ``significance`` member of ``summary.json``
        (:func:`sillmark.io.summary.significance_member`): the minimum, its
        source and the counts.
    notes : iterable of str
        Further lines (e.g. which assets a what-if passed over).

    The text holds no clock time, so the same results give the same guide
    (``summary.json`` says when a run was made).
    """
    unit = VerticalUnit.parse(grid.vertical_unit)
    datum = (vertical_datum or "").strip() or NO_DATUM_TEXT
    out: list[str] = [f"Sillmark {__version__}: {title}", ""]
    out += _wrapped(f"CAUTION: {SCREENING_CAUTION}")
    out += ["", "Units"]
    out += _wrapped(f"Elevations, levels and depths are in {unit_name(unit)} ({unit.value}), "
                    f"measured from: {datum}. Column names end in their unit (_{unit_suffix(unit)}, "
                    "_m2, _ha, _m3, _deg" + (", _acre_ft" if unit.is_feet else "") + ").", indent="  ")
    out += _wrapped(f"Coordinates (x, y) are in the DEM's CRS: {crs_label(grid)}; lon/lat in "
                    "WGS 84 degrees.", indent="  ")
    if connectivity is not None:
        out += _wrapped(f"Cells connect to their {int(connectivity)} neighbours.", indent="  ")
    if significance:
        out += ["", "Significance"]
        out += [f"  {line}" for line in significance_lines(significance)]
    out += ["", "Files"]
    for name in files:
        out.append(f"  {name}")
        about = describe_file(name, unit)
        if about:
            out += _wrapped(about, indent="      ")
    notes = [str(n) for n in notes]
    if notes:
        out += ["", "Notes"]
        for note in notes:
            out += _wrapped(note, indent="  ")
    return "\n".join(out) + "\n"


def significance_lines(member: Mapping[str, Any]) -> list[str]:
    """Lines saying the minimum, its source and the counts of a ``significance`` member."""
    depth = member["min_depth"]
    lines = [f"Minimum depth of a depression of its own: {_short(depth['value'])} {depth['unit']} "
             f"({member['source']})."]
    if member.get("min_area_m2"):
        lines.append(f"Minimum area: {_short(member['min_area_m2'])} m2.")
    if member.get("min_volume_m3"):
        lines.append(f"Minimum volume: {_short(member['min_volume_m3'])} m3.")
    counts = member["counts"]
    lines.append(
        f"Significant depressions: {counts['significant']:,} (of them {counts['significant_top']:,} "
        f"whole depressions, the rest nested inside those); depressions in all: "
        f"{counts['all_depressions']:,}, with {counts['hierarchy_nodes']:,} nested pits and pools.")
    if member.get("full_inventory"):
        lines.append("Full inventory: every depression is listed and mapped; the column "
                     "'significant' marks those that reach the minimum.")
    else:
        lines.append("Depressions below the minimum are not listed or mapped on their own; they "
                     "count as part of the smallest significant depression holding them, or of none. "
                     "Onset stage, water levels, areas and volumes stay exact: the DEM is not altered.")
    return [w for line in lines for w in _wrapped(line, indent="")]


def write_readme(folder: str | os.PathLike, files: Iterable[str], **kwargs: Any) -> Path:
    """Write ``README.txt`` into ``folder`` (atomically); ``kwargs`` as for :func:`readme_text`."""
    path = Path(folder) / README_NAME
    text = readme_text([f for f in files if f != README_NAME], **kwargs)
    with atomic_output(path) as tmp:
        with open(tmp, "x", encoding="utf-8", newline="\n") as f:
            f.write(text)
    return path


def _wrapped(text: str, indent: str = "") -> list[str]:
    return textwrap.wrap(text, width=_WIDTH, initial_indent=indent, subsequent_indent=indent,
                         break_on_hyphens=False) or [indent]


def _short(value: float) -> str:
    return f"{float(value):.6g}"
