"""Benchmark of the depression hierarchy and its stage curves against the spill engine.

On the synthetic terrain of bench/bench_engine.py, times, in one process:
- the spill engine (sillmark.engine.flood.priority_flood: onset stage, flood tree,
  depression table);
- the depression hierarchy with the stage curves of every node
  (sillmark.products.hierarchy_sweep.depression_hierarchy), from the engine's result;
- evaluating every node's curve at its spill and merge levels (curve_at);
and prints the best times and the ratio hierarchy / engine.

Usage: python bench/bench_hierarchy.py [--size 2000] [--repeat 3]

Target: hierarchy and curves of all nodes in no more than about the engine's time.
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))

from bench.bench_engine import _edge, make_terrain  # noqa: E402


def best_of(repeat: int, run):
    times, out = [], None
    for _ in range(repeat):
        del out
        t0 = time.perf_counter()
        out = run()
        times.append(time.perf_counter() - t0)
    return min(times), times, out


def main(argv=None) -> int:
    from sillmark.engine.flood import priority_flood
    from sillmark.products.hierarchy_sweep import depression_hierarchy

    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--size", type=int, default=2000, help="terrain is SIZE x SIZE cells")
    ap.add_argument("--repeat", type=int, default=3, help="runs of each step (best is kept)")
    args = ap.parse_args(argv)

    t0 = time.perf_counter()
    z = make_terrain(args.size)
    outlets = _edge(z.shape)
    print(f"terrain: {args.size} x {args.size} float32 ({z.size / 1e6:.1f} Mcells), "
          f"built in {time.perf_counter() - t0:.1f} s")
    areas = np.full(z.shape[0], 4.0)  # 2 m cells

    # Compile outside the timing.
    small = priority_flood(z[:64, :64].copy(), _edge((64, 64)), row_areas=areas[:64])
    warm = depression_hierarchy(small, row_areas=areas[:64])
    if len(warm):
        warm.curve_at(1, [0.0])

    engine_s, engine_runs, result = best_of(
        args.repeat, lambda: priority_flood(z, outlets, row_areas=areas)
    )
    hier_s, hier_runs, h = best_of(
        args.repeat, lambda: depression_hierarchy(result, row_areas=areas)
    )
    t = h.nodes
    probe = np.where(t.is_leaf, t.spill_elevation, t.merge_elevation).astype(np.float64)

    def evaluate_all():
        total = 0.0
        for v in range(1, len(h) + 1):
            at = h.curve_at(v, [probe[v - 1], float(t.spill_elevation[v - 1])])
            total += at.storage_m3[-1]
        return total

    eval_s, _, total = best_of(args.repeat, evaluate_all)
    assert np.isclose(total, t.volume_m3.sum(), rtol=1e-9)
    top_volume = t.volume_m3[h.tops - 1].sum()
    assert np.isclose(top_volume, result.depressions.volume_m2_vu.sum(), rtol=1e-9)

    cells = int((result.depression_id > 0).sum())
    height = np.zeros(len(h) + 1, dtype=np.int64)
    for v in range(1, len(h) + 1):
        p = int(t.parent[v - 1])
        if p:
            height[p] = max(height[p], height[v] + 1)
    region_sum = int(t.cell_count.sum())
    stored = h.segments.elevation.shape[0]

    print()
    print(f"{'step':<46}{'best time':>11}{'x engine':>10}")
    rows = [
        ("spill engine (priority_flood)", engine_s),
        ("hierarchy + curves of all nodes", hier_s),
        ("curve_at for every node, 2 levels each", eval_s),
    ]
    for label, seconds in rows:
        print(f"{label:<46}{seconds:>9.3f} s{seconds / engine_s:>10.2f}")
    print()
    print(f"engine runs {['%.3f' % s for s in engine_runs]} s; "
          f"hierarchy runs {['%.3f' % s for s in hier_runs]} s")
    print(f"depressions {len(result.depressions)}, nodes {len(h)} "
          f"({int(t.is_leaf.sum())} leaves), deepest tree {int(height.max(initial=0)) + 1} levels")
    print(f"depression cells {cells} ({cells / z.size:.1%}); sum of node region sizes "
          f"{region_sum} ({region_sum / max(cells, 1):.1f} x): stored breakpoints {stored}")
    print()
    print("target: hierarchy + curves <= about 1x the engine")
    print(f"measured: {hier_s / engine_s:.2f}x the engine")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
