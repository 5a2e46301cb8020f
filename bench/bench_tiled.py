"""Benchmark of the out-of-core tiled engine on Dask, beside the in-memory engine.

1. Writes a SIZE x SIZE float32 terrain (default 20 000 x 20 000, 1.6 GB, an
   uncompressed tiled GeoTIFF) window by window: the generator never holds more
   than one band of rows, so the DEM may be larger than memory. With
   ``--noise SD`` every cell also gets independent Gaussian noise of SD metres
   (issue 15 is about survey DEMs, whose noise makes a pit almost everywhere).
2. Analyses it with :func:`sillmark.run.analyse` (tiles in scratch files) on a LocalCluster of
   WORKERS worker processes (1 thread each, MEMORY per worker, on 127.0.0.1),
   tiles of TILE cells, as ``sillmark analyse DEM --tiles N`` runs it: every
   default output (the rasters, the tables, the hierarchy files with the
   default significance minimum, the listed depressions' tables and outlines).
   It prints the wall time of each step (the engine's, the rasters' writing,
   the hierarchy, the listed tables, the outlines), the aggregate Mcells/s over
   everything, the peak resident memory of every process (this one, which also
   runs the scheduler, the nannies and the workers), the machine's load average
   and the bytes that moved: task arguments sent, results gathered and the
   workers' own outgoing bytes.
3. Crops CROP x CROP cells from the terrain and checks that the tiled engine on
   the cluster (tiles of CROP_TILE cells) gives exactly the in-memory engine's
   result with the same tiles: every cell of the four rasters, every row of the
   depression table; and the tile-free part equals the in-memory engine at its
   default tiles. The in-memory engine's time on that crop is printed beside,
   and on a MEMORY_SIZE square if asked (the largest that fits the machine).

Usage: python bench/bench_tiled.py [--size 20000] [--workers 2] [--memory 2GB]
       [--tile 2048] [--crop 4000] [--crop-tile 1024] [--memory-size 0] [--engine-only]
       [--noise 0.03] [--keep DIR]

pysheds' ``fill_depressions`` alone is timed on the crop for scale.

Targets (issue 15, "Out of core"): >= 3 Mcells/s aggregate on 2 workers with every
default output, on a survey-like DEM (``--noise 0.03``: 3 cm of independent noise on
every cell); exact agreement with the in-memory result on a 4000 x 4000 crop.
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))

#: Steps of run.seconds that are the engine's own (the rest write files).
ENGINE_STEPS = ("read", "flood", "graph", "finish", "join", "totals")

#: Wavelengths (cells) and amplitudes (m) of the terrain's value-noise octaves.
OCTAVES = ((400.0, 60.0), (80.0, 12.0), (16.0, 2.5), (4.0, 0.4))


def _lattice(i: np.ndarray, j: np.ndarray, octave: int, seed: int) -> np.ndarray:
    """Pseudo-random values in [-1, 1) at integer lattice points, from a hash of (i, j)."""
    h = (i.astype(np.uint64) * np.uint64(0x9E3779B1) + j.astype(np.uint64) * np.uint64(0x85EBCA77)
         + np.uint64(seed * 1000003 + octave * 7919))
    h ^= h >> np.uint64(33)
    h *= np.uint64(0xFF51AFD7ED558CCD)
    h ^= h >> np.uint64(33)
    h *= np.uint64(0xC4CEB9FE1A85EC53)
    h ^= h >> np.uint64(33)
    return (h >> np.uint64(40)).astype(np.float64) / float(1 << 23) - 1.0


def terrain_window(r0: int, r1: int, c0: int, c1: int, size: int, seed: int = 2026,
                   noise: float = 0.0) -> np.ndarray:
    """Rows r0:r1, columns c0:c1 of the terrain: value noise in four octaves on a tilt.

    Every cell depends only on its own coordinates, so windows join without seams.
    Without ``noise`` the heights are rounded to centimetres (ties on rims, as in
    surveyed DEMs). With ``noise`` (metres, a standard deviation) every cell gets
    its own Gaussian error, as a lidar or drone survey does (the micro-relief of
    bench/terrain.py ``survey_terrain``, which holds the whole grid in memory and
    so cannot be written window by window), and the heights are rounded to
    millimetres, the recording step of ``survey_terrain``.
    """
    yy = np.arange(r0, r1, dtype=np.float64)[:, None]
    xx = np.arange(c0, c1, dtype=np.float64)[None, :]
    z = np.zeros((r1 - r0, c1 - c0), dtype=np.float64)
    for k, (wave, amp) in enumerate(OCTAVES):
        fy, fx = yy / wave, xx / wave
        iy, ix = np.floor(fy), np.floor(fx)
        ty, tx = fy - iy, fx - ix
        sy, sx = ty * ty * (3 - 2 * ty), tx * tx * (3 - 2 * tx)  # smoothstep
        iy, ix = iy.astype(np.int64) + 1_000_000, ix.astype(np.int64) + 1_000_000
        v00 = _lattice(iy, ix, k, seed)
        v01 = _lattice(iy, ix + 1, k, seed)
        v10 = _lattice(iy + 1, ix, k, seed)
        v11 = _lattice(iy + 1, ix + 1, k, seed)
        top = v00 + (v01 - v00) * sx
        bottom = v10 + (v11 - v10) * sx
        z += amp * (top + (bottom - top) * sy)
    z += 40.0 * xx / size + 20.0 * yy / size + 100.0
    if not noise:
        return np.round(z, 2).astype(np.float32)
    z += noise * _cell_gaussian(r0, r1, c0, c1, seed)
    return np.round(z, 3).astype(np.float32)


def _cell_gaussian(r0: int, r1: int, c0: int, c1: int, seed: int) -> np.ndarray:
    """Standard normal values, one per cell, from a hash of the cell's own row and
    column (Box-Muller on two hashed uniforms), so windows join without seams."""
    i = np.arange(r0, r1, dtype=np.int64)[:, None] + 3_000_000
    j = np.arange(c0, c1, dtype=np.int64)[None, :] + 3_000_000
    u1 = (_lattice(i, j, 101, seed) + 1.0) / 2.0  # [0, 1)
    u2 = (_lattice(i, j, 102, seed) + 1.0) / 2.0
    return np.sqrt(-2.0 * np.log1p(-u1)) * np.cos(2.0 * np.pi * u2)


def write_terrain(path: Path, size: int, *, rows_per_band: int = 512, window=None,
                  noise: float = 0.0) -> Path:
    """Write the terrain (or its ``window`` = (r0, r1, c0, c1)) as a tiled GeoTIFF, band by band."""
    import rasterio
    from affine import Affine

    r0, r1, c0, c1 = window or (0, size, 0, size)
    profile = dict(driver="GTiff", width=c1 - c0, height=r1 - r0, count=1, dtype="float32",
                   crs="EPSG:32633", transform=Affine(1.0, 0.0, 500_000.0 + c0, 0.0, -1.0,
                                                      5_000_000.0 - r0),
                   tiled=True, blockxsize=256, blockysize=256, BIGTIFF="IF_SAFER")
    with rasterio.open(path, "w", **profile) as ds:
        for a in range(r0, r1, rows_per_band):
            b = min(r1, a + rows_per_band)
            ds.write(terrain_window(a, b, c0, c1, size, noise=noise), 1,
                     window=rasterio.windows.Window(0, a - r0, c1 - c0, b - a))
    return path


def _peak_kib(pid: int | str = "self") -> int:
    with open(f"/proc/{pid}/status") as f:
        for line in f:
            if line.startswith("VmHWM:"):
                return int(line.split()[1])
    return 0


def _process_peaks() -> dict[str, float]:
    """Peak RSS (GB) of this process (client, scheduler, nannies) and every process below it."""
    import psutil

    me = psutil.Process()
    peaks = {f"client, scheduler and nannies (pid {me.pid})": _peak_kib() / 2**20}
    for child in me.children(recursive=True):
        try:
            cmd = " ".join(child.cmdline())
            kind = "multiprocessing helper" if "resource_tracker" in cmd else "worker"
            peaks[f"{kind} (pid {child.pid})"] = _peak_kib(child.pid) / 2**20
        except (psutil.Error, OSError):
            continue
    return peaks


def _in_memory_child(path: str, tile: int | None) -> None:
    """In a fresh process: the in-memory engine on a DEM file; print time and peak RSS."""
    from sillmark.engine.flood import analyse_site, priority_flood
    from sillmark.grid.dem import read_dem
    from sillmark.grid.outlets import build_outlets

    dem = read_dem(path, max_cells=2**40)
    outlets = build_outlets(dem, ["edge"])
    # Compile (or load from numba's cache) for read-only arrays, as the DEM's are.
    z, m = dem.elevation[:300, :300].copy(), outlets.mask[:300, :300].copy()
    z.flags.writeable = m.flags.writeable = False
    analyse_site(type(dem)(elevation=z, transform=dem.transform, crs=dem.crs,
                           vertical_unit=dem.vertical_unit), type(outlets)(mask=m, sources=("edge",)))
    t0 = time.perf_counter()
    r = analyse_site(dem, outlets) if tile is None else priority_flood(
        dem.elevation, outlets.mask, row_areas=dem.row_areas, transform=dem.transform,
        tile_size=tile)
    seconds = time.perf_counter() - t0
    print(json.dumps({"cells": int(dem.elevation.size), "seconds": seconds,
                      "depressions": len(r.depressions), "peak_gb": _peak_kib() / 2**20}))


def _pysheds_child(path: str) -> None:
    """In a fresh process: pysheds' fill_depressions alone on a DEM file; print its time."""
    import pysheds
    import rasterio
    from affine import Affine
    from pysheds.grid import Grid
    from pysheds.sview import Raster, ViewFinder

    with rasterio.open(path) as src:
        z = src.read(1).astype(np.float32)
    view = ViewFinder(affine=Affine(1.0, 0, 0, 0, -1.0, float(z.shape[0])), shape=z.shape,
                      nodata=np.float32(-9999.0), crs="EPSG:32633")
    t0 = time.perf_counter()
    Grid(viewfinder=view).fill_depressions(Raster(z, viewfinder=view))
    seconds = time.perf_counter() - t0
    print(json.dumps({"cells": int(z.size), "seconds": seconds, "version": pysheds.__version__,
                      "peak_gb": _peak_kib() / 2**20}))


def pysheds_figures(path: Path) -> dict:
    out = subprocess.run([sys.executable, __file__, "--pysheds-child", str(path)],
                         check=True, capture_output=True, text=True)
    return json.loads(out.stdout.strip().splitlines()[-1])


def in_memory_figures(path: Path) -> dict:
    out = subprocess.run([sys.executable, __file__, "--in-memory-child", str(path)],
                         check=True, capture_output=True, text=True)
    return json.loads(out.stdout.strip().splitlines()[-1])


def check_crop(crop_path: Path, out: Path, run_map, tile: int) -> dict:
    """Tiled (on the cluster) against in-memory on the crop: every cell and every row."""
    import rasterio

    from sillmark.engine.flood import priority_flood
    from sillmark.grid.dem import read_dem
    from sillmark.grid.outlets import build_outlets
    from sillmark.run import analyse

    run = analyse(crop_path, ("edge",), out, executor=run_map, store="files", tile_size=tile,
                  derived=False)
    dem = read_dem(crop_path)
    mask = build_outlets(dem, ["edge"]).mask
    same = priority_flood(dem.elevation, mask, row_areas=dem.row_areas, transform=dem.transform,
                          tile_size=tile)
    whole = priority_flood(dem.elevation, mask, row_areas=dem.row_areas, transform=dem.transform)

    def band(name):
        with rasterio.open(out / name) as ds:
            return ds.read(1)

    ids = np.where(np.isnan(same.onset_stage), -1, same.depression_id)
    checks = {
        "onset_stage": np.array_equal(band("onset_stage.tif"), same.onset_stage, equal_nan=True),
        "fill_depth": np.array_equal(band("fill_depth.tif"), same.fill_depth, equal_nan=True),
        "depression_id": np.array_equal(band("depression_id.tif"), ids),
        "flood_tree": np.array_equal(band("flood_tree.tif"), same.flood_tree),
        "table": all(np.array_equal(getattr(same.depressions, c), getattr(run.depressions, c),
                                    equal_nan=True) for c in same.depressions.columns),
        # Spill points and sills are tile-independent: the whole table equals
        # the in-memory run at its default tile size too.
        "tile-free vs default tiles": bool(
            np.array_equal(band("onset_stage.tif"), whole.onset_stage, equal_nan=True)
            and np.array_equal(band("depression_id.tif"),
                               np.where(np.isnan(whole.onset_stage), -1, whole.depression_id))
            and all(np.array_equal(getattr(whole.depressions, c), getattr(run.depressions, c),
                                   equal_nan=True) for c in whole.depressions.columns)),
    }
    return {"depressions": len(run.depressions), "checks": checks}


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--size", type=int, default=20000)
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--memory", default="2GB", help="memory limit per worker")
    ap.add_argument("--tile", type=int, default=2048)
    ap.add_argument("--crop", type=int, default=4000)
    ap.add_argument("--crop-tile", type=int, default=1024)
    ap.add_argument("--memory-size", type=int, default=0,
                    help="also time the in-memory engine on a square of this size (0: skip)")
    ap.add_argument("--engine-only", action="store_true",
                    help="skip the outlines and hierarchy files (the engine's figures only)")
    ap.add_argument("--noise", type=float, default=0.0,
                    help="standard deviation (m) of independent noise on every cell, as on a "
                         "survey DEM (e.g. 0.03); 0 keeps the smooth terrain")
    ap.add_argument("--keep", default=None, help="work folder to keep (default: a temporary one)")
    ap.add_argument("--in-memory-child", default=None, help=argparse.SUPPRESS)
    ap.add_argument("--pysheds-child", default=None, help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.in_memory_child:
        _in_memory_child(args.in_memory_child, None)
        return 0
    if args.pysheds_child:
        _pysheds_child(args.pysheds_child)
        return 0

    from sillmark.engine.executors import dask_executor as dask_map
    from sillmark.products.significance import site_minimum
    from sillmark.run import analyse

    minimum = site_minimum()  # the terrain is in metres; the default vertical accuracy

    work = Path(args.keep) if args.keep else Path(tempfile.mkdtemp(prefix="sillmark-bench-"))
    work.mkdir(parents=True, exist_ok=True)
    report: dict = {"size": args.size, "workers": args.workers, "memory_limit": args.memory,
                    "tile": args.tile}
    try:
        suffix = f"_noise{args.noise:g}" if args.noise else ""
        dem = work / f"terrain_{args.size}{suffix}.tif"
        if not dem.exists():
            t0 = time.perf_counter()
            write_terrain(dem, args.size, noise=args.noise)
            report["generate_s"] = time.perf_counter() - t0
        report["dem_bytes"] = dem.stat().st_size
        crop = work / f"crop_{args.crop}{suffix}.tif"
        write_terrain(crop, args.size, window=(0, args.crop, 0, args.crop), noise=args.noise)
        with dask_map(workers=args.workers, memory_limit=args.memory) as run_map:
            # Warm the workers (imports, compiled kernels from numba's cache) off the clock.
            analyse(crop, ("edge",), work / "warm", executor=run_map, store="files",
                    tile_size=1000, derived=not args.engine_only,
                    minimum=None if args.engine_only else minimum)
            run_map.sent_bytes = run_map.received_bytes = 0
            out_before = run_map.worker_outgoing_bytes()
            load = os.getloadavg()
            t0 = time.perf_counter()
            # As `sillmark analyse DEM --tiles N` runs it: every default output, the
            # default significance minimum (from the default vertical accuracy).
            run = analyse(dem, ("edge",), work / "out", executor=run_map, store="files",
                          tile_size=args.tile, derived=not args.engine_only,
                          minimum=None if args.engine_only else minimum,
                          vector_format="auto")  # the command's default
            wall = time.perf_counter() - t0
            engine = sum(run.seconds[k] for k in ENGINE_STEPS if k in run.seconds)
            report.update({
                "load_average_before": load,
                "load_average_after": os.getloadavg(),
                "wall_s": wall,
                "steps_s": run.seconds,
                "engine_s": engine,
                "cells": args.size * args.size,
                "mcells_per_s": args.size * args.size / wall / 1e6,
                "engine_mcells_per_s": args.size * args.size / engine / 1e6,
                "tiles": run.tiles,
                "depressions": len(run.depressions),
                "task_args_sent_bytes": run_map.sent_bytes,
                "results_gathered_bytes": run_map.received_bytes,
                "worker_outgoing_bytes": run_map.worker_outgoing_bytes() - out_before,
                "files": len(run.files),
                "file_bytes": {p.name: p.stat().st_size for p in run.files},
            })
            if run.hierarchy is not None:
                report["hierarchy"] = {"nodes": run.hierarchy.nodes,
                                       "batches": run.hierarchy.batches,
                                       "depth": run.hierarchy.depth}
            if run.significance is not None:
                report["significance"] = run.significance
            report["peak_rss_gb"] = _process_peaks()
            report["crop"] = check_crop(crop, work / "crop_out", run_map, args.crop_tile)
        report["in_memory_crop"] = in_memory_figures(crop)
        report["pysheds_crop"] = pysheds_figures(crop)
        if args.memory_size:
            big = work / f"square_{args.memory_size}.tif"
            write_terrain(big, args.size, window=(0, args.memory_size, 0, args.memory_size),
                          noise=args.noise)
            report["in_memory_square"] = in_memory_figures(big)
    finally:
        if not args.keep:
            shutil.rmtree(work, ignore_errors=True)
    print(json.dumps(report, indent=2))
    mcs = report["mcells_per_s"]
    peak = max(report["peak_rss_gb"].values())
    exact = all(report["crop"]["checks"].values())
    steps = report["steps_s"]
    what = "the engine's files only" if args.engine_only else f"all {report['files']} files"
    print(f"\ntiled, {what}: {report['cells'] / 1e6:.0f} Mcells in {report['wall_s']:.1f} s = "
          f"{mcs:.2f} Mcells/s aggregate on {args.workers} workers (target >= 3); peak RSS "
          f"{peak:.2f} GB; crop exact: {exact}; load average before {report['load_average_before'][0]:.2f}")
    print("  " + ", ".join(f"{k} {steps[k]:.1f} s" for k in
                           (*ENGINE_STEPS, "write", "hierarchy", "listed_tables", "outlines",
                            "summary") if k in steps)
          + f"; engine alone {report['engine_mcells_per_s']:.2f} Mcells/s")
    imc = report["in_memory_crop"]
    print(f"in-memory on the {args.crop} x {args.crop} crop: {imc['cells'] / imc['seconds'] / 1e6:.2f} "
          f"Mcells/s, peak {imc['peak_gb']:.2f} GB")
    ps = report["pysheds_crop"]
    print(f"pysheds {ps['version']} fill_depressions alone on the same crop: "
          f"{ps['cells'] / ps['seconds'] / 1e6:.2f} Mcells/s, peak {ps['peak_gb']:.2f} GB")
    return 0 if exact else 1


if __name__ == "__main__":
    sys.exit(main())
