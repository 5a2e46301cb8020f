"""Run the compiled kernels once with numba's bounds checking switched on.

The kernels trust their inputs and index flat padded arrays with computed
offsets; with bounds checks off (numba's default) a stray index would corrupt
memory silently. A fresh interpreter with NUMBA_BOUNDSCHECK=1 and an empty
cache compiles every kernel with checks and runs the engine, the stage
analysis, the hierarchy and the tiled engine (with its hierarchy) on DEMs that exercise tiles, nodata, ties and both
connectivities, and culverts across tiles; an out-of-range index raises IndexError there.
"""

from __future__ import annotations

import os
import subprocess
import sys
import textwrap
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[2]

SCRIPT = textwrap.dedent(
    """
    from pathlib import Path
    import numpy as np
    from sillmark.engine.flood import priority_flood
    from sillmark.grid.dem import dem_from_array
    from sillmark.products.source import ArraySource
    from sillmark.products.stage import stage_table, water_level_map
    from sillmark.products.hierarchy_sweep import depression_hierarchy

    rng = np.random.default_rng(5)
    for shape, conn, tile in [((23, 31), 8, 4), ((17, 9), 4, 3), ((1, 12), 8, 5), ((9, 1), 4, 2)]:
        z = rng.integers(0, 6, shape).astype(np.float32)
        z[rng.random(shape) < 0.1] = np.nan
        outlets = np.zeros(shape, bool)
        outlets[0, :] = outlets[-1, :] = outlets[:, 0] = outlets[:, -1] = True
        outlets &= ~np.isnan(z)
        if not outlets.any():
            z[0, 0] = 1.0
            outlets[0, 0] = True
        r = priority_flood(z, outlets, connectivity=conn, tile_size=tile)
        for k in range(len(r.depressions)):
            r.route(int(r.depressions.pit_row[k]), int(r.depressions.pit_col[k]))
        water_level_map(r, 2.5)
        stage_table(ArraySource(dem_from_array(z), r), np.arange(0, 6, 0.5))
        h = depression_hierarchy(r)
        # The curve rows' kernels, with a limit small enough to send nodes to steps.
        from sillmark.products import hierarchy_curves as hc
        counts = hc.natural_counts(h, max_points=3, step_rows=2)
        stride, _ = hc.choose_strides(counts, h.nodes.volume_m3, None, 3 * len(h) + 3)
        hc.curve_rows(h, counts, stride, max_points=3, step_rows=2)

    # Culverts and a flap valve across tiles of a few cells, and routes through them.
    from sillmark.engine.culverts import culvert_edges
    z = rng.integers(0, 6, (11, 13)).astype(np.float32)
    z[3:8, 4:9] = 9.0
    z[5, 6] = 0.0
    edge = np.zeros(z.shape, bool)
    edge[0, :] = edge[-1, :] = edge[:, 0] = edge[:, -1] = True
    pipes = culvert_edges(z.shape, [5, 1, 9], [6, 1, 2], [0, 9, 2], [6, 11, 10],
                          [1.0, 3.0, 2.0], [False, True, False], elevation=z)
    for tile in (3, 64):
        r = priority_flood(z, edge, culverts=pipes, tile_size=tile)
        for rr, cc in zip(*np.nonzero(~np.isnan(r.onset_stage))):
            r.route(int(rr), int(cc))

    # The out-of-core engine's own kernels, tiles of a few cells, in this process.
    import tempfile
    from tests.loopback import analyse_on_tiles
    from sillmark.io.results_folder import add_hierarchy_files
    from tests.rasters import write_raster
    with tempfile.TemporaryDirectory() as tmp:
        z = rng.integers(0, 6, (13, 11)).astype(np.float32)
        z[rng.random(z.shape) < 0.1] = -9999.0
        z[0, 0] = 1.0
        path = write_raster(Path(tmp) / "z.tif", z, nodata=-9999.0)
        for conn, tile in ((8, 3), (4, 4)):
            analyse_on_tiles(path, Path(tmp) / f"out{conn}", outlets=["edge", "nodata"],
                          connectivity=conn, tile_size=tile)
            add_hierarchy_files(Path(tmp) / f"out{conn}", window_cells=6)
    print("bounds ok")
    """
)


@pytest.mark.slow
def test_kernels_run_clean_with_bounds_checking(tmp_path):
    env = dict(os.environ)
    env["NUMBA_BOUNDSCHECK"] = "1"
    env["NUMBA_CACHE_DIR"] = str(tmp_path / "numba-cache")
    env["PYTHONPATH"] = str(ROOT) + os.pathsep + env.get("PYTHONPATH", "")
    done = subprocess.run(
        [sys.executable, "-c", SCRIPT], env=env, cwd=ROOT, capture_output=True, text=True,
        timeout=900,
    )
    assert done.returncode == 0, done.stderr[-3000:]
    assert "bounds ok" in done.stdout
