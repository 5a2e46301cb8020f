"""Peak memory of one web analysis run of a DEM on the tiled engine, in a process of its own.

``python -m tests.web.peak_worker ROWS COLS FOLDER`` writes an invented DEM
(rolling ground with closed basins, a strip of nodata), runs a small warm-up
site through the app first (so numba's compilation is not counted), then
uploads the DEM, confirms its settings and lets the inline job runner analyse
it while :mod:`tracemalloc` watches. It prints one JSON line: the peak of
Python and numpy allocations during the run, the process's peak resident set,
the cells, and the run's status.

Used by ``tests/web/test_web_large.py`` and by hand to compare two checkouts.
tracemalloc sees every numpy array and Python object; it does not see memory
GDAL or numba's runtime allocate for themselves (block caches, kernel scratch).
"""

from __future__ import annotations

import json
import resource
import sys
import tracemalloc
from pathlib import Path

import numpy as np
import rasterio
from affine import Affine

from tests.web_support import Client, confirm, make_app, upload_dem, write_lowbank

#: Projected CRS of the invented site (UTM zone 33N), 5 m cells.
CRS = "EPSG:32633"
CELL = 5.0
#: Engine tile side and hierarchy window of the run: the memory of the engine's
#: steps grows with them (and with the DEM's width), not with the DEM's cells.
TILE = 512
WINDOW_CELLS = 1 << 18


def write_rolling_dem(path: Path, rows: int, cols: int) -> Path:
    """Rolling ground (metres) with closed basins between the crests; nodata on a strip."""
    r = np.arange(rows, dtype=np.float32)[:, None]
    c = np.arange(cols, dtype=np.float32)[None, :]
    z = (30.0 + 0.004 * c + 2.5 * np.sin(r / 37.0) * np.sin(c / 41.0)
         + 0.8 * np.cos((r + 2 * c) / 23.0)).astype(np.float32)
    z[rows // 3: rows // 3 + 5, cols // 4: cols // 2] = -9999.0
    profile = dict(driver="GTiff", width=cols, height=rows, count=1, dtype="float32",
                   crs=CRS, transform=Affine(CELL, 0, 500_000.0, 0, -CELL, 5_200_000.0),
                   nodata=-9999.0, tiled=True, blockxsize=256, blockysize=256,
                   compress="deflate")
    with rasterio.open(path, "w", **profile) as ds:
        ds.write(z, 1)
    return path


def measure(rows: int, cols: int, folder: Path) -> dict:
    folder.mkdir(parents=True, exist_ok=True)
    app = make_app(folder / "data", TILED_ABOVE_CELLS=1_000, TILED_TILE_SIZE=TILE, TILED_WINDOW_CELLS=WINDOW_CELLS,
                   UPLOAD_READ_CELLS=1_000, MAX_DEM_CELLS=rows * cols + 1)
    client = Client(app)
    warm = upload_dem(client, write_lowbank(folder / "warm.tif")).get_json()["site_id"]
    assert confirm(client, warm).status_code == 202
    big = write_rolling_dem(folder / "rolling.tif", rows, cols)
    site_id = upload_dem(client, big).get_json()["site_id"]
    rss_before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    tracemalloc.start()
    status = confirm(client, site_id).status_code
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    state = client.get(f"/api/sites/{site_id}/status").get_json()
    return {
        "cells": rows * cols,
        "confirm_status": status,
        "state": state["state"],
        "message": (state.get("run") or {}).get("message"),
        "traced_peak_bytes": peak,
        "rss_peak_kib_before": rss_before,
        "rss_peak_kib_after": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss,
        "site_id": site_id,
    }


if __name__ == "__main__":
    print(json.dumps(measure(int(sys.argv[1]), int(sys.argv[2]), Path(sys.argv[3]))))
