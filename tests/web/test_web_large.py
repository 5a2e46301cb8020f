"""A DEM larger than the worker's memory: every grid-sized array is written block by block.

The relief (hillshade and tint pyramids) drawn in blocks must be the very
arrays the whole-grid functions of :mod:`sillmark.web.render` make; the
streamed result arrays must be the in-memory run's (tests/web/test_web_tiled.py
checks the served figures and tiles); and a whole web run of a 4.2-million-cell
DEM on the tiled engine must never hold as much as one float32 copy of the grid
in Python and numpy allocations (tracemalloc), where the whole-grid path held
the DEM, its hillshade temporaries and every result raster at once.
"""

from __future__ import annotations

import json
import sqlite3
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import rasterio

from sillmark.web import arrays, layout, relief, render

REPO = Path(__file__).resolve().parents[2]


def rolling_grid(rows: int, cols: int, seed: int) -> np.ndarray:
    """Invented ground with noise, a nodata hole and a nodata first column."""
    rng = np.random.default_rng(seed)
    r = np.arange(rows, dtype=np.float32)[:, None]
    c = np.arange(cols, dtype=np.float32)[None, :]
    z = (20 + 3 * np.sin(r / 17) * np.cos(c / 29) + rng.normal(0, 0.2, (rows, cols))).astype(np.float32)
    z[100:140, 60:90] = np.nan
    z[:, 0] = np.nan
    return z


@pytest.mark.parametrize("dx_per_row", [False, True])
def test_relief_drawn_in_blocks_is_the_whole_grid_relief(tmp_path, monkeypatch, dx_per_row):
    # 530 x 300 cells: levels 530 x 300, 265 x 150 (an odd row count), 132 x 75.
    rows, cols = 530, 300
    z = rolling_grid(rows, cols, seed=3)
    # Blocks of 6 rows (shaded) and 3 rows (halved): the halo and the halving are
    # crossed by a block boundary dozens of times.
    monkeypatch.setattr(arrays, "BLOCK_CELLS", 6 * cols)
    dx = np.linspace(3.0, 2.5, rows) if dx_per_row else 2.0  # widths per row as on a lon/lat grid
    z_lo, z_hi = float(np.nanmin(z)), float(np.nanmax(z))
    writer = arrays.ArrayWriter(tmp_path / "arrays")
    levels = relief.write_relief(writer, lambda a, b: z[a:b], z.shape, dx_m=dx, dy_m=2.0,
                                 z_metres=1.0, z_range=(z_lo, z_hi))

    shades = render.shade_pyramid(render.hillshade(z, dx_m=dx, dy_m=2.0, z_metres=1.0))
    tints = render.shade_pyramid(render.tint_classes(z, z_lo, z_hi))
    assert levels == len(shades) == 3
    for k in range(levels):
        assert np.array_equal(writer.read(f"hillshade_{k}"), shades[k]), k
        assert np.array_equal(writer.read(f"tint_{k}"), tints[k]), k
    # The block edges are not all alike: the check would miss a dropped halo on flat ground.
    assert len(np.unique(shades[0])) > 50


def test_shaded_block_without_its_halo_differs_at_the_block_edge():
    """Why the halo matters: shading rows 10:20 alone gets one-sided differences at
    their first and last rows, unlike the same rows of the whole grid."""
    z = rolling_grid(40, 30, seed=5)[:, 1:]
    whole = render.hillshade(z, dx_m=1.0, dy_m=1.0, z_metres=1.0)
    alone = render.hillshade(z[10:20], dx_m=1.0, dy_m=1.0, z_metres=1.0)
    with_halo = relief.shaded_rows(lambda a, b: z[a:b], 40, 10, 20, dx_m=1.0, dy_m=1.0, z_metres=1.0)
    assert np.array_equal(with_halo, whole[10:20])
    assert not np.array_equal(alone[[0, -1]], whole[[10, 19]])


def test_array_writer_keeps_the_old_folder_until_commit_and_checks_block_shapes(tmp_path):
    folder = tmp_path / "arrays"
    folder.mkdir()
    (folder / "meta.json").write_text("{}")
    writer = arrays.ArrayWriter(folder)
    values = np.arange(35, dtype=np.float32).reshape(7, 5)
    writer.write_rows("elevation", (7, 5), lambda a, b: values[a:b], rows=2)
    assert np.array_equal(writer.read("elevation"), values)
    assert (folder / "meta.json").read_text() == "{}"  # nothing visible before the commit
    with pytest.raises(ValueError, match="rows 0:2 of onset_stage"):
        writer.write_rows("onset_stage", (7, 5), lambda a, b: values[a:b, :4], rows=2)
    writer.discard()
    assert not writer.tmp.exists() and (folder / "meta.json").exists()


def _current_run_folder(data: Path, site_id: int) -> Path:
    conn = sqlite3.connect(data / layout.DB_NAME)
    try:
        run = conn.execute("SELECT current_run FROM sites WHERE id = ?", (site_id,)).fetchone()[0]
    finally:
        conn.close()
    return layout.run_dir(data, site_id, run)


@pytest.mark.slow
def test_a_large_dem_is_analysed_and_stored_without_a_whole_grid_copy(tmp_path):
    """8192 x 512 = 4 194 304 cells, tiles of 512, hierarchy windows of 2**18 cells.

    One float32 copy of the grid is 16.8 MB and a float64 copy 33.6 MB. The
    whole-grid worker read the DEM whole (4 bytes a cell), shaded it whole
    (about 24 bytes a cell of temporaries) and read every result raster back
    whole, so its peak was several times the grid (measured 176 MB on this DEM
    before the change); the block path holds blocks of 2**18 cells, and the
    engine's tiles and windows, whatever the DEM's length.
    """
    rows, cols = 8192, 512
    proc = subprocess.run(
        [sys.executable, "-m", "tests.web.peak_worker", str(rows), str(cols), str(tmp_path)],
        cwd=REPO, capture_output=True, text=True, timeout=600)
    assert proc.returncode == 0, proc.stderr[-3000:]
    report = json.loads(proc.stdout.strip().splitlines()[-1])
    assert report["state"] == "ready", report
    cells = rows * cols
    assert report["traced_peak_bytes"] < cells * 4, report  # less than one float32 copy

    # What was stored is the DEM, its whole-grid relief and the result rasters, exactly.
    folder = _current_run_folder(tmp_path / "data", report["site_id"])
    stored = arrays.load(folder / "arrays")
    with rasterio.open(tmp_path / "rolling.tif") as ds:
        z = ds.read(1, masked=True).filled(np.nan).astype(np.float32)
    assert np.array_equal(stored.dem.elevation, z, equal_nan=True)
    shade = render.hillshade(z, dx_m=5.0, dy_m=5.0, z_metres=1.0)  # 5 m cells, metres
    assert np.array_equal(stored.pyramid[0], shade)
    assert [p.shape for p in stored.pyramid] == [lv.shape for lv in render.shade_pyramid(shade)]
    with rasterio.open(folder / "results" / "onset_stage.tif") as ds:
        onset = ds.read(1)
    assert np.array_equal(stored.result.onset_stage, onset, equal_nan=True)
    valid = np.isfinite(z)
    assert np.all(stored.result.onset_stage[valid] >= z[valid])  # filling never lowers ground
