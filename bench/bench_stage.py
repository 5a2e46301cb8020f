"""Benchmark of the stage analysis beside the engine, on the same terrain.

Prints, from one run on the 4000 x 4000 benchmark terrain of bench_engine.py:
- the spill engine's own time (onset stage, flood tree, ids, table);
- one water-level map (class and depth rasters with area and volume totals);
- the site stage table at 200 levels;
- the depression hierarchy with the stage-area and stage-storage curves of
  every depression, when sillmark.products.hierarchy is available;
and the ratios the targets are stated in (issue 3): a single map under 50 ms;
the table and all curves together in no more than twice the engine's time.

Usage: python bench/bench_stage.py [--size 4000] [--repeat 5]
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))
sys.path.insert(0, str(HERE))

from bench_engine import _edge, make_terrain  # noqa: E402


def best_of(repeat, fn):
    times = []
    out = None
    for _ in range(repeat):
        t0 = time.perf_counter()
        out = fn()
        times.append(time.perf_counter() - t0)
    return min(times), out


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--size", type=int, default=4000)
    ap.add_argument("--repeat", type=int, default=5)
    args = ap.parse_args(argv)

    from sillmark.engine.flood import priority_flood
    from sillmark.grid.dem import dem_from_array
    from sillmark.products.source import ArraySource
    from sillmark.products.stage import stage_levels, stage_table, water_level_map

    z = make_terrain(args.size)
    outlets = _edge(z.shape)
    dem = dem_from_array(z)  # 1 m cells: areas count cells
    areas = dem.row_areas
    small = make_terrain(64)
    r_small = priority_flood(small, _edge(small.shape))  # compile outside the timing
    water_level_map(r_small, float(np.nanmedian(small)))
    small_source = ArraySource(dem_from_array(small), r_small)
    stage_table(small_source, stage_levels(small_source, step=1.0))

    engine_s, result = best_of(max(1, args.repeat // 2), lambda: priority_flood(z, outlets))
    level = float(np.percentile(result.onset_stage, 40))
    state = np.empty(z.shape, np.uint8)
    depth = np.empty(z.shape, np.float32)
    map_s, wmap = best_of(
        args.repeat, lambda: water_level_map(result, level, row_areas=areas, out=(state, depth))
    )
    lo, hi = float(np.nanmin(result.onset_stage)), float(result.depressions.spill_elevation.max())
    levels = np.linspace(lo, hi, 200).astype(np.float32)
    levels = np.unique(levels)
    table_s, table = best_of(args.repeat, lambda: stage_table(ArraySource(dem, result), levels))

    curves_s = None
    try:
        from sillmark.products import hierarchy, hierarchy_sweep
    except ImportError:
        hierarchy = None
    if hierarchy is not None and hasattr(hierarchy, "depression_hierarchy"):
        hierarchy_sweep.depression_hierarchy(r_small)
        curves_s, _ = best_of(
            max(1, args.repeat // 2),
            lambda: hierarchy_sweep.depression_hierarchy(result, row_areas=areas),
        )

    print(f"terrain {args.size} x {args.size} ({z.size / 1e6:.1f} Mcells), "
          f"{len(result.depressions)} depressions")
    print(f"engine (full)                     {engine_s * 1e3:9.1f} ms")
    print(f"water-level map at {level:8.2f} m     {map_s * 1e3:9.1f} ms   "
          f"(target < 50 ms; flooded {wmap.flooded_area_m2 / 1e4:.1f} ha)")
    print(f"stage table, {len(levels)} levels           {table_s * 1e3:9.1f} ms   "
          f"= {table_s / engine_s:.2f} x engine")
    if curves_s is not None:
        both = table_s + curves_s
        print(f"hierarchy + all curves            {curves_s * 1e3:9.1f} ms")
        print(f"table + curves together           {both * 1e3:9.1f} ms   "
              f"= {both / engine_s:.2f} x engine (target <= 2.0)")
    else:
        print("hierarchy + curves: sillmark.products.hierarchy not available in this checkout")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
