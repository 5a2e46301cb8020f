"""Benchmark of depression significance on invented survey terrain.

On fractal relief with centimetre noise (bench/terrain.py), times, in one process:
- the spill engine (sillmark.engine.flood.priority_flood);
- the depression hierarchy (sillmark.products.hierarchy_sweep.depression_hierarchy);
- significance (sillmark.products.significance.significance) and its cell raster;
and prints the node counts with and without the noise, how many depressions are
significant, and the ratio of the significance step to the engine.

Usage: python bench/bench_significance.py [--size 1000] [--noise 0.03] [--accuracy 0.10]

Target: significance in a small fraction of the engine's time, and as many
significant depressions with the noise as the noise-free relief has of that depth
(give or take those near the minimum).
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))

from bench.terrain import survey_terrain  # noqa: E402


def _edge(shape):
    m = np.zeros(shape, bool)
    m[0, :] = m[-1, :] = m[:, 0] = m[:, -1] = True
    return m


def timed(run):
    t0 = time.perf_counter()
    out = run()
    return time.perf_counter() - t0, out


def main(argv=None) -> None:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--size", type=int, default=1000)
    p.add_argument("--noise", type=float, default=0.03, help="noise standard deviation, m")
    p.add_argument("--accuracy", type=float, default=0.10, help="stated vertical accuracy, m")
    p.add_argument("--seed", type=int, default=2026)
    a = p.parse_args(argv)

    from sillmark.engine.flood import priority_flood
    from sillmark.products.hierarchy_sweep import depression_hierarchy
    from sillmark.products.significance import significance, site_minimum

    n = a.size
    t = survey_terrain(n, seed=a.seed, noise_sd=a.noise, relief_m=0.01 * n,
                       bowls=((n / 2, n / 2, n / 8, 1.5),))
    edge = _edge(t.elevation.shape)
    minimum = site_minimum(vertical_accuracy=a.accuracy)
    # Warm the compiled kernels on a small site first.
    small = survey_terrain(64, seed=1)
    significance(depression_hierarchy(priority_flood(small.elevation, _edge((64, 64)))), minimum)

    rows = []
    for label, z in (("relief", t.relief), ("survey", t.elevation)):
        te, r = timed(lambda: priority_flood(z, edge))
        th, h = timed(lambda: depression_hierarchy(r))
        ts, s = timed(lambda: significance(h, minimum))
        tc, _ = timed(lambda: s.cell_ids(h))
        rows.append((label, len(h), len(s), te, th, ts, tc))
    print(f"{n} x {n} cells, noise {a.noise} m, accuracy {a.accuracy} m, "
          f"minimum depth {minimum.min_depth:.3f} m")
    print(f"{'DEM':8s} {'nodes':>9s} {'significant':>11s} {'engine s':>9s} {'hierarchy s':>11s} "
          f"{'signif. s':>9s} {'cells s':>8s} {'signif./engine':>14s}")
    for label, nodes, sig, te, th, ts, tc in rows:
        print(f"{label:8s} {nodes:9d} {sig:11d} {te:9.3f} {th:11.3f} {ts:9.4f} {tc:8.3f} "
              f"{ts / te:14.4f}")


if __name__ == "__main__":
    main()
