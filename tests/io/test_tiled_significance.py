"""The significance minimum on the tiled path gives the in-memory run's files.

A small survey-like DEM (rolling ground with 3 cm of independent noise on every
cell, so it holds many noise-made pits beside a few real pools, some of them
nested) is analysed in memory and tile by tile (16-cell tiles, so tile edges
cross the pools; the hierarchy cut into several windows of depressions). With
the default minimum both must list the same depressions, nodes and curves, byte
for byte, and give the same counts; with the full inventory both list every
depression with the same ``significant`` column.
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

from sillmark.grid.dem import read_dem
from sillmark.products.significance import site_minimum
from sillmark.run import analyse
from tests.engine.test_flood import synthetic_terrain
from tests.loopback import analyse_on_tiles
from tests.rasters import write_raster

LISTED_FILES = ("depressions.csv", "spill_points.geojson", "depressions.geojson",
                "depression_hierarchy.csv", "depression_hierarchy.json", "depression_curves.csv")
TILE = 16


@pytest.fixture(scope="module")
def noisy_tif(tmp_path_factory):
    """60 x 64 cells of 1 m: about 3 m of rolling relief plus N(0, 3 cm) noise per cell.

    Seed chosen while writing the test: 20 depressions, 42 hierarchy nodes, 8 of
    them significant at the default 0.30 m minimum, 2 of those nested in another.
    """
    z = synthetic_terrain(60, 64, 0, smooth=3.0) * 0.012
    z = (z + np.random.default_rng(0).normal(0.0, 0.03, z.shape)).astype(np.float32)
    return write_raster(tmp_path_factory.mktemp("noisy") / "noisy.tif", z)


def _both(path, tmp_path, **listing):
    minimum = site_minimum(unit="m")
    memory = analyse(read_dem(path), ("edge",), tmp_path / "memory", minimum=minimum, **listing)
    tiled = analyse_on_tiles(path, tmp_path / "tiled", derived=True, tile_size=TILE,
                             window_cells=600, minimum=minimum, **listing)
    return memory, tiled


def _summary(folder):
    return json.loads((folder / "summary.json").read_text(encoding="utf-8"))


def _assert_same_listing(tmp_path):
    for name in LISTED_FILES:
        assert (tmp_path / "tiled" / name).read_bytes() == \
            (tmp_path / "memory" / name).read_bytes(), name
    a, b = _summary(tmp_path / "tiled"), _summary(tmp_path / "memory")
    for member in ("significance", "depressions", "depression_curves"):
        assert a[member] == b[member], member


def test_tiled_default_minimum_lists_what_the_in_memory_run_lists(noisy_tif, tmp_path):
    memory, tiled = _both(noisy_tif, tmp_path)
    _assert_same_listing(tmp_path)
    counts = _summary(tmp_path / "tiled")["significance"]["counts"]
    assert counts == {"significant": 8, "significant_top": 6, "all_depressions": 20,
                      "hierarchy_nodes": 42}
    assert tiled.hierarchy.batches > 1  # the windows cut the depressions into runs

    # Some listed depression is cut by a tile edge, so the join across tiles counts.
    ids = read_dem(tmp_path / "tiled" / "depression_id.tif").elevation
    table = pd.read_csv(tmp_path / "tiled" / "depressions.csv")
    assert len(table) == counts["significant_top"]
    crossing = [d for d in table["id"]
                if len({(r // TILE, c // TILE) for r, c in zip(*np.nonzero(ids == d))}) > 1]
    assert crossing

    # By definition (significance.py): with no area or volume threshold, a whole
    # depression is listed when its pit lies at least 0.30 m below its spill.
    depth = (table["spill_elevation_m"].astype(np.float32).astype(np.float64)
             - table["pit_elevation_m"].astype(np.float32).astype(np.float64))
    assert (depth >= 0.3).all()
    nodes = pd.read_csv(tmp_path / "tiled" / "depression_hierarchy.csv")
    assert len(nodes) == counts["significant"]
    assert set(pd.read_csv(tmp_path / "tiled" / "depression_curves.csv")["node_id"]) == \
        set(nodes["id"])
    assert "(tiled engine)" in (tmp_path / "tiled" / "README.txt").read_text(encoding="utf-8")


def test_tiled_full_inventory_marks_the_same_depressions(noisy_tif, tmp_path):
    _both(noisy_tif, tmp_path, full_inventory=True)
    _assert_same_listing(tmp_path)
    table = pd.read_csv(tmp_path / "tiled" / "depressions.csv")
    assert list(table["id"]) == list(range(1, 21))
    depth = (table["spill_elevation_m"].astype(np.float32).astype(np.float64)
             - table["pit_elevation_m"].astype(np.float32).astype(np.float64))
    assert list(table["significant"]) == list(depth >= 0.3)
    assert len(pd.read_csv(tmp_path / "tiled" / "depression_hierarchy.csv")) == 42
