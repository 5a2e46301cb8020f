"""The ``sillmark`` command line.

``sillmark analyse DEM --out DIR`` reads a DEM, marks its outlets, runs the spill
engine and writes the result files (see :mod:`analysis.export`), then prints a
short summary. Errors Sillmark expects (bad input, unwritable output) end the
run with one line ``sillmark: error: ...`` on stderr and exit status 2.

Exit status: 0 on success, 2 on a usage or input error, 130 when interrupted.
"""

from __future__ import annotations

import argparse
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


def _crs(text: str) -> str:
    value = text.strip()
    if re.fullmatch(r"\d+(\+\d+)?", value):  # 32633, or 32633+5773 with a vertical CRS
        return f"EPSG:{value}"
    if not value:
        raise argparse.ArgumentTypeError("an empty CRS; give an EPSG code such as 32633")
    return value


def build_parser() -> argparse.ArgumentParser:
    """The argument parser of the ``sillmark`` command (for ``--help`` and tests)."""
    from analysis.dem import DEFAULT_MAX_CELLS

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
        "--outlet",
        dest="outlets",
        metavar="edge|nodata|FILE",
        action="append",
        help="where water enters or leaves the site (repeatable; default: edge)",
    )
    analyse.add_argument(
        "--out", required=True, metavar="DIR",
        help="folder for the result files; created if missing, Sillmark's own file names replaced",
    )
    analyse.add_argument(
        "--connectivity", type=_connectivity, default=8, metavar="4|8",
        help="neighbours water may pass between: 8 (default, diagonals too) or 4",
    )
    analyse.add_argument(
        "--vertical-unit", choices=("m", "ft", "us-ft"), default=None,
        help="unit of the elevations when the file does not say: m (metres), ft "
        "(international feet) or us-ft (US survey feet)",
    )
    analyse.add_argument(
        "--crs", type=_crs, default=None, metavar="EPSG",
        help="CRS of the DEM when the file has none, as an EPSG code (e.g. 32633, or "
        "32633+5773 to add a vertical CRS) or WKT; must agree with the file's CRS if it has one",
    )
    analyse.add_argument("--band", type=_positive_int, default=None, metavar="N",
                         help="band holding the elevations, counted from 1 (needed for multi-band files)")
    analyse.add_argument(
        "--max-cells", type=_positive_int, default=None, metavar="N",
        help=f"refuse DEMs with more than N cells, to guard memory (default {DEFAULT_MAX_CELLS:,})",
    )
    analyse.add_argument("-q", "--quiet", action="store_true", help="no progress display on stderr")
    analyse.set_defaults(run=_run_analyse)
    return parser


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


def _summary_lines(result, dem, outlets, out_dir: Path, files: list[Path], stream: TextIO) -> list[str]:
    from analysis import SCREENING_CAUTION
    from analysis.units import ACRE_FOOT_M3, VerticalUnit

    m2, m3 = ("m²", "m³") if _can_print(stream, "m²m³") else ("m2", "m3")
    unit = VerticalUnit.parse(dem.vertical_unit)
    t = result.depressions
    rows, cols = dem.elevation.shape
    dx, dy = dem.cell_size
    size_unit = _horizontal_unit(dem, stream)
    epsg = dem.crs.to_epsg()
    crs_text = f"EPSG:{epsg}" if epsg else f"CRS {dem.horizontal_crs.name!r}"
    name = Path(dem.path).name if getattr(dem, "path", None) else "DEM"
    lines = [
        f"Site: {name}, {rows:,} x {cols:,} cells of {dx:g}{size_unit} x {dy:g}{size_unit}, "
        f"{crs_text}, elevations in {unit.symbol}",
        f"Outlets: {', '.join(outlets.sources)} ({outlets.count:,} cells); connectivity {result.connectivity}",
    ]
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


def _run_analyse(args: argparse.Namespace) -> int:
    from analysis.dem import read_dem
    from analysis.export import write_results
    from analysis.flood import analyse_site
    from analysis.outlets import build_outlets

    show = not args.quiet and sys.stderr.isatty()
    progress = _Progress(show)
    try:
        progress.start("read")
        options = {}
        if args.max_cells is not None:
            options["max_cells"] = args.max_cells
        dem = read_dem(args.dem, band=args.band, vertical_unit=args.vertical_unit, crs=args.crs, **options)
        progress.done()
        progress.start("outlets")
        outlets = build_outlets(dem, tuple(args.outlets or ("edge",)), connectivity=args.connectivity)
        progress.done()
        progress.start("flood")
        result = analyse_site(dem, outlets, connectivity=args.connectivity)
        progress.done()
        progress.start("export")
        out_dir = Path(args.out)
        files = write_results(result, dem, outlets, out_dir, progress=progress.file)
        progress.done()
    finally:
        progress.close()
    for line in _summary_lines(result, dem, outlets, out_dir, files, sys.stdout):
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
