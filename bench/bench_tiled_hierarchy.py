"""The hierarchy files out of core against the in-memory path, on the benchmark terrain.

    .venv/bin/python bench/bench_tiled_hierarchy.py [--size 4000] [--window-cells N]

Writes the terrain of bench/bench_tiled.py (size x size float32) to a temporary
folder, runs the tiled engine on it once, then in fresh processes:

- out of core: :func:`sillmark.io.results_folder.add_hierarchy_files` on the
  folder (serial, one batch after another; the DEM check of the folder is
  skipped by giving the grid);
- in memory: read the DEM, flood it, then
  :func:`sillmark.io.hierarchy_writer.write_hierarchy_files` on the result as an
  :class:`~sillmark.products.source.ArraySource` (only this timed; the time of
  :func:`sillmark.products.hierarchy_sweep.site_hierarchy` alone is printed beside it).

Prints wall times, each process's peak resident memory (VmHWM) and whether the
three files are the same bytes.
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))


def _peak_mib() -> float:
    with open("/proc/self/status") as f:
        for line in f:
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) / 1024
    return 0.0


def out_of_core(folder: str, window_cells: int) -> dict:
    from sillmark.grid.dem_grid import read_dem_grid
    from sillmark.io.summary import read_summary
    from sillmark.io.results_folder import add_hierarchy_files

    grid = read_dem_grid(read_summary(folder).dem)
    t0 = time.perf_counter()
    run = add_hierarchy_files(folder, grid=grid, window_cells=window_cells)
    return {"seconds": time.perf_counter() - t0, "steps": run.seconds, "batches": run.batches,
            "nodes": run.nodes, "largest_window": run.window_cells, "peak_mib": _peak_mib()}


def in_memory(dem_path: str, out: str) -> dict:
    from sillmark.grid.dem import read_dem
    from sillmark.engine.flood import analyse_site
    from sillmark.io.hierarchy_writer import write_hierarchy_files
    from sillmark.products.hierarchy_sweep import site_hierarchy
    from sillmark.products.source import ArraySource
    from sillmark.grid.outlets import build_outlets

    dem = read_dem(dem_path)
    result = analyse_site(dem, build_outlets(dem, ["edge"]))
    Path(out).mkdir(parents=True, exist_ok=True)
    t0 = time.perf_counter()
    written = write_hierarchy_files(ArraySource(dem, result), out)
    t1 = time.perf_counter()
    site_hierarchy(dem, result)
    t2 = time.perf_counter()
    return {"seconds": t1 - t0, "steps": written.seconds, "hierarchy_s": t2 - t1,
            "nodes": written.nodes, "peak_mib": _peak_mib()}


def _child(*args: str) -> dict:
    done = subprocess.run([sys.executable, __file__, *args], check=True, capture_output=True,
                          text=True)
    return json.loads(done.stdout.strip().splitlines()[-1])


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--size", type=int, default=4000)
    parser.add_argument("--window-cells", type=int, default=1 << 24)
    parser.add_argument("--child", nargs="+", help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.child:
        kind, *rest = args.child
        out = out_of_core(rest[0], int(rest[1])) if kind == "tiled" else in_memory(*rest)
        print(json.dumps(out))
        return

    from sillmark.io import hierarchy_files as hx
    from sillmark.engine.executors import SerialExecutor
    from sillmark.run import analyse
    sys.path.insert(0, str(ROOT / "bench"))
    from bench_tiled import write_terrain

    with tempfile.TemporaryDirectory(dir=ROOT / "bench") as tmp:
        tmp = Path(tmp)
        dem = write_terrain(tmp / "terrain.tif", args.size)
        t0 = time.perf_counter()
        analyse(dem, ("edge",), tmp / "tiled", executor=SerialExecutor(), store="files",
                tile_size=2048, derived=False)
        print(f"terrain {args.size} x {args.size}; tiled engine {time.perf_counter() - t0:.1f} s")
        tiled = _child("--child", "tiled", str(tmp / "tiled"), str(args.window_cells))
        memory = _child("--child", "memory", str(dem), str(tmp / "memory"))
        same = all((tmp / "tiled" / n).read_bytes() == (tmp / "memory" / n).read_bytes()
                   for n in hx.HIERARCHY_FILE_NAMES)
        sizes = {n: (tmp / "tiled" / n).stat().st_size for n in hx.HIERARCHY_FILE_NAMES}
    print(f"nodes {tiled['nodes']:,}; files {sizes}; same bytes: {same}")
    steps = ", ".join(f"{k} {v:.2f} s" for k, v in tiled["steps"].items())
    print(f"out of core: {tiled['seconds']:.2f} s ({steps}); {tiled['batches']} batches, largest "
          f"window {tiled['largest_window']:,} cells; peak {tiled['peak_mib']:.0f} MiB")
    steps = ", ".join(f"{k} {v:.2f} s" for k, v in memory["steps"].items())
    print(f"in memory:   {memory['seconds']:.2f} s ({steps}; site_hierarchy alone "
          f"{memory['hierarchy_s']:.2f} s); peak {memory['peak_mib']:.0f} MiB (process, with "
          "the DEM and the flood)")


if __name__ == "__main__":
    main()
