"""The ``sillmark`` command line.

``sillmark analyse DEM --out DIR`` reads a DEM, marks its outlets, runs the spill
engine and writes the result files (see :mod:`analysis.export`), then prints a
short summary. ``sillmark stage SOURCE --level H --out DIR`` writes the
water-level maps at outlet water levels and the stage table (see
:mod:`analysis.stage_export`), from a DEM or from the folder ``analyse`` wrote.
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
    "spill_points.geojson and summary.json."
)
_ANALYSE_EPILOG = (
    _wrap(
        "Outlets are where water enters or leaves the site. 'edge' marks every valid "
        "cell on the border of the grid; 'nodata' marks valid cells next to nodata "
        "(open sea, a masked lake); a FILE is a GeoJSON of water bodies (.geojson, "
        ".json; e.g. a river channel) or a mask raster on the DEM's grid (.tif, "
        "non-zero = outlet). Give --outlet several times to combine them."
    )
    + "\n\nexample:\n"
    + "  sillmark analyse site.tif --outlet nodata --outlet edge --out results/site\n\n"
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
    "flooded and shielded area and volume against level (stage_table.csv)."
)
_STAGE_EPILOG = (
    _wrap(
        "SOURCE is a DEM (the spill engine runs on it first, with --outlet, "
        "--connectivity, --vertical-unit and --crs as for 'sillmark analyse') or a "
        "folder written by 'sillmark analyse'. From a folder, the DEM recorded in its "
        "summary.json is read again and the engine re-run with the folder's outlets "
        "(the outlet cells of its flood_tree.tif) and connectivity; the run is checked "
        "against the folder's onset_stage.tif, so the files are the same as from the DEM."
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
    + "\n\nexamples:\n"
    + "  sillmark stage site.tif --outlet nodata --level 47.6 --level 48.2 --out results/stage\n"
    + "  sillmark stage results/site --level 47.6 --table-step 0.1 --out results/stage\n\n"
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
        "--out", required=True, metavar="DIR",
        help="folder for the result files; created if missing, Sillmark's own file names replaced",
    )
    _add_site_options(stage, connectivity_default=None)
    stage.add_argument(
        "--force", action="store_true",
        help="use levels that look like they are in the wrong unit",
    )
    stage.set_defaults(run=_run_stage)
    return parser


def _add_site_options(parser: argparse.ArgumentParser, *, connectivity_default: int | None) -> None:
    """Options that say how to read a DEM and run the engine on it (analyse, stage)."""
    from analysis.dem import DEFAULT_MAX_CELLS

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
    from analysis.units import VerticalUnit

    unit = VerticalUnit.parse(dem.vertical_unit)
    rows, cols = dem.elevation.shape
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


def _summary_lines(result, dem, outlets, out_dir: Path, files: list[Path], stream: TextIO) -> list[str]:
    from analysis import SCREENING_CAUTION
    from analysis.units import ACRE_FOOT_M3, VerticalUnit

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
    if result.unreached_cells:
        lines.append(f"Cells no outlet reaches (walled in by nodata): {result.unreached_cells:,} cells")
    lines.append(f"Results: {len(files)} files in {out_dir}")
    lines.append(f"Caution: {SCREENING_CAUTION}")
    return lines


def _volume_text(volume_m3: float, unit, m3: str) -> str:
    from analysis.units import ACRE_FOOT_M3

    text = f"{_number(volume_m3)} {m3}"
    if unit.is_feet:
        text += f" ({_number(volume_m3 / ACRE_FOOT_M3, 2)} acre-ft)"
    return text


def _stage_lines(result, dem, outlets, out_dir: Path, written, notes: dict, origin: str | None,
                 stream: TextIO) -> list[str]:
    from analysis import SCREENING_CAUTION
    from analysis.stage_export import level_text
    from analysis.units import VerticalUnit

    m2, m3 = _area_volume_symbols(stream)
    unit = VerticalUnit.parse(dem.vertical_unit)
    sym = unit.symbol
    lines = _site_lines(result, dem, outlets, stream)
    if origin:
        lines.append(origin)
    n_dep = len(result.depressions)
    for level in written.levels:
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
        lines.append(f"  Files: {', '.join(p.name for p in level.paths)}")
    if written.table is not None:
        t = written.table
        lines.append(
            f"Stage table: {len(t):,} levels from {level_text(t.level[0])} {sym} to "
            f"{level_text(t.level[-1])} {sym} in {written.table_path.name}"
        )
    lines.append(f"Results: {len(written.paths)} files in {out_dir}")
    lines.append(f"Caution: {SCREENING_CAUTION}")
    return lines


class _Progress:
    """Phase bar plus a per-file bar on stderr; does nothing when disabled."""

    PHASES = ("read", "outlets", "flood", "export")

    def __init__(self, enabled: bool) -> None:
        self.enabled = enabled
        self._phase = None
        self._file = None
        if enabled:
            from tqdm import tqdm

            self._tqdm = tqdm
            self._phase = tqdm(total=len(self.PHASES), desc="sillmark", unit="phase", file=sys.stderr,
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
    """Read a DEM, mark its outlets and run the spill engine: the start of every command.

    The DEM is read by its absolute path, so that ``summary.json`` records a path
    that still leads to it from another working folder.
    """
    from analysis.dem import read_dem
    from analysis.flood import analyse_site
    from analysis.outlets import build_outlets

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
    progress.start("flood")
    result = analyse_site(dem, outlets, connectivity=connectivity)
    progress.done()
    return dem, outlets, result


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

    from analysis.dem import read_dem
    from analysis.errors import InvalidDEM, InvalidParameter
    from analysis.flood import OUTLET_CODE, analyse_site
    from analysis.outlets import Outlets

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
    summary_path = folder / "summary.json"
    if not summary_path.is_file():
        raise InvalidParameter(
            f"the folder {folder} holds no summary.json; give a DEM file or a folder "
            "written by 'sillmark analyse'"
        )
    try:
        summary = json.loads(summary_path.read_text(encoding="utf-8"))
        dem_text = summary["dem"]
        grid = summary["grid"]
        rows, cols = int(grid["rows"]), int(grid["cols"])
        transform = [float(v) for v in grid["transform"]]
        unit = str(grid["vertical_unit"])
        epsg = grid["crs"]["epsg"]
        crs = f"EPSG:{int(epsg)}" if epsg is not None else str(grid["crs"]["wkt"])
        connectivity = int(summary["connectivity"])
        sources = [str(v) for v in summary["outlets"]["sources"]]
    except (ValueError, KeyError, TypeError, UnicodeDecodeError):
        raise InvalidParameter(
            f"{summary_path} is not a summary written by 'sillmark analyse'; run the "
            "analysis again, or give the DEM file as SOURCE"
        ) from None
    if not dem_text:
        raise InvalidParameter(f"{summary_path} records no DEM file; give the DEM file as SOURCE")
    if not os.path.isfile(dem_text):
        raise InvalidParameter(
            f"the DEM recorded in {summary_path} ({dem_text}) is not found from here; run "
            "from the folder 'sillmark analyse' ran in, or give the DEM file as SOURCE"
        )

    progress.start("read")
    options = {}
    if args.max_cells is not None:
        options["max_cells"] = args.max_cells
    dem = read_dem(dem_text, band=args.band, vertical_unit=unit, crs=crs, **options)
    tr = dem.transform
    if dem.shape != (rows, cols) or [tr.a, tr.b, tr.c, tr.d, tr.e, tr.f] != transform:
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
    from analysis.export import write_results

    show = not args.quiet and sys.stderr.isatty()
    progress = _Progress(show)
    try:
        dem, outlets, result = _site_from_dem(args.dem, args, progress)
        progress.start("export")
        out_dir = Path(args.out)
        files = write_results(result, dem, outlets, out_dir, progress=progress.file)
        progress.done()
    finally:
        progress.close()
    for line in _summary_lines(result, dem, outlets, out_dir, files, sys.stdout):
        print(line)
    return EXIT_OK


def _stage_request(args: argparse.Namespace) -> None:
    """Checks of the stage options that need no DEM, made before anything is read."""
    from analysis.errors import InvalidParameter

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


def _level_checks(result, dem, args: argparse.Namespace) -> dict[float, list[str]]:
    """Refuse levels that look like the wrong unit; return notes per level (float32 value)."""
    import numpy as np

    from analysis.errors import InvalidParameter
    from analysis.stage_export import level_text, unique_levels
    from analysis.units import VerticalUnit

    unit = VerticalUnit.parse(dem.vertical_unit)
    sym = unit.symbol
    z_low = float(np.nanmin(dem.elevation))
    z_high = float(np.nanmax(dem.elevation))
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
    lowest = float(np.nanmin(result.onset_stage))
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
    from analysis.stage import stage_levels
    from analysis.stage_export import write_stage_results

    _stage_request(args)
    source = Path(args.source)
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
            table_levels = stage_levels(result, step=args.table_step, start=args.table_from,
                                        stop=args.table_to)
        progress.start("export")
        out_dir = Path(args.out)
        written = write_stage_results(result, dem, out_dir, levels=args.levels or [],
                                      table_levels=table_levels, progress=progress.file)
        progress.done()
    finally:
        progress.close()
    for line in _stage_lines(result, dem, outlets, out_dir, written, notes, origin, sys.stdout):
        print(line)
    return EXIT_OK


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

    from analysis.errors import SillmarkError

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
