"""Benchmark of the whole ``sillmark analyse`` on a survey DEM with micro-relief (issue 15).

The terrain is :func:`bench.terrain.survey_terrain`: fractal relief plus
independent noise of a few centimetres on every cell, recorded to the
millimetre, SIZE x SIZE cells of 1 m (default 3000). Measured in the same run,
each in a fresh process:

1. **analyse**: the command ``sillmark analyse DEM.tif --out DIR`` with every
   default output (run once first so the compiled kernels are cached; the
   second run is timed), its wall time and its peak resident memory beyond
   what the process held after its imports, in bytes per cell beyond the DEM
   itself (4 bytes a cell);
2. **engine**: :func:`sillmark.engine.flood.priority_flood` alone on the array;
3. **pysheds**: pysheds' ``Grid.fill_depressions`` alone on the array
   (depression filling only; the version is printed).

Then the step times of one analyse (from its progress callback) and the sizes
of the files it wrote.

Targets (issue 15): analyse at least 3x faster than pysheds' fill alone, at
most 2x the engine's time, peak at most 100 bytes per cell beyond the DEM.

Usage: python bench/bench_survey.py [--size 3000] [--seed 0] [--keep DIR]
"""

from __future__ import annotations

import argparse
import json
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))


def _status_kib(field: str) -> int:
    with open("/proc/self/status") as f:
        for line in f:
            if line.startswith(field + ":"):
                return int(line.split()[1])
    raise RuntimeError(f"no {field} in /proc/self/status")


def _reset_peak() -> int:
    """Resident memory now (bytes), and the peak counter reset to it."""
    with open("/proc/self/clear_refs", "w") as f:
        f.write("5")
    return _status_kib("VmRSS") * 1024


def _edge(shape) -> np.ndarray:
    m = np.zeros(shape, bool)
    m[0, :] = m[-1, :] = m[:, 0] = m[:, -1] = True
    return m


def child(kind: str, path: str, out: str) -> dict:
    """One measurement in this fresh process."""
    if kind == "analyse":
        from sillmark.cli import main

        before = _reset_peak()
        t0 = time.perf_counter()
        status = main(["analyse", path, "--out", out])
        seconds = time.perf_counter() - t0
        if status != 0:
            raise SystemExit(f"sillmark analyse exited with {status}")
        return {"kind": kind, "s": seconds, "peak_extra": _status_kib("VmHWM") * 1024 - before}
    if kind == "steps":
        from sillmark.run import analyse

        marks: dict[str, float] = {}
        peaks: dict[str, float] = {}
        before = _reset_peak()
        t0 = time.perf_counter()

        def progress(step: str, done: int, total: int) -> None:
            # The peak of each step beyond the memory held at the start, then reset.
            if done == total:
                marks[step] = time.perf_counter() - t0
                peaks[step] = max(peaks.get(step, 0), _status_kib("VmHWM") * 1024 - before)
                _reset_peak()

        from sillmark.grid.dem import read_dem
        from sillmark.process_memory import return_freed_memory
        from sillmark.products.significance import site_minimum

        return_freed_memory()  # as the command does

        dem = read_dem(path)  # as the command does: in memory, with its default minimum
        run = analyse(dem, ("edge",), out, progress=progress,
                      minimum=site_minimum(unit=dem.vertical_unit))
        h = run.hierarchy
        return {"kind": kind, "marks": marks, "peaks": peaks, "seconds": run.seconds,
                "depressions": len(run.depressions),
                "hierarchy": {"nodes": h.nodes, "depth": h.depth,
                              "curve_rows": h.curve_rows, "natural": h.curve_rows_natural,
                              "budget": h.curve_rows_budget, "seconds": h.seconds}}
    z = np.load(path)
    outlets = _edge(z.shape)
    if kind == "engine":
        from sillmark.engine.flood import priority_flood

        priority_flood(z[:300, :300].copy(), _edge((300, 300)))  # compile outside the timing

        def run():
            return priority_flood(z, outlets)

    elif kind == "pysheds":
        from affine import Affine
        from pysheds.grid import Grid
        from pysheds.sview import Raster, ViewFinder

        view = ViewFinder(affine=Affine(1.0, 0, 0, 0, -1.0, float(z.shape[0])), shape=z.shape,
                          nodata=np.float32(-9999.0), crs="EPSG:32633")
        grid = Grid(viewfinder=view)
        small = ViewFinder(affine=view.affine, shape=(64, 64), nodata=view.nodata, crs=view.crs)
        Grid(viewfinder=small).fill_depressions(Raster(z[:64, :64].copy(), viewfinder=small))

        def run():
            return grid.fill_depressions(Raster(z.copy(), viewfinder=view))

    else:
        raise ValueError(kind)
    before = _reset_peak()
    t0 = time.perf_counter()
    run()
    seconds = time.perf_counter() - t0
    return {"kind": kind, "s": seconds, "peak_extra": _status_kib("VmHWM") * 1024 - before}


def measure(kind: str, path: Path, out: Path) -> dict:
    t0 = time.perf_counter()
    got = subprocess.run([sys.executable, __file__, "--child", kind, str(path), str(out)],
                         check=True, capture_output=True, text=True)
    result = json.loads(got.stdout.strip().splitlines()[-1])
    result["process_s"] = time.perf_counter() - t0
    return result


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--size", type=int, default=3000)
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--keep", type=Path, default=None)
    parser.add_argument("--no-warm", action="store_true",
                        help="skip the first analyse (when the compiled kernels are cached)")
    parser.add_argument("--no-steps", action="store_true",
                        help="skip the extra analyse that times and measures each step")
    parser.add_argument("--child", nargs=3, metavar=("KIND", "PATH", "OUT"), help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.child:
        print(json.dumps(child(*args.child)))
        return 0

    from bench.terrain import survey_terrain, write_geotiff

    work = Path(tempfile.mkdtemp(prefix="sillmark-survey-")) if args.keep is None else args.keep
    work.mkdir(parents=True, exist_ok=True)
    try:
        t = survey_terrain(args.size, seed=args.seed)
        cells = t.elevation.size
        tif = write_geotiff(work / "survey.tif", t.elevation, cell_size=t.cell_size)
        npy = work / "survey.npy"
        np.save(npy, t.elevation)
        del t
        print(f"survey terrain {args.size} x {args.size} ({cells / 1e6:.1f} Mcells), "
              f"noise 3 cm, 1 mm steps; seed {args.seed}")

        if not args.no_warm:
            measure("analyse", tif, work / "warm")  # caches the compiled kernels
            shutil.rmtree(work / "warm", ignore_errors=True)
        whole = measure("analyse", tif, work / "out")
        engine = measure("engine", npy, work)
        import pysheds

        fill = measure("pysheds", npy, work)
        steps = None if args.no_steps else measure("steps", tif, work / "steps")

        dem_bytes = 4 * cells
        beyond = (whole["peak_extra"] - dem_bytes) / cells
        print(f"{'':34s} {'seconds':>9s} {'peak B/cell':>12s}")
        print(f"{'sillmark analyse (whole command)':34s} {whole['s']:9.2f} {beyond:12.1f}"
              f"   (process {whole['process_s']:.2f} s with start-up)")
        print(f"{'sillmark engine alone':34s} {engine['s']:9.2f} "
              f"{engine['peak_extra'] / cells:12.1f}")
        print(f"{'pysheds ' + pysheds.__version__ + ' fill_depressions':34s} {fill['s']:9.2f} "
              f"{fill['peak_extra'] / cells:12.1f}")
        summary = json.loads((work / "out" / "summary.json").read_text())
        print(f"depressions {summary['depressions']['count']}; curves file:",
              summary.get("depression_curves"))
        if steps is not None:
            h = steps["hierarchy"]
            print(f"hierarchy nodes {h['nodes']}, depth {h['depth']}")
            print("steps of one analyse (s since start, at each step's end):",
                  ", ".join(f"{k} {v:.1f}" for k, v in steps["marks"].items()))
            print("peak of each step beyond the start, B/cell:",
                  ", ".join(f"{k} {v / cells:.0f}" for k, v in steps["peaks"].items()))
            print("hierarchy seconds:", {k: round(v, 2) for k, v in h["seconds"].items()})
        for p in sorted((work / "out").iterdir()):
            print(f"  {p.name:32s} {p.stat().st_size / 1e6:9.1f} MB")
        print("targets: analyse >= 3x faster than pysheds fill | <= 2x the engine | "
              "<= 100 B/cell beyond the DEM")
        print(f"measured: {fill['s'] / whole['s']:.2f}x faster than pysheds | "
              f"{whole['s'] / engine['s']:.2f}x the engine | {beyond:.1f} B/cell")
    finally:
        if args.keep is None:
            shutil.rmtree(work, ignore_errors=True)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
