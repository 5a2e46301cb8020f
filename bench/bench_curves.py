"""Benchmark of the three depression-hierarchy files, and of the curves on deep nesting.

1. **Survey terrain** (:func:`bench.terrain.survey_terrain`, SIZE x SIZE, noise
   3 cm on every cell): in fresh processes, the engine's result written to the
   three hierarchy files by :func:`sillmark.io.hierarchy_writer.write_hierarchy_files`
   (one window, in memory), with this checkout and, given ``--compare DIR``,
   with the checkout in DIR (e.g. an older version), each with its step times
   and peak memory; pysheds' ``fill_depressions`` on the same array for scale.
2. **A staircase of D nested pools** (one row of pits separated by walls that
   rise towards the outlet, so each pool merges with the next: a chain D levels
   deep), for growing D: the time of the curves file's rows. Summing each row's
   pools one by one costs about D² here; the sweep costs about D log D.

Usage: python bench/bench_curves.py [--size 3000] [--compare /path/to/checkout]
       [--chain 500 1000 2000 4000]
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent


def _status_kib(field: str) -> int:
    with open("/proc/self/status") as f:
        for line in f:
            if line.startswith(field + ":"):
                return int(line.split()[1])
    raise RuntimeError(field)


def staircase(d: int) -> np.ndarray:
    """3 x (2d + 3) cells: pit k at depth -k, the wall right of it at 50 - k."""
    z = np.full((3, 2 * d + 3), 100.0, np.float32)
    for k in range(d):
        z[1, 2 * k + 1] = -float(k)
        z[1, 2 * k + 2] = 50.0 - k
    z[1, 2 * d + 1] = 60.0
    return z


def _edge(shape):
    m = np.zeros(shape, bool)
    m[0, :] = m[-1, :] = m[:, 0] = m[:, -1] = True
    return m


def child(kind: str, arg: str) -> dict:
    from affine import Affine

    from sillmark.engine.flood import priority_flood
    from sillmark.grid.dem import dem_from_array
    from sillmark.io.hierarchy_writer import write_hierarchy_files
    from sillmark.products.source import ArraySource

    if kind == "files":
        z = np.load(arg)
        dem = dem_from_array(z, transform=Affine(1, 0, 500000, 0, -1, 5000000),
                             crs="EPSG:32633")
        small = dem_from_array(z[:200, :200].copy(), transform=dem.transform, crs="EPSG:32633")
        with tempfile.TemporaryDirectory() as out:  # compile outside the timing
            write_hierarchy_files(ArraySource(small, priority_flood(
                small.elevation, _edge(small.shape), row_areas=small.row_areas,
                transform=small.transform)), out)
        result = priority_flood(z, _edge(z.shape), row_areas=dem.row_areas,
                                transform=dem.transform)
        with open("/proc/self/clear_refs", "w") as f:
            f.write("5")
        before = _status_kib("VmRSS")
        with tempfile.TemporaryDirectory() as out:
            t0 = time.perf_counter()
            written = write_hierarchy_files(ArraySource(dem, result), out)
            seconds = time.perf_counter() - t0
            sizes = {p.name: p.stat().st_size for p in written.files}
        return {"s": seconds, "steps": written.seconds, "nodes": written.nodes,
                "depth": written.depth, "sizes": sizes,
                "peak_extra": (_status_kib("VmHWM") - before) * 1024,
                "curve_rows": getattr(written, "curve_rows", None)}
    if kind == "chain":
        from sillmark.io import hierarchy_files as hx
        from sillmark.products.hierarchy_sweep import depression_hierarchy
        from sillmark.units import VerticalUnit

        out = {}
        hx.curve_part_columns(depression_hierarchy(priority_flood(staircase(4), _edge((3, 11)))),
                              VerticalUnit.METRE)
        for d in map(int, arg.split(",")):
            z = staircase(d)
            h = depression_hierarchy(priority_flood(z, _edge(z.shape)))
            t0 = time.perf_counter()
            cols = hx.curve_part_columns(h, VerticalUnit.METRE)
            out[d] = {"s": time.perf_counter() - t0, "rows": int(cols["node_id"].shape[0])}
        return out
    if kind == "pysheds":
        from pysheds.grid import Grid
        from pysheds.sview import Raster, ViewFinder

        z = np.load(arg)
        view = ViewFinder(affine=Affine(1.0, 0, 0, 0, -1.0, float(z.shape[0])), shape=z.shape,
                          nodata=np.float32(-9999.0), crs="EPSG:32633")
        t0 = time.perf_counter()
        Grid(viewfinder=view).fill_depressions(Raster(z.copy(), viewfinder=view))
        return {"s": time.perf_counter() - t0}
    raise ValueError(kind)


def run_child(kind: str, arg: str, checkout: Path | None = None) -> dict:
    env = dict(os.environ)
    if checkout is not None:
        env["PYTHONPATH"] = str(checkout)
    got = subprocess.run([sys.executable, "-P", __file__, "--child", kind, arg], check=True,
                         capture_output=True, text=True, env=env)
    return json.loads(got.stdout.strip().splitlines()[-1])


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--size", type=int, default=3000)
    parser.add_argument("--compare", type=Path, default=None)
    parser.add_argument("--chain", type=int, nargs="*", default=[250, 500, 1000, 2000])
    parser.add_argument("--child", nargs=2, help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.child:
        print(json.dumps(child(*args.child)))
        return 0

    sys.path.insert(0, str(HERE.parent))  # not in the children: they import the checkout asked
    from bench.terrain import survey_terrain

    chain = ",".join(map(str, args.chain))
    mine = run_child("chain", chain)
    other = run_child("chain", chain, args.compare) if args.compare else None
    print("staircase of D nested pools: seconds for the curves file's rows")
    for d in args.chain:
        line = f"  D = {d:5d}: this checkout {mine[str(d)]['s']:8.3f} s ({mine[str(d)]['rows']} rows)"
        if other:
            line += f" | {args.compare}: {other[str(d)]['s']:8.3f} s"
        print(line)

    if args.size > 0:
        with tempfile.TemporaryDirectory() as work:
            npy = Path(work) / "survey.npy"
            np.save(npy, survey_terrain(args.size).elevation)
            fill = run_child("pysheds", str(npy))
            rows = [("this checkout", run_child("files", str(npy)))]
            if args.compare:
                rows.append((str(args.compare), run_child("files", str(npy), args.compare)))
        cells = args.size * args.size
        print(f"survey terrain {args.size} x {args.size}: the three hierarchy files, in memory")
        for name, r in rows:
            print(f"  {name}: {r['s']:.2f} s, peak {r['peak_extra'] / cells:.0f} B/cell, "
                  f"{r['nodes']} nodes, depth {r['depth']}, curve rows {r['curve_rows']}")
            print("    steps:", {k: round(v, 2) for k, v in r["steps"].items()})
            print("    sizes MB:", {k: round(v / 1e6, 1) for k, v in r["sizes"].items()})
        print(f"  pysheds fill_depressions on the same array: {fill['s']:.2f} s")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
