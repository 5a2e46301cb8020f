"""The ``sillmark`` command line.

``sillmark analyse DEM --out DIR`` reads a DEM, marks its outlets, runs the spill
engine and writes the result files (see :mod:`sillmark.io.export`), then prints a
short summary. ``sillmark stage SOURCE --level H --out DIR`` writes the
water-level maps at outlet water levels and the stage table (see
:mod:`sillmark.io.stage_files`), from a DEM or from the folder ``analyse`` wrote;
with ``--assets FILE`` also each asset's state, depth and controlling sill at
every level, and with ``--raise-sill HEIGHT`` what raising each controlling
sill would gain (see :mod:`sillmark.products.assets`, :mod:`sillmark.io.asset_files`).
Errors Sillmark expects (bad input, unwritable output) end the run with one line
``sillmark: error: ...`` on stderr and exit status 2.

Exit status: 0 on success, 2 on a usage or input error, 130 when interrupted.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import re
import signal
import sys
import textwrap
from collections.abc import Sequence
from pathlib import Path
from typing import TextIO

from sillmark import __version__

PROG = "sillmark"
EXIT_OK = 0
EXIT_ERROR = 2
EXIT_INTERRUPTED = 130


def _wrap(text: str) -> str:
    return textwrap.fill(text, width=78, break_on_hyphens=False)

_DESCRIPTION = (
    "Screening analysis of surface connectivity on a site DEM: for every cell, the "
    "outlet water level at which surface water first reaches it (its onset stage), "
    "the depressions that hold water below their spill points, and the route water "
    "takes from the outlets."
)
_ANALYSE_DESCRIPTION = (
    "Read a DEM, mark its outlets, compute the onset stage, flood tree, depressions "
    "and spill points, and write them to a folder: GeoTIFF rasters (onset_stage, "
    "fill_depth, depression_id, flood_tree), depressions.csv, depressions.geojson, "
    "spill_points.geojson, the nested depressions (depression_hierarchy.csv and "
    ".json), every depression's stage-area and stage-storage curve "
    "(depression_curves.csv) and summary.json."
)
_ANALYSE_EPILOG = (
    _wrap(
        "Outlets are where water enters or leaves the site. 'edge' marks every valid "
        "cell on the border of the grid; 'nodata' marks valid cells next to nodata "
        "(open sea, a masked lake); a FILE is a GeoJSON of water bodies (.geojson, "
        ".json; e.g. a river channel) or a mask raster on the DEM's grid (.tif, "
        "non-zero = outlet). Give --outlet several times to combine them."
    )
    + "\n\n"
    + _wrap(
        "--tiles N runs the same analysis tile by tile on Dask for DEMs larger than memory "
        "(same onset stage, flood tree, depression ids and depression table as the "
        "in-memory engine with N-cell tiles); without --scheduler it starts a local cluster. "
        "It writes the same files as the in-memory engine, each built window by window: "
        "the four rasters, depressions.csv, depressions.geojson, spill_points.geojson, "
        "the hierarchy files and summary.json."
    )
    + "\n\nexamples:\n"
    + "  sillmark analyse site.tif --outlet nodata --outlet edge --out results/site\n"
    + "  sillmark analyse big.tif --tiles 4096 --scheduler tcp://10.0.0.5:8786 --out /shared/big\n\n"
    + _wrap(
        "Exit status: 0 on success, 2 on a usage or input error (one line on stderr), "
        "130 when interrupted."
    )
    + "\n\n"
    + _wrap(
        "Screening analysis only, not a hydraulic model; decisions rest with a licensed "
        "engineer or hydrologist and the local codes."
    )
)


#: Most water levels one ``sillmark stage`` call writes maps for.
MAX_LEVELS = 50
#: A level more than this many times the site's elevation range above its highest
#: ground is taken for a level in the wrong unit (unless --force).
WRONG_UNIT_FACTOR = 10.0

_STAGE_DESCRIPTION = (
    "Write what the site looks like at given outlet water levels: for each level H, "
    "the depth of water reached from the outlets (depth_H.tif), the state of every "
    "cell (water_state_H.tif: dry, flooded or shielded low ground), the flooded and "
    "the shielded outlines (flood_extent_H.geojson, shielded_H.geojson) and every "
    "depression's state and freeboard (depressions_at_H.csv); with --table-step, "
    "flooded and shielded area and volume against level (stage_table.csv). With "
    "--assets, every asset's state, depth, onset stage, route and controlling sill at "
    "each level (assets_H.csv, assets_H.geojson); with --raise-sill, how much later "
    "each asset behind a sill would get wet if that sill were higher "
    "(what_if_raise_HEIGHT.csv)."
)
_STAGE_EPILOG = (
    _wrap(
        "SOURCE is a DEM (the spill engine runs on it first, with --outlet, "
        "--connectivity, --vertical-unit and --crs as for 'sillmark analyse') or a "
        "folder written by 'sillmark analyse'. From a folder, the DEM recorded in its "
        "summary.json is read again and the engine re-run with the folder's outlets "
        "(the outlet cells of its flood_tree.tif) and connectivity; the run is checked "
        "against the folder's onset_stage.tif, so the files are the same as from the DEM. "
        "A folder of the tiled engine ('analyse --tiles') is not re-run: its onset_stage.tif "
        "and depressions.csv are read block by block with the DEM (checked against its "
        "fill_depth.tif), as is a DEM given with --tiles N; the files are the same. "
        "--assets needs the in-memory engine."
    )
    + "\n\n"
    + _wrap(
        "H in the file names is the level in the site's vertical unit with at least "
        "two decimals and the unit: depth_47.60m.tif, depth_-1.25m.tif, "
        "depth_152.50ft.tif, depth_152.50us_ft.tif. A cell is flooded when its onset "
        "stage is at or below H; shielded low ground lies below H but no surface path "
        "reaches it yet (it is still at risk from seepage, local rain or a breach)."
    )
    + "\n\n"
    + _wrap(
        f"At most {MAX_LEVELS} --level values per call. A level below every cell's onset "
        "stage floods nothing (a note says so; the files are still written). A level "
        f"more than {WRONG_UNIT_FACTOR:g} times the site's elevation range above its "
        "highest ground is refused as probably in the wrong unit, unless --force."
    )
    + "\n\n"
    + _wrap(
        "--assets FILE is a CSV with a name column and x, y in the DEM's CRS (or lon, lat "
        "in WGS 84 degrees), optionally kind, or a GeoJSON of Point features; it needs at "
        "least one --level. Assets outside the DEM or on nodata are listed without "
        "figures. --raise-sill HEIGHT (with --assets) raises, one at a time, the "
        "controlling sill of every asset that has one (not its own ground) by HEIGHT in "
        "the site's vertical unit and floods the site again, once per distinct sill; "
        "water may then come another way, over a sill that was higher."
    )
    + "\n\nexamples:\n"
    + "  sillmark stage site.tif --outlet nodata --level 47.6 --level 48.2 --out results/stage\n"
    + "  sillmark stage results/site --level 47.6 --table-step 0.1 --out results/stage\n"
    + "  sillmark stage results/site --level 47.6 --assets assets.csv --raise-sill 0.5 --out results/stage\n\n"
    + _wrap(
        "Exit status: 0 on success, 2 on a usage or input error (one line on stderr), "
        "130 when interrupted."
    )
    + "\n\n"
    + _wrap(
        "Screening analysis only, not a hydraulic model; decisions rest with a licensed "
        "engineer or hydrologist and the local codes."
    )
)


class _UsageError(Exception):
    """Raised by the parser instead of printing usage and exiting."""


class _ParserExit(Exception):
    """Raised by the parser after --help or --version, with the exit status."""

    def __init__(self, status: int) -> None:
        super().__init__(status)
        self.status = status


class _Parser(argparse.ArgumentParser):
    """An ArgumentParser that returns control to :func:`main` instead of exiting."""

    def error(self, message: str) -> None:  # type: ignore[override]
        raise _UsageError(f"{message} (see '{self.prog} --help')")

    def exit(self, status: int = 0, message: str | None = None) -> None:  # type: ignore[override]
        if message:
            self._print_message(message, sys.stderr)
        raise _ParserExit(status)


def _positive_int(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a whole number") from None
    if value < 1:
        raise argparse.ArgumentTypeError(f"{text!r} must be 1 or more")
    return value


def _tile_cells(text: str) -> int:
    from sillmark.engine.plan import MAX_TILE_SIZE

    value = _positive_int(text)
    if value > MAX_TILE_SIZE:
        raise argparse.ArgumentTypeError(f"{text!r} is more than {MAX_TILE_SIZE} cells a side")
    return value


def _connectivity(text: str) -> int:
    if text.strip() in ("4", "8"):
        return int(text)
    raise argparse.ArgumentTypeError(
        f"{text!r} is not a connectivity; use 8 (eight neighbours, the default) or 4"
    )


def _water_level(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        value = math.nan  # refused below with the same message as NaN itself
    if not math.isfinite(value):
        raise argparse.ArgumentTypeError(
            f"{text!r} is not a water level; give a finite number in the site's vertical "
            "unit, e.g. 47.6 or -1.25"
        )
    if abs(value) > 3.4028234663852886e38:  # beyond float32, the precision of elevations
        raise argparse.ArgumentTypeError(f"{text!r} is beyond any elevation a DEM can hold")
    return value


def _level_step(text: str) -> float:
    value = _water_level(text)
    if value <= 0:
        raise argparse.ArgumentTypeError(f"{text!r} is not a level step; give a positive number, e.g. 0.1")
    return value


def _sill_height(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        value = math.nan
    if not (math.isfinite(value) and value > 0):
        raise argparse.ArgumentTypeError(
            f"{text!r} is not a height to raise a sill by; give a positive number in the "
            "site's vertical unit, e.g. 0.5"
        )
    return value


def _crs(text: str) -> str:
    value = text.strip()
    if re.fullmatch(r"\d+(\+\d+)?", value):  # 32633, or 32633+5773 with a vertical CRS
        return f"EPSG:{value}"
    if not value:
        raise argparse.ArgumentTypeError("an empty CRS; give an EPSG code such as 32633")
    return value


def build_parser() -> argparse.ArgumentParser:
    """The argument parser of the ``sillmark`` command (for ``--help`` and tests)."""
    parser = _Parser(
        prog=PROG,
        description=_DESCRIPTION,
        epilog="Run 'sillmark COMMAND --help' for the options of a command.",
    )
    parser.add_argument("--version", action="version", version=f"%(prog)s {__version__}")
    commands = parser.add_subparsers(dest="command", metavar="COMMAND", required=True)

    analyse = commands.add_parser(
        "analyse",
        help="compute onset stage, depressions and spill points of a DEM and write them",
        description=_wrap(_ANALYSE_DESCRIPTION),
        epilog=_ANALYSE_EPILOG,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    analyse.add_argument("dem", metavar="DEM", help="the site DEM, a single-band GeoTIFF or other raster GDAL reads")
    analyse.add_argument(
        "--out", required=True, metavar="DIR",
        help="folder for the result files; created if missing, Sillmark's own file names replaced",
    )
    _add_site_options(analyse, connectivity_default=8)
    _add_tiled_options(analyse, "analyse in tiles of N x N cells (e.g. 4096) on a Dask cluster; "
                       "the same files as without --tiles (the hierarchy files from "
                       "windows of depressions)")
    analyse.set_defaults(run=_run_analyse)

    stage = commands.add_parser(
        "stage",
        help="water-level maps, depths and the stage table at given outlet water levels",
        description=_wrap(_STAGE_DESCRIPTION),
        epilog=_STAGE_EPILOG,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    stage.add_argument(
        "source", metavar="SOURCE",
        help="the site DEM, or the output folder of 'sillmark analyse'",
    )
    stage.add_argument(
        "--level", dest="levels", type=_water_level, action="append", metavar="H",
        help=f"outlet water level in the site's vertical unit (repeatable, at most {MAX_LEVELS})",
    )
    stage.add_argument(
        "--table-step", type=_level_step, default=None, metavar="STEP",
        help="write stage_table.csv with a row every STEP (site's vertical unit)",
    )
    stage.add_argument(
        "--table-from", type=_water_level, default=None, metavar="A",
        help="lowest level of the stage table (default: the lowest onset stage, i.e. the lowest outlet)",
    )
    stage.add_argument(
        "--table-to", type=_water_level, default=None, metavar="B",
        help="highest level of the stage table (default: the highest spill elevation)",
    )
    stage.add_argument(
        "--assets", default=None, metavar="FILE",
        help="assets (CSV with name and x/y or lon/lat columns, or GeoJSON points): "
        "write assets_H.csv and assets_H.geojson for each level",
    )
    stage.add_argument(
        "--raise-sill", type=_sill_height, default=None, metavar="HEIGHT",
        help="with --assets: raise each asset's controlling sill by HEIGHT (site's vertical "
        "unit), flood again, and write what_if_raise_HEIGHT.csv",
    )
    stage.add_argument(
        "--out", required=True, metavar="DIR",
        help="folder for the result files; created if missing, Sillmark's own file names replaced",
    )
    _add_site_options(stage, connectivity_default=None)
    _add_tiled_options(stage, "run the tiled engine on the DEM (as 'analyse --tiles N') and "
                       "write the exports block by block; a folder the tiled engine wrote is "
                       "always read block by block")
    stage.add_argument(
        "--force", action="store_true",
        help="use levels that look like they are in the wrong unit",
    )
    stage.set_defaults(run=_run_stage)

    serve = commands.add_parser(
        "serve",
        help="run the browser app (registers and analyses the demo site on first start)",
        description=_wrap(_SERVE_DESCRIPTION),
        epilog=_SERVE_EPILOG,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    serve.add_argument("--host", default="127.0.0.1",
                       help="address to listen on (default 127.0.0.1: this machine only; any other "
                       "address needs $SILLMARK_EDITOR_SECRET)")
    serve.add_argument("--port", type=_port, default=8150, help="port to listen on (default 8150)")
    serve.add_argument(
        "--data", default=None, metavar="DIR",
        help="data folder for sites, results and settings (default: $SILLMARK_DATA, else ~/.sillmark)",
    )
    serve.add_argument("--threads", type=_positive_int, default=8, help="request threads (default 8)")
    serve.set_defaults(run=_run_serve)
    return parser


_SERVE_DESCRIPTION = (
    "Serve Sillmark's browser app with waitress: upload DEMs, set outlets, follow the "
    "analysis, move the outlet water level and read depths, routes and controlling "
    "sills off the map. On first start the demo site (Caddlewick on the River Torvey, "
    "invented) is registered and analysed in the background."
)
_SERVE_EPILOG = (
    _wrap(
        "By default the app listens on 127.0.0.1 and asks for no sign-in. Any other --host "
        "needs an access secret chosen by the operator: $SILLMARK_EDITOR_SECRET (upload, "
        "settings, runs) and optionally $SILLMARK_VIEWER_SECRET (read-only), or "
        "EDITOR_SECRET / VIEWER_SECRET in the data folder's config.py; without one the "
        "server refuses to start. Every page and script is served by this server; nothing "
        "is fetched from elsewhere."
    )
    + "\n\nexamples:\n  sillmark serve --port 8150 --data ~/sillmark-data\n"
    + "  SILLMARK_EDITOR_SECRET=... SILLMARK_VIEWER_SECRET=... sillmark serve --host 0.0.0.0\n\n"
    + _wrap(
        "Screening analysis only, not a hydraulic model; decisions rest with a licensed "
        "engineer or hydrologist and the local codes."
    )
)


def _port(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a port number") from None
    if not 1 <= value <= 65535:
        raise argparse.ArgumentTypeError(f"{text!r} is not a port number (1 to 65535)")
    return value


def _add_tiled_options(parser: argparse.ArgumentParser, tiles_help: str) -> None:
    """--tiles, --scheduler and --workers: the out-of-core engine (analyse, stage)."""
    tiled = parser.add_argument_group(
        "out of core",
        "run the analysis tile by tile on Dask, for DEMs larger than memory; the DEM and "
        "--out must be paths every worker can read and write",
    )
    tiled.add_argument("--tiles", type=_tile_cells, default=None, metavar="N", help=tiles_help)
    where = tiled.add_mutually_exclusive_group()
    where.add_argument(
        "--scheduler", default=None, metavar="ADDR",
        help="with --tiles: use the running Dask scheduler at ADDR (tcp://HOST:PORT)",
    )
    where.add_argument(
        "--workers", type=_positive_int, default=None, metavar="N",
        help="with --tiles: start a local cluster of N worker processes (default: one per CPU)",
    )


def _add_site_options(parser: argparse.ArgumentParser, *, connectivity_default: int | None) -> None:
    """Options that say how to read a DEM and run the engine on it (analyse, stage)."""
    from sillmark.grid.dem import DEFAULT_MAX_CELLS

    parser.add_argument(
        "--outlet",
        dest="outlets",
        metavar="edge|nodata|FILE",
        action="append",
        help="where water enters or leaves the site (repeatable; default: edge)",
    )
    parser.add_argument(
        "--connectivity", type=_connectivity, default=connectivity_default, metavar="4|8",
        help="neighbours water may pass between: 8 (default, diagonals too) or 4",
    )
    parser.add_argument(
        "--vertical-unit", choices=("m", "ft", "us-ft"), default=None,
        help="unit of the elevations when the file does not say: m (metres), ft "
        "(international feet) or us-ft (US survey feet)",
    )
    parser.add_argument(
        "--crs", type=_crs, default=None, metavar="EPSG",
        help="CRS of the DEM when the file has none, as an EPSG code (e.g. 32633, or "
        "32633+5773 to add a vertical CRS) or WKT; must agree with the file's CRS if it has one",
    )
    parser.add_argument("--band", type=_positive_int, default=None, metavar="N",
                        help="band holding the elevations, counted from 1 (needed for multi-band files)")
    parser.add_argument(
        "--max-cells", type=_positive_int, default=None, metavar="N",
        help=f"refuse DEMs with more than N cells, to guard memory (default {DEFAULT_MAX_CELLS:,})",
    )
    parser.add_argument("-q", "--quiet", action="store_true", help="no progress display on stderr")


# --------------------------------------------------------------------------- output


def _can_print(stream: TextIO, text: str) -> bool:
    try:
        text.encode(getattr(stream, "encoding", None) or "ascii")
    except (UnicodeEncodeError, LookupError):
        return False
    return True


_LINEAR_SYMBOL = {"metre": " m", "meter": " m", "foot": " ft", "us survey foot": " US ft"}


def _horizontal_unit(dem, stream: TextIO) -> str:
    """Symbol of the DEM's horizontal unit, as written after a cell size."""
    if dem.is_geographic:
        return "°" if _can_print(stream, "°") else " deg"
    axes = dem.horizontal_crs.axis_info
    name = axes[0].unit_name if axes else ""
    return _LINEAR_SYMBOL.get(name.lower(), f" {name}")


def _number(value: float, decimals: int = 1) -> str:
    return f"{value:,.{decimals}f}"


def _area_volume_symbols(stream: TextIO) -> tuple[str, str]:
    return ("m²", "m³") if _can_print(stream, "m²m³") else ("m2", "m3")


def _site_lines(result, dem, outlets, stream: TextIO) -> list[str]:
    """The site and its outlets, as the first lines of every command's summary."""
    from sillmark.units import VerticalUnit

    unit = VerticalUnit.parse(dem.vertical_unit)
    rows, cols = dem.shape
    dx, dy = dem.cell_size
    size_unit = _horizontal_unit(dem, stream)
    epsg = dem.crs.to_epsg()
    crs_text = f"EPSG:{epsg}" if epsg else f"CRS {dem.horizontal_crs.name!r}"
    name = Path(dem.path).name if getattr(dem, "path", None) else "DEM"
    return [
        f"Site: {name}, {rows:,} x {cols:,} cells of {dx:g}{size_unit} x {dy:g}{size_unit}, "
        f"{crs_text}, elevations in {unit.symbol}",
        f"Outlets: {', '.join(outlets.sources)} ({outlets.count:,} cells); connectivity {result.connectivity}",
    ]


def _summary_lines(result, dem, outlets, out_dir: Path, files: list[Path], stream: TextIO,
                   hierarchy=None) -> list[str]:
    from sillmark import SCREENING_CAUTION
    from sillmark.units import ACRE_FOOT_M3, VerticalUnit

    m2, m3 = _area_volume_symbols(stream)
    unit = VerticalUnit.parse(dem.vertical_unit)
    t = result.depressions
    lines = _site_lines(result, dem, outlets, stream)
    if len(t):
        area_m2 = float(t.area_m2.sum())
        volume_m3 = float(t.volume_m2_vu.sum()) * unit.metres
        storage = f"{_number(volume_m3)} {m3}"
        if unit.is_feet:
            storage += f" ({_number(volume_m3 / ACRE_FOOT_M3, 2)} acre-ft)"
        k = int(t.spill_elevation.argmax())
        lines.append(
            f"Depressions: {len(t):,}, total area {_number(area_m2 / 1e4, 2)} ha "
            f"({_number(area_m2, 0)} {m2}), storage at spill {storage}"
        )
        lines.append(
            f"Highest spill elevation: {float(t.spill_elevation[k]):.2f} {unit.symbol} "
            f"(depression {int(t.id[k])})"
        )
    else:
        lines.append(f"Depressions: 0 (no ground holds water below a spill point), 0.00 ha, 0 {m3}")
    if hierarchy is not None and len(hierarchy):
        lines.append(_hierarchy_line(hierarchy))
    if result.unreached_cells:
        lines.append(f"Cells no outlet reaches (walled in by nodata): {result.unreached_cells:,} cells")
    lines.append(f"Results: {len(files)} files in {out_dir}")
    lines.append(f"Caution: {SCREENING_CAUTION}")
    return lines


def _hierarchy_line(hierarchy) -> str:
    """Nodes, pits and nesting depth of the depression hierarchy (in memory, or the
    counts of sillmark.io.hierarchy_writer.HierarchyFiles)."""
    if hasattr(hierarchy, "depth"):
        nodes, pits, levels = hierarchy.nodes, hierarchy.pits, hierarchy.depth
    else:
        t = hierarchy.nodes
        depth = [0] * (len(t) + 1)
        for v in range(len(t), 0, -1):  # parents have higher ids than their children
            p = int(t.parent[v - 1])
            depth[v] = depth[p] + 1 if p else 1
        nodes, pits, levels = len(t), len(hierarchy.leaves), max(depth)
    return (
        f"Depression hierarchy: {nodes:,} nodes ({pits:,} pits), nested up "
        f"to {levels:,} level{'s' if levels != 1 else ''} deep; curves in depression_curves.csv"
    )


def _volume_text(volume_m3: float, unit, m3: str) -> str:
    from sillmark.units import ACRE_FOOT_M3

    text = f"{_number(volume_m3)} {m3}"
    if unit.is_feet:
        text += f" ({_number(volume_m3 / ACRE_FOOT_M3, 2)} acre-ft)"
    return text


def _stage_lines(result, dem, outlets, out_dir: Path, written, notes: dict, origin: str | None,
                 stream: TextIO, *, assets=None, asset_levels=(), what_if=None,
                 what_if_path: Path | None = None) -> list[str]:
    from sillmark import SCREENING_CAUTION
    from sillmark.io.stage_files import level_text
    from sillmark.units import VerticalUnit

    m2, m3 = _area_volume_symbols(stream)
    unit = VerticalUnit.parse(dem.vertical_unit)
    sym = unit.symbol
    lines = _site_lines(result, dem, outlets, stream)
    if origin:
        lines.append(origin)
    if assets is not None:
        lines.append(_assets_line(assets, asset_levels))
    n_dep = len(result.depressions)
    extra_files = 0
    for index, level in enumerate(written.levels):
        lines.append(f"Water level {level_text(level.level)} {sym}:")
        lines.extend(f"  Note: {note}" for note in notes.get(float(level.level), ()))
        lines.append(
            f"  Flooded: {_number(level.flooded_area_m2 / 1e4, 2)} ha "
            f"({_number(level.flooded_area_m2, 0)} {m2}), volume "
            f"{_volume_text(level.flooded_volume_m3, unit, m3)}"
        )
        lines.append(
            f"  Shielded low ground: {_number(level.shielded_area_m2 / 1e4, 2)} ha "
            f"({_number(level.shielded_area_m2, 0)} {m2}), volume below the level "
            f"{_volume_text(level.shielded_volume_m3, unit, m3)}"
        )
        lines.append(
            f"  Depressions: {level.depressions_overtopped:,} overtopped, "
            f"{level.depressions_cut_off:,} cut off below the level, "
            f"{level.depressions_dry:,} dry (of {n_dep:,})"
        )
        paths = list(level.paths)
        if index < len(asset_levels):
            table, asset_paths = asset_levels[index]
            lines.extend(_asset_level_lines(table, dem, stream))
            paths.extend(asset_paths)
            extra_files += len(asset_paths)
        lines.append(f"  Files: {', '.join(p.name for p in paths)}")
    if written.table is not None:
        t = written.table
        lines.append(
            f"Stage table: {len(t):,} levels from {level_text(t.level[0])} {sym} to "
            f"{level_text(t.level[-1])} {sym} in {written.table_path.name}"
        )
    if what_if is not None:
        lines.extend(_what_if_lines(what_if, what_if_path, dem, stream))
        extra_files += 1
    lines.append(f"Results: {len(written.paths) + extra_files} files in {out_dir}")
    lines.append(f"Caution: {SCREENING_CAUTION}")
    return lines


def _xy_text(dem, x: float, y: float, stream: TextIO) -> str:
    if dem.is_geographic:
        deg = _horizontal_unit(dem, stream)
        return f"lon {x:.6f}{deg}, lat {y:.6f}{deg}"
    size_unit = _horizontal_unit(dem, stream)
    return f"x {x:.1f}{size_unit}, y {y:.1f}{size_unit}"


def _assets_line(assets, asset_levels) -> str:
    """How many assets were read and how many have no figures, once for all levels."""
    from sillmark.grid.assets import STATUS_OK

    source = assets.source
    if not asset_levels:
        return f"Assets: {len(assets):,} from {source}"
    table = asset_levels[0][0]
    missing: dict[str, int] = {}
    for status in table.status:
        if status != STATUS_OK:
            missing[status] = missing.get(status, 0) + 1
    text = f"Assets: {len(assets):,} from {source}"
    if missing:
        parts = ", ".join(f"{count:,} {status}" for status, count in missing.items())
        text += f" ({parts}: no figures)"
    return text


def _asset_level_lines(table, dem, stream: TextIO) -> list[str]:
    """Counts of flooded, shielded and dry assets at one level, the flooded ones
    with their depth, and the next to flood with their onset stage and sill."""
    import numpy as np

    from sillmark.io.stage_files import level_text
    from sillmark.products.assets import STATE_DRY, STATE_FLOODED, STATE_SHIELDED

    sym = table.unit.symbol
    state = table.state
    flooded = [k for k in range(len(table)) if state[k] == STATE_FLOODED]
    shielded = sum(1 for v in state if v == STATE_SHIELDED)
    dry = sum(1 for v in state if v == STATE_DRY)
    none = len(table) - len(flooded) - shielded - dry
    text = f"  Assets: {len(flooded):,} flooded, {shielded:,} shielded, {dry:,} dry"
    if none:
        text += f", {none:,} without figures"
    lines = [text + f" (of {len(table):,})"]
    for k in flooded[:LIST_FLOODED]:
        lines.append(f"    flooded: {_asset_name(table, k)}: depth {float(table.depth[k]):.2f} {sym} "
                     f"(ground {level_text(table.ground_elevation[k])} {sym})")
    if len(flooded) > LIST_FLOODED:
        lines.append(f"    ... and {len(flooded) - LIST_FLOODED:,} more flooded (see the assets file)")
    waiting = [k for k in range(len(table)) if state[k] in (STATE_SHIELDED, STATE_DRY)]
    waiting.sort(key=lambda k: (float(table.onset_stage[k]), k))
    for k in waiting[:LIST_NEXT]:
        sill = table.sill(k)
        if bool(table.sill_is_own_cell[k]):
            where = "no sill, its own ground controls"
        else:
            where = (f"controlling sill {level_text(sill.elevation)} {sym} at row {sill.row}, "
                     f"col {sill.col} ({_xy_text(dem, sill.x, sill.y, stream)})")
        freeboard = float(np.float32(table.onset_stage[k]) - np.float32(table.level))
        lines.append(
            f"    next to flood: {_asset_name(table, k, state[k])}: onset stage "
            f"{level_text(table.onset_stage[k])} {sym}, freeboard {freeboard:.2f} {sym}; {where}"
        )
    return lines


def _asset_name(table, k: int, state: str = "") -> str:
    notes = ", ".join(text for text in (table.kind[k], state) if text)
    return f"{table.name[k]} ({notes})" if notes else table.name[k]


def _what_if_lines(run, path: Path | None, dem, stream: TextIO) -> list[str]:
    from sillmark.grid.crs import horizontal_unit_suffix
    from sillmark.io.stage_files import level_text
    from sillmark.units import VerticalUnit, unit_suffix

    unit = VerticalUnit.parse(dem.vertical_unit)
    sym = unit.symbol
    v = unit_suffix(unit)
    h = horizontal_unit_suffix(dem)
    name = path.name if path is not None else "the what-if file"
    height = run.rows[0][f"height_{v}"] if run.rows else None
    head = "What if each controlling sill were higher" if height is None else (
        f"What if each controlling sill were {level_text(height)} {sym} higher")
    lines = [f"{head} ({name}):"]
    passed = []
    if run.own:
        passed.append(f"{run.own:,} whose own ground controls")
    if run.no_figures:
        passed.append(f"{run.no_figures:,} without figures")
    tail = f"; passed over: {', '.join(passed)}" if passed else ""
    if not run.rows:
        lines.append(f"  No asset stands behind a sill: nothing to raise{tail}")
        return lines
    n_rows, n_sills = len(run.rows), len(run.sills)
    lines.append(f"  {n_rows:,} asset{'s' if n_rows != 1 else ''} behind {n_sills:,} distinct "
                 f"sill{'s' if n_sills != 1 else ''} ({n_sills:,} recompute{'s' if n_sills != 1 else ''})"
                 f"{tail}")
    for members in run.sills[:LIST_SILLS]:
        first = members[0]
        before = first[f"onset_before_{v}"]
        after = [m[f"onset_after_{v}"] for m in members]
        gains = [m[f"gain_{v}"] for m in members]
        lo, hi = min(after), max(after)
        after_text = f"{level_text(lo)} {sym}" if lo == hi else f"{level_text(lo)} to {level_text(hi)} {sym}"
        gain_text = (f"{min(gains):.2f} {sym}" if min(gains) == max(gains)
                     else f"{min(gains):.2f} to {max(gains):.2f} {sym}")
        xy = _xy_text(dem, first[f"sill_before_x_{h}"], first[f"sill_before_y_{h}"], stream)
        lines.append(
            f"  sill at row {first['sill_before_row']}, col {first['sill_before_col']} ({xy}) "
            f"({first['raised_cells']:,} crest cell{'s' if first['raised_cells'] != 1 else ''}) "
            f"raised from {level_text(first[f'sill_before_elevation_{v}'])} to "
            f"{level_text(first[f'raised_elevation_{v}'])} {sym}: {len(members):,} "
            f"asset{'s' if len(members) != 1 else ''}, onset stage {level_text(before)} -> "
            f"{after_text} (gain {gain_text})"
        )
        if all(m["raised_cell_controls"] for m in members):
            lines.append("    the raised cell still controls")
        else:
            moved = next(m for m in members if not m["raised_cell_controls"])
            there = (f"row {moved['sill_after_row']}, col {moved['sill_after_col']} "
                     f"({_xy_text(dem, moved[f'sill_after_x_{h}'], moved[f'sill_after_y_{h}'], stream)})")
            if max(gains) == 0:
                lines.append(
                    f"    no gain: another way in at the same elevation remains, over {there} at "
                    f"{level_text(moved[f'sill_after_elevation_{v}'])} {sym}"
                )
            else:
                lines.append(
                    f"    then water comes over the sill at {there} at "
                    f"{level_text(moved[f'sill_after_elevation_{v}'])} {sym}"
                )
    if len(run.sills) > LIST_SILLS:
        lines.append(f"  ... and {len(run.sills) - LIST_SILLS:,} more sills (see {name})")
    return lines


class _Progress:
    """Phase bar plus a per-file bar on stderr; does nothing when disabled."""

    PHASES = ("read", "outlets", "flood", "export")

    def __init__(self, enabled: bool, phases: tuple[str, ...] | None = None) -> None:
        self.enabled = enabled
        self._phase = None
        self._file = None
        if enabled:
            from tqdm import tqdm

            self._tqdm = tqdm
            total = len(self.PHASES if phases is None else phases)
            self._phase = tqdm(total=total, desc="sillmark", unit="phase", file=sys.stderr,
                               leave=False, bar_format="{desc}: {n_fmt}/{total_fmt} {bar} {elapsed}")

    def start(self, phase: str) -> None:
        if self._phase is not None:
            self._phase.set_description_str(f"sillmark: {phase}")

    def done(self) -> None:
        if self._phase is not None:
            self._phase.update(1)

    def file(self, name: str, done: int, total: int) -> None:
        if not self.enabled:
            return
        if self._file is None:
            self._file = self._tqdm(total=total, desc=name, unit="block", file=sys.stderr, leave=False, position=1)
        bar = self._file
        if bar.desc != name or bar.total != total:
            bar.reset(total=total)
            bar.set_description_str(name)
        bar.n = done
        bar.refresh()

    def close(self) -> None:
        for bar in (self._file, self._phase):
            if bar is not None:
                bar.close()


# --------------------------------------------------------------------------- commands


def _site_from_dem(dem_path: str, args: argparse.Namespace, progress: _Progress):
    """Read a DEM, mark its outlets and run the spill engine: the start of every command."""
    from sillmark.engine.flood import analyse_site

    dem, outlets, connectivity = _read_site(dem_path, args, progress)
    progress.start("flood")
    result = analyse_site(dem, outlets, connectivity=connectivity)
    progress.done()
    return dem, outlets, result


def _read_site(dem_path: str, args: argparse.Namespace, progress: _Progress):
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


def _site_from_folder(folder: Path, args: argparse.Namespace, progress: _Progress):
    """The site of a folder written by ``sillmark analyse``, engine re-run and checked.

    ``summary.json`` gives the DEM's path, its vertical unit, CRS and grid, the
    outlet sources and the connectivity. The outlet cells are those of
    ``flood_tree.tif`` (code 9), whatever made them (the DEM edge, nodata, a
    GeoJSON file). The DEM is read again and the engine re-run on it with those
    outlets (a second or so for a few million cells), and the onset stage
    compared cell by cell with ``onset_stage.tif``: if the DEM changed since the
    analysis, the run stops rather than mixing old and new results. So the
    result, and every file written from it, is the same as from the DEM itself.
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
    progress.done()
    progress.start("outlets")
    mask = (stored["flood_tree.tif"] == OUTLET_CODE) & dem.valid
    outlets = Outlets(mask=mask, sources=tuple(sources))
    progress.done()
    progress.start("flood")
    result = analyse_site(dem, outlets, connectivity=connectivity)
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


def _run_analyse(args: argparse.Namespace) -> int:
    from sillmark.run import analyse

    if args.tiles is not None:
        return _run_analyse_tiled(args)
    if args.scheduler is not None or args.workers is not None:
        from sillmark.errors import InvalidParameter

        option = "--scheduler" if args.scheduler is not None else "--workers"
        raise InvalidParameter(f"{option} runs the tiled engine; give --tiles N with it (e.g. --tiles 4096)")
    show = not args.quiet and sys.stderr.isatty()
    progress = _Progress(show)
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
        progress.start("flood")
        out_dir = Path(args.out)
        run = analyse(dem, outlets, out_dir, connectivity=connectivity, progress=step)
        progress.done()
    finally:
        progress.close()
    for line in _summary_lines(run.result, dem, outlets, out_dir, run.files, sys.stdout,
                               run.hierarchy):
        print(line)
    return EXIT_OK


_TILED_STEPS = {"flood": "flood tiles", "graph": "seed graph", "finish": "finish tiles",
                 "join": "join depressions", "totals": "depression totals", "write": "write"}
#: Steps of sillmark.io.results_folder.add_hierarchy_files (``analyse --tiles``).
_HIERARCHY_STEPS = {"hierarchy": "depression hierarchy", "hierarchy_files": "format hierarchy",
                    "hierarchy_write": "write hierarchy files"}


def _tiled_engine(args: argparse.Namespace, dem_path: str, out_dir: Path, progress: _Progress,
                  *, derived: bool = False):
    """Run :func:`sillmark.run.analyse` tile by tile on the cluster the options name; return
    the run, the DEM's grid and a line naming the engine.

    ``derived``: also write the depression outlines and the hierarchy files (on
    the same cluster)."""
    from sillmark.engine.executors import dask_executor
    from sillmark.errors import InvalidParameter
    from sillmark.run import analyse

    if args.max_cells is not None:
        raise InvalidParameter("--max-cells guards the memory of the in-memory engine; the tiled "
                               "engine (--tiles) holds one tile at a time: drop --max-cells")
    connectivity = 8 if args.connectivity is None else args.connectivity
    names = {**_TILED_STEPS, "outlines": "outline depressions", **_HIERARCHY_STEPS}

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
            derived=derived,
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

    show = not args.quiet and sys.stderr.isatty()
    progress = _Progress(show, phases=(*_TILED_STEPS, "outlines", *_HIERARCHY_STEPS))
    out_dir = Path(args.out)
    try:
        run, grid, engine = _tiled_engine(args, args.dem, out_dir, progress, derived=True)
    finally:
        progress.close()
    outlets = types.SimpleNamespace(sources=run.outlet_sources, count=run.outlet_cells)
    lines = _summary_lines(run, grid, outlets, out_dir, run.files, sys.stdout, run.hierarchy)
    lines.insert(2, engine)
    for line in lines:
        print(line)
    return EXIT_OK


def _stage_request(args: argparse.Namespace) -> None:
    """Checks of the stage options that need no DEM, made before anything is read."""
    from sillmark.errors import InvalidParameter

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


def _run_stage(args: argparse.Namespace) -> int:
    from sillmark.io.stage_files import write_stage_results
    from sillmark.products.source import ArraySource
    from sillmark.products.stage import stage_levels

    _stage_request(args)
    source = Path(args.source)
    if args.tiles is not None or _tiled_folder(source):
        return _run_stage_tiled(args)
    if args.scheduler is not None or args.workers is not None:
        from sillmark.errors import InvalidParameter

        option = "--scheduler" if args.scheduler is not None else "--workers"
        raise InvalidParameter(f"{option} runs the tiled engine; give --tiles N with it (e.g. --tiles 4096)")
    show = not args.quiet and sys.stderr.isatty()
    progress = _Progress(show)
    try:
        if source.is_dir():
            dem, outlets, result = _site_from_folder(source, args, progress)
            origin = f"Analysis: {source} (engine re-run on its DEM; onset stage matches onset_stage.tif)"
        else:
            dem, outlets, result = _site_from_dem(args.source, args, progress)
            origin = None
        notes = _level_checks(result, dem, args)
        table_levels = None
        if args.table_step is not None:
            table_levels = stage_levels(ArraySource(dem, result), step=args.table_step,
                                        start=args.table_from, stop=args.table_to)
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
                                      table_levels=table_levels, progress=progress.file)
        asset_levels = []
        if assets is not None:
            asset_levels = _write_asset_levels(result, dem, assets, written, out_dir, progress.file)
        what_if_path = None
        if what_if is not None:
            what_if_path = _write_what_if(dem, what_if, args.raise_sill, out_dir, progress.file)
        progress.done()
    finally:
        progress.close()
    lines = _stage_lines(result, dem, outlets, out_dir, written, notes, origin, sys.stdout,
                         assets=assets, asset_levels=asset_levels, what_if=what_if,
                         what_if_path=what_if_path)
    for line in lines:
        print(line)
    return EXIT_OK


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
    progress = _Progress(show, phases=(*_TILED_STEPS, "read", "export") if args.tiles else ("read", "export"))
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
            _run, _grid, engine = _tiled_engine(args, args.source, folder, progress)
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
                                      table_levels=table_levels, progress=progress.file)
        progress.done()
    finally:
        progress.close()
        if scratch is not None:
            shutil.rmtree(scratch, ignore_errors=True)
    result = types.SimpleNamespace(connectivity=site.connectivity, depressions=site.depressions["id"])
    outlets = types.SimpleNamespace(sources=site.outlet_sources, count=site.outlet_count)
    for line in _stage_lines(result, site.grid, outlets, out_dir, written, notes, origin, sys.stdout):
        print(line)
    return EXIT_OK


#: Flooded assets listed by name per level, and assets listed as next to flood.
LIST_FLOODED = 5
LIST_NEXT = 3
#: Distinct raised sills listed in the what-if summary.
LIST_SILLS = 10


def _write_asset_levels(result, dem, assets, written, out_dir: Path, progress) -> list:
    """Assess the assets at every written level and write their two files; return the tables."""
    from sillmark.io.asset_files import (
        asset_file_names,
        write_assets_csv,
        write_assets_geojson,
    )
    from sillmark.products.assets import assess_assets

    tables = []
    for level in written.levels:
        table = assess_assets(assets, dem, result, level.level)
        csv_name, geojson_name = asset_file_names(level.level, dem.vertical_unit)
        for name, write in ((csv_name, write_assets_csv), (geojson_name, write_assets_geojson)):
            progress(name, 0, 1)
            write(table, out_dir / name)
            progress(name, 1, 1)
        tables.append((table, (out_dir / csv_name, out_dir / geojson_name)))
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


def _write_what_if(dem, run: _WhatIfRun, height: float, out_dir: Path, progress) -> Path:
    from sillmark.io.asset_files import what_if_file_name, write_what_if_csv

    name = what_if_file_name(height, dem.vertical_unit)
    notes = []
    if run.own:
        notes.append(f"not listed: {run.own} asset(s) whose own ground is the controlling point "
                     "(no sill between them and the water; see sill_is_own_cell in assets_*.csv)")
    if run.no_figures:
        notes.append(f"not listed: {run.no_figures} asset(s) without figures (outside the DEM, "
                     "on nodata, or not reached by any outlet)")
    progress(name, 0, 1)
    path = write_what_if_csv(run.rows, dem, out_dir / name, height=height, notes=notes)
    progress(name, 1, 1)
    return path


def serve_refusal(args: argparse.Namespace) -> str | None:
    """Why ``sillmark serve`` with ``args`` must not start, or None: a host beyond this
    machine without an access secret, or unusable secrets (see sillmark.web.auth)."""
    from sillmark.web import auth
    from sillmark.web import config as web_config

    options = {"DATA_DIR": args.data} if args.data is not None else {}
    data_dir = web_config.data_dir_from({**web_config.DEFAULTS, **options})
    return auth.serving_refusal(args.host, web_config.instance_settings(data_dir, options))


def _run_serve(args: argparse.Namespace) -> int:
    import waitress

    from sillmark.web import auth, create_app

    refusal = serve_refusal(args)
    if refusal is not None:
        print(f"{PROG}: error: {refusal}", file=sys.stderr, flush=True)
        return EXIT_ERROR
    options = {}
    if args.data is not None:
        options["DATA_DIR"] = args.data
    app = create_app(options or None)
    services = app.extensions["sillmark"]
    where = f"http://{'[' + args.host + ']' if ':' in args.host else args.host}:{args.port}/"
    print(f"Sillmark {__version__} serving at {where}", flush=True)
    print(f"Data folder: {services.data_dir}", flush=True)
    found = auth.secrets_in(app.config)
    if found:
        roles = "editors and viewers" if auth.VIEWER in found else "editors"
        print(f"Sign-in required ({roles}): {where}signin", flush=True)
    if not auth.is_loopback(args.host):
        print(f"{PROG}: warning: listening on {args.host}; other machines can reach this "
              "server (with the access secret); the connection is not encrypted, so put it "
              "behind an HTTPS proxy on an untrusted network", file=sys.stderr, flush=True)
    print("Press Ctrl-C to stop.", flush=True)
    # SIGTERM (a service manager's stop) ends the server as Ctrl-C does: its analysis
    # workers are stopped and their runs queued again for the next start.
    signal.signal(signal.SIGTERM, _exit_on_signal)
    try:
        waitress.serve(app, host=args.host, port=args.port, threads=args.threads,
                       ident="Sillmark", _quiet=True)
    finally:
        services.runner.stop()
    return EXIT_OK


def _exit_on_signal(signum, _frame) -> None:
    raise SystemExit(128 + signum)


def _error_text(exc: BaseException) -> str:
    if isinstance(exc, OSError) and exc.strerror and exc.filename:
        return f"{exc.strerror}: {exc.filename}"
    text = " ".join(str(exc).split())
    return text or type(exc).__name__


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line with ``argv`` (default ``sys.argv[1:]``); return the exit status."""
    parser = build_parser()
    try:
        args = parser.parse_args(argv)
    except _ParserExit as stop:
        return stop.status
    except _UsageError as exc:
        print(f"{PROG}: error: {exc}", file=sys.stderr)
        return EXIT_ERROR

    import rasterio.errors

    from sillmark.errors import SillmarkError

    try:
        return args.run(args)
    except KeyboardInterrupt:
        print(f"{PROG}: interrupted", file=sys.stderr)
        return EXIT_INTERRUPTED
    except (SillmarkError, OSError, rasterio.errors.RasterioError) as exc:
        print(f"{PROG}: error: {_error_text(exc)}", file=sys.stderr)
        return EXIT_ERROR
    except MemoryError:
        print(f"{PROG}: error: not enough memory for this DEM; try a smaller extent or "
              "a coarser cell size", file=sys.stderr)
        return EXIT_ERROR


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
