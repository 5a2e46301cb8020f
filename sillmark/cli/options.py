"""The command line's parser: commands, options, argument checks and help texts.
"""

from __future__ import annotations

import argparse
import math
import re
import sys

from sillmark import __version__
from sillmark.cli.analyse import run_analyse
from sillmark.cli.common import MAX_LEVELS, PROG, WRONG_UNIT_FACTOR, wrap
from sillmark.cli.serve import run_serve
from sillmark.cli.stage import run_stage
from sillmark.io.vector_layers import GEOJSON_MAX_FEATURES, VECTOR_FORMATS
from sillmark.products.significance import (
    DEFAULT_VERTICAL_ACCURACY_M,
    DEPTH_PER_ACCURACY,
)

_DESCRIPTION = (
    "Screening analysis of surface connectivity on a site DEM: for every cell, the "
    "outlet water level at which surface water first reaches it (its onset stage), "
    "the depressions that hold water below their spill points, and the route water "
    "takes from the outlets."
)


_ANALYSE_DESCRIPTION = (
    "Read a DEM, mark its outlets, compute the onset stage, flood tree, depressions "
    "and spill points, and write them to a folder: GeoTIFF rasters (onset_stage, "
    "fill_depth, depression_id, flood_tree), depressions.csv, the outlines and spill "
    "points (depressions and spill_points, GeoJSON or GeoPackage), the nested depressions "
    "(depression_hierarchy.csv and .json), the stage-area and stage-storage curves of the "
    "significant depressions (depression_curves.csv), README.txt and summary.json. "
    "Survey DEMs hold many tiny depressions made by noise: only those that reach a minimum "
    "depth (from --vertical-accuracy) are listed and mapped; the rest count as part of the "
    "smallest significant depression holding them."
)


_ANALYSE_EPILOG = (
    wrap(
        "Outlets are where water enters or leaves the site. 'edge' marks every valid "
        "cell on the border of the grid; 'nodata' marks valid cells next to nodata "
        "(open sea, a masked lake); a FILE is a GeoJSON of water bodies (.geojson, "
        ".json; e.g. a river channel) or a mask raster on the DEM's grid (.tif, "
        "non-zero = outlet). Give --outlet several times to combine them."
    )
    + "\n\n"
    + wrap(
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
    + wrap(
        "Exit status: 0 on success, 2 on a usage or input error (one line on stderr), "
        "130 when interrupted."
    )
    + "\n\n"
    + wrap(
        "Screening analysis only, not a hydraulic model; decisions rest with a licensed "
        "engineer or hydrologist and the local codes."
    )
)


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
    wrap(
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
    + wrap(
        "H in the file names is the level in the site's vertical unit with at least "
        "two decimals and the unit: depth_47.60m.tif, depth_-1.25m.tif, "
        "depth_152.50ft.tif, depth_152.50us_ft.tif. A cell is flooded when its onset "
        "stage is at or below H; shielded low ground lies below H but no surface path "
        "reaches it yet (it is still at risk from seepage, local rain or a breach)."
    )
    + "\n\n"
    + wrap(
        f"At most {MAX_LEVELS} --level values per call. A level below every cell's onset "
        "stage floods nothing (a note says so; the files are still written). A level "
        f"more than {WRONG_UNIT_FACTOR:g} times the site's elevation range above its "
        "highest ground is refused as probably in the wrong unit, unless --force."
    )
    + "\n\n"
    + wrap(
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
    + wrap(
        "Exit status: 0 on success, 2 on a usage or input error (one line on stderr), "
        "130 when interrupted."
    )
    + "\n\n"
    + wrap(
        "Screening analysis only, not a hydraulic model; decisions rest with a licensed "
        "engineer or hydrologist and the local codes."
    )
)


class UsageError(Exception):
    """Raised by the parser instead of printing usage and exiting."""


class ParserExit(Exception):
    """Raised by the parser after --help or --version, with the exit status."""

    def __init__(self, status: int) -> None:
        super().__init__(status)
        self.status = status


class _Parser(argparse.ArgumentParser):
    """An ArgumentParser that returns control to :func:`main` instead of exiting."""

    def error(self, message: str) -> None:  # type: ignore[override]
        raise UsageError(f"{message} (see '{self.prog} --help')")

    def exit(self, status: int = 0, message: str | None = None) -> None:  # type: ignore[override]
        if message:
            self._print_message(message, sys.stderr)
        raise ParserExit(status)


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


def _accuracy(text: str) -> float:
    """A vertical accuracy: a finite number above 0."""
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a number such as 0.10, not {text!r}") from None
    if not math.isfinite(value) or value <= 0:
        raise argparse.ArgumentTypeError(
            f"the vertical accuracy is an RMSE above 0 (e.g. 0.10), not {text!r}")
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
        description=wrap(_ANALYSE_DESCRIPTION),
        epilog=_ANALYSE_EPILOG,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    analyse.add_argument("dem", metavar="DEM", help="the site DEM, a single-band GeoTIFF or other raster GDAL reads")
    analyse.add_argument(
        "--out", required=True, metavar="DIR",
        help="folder for the result files; created if missing, Sillmark's own file names replaced",
    )
    analyse.add_argument(
        "--edits", metavar="FILE",
        help="a GeoJSON of edits to the ground water sees: features with 'kind' culvert "
             "(LineString, 'invert', optional 'one_way'), barrier (LineString, 'crest') or "
             "breach (LineString or Polygon, 'level'); RFC 7946 lon/lat or a named 'crs'",
    )
    _add_site_options(analyse, connectivity_default=8)
    listing = analyse.add_argument_group(
        "significance", "which depressions are listed and mapped (the rasters, areas and "
        "volumes stay exact whatever is chosen)")
    listing.add_argument(
        "--vertical-accuracy", type=_accuracy, default=None, metavar="VALUE",
        help="the DEM's vertical accuracy (RMSE) in the site's vertical unit; a depression is "
        f"listed on its own when it is at least {DEPTH_PER_ACCURACY:g} x VALUE deep, pit to spill "
        f"(default VALUE: {DEFAULT_VERTICAL_ACCURACY_M:g} m, usual for airborne lidar, a "
        "value recalled from memory rather than a cited standard; converted for sites in feet)",
    )
    listing.add_argument(
        "--full-inventory", action="store_true",
        help="also list and map every depression below the minimum, with a 'significant' column",
    )
    analyse.add_argument(
        "--vector-format", choices=VECTOR_FORMATS, default="auto",
        help="depressions and spill_points as GeoJSON (WGS 84) or GeoPackage (the DEM's CRS, "
        f"spatial index); auto (default): GeoJSON up to {GEOJSON_MAX_FEATURES:,} features, "
        "else GeoPackage",
    )
    _add_tiled_options(analyse, "analyse in tiles of N x N cells (e.g. 4096) on a Dask cluster; "
                       "the same files as without --tiles (the hierarchy files from "
                       "windows of depressions), with the same significance minimum")
    reach = analyse.add_argument_group("a sloped river and places cut off")
    reach.add_argument(
        "--profile", default=None, metavar="FILE",
        help="GeoJSON of the river's centreline (one LineString, also an outlet) and two or "
        "more stations (Points with a 'level'): add onset_offset.tif (rise of the whole "
        "profile at which each cell gets wet) and profile_level.tif")
    reach.add_argument(
        "--refuge", default=None, metavar="FILE",
        help="GeoJSON points or polygons of refuges (rest centres, high ground): add "
        "cutoff_stage.tif, the level at which each place's last dry route to a refuge goes under")
    reach.add_argument(
        "--roads", default=None, metavar="FILE",
        help="with --refuge: GeoJSON lines of the roads; routes to a refuge keep to them")
    analyse.set_defaults(run=run_analyse)

    stage = commands.add_parser(
        "stage",
        help="water-level maps, depths and the stage table at given outlet water levels",
        description=wrap(_STAGE_DESCRIPTION),
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
        "--offset", dest="offsets", type=_water_level, action="append", metavar="D",
        help="for a folder analysed with --profile: the files for the water-surface profile "
        "raised by D (0 is the design profile; repeatable, instead of --level)",
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
    stage.add_argument(
        "--vector-format", choices=VECTOR_FORMATS, default="auto",
        help="flood_extent_H and shielded_H as GeoJSON (WGS 84) or GeoPackage (the DEM's CRS, "
        f"spatial index); auto (default): GeoJSON up to {GEOJSON_MAX_FEATURES:,} polygon parts, "
        "else GeoPackage",
    )
    stage.set_defaults(run=run_stage)

    serve = commands.add_parser(
        "serve",
        help="run the browser app (registers and analyses the demo site on first start)",
        description=wrap(_SERVE_DESCRIPTION),
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
    serve.set_defaults(run=run_serve)
    return parser


_SERVE_DESCRIPTION = (
    "Serve Sillmark's browser app with waitress: upload DEMs, set outlets, follow the "
    "analysis, move the outlet water level and read depths, routes and controlling "
    "sills off the map. On first start the demo site (Caddlewick on the River Torvey, "
    "invented) is registered and analysed in the background."
)


_SERVE_EPILOG = (
    wrap(
        "By default the app listens on 127.0.0.1 and asks for no sign-in. Any other --host "
        "needs an access secret chosen by the operator: $SILLMARK_EDITOR_SECRET (upload, "
        "settings, runs) and optionally $SILLMARK_VIEWER_SECRET (read-only), or "
        "EDITOR_SECRET / VIEWER_SECRET in the data folder's config.py; without one the "
        "server refuses to start. Every page and script is served by this server; nothing "
        "is fetched from elsewhere."
    )
    + "\n\nexamples:\n  sillmark serve --port 8150 --data ~/sillmark-data\n"
    + "  SILLMARK_EDITOR_SECRET=... SILLMARK_VIEWER_SECRET=... sillmark serve --host 0.0.0.0\n\n"
    + wrap(
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
