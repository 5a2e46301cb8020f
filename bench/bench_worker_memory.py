"""Peak memory of a web analysis run on the tiled engine, as the DEM grows longer.

Runs ``tests.web.peak_worker`` (one process per DEM: a warm-up site, then the
measured run under tracemalloc) on invented DEMs 512 cells wide and of growing
length, and prints for each the traced peak, the bytes per cell, and the ratio
of the peak to one float32 copy of the grid (the reference a whole-grid worker
exceeds by reading the DEM alone). A worker that writes its arrays block by
block keeps the peak about flat while the cells grow.

    .venv/bin/python bench/bench_worker_memory.py [ROWS ...]
"""

from __future__ import annotations

import json
import subprocess
import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
COLS = 512


def measure(rows: int) -> dict:
    with tempfile.TemporaryDirectory(prefix="sillmark-bench-") as tmp:
        proc = subprocess.run([sys.executable, "-m", "tests.web.peak_worker", str(rows), str(COLS),
                               tmp], cwd=ROOT, capture_output=True, text=True, check=True)
    return json.loads(proc.stdout.strip().splitlines()[-1])


def main(argv: list[str]) -> int:
    lengths = [int(a) for a in argv] or [2048, 8192, 16384]
    print(f"{'rows x cols':>14} {'cells':>11} {'traced peak MB':>15} {'B/cell':>7} "
          f"{'peak / float32 grid':>20}")
    for rows in lengths:
        got = measure(rows)
        if got["state"] != "ready":
            print(f"{rows} x {COLS}: the run did not finish: {got['message']}")
            return 1
        cells = got["cells"]
        peak = got["traced_peak_bytes"]
        print(f"{rows:>7} x {COLS:<4} {cells:>11,} {peak / 1e6:>15.1f} {peak / cells:>7.2f} "
              f"{peak / (4 * cells):>20.2f}")
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
