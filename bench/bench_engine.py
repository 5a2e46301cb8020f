"""Benchmark of the spill engine against reference libraries, side by side.

Runs, on the same synthetic terrain and in the same invocation:
- Sillmark's full engine (onset stage, flood tree, depression ids and table);
- pysheds 0.5 ``Grid.fill_depressions`` (depression filling only);
- scikit-image ``morphology.reconstruction(method="erosion")`` (filling only);
and prints cells per second for each, the ratio of Sillmark to each, and
Sillmark's peak memory per cell beyond the DEM itself. Each measurement runs in
a fresh child process so peak resident memory is its own.

Usage: python bench/bench_engine.py [--size 4000] [--repeat 3] [--skip-references]

Targets (issue 2): >= 10 Mcells/s for the full engine, >= 20x pysheds, <= 16
bytes per cell beyond the DEM.
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
sys.path.insert(0, str(HERE.parent))


def make_terrain(size: int, seed: int = 2026) -> np.ndarray:
    """Rolling terrain with many closed depressions of all sizes (float32, metres).

    Smoothed noise at three wavelengths on a gentle tilt, so the surface has
    thousands of pits, nested basins, saddles and long slopes.
    """
    from scipy.ndimage import gaussian_filter

    rng = np.random.default_rng(seed)
    z = np.zeros((size, size), np.float64)
    for sigma, amp in ((40.0, 30.0), (8.0, 4.0), (2.0, 0.5)):
        z += amp * gaussian_filter(rng.standard_normal((size, size)), sigma) * sigma
    tilt = np.linspace(0.0, 20.0, size)
    z += tilt[None, :] + tilt[:, None] * 0.5
    return np.round(z + 100.0, 2).astype(np.float32)


def _status_kib(field: str) -> int:
    with open("/proc/self/status") as f:
        for line in f:
            if line.startswith(field + ":"):
                return int(line.split()[1])
    raise RuntimeError(field)


def _edge(shape):
    m = np.zeros(shape, bool)
    m[0, :] = m[-1, :] = m[:, 0] = m[:, -1] = True
    return m


def child(kind: str, path: str, repeat: int) -> dict:
    """Run one measurement in this (fresh) process and return figures."""
    z = np.load(path)
    outlets = _edge(z.shape)
    if kind == "sillmark":
        from sillmark.engine.flood import priority_flood

        priority_flood(z[:600, :600].copy(), _edge((600, 600)), tile_size=256)  # compile outside the timing

        def run():
            return priority_flood(z, outlets)

    elif kind == "pysheds":
        from affine import Affine
        from pysheds.grid import Grid
        from pysheds.sview import Raster, ViewFinder

        view = ViewFinder(
            affine=Affine(1.0, 0, 0, 0, -1.0, float(z.shape[0])), shape=z.shape,
            nodata=np.float32(-9999.0), crs="EPSG:32633",
        )
        grid = Grid(viewfinder=view)
        small = ViewFinder(affine=view.affine, shape=(64, 64), nodata=view.nodata, crs=view.crs)
        Grid(viewfinder=small).fill_depressions(Raster(z[:64, :64].copy(), viewfinder=small))

        def run():
            return grid.fill_depressions(Raster(z.copy(), viewfinder=view))

    elif kind == "skimage":
        from skimage.morphology import reconstruction

        def run():
            seed = z.copy()
            seed[1:-1, 1:-1] = z.max()
            return reconstruction(seed, z, method="erosion")

    else:
        raise ValueError(kind)

    rss_before = _status_kib("VmRSS")
    with open("/proc/self/clear_refs", "w") as f:  # reset VmHWM to the current RSS
        f.write("5")
    times = []
    result = None
    for _ in range(repeat):
        del result
        t0 = time.perf_counter()
        result = run()
        times.append(time.perf_counter() - t0)
    peak = _status_kib("VmHWM")
    extra = {}
    if kind == "sillmark":
        extra = {"depressions": len(result.depressions), "heap_pops": result.heap_pops}
    return {
        "kind": kind,
        "cells": int(z.size),
        "best_s": min(times),
        "times_s": times,
        "peak_extra_bytes": (peak - rss_before) * 1024,
        **extra,
    }


def measure(kind: str, path: str, repeat: int) -> dict:
    out = subprocess.run(
        [sys.executable, __file__, "--child", kind, path, "--repeat", str(repeat)],
        check=True, capture_output=True, text=True,
    )
    return json.loads(out.stdout.strip().splitlines()[-1])


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--size", type=int, default=4000, help="terrain is SIZE x SIZE cells")
    ap.add_argument("--repeat", type=int, default=3, help="runs per library (best is kept)")
    ap.add_argument("--skip-references", action="store_true")
    ap.add_argument("--child", nargs=2, metavar=("KIND", "PATH"), help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.child:
        print(json.dumps(child(args.child[0], args.child[1], args.repeat)))
        return 0

    with tempfile.TemporaryDirectory() as tmp:
        path = os.path.join(tmp, "terrain.npy")
        t0 = time.perf_counter()
        z = make_terrain(args.size)
        np.save(path, z)
        print(f"terrain: {args.size} x {args.size} float32 ({z.size / 1e6:.1f} Mcells), "
              f"built in {time.perf_counter() - t0:.1f} s")
        del z
        rows = [measure("sillmark", path, args.repeat)]
        if not args.skip_references:
            rows.append(measure("pysheds", path, 1))
            rows.append(measure("skimage", path, 1))

    ours = rows[0]
    mcps = ours["cells"] / ours["best_s"] / 1e6
    print()
    print(f"{'library':<34}{'best time':>12}{'Mcells/s':>11}{'Sillmark x':>12}")
    labels = {
        "sillmark": "Sillmark full engine",
        "pysheds": "pysheds 0.5 fill_depressions",
        "skimage": "scikit-image reconstruction",
    }
    for row in rows:
        rate = row["cells"] / row["best_s"] / 1e6
        ratio = row["best_s"] / ours["best_s"]
        print(f"{labels[row['kind']]:<34}{row['best_s']:>10.2f} s{rate:>11.2f}{ratio:>12.1f}")
    per_cell = ours["peak_extra_bytes"] / ours["cells"]
    print()
    print(f"Sillmark: {ours['depressions']} depressions, {ours['heap_pops']} heap pops, "
          f"runs {['%.2f' % t for t in ours['times_s']]} s")
    print(f"Sillmark peak memory beyond the DEM: {per_cell:.1f} bytes per cell")
    print()
    print("targets: >= 10 Mcells/s  |  >= 20x pysheds  |  <= 16 bytes/cell")
    verdict = [f"{mcps:.2f} Mcells/s"]
    if len(rows) > 1:
        verdict.append(f"{rows[1]['best_s'] / ours['best_s']:.1f}x pysheds")
    verdict.append(f"{per_cell:.1f} bytes/cell")
    print("measured: " + "  |  ".join(verdict))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
