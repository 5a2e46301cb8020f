"""The ``sillmark`` command line: one module per command (:mod:`~sillmark.cli.analyse`,
:mod:`~sillmark.cli.stage`, :mod:`~sillmark.cli.serve`), the parser in
:mod:`sillmark.cli.options` and the printed reports in :mod:`sillmark.cli.reports`.

``sillmark analyse DEM --out DIR`` reads a DEM, marks its outlets, runs the spill
engine and writes the result files (see :mod:`sillmark.run`), then prints a
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

import sys
from collections.abc import Sequence

from sillmark.cli.common import EXIT_ERROR, EXIT_INTERRUPTED, EXIT_OK, PROG
from sillmark.cli.options import ParserExit, UsageError, build_parser
from sillmark.cli.serve import serve_refusal

__all__ = ["EXIT_ERROR", "EXIT_INTERRUPTED", "EXIT_OK", "PROG", "build_parser", "main", "serve_refusal"]


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
    except ParserExit as stop:
        return stop.status
    except UsageError as exc:
        print(f"{PROG}: error: {exc}", file=sys.stderr)
        return EXIT_ERROR

    import rasterio.errors

    from sillmark.errors import SillmarkError
    from sillmark.process_memory import return_freed_memory

    return_freed_memory()  # whole-grid arrays go back to the system when freed

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
