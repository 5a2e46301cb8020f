"""Tests of the out-of-core tiled engine (sillmark.run.analyse on a DEM file, sillmark.engine.pipeline) against the in-memory engine.

The reference for every check is Sillmark's own in-memory engine
(:func:`sillmark.engine.flood.priority_flood`), which the suite checks elsewhere against
a textbook minimax Dijkstra, scikit-image and pysheds. With the same tile size
the tiled engine must give the very same bits: onset stage, flood tree,
depression ids, every column of the depression table (hence every route and its
controlling sill) and the result files. The tile-independent part (onset stage,
ids, pits, counts, areas, volumes, spill elevations) must also equal the
in-memory engine at its default tile size.

Most runs use :func:`sillmark.engine.executors.serial_map`; the last tests run the same
cases on a dask.distributed LocalCluster of two worker processes on 127.0.0.1.
"""

from __future__ import annotations

import json
import shutil

import numpy as np
import pytest
import rasterio
from affine import Affine

from sillmark.grid.dem import read_dem
from sillmark.errors import InvalidDEM, InvalidOutlets, InvalidParameter
from sillmark.io.geotiff import write_depression_ids, write_fill_depth, write_flood_tree, write_onset_stage
from sillmark.io.csv_tables import write_depressions_csv
from sillmark.io.geojson import write_spill_points_geojson
from sillmark.engine.flood import SpillResult, priority_flood
from sillmark.grid.outlets import build_outlets
from sillmark.engine.executors import serial_map
from sillmark.run import TILED_FILE_NAMES
from tests.loopback import analyse_on_tiles
from tests.loopback import loopback_cluster
from tests.rasters import write_raster
from tests.engine.test_flood import TWIN_BOWLS, synthetic_terrain

UTM33_MEMBER = {"type": "name", "properties": {"name": "EPSG:32633"}}
#: Columns of the depression table that do not depend on the tile size.
TILE_FREE = ("id", "pit_row", "pit_col", "pit_elevation", "spill_elevation", "max_depth",
             "cell_count", "area_m2", "volume_m2_vu")


def in_memory(path, specs=("edge",), connectivity=8, tile=None):
    dem = read_dem(path)
    outlets = build_outlets(dem, list(specs), connectivity=connectivity)
    r = priority_flood(dem.elevation, outlets.mask, connectivity=connectivity,
                       row_areas=dem.row_areas, transform=dem.transform, tile_size=tile)
    return dem, outlets, r


def read_band(path):
    with rasterio.open(path) as ds:
        return ds.read(1)


def tiled_result(run, folder, dem) -> SpillResult:
    """A SpillResult built from the tiled engine's files, for routes and sills."""
    ids = read_band(folder / "depression_id.tif")
    return SpillResult(
        elevation=dem.elevation, onset_stage=read_band(folder / "onset_stage.tif"),
        flood_tree=read_band(folder / "flood_tree.tif"), depression_id=np.maximum(ids, 0),
        depressions=run.depressions, connectivity=run.connectivity,
        unreached_cells=run.unreached_cells, heap_pops=run.heap_pops,
    )


def assert_same(run, folder, dem, outlets, r, *, routes=400):
    """Every cell, every table row and every sampled route's sill are the same bits."""
    s = read_band(folder / "onset_stage.tif")
    assert np.array_equal(s, r.onset_stage, equal_nan=True)
    ids = read_band(folder / "depression_id.tif")
    assert np.array_equal(ids, np.where(np.isnan(r.onset_stage), -1, r.depression_id))
    assert np.array_equal(read_band(folder / "flood_tree.tif"), r.flood_tree)
    fill = read_band(folder / "fill_depth.tif")
    assert np.array_equal(fill, r.onset_stage - r.elevation, equal_nan=True)
    t, u = r.depressions, run.depressions
    for name in t.columns:
        assert np.array_equal(getattr(t, name), getattr(u, name), equal_nan=True), name
        assert getattr(t, name).dtype == getattr(u, name).dtype, name
    assert run.unreached_cells == r.unreached_cells
    assert run.heap_pops == r.heap_pops
    assert run.outlet_cells == outlets.count
    assert run.valid_cells == int(np.count_nonzero(dem.valid))
    mine = tiled_result(run, folder, dem)
    reached = np.argwhere(r.flood_tree > 0)
    pits = np.column_stack([t.pit_row, t.pit_col])
    rng = np.random.default_rng(0)
    pick = reached[rng.permutation(len(reached))[:routes]]
    for rr, cc in np.concatenate([pits, pick]):
        a, b = r.route(int(rr), int(cc)), mine.route(int(rr), int(cc))
        assert (a.sill_row, a.sill_col, a.sill_elevation) == (b.sill_row, b.sill_col, b.sill_elevation)
        assert np.array_equal(a.rows, b.rows) and np.array_equal(a.cols, b.cols)


def assert_tile_free(run, folder, dem, whole):
    """Onset stage, ids, the whole table and every route's sill equal the one-tile result.

    ``whole`` is the in-memory engine run as a single tile: only the flood tree
    and route cells below the sill may differ where routes tie.
    """
    s = read_band(folder / "onset_stage.tif")
    assert np.array_equal(s, whole.onset_stage, equal_nan=True)
    ids = read_band(folder / "depression_id.tif")
    assert np.array_equal(ids, np.where(np.isnan(whole.onset_stage), -1, whole.depression_id))
    for name in whole.depressions.columns:
        assert np.array_equal(getattr(whole.depressions, name), getattr(run.depressions, name),
                              equal_nan=True), name
    mine = tiled_result(run, folder, dem)
    for rr, cc in np.argwhere(whole.flood_tree > 0):
        a, b = whole.route(int(rr), int(cc)), mine.route(int(rr), int(cc))
        assert (a.sill_row, a.sill_col) == (b.sill_row, b.sill_col)
        assert b.reaches_outlet


def run_tiled(path, out, *, specs=("edge",), connectivity=8, tile=16, map=None):
    if out.exists():
        shutil.rmtree(out)
    return analyse_on_tiles(path, out, outlets=list(specs), connectivity=connectivity,
                            tile_size=tile, executor=map)


def check(path, tmp_path, *, specs=("edge",), connectivity=8, tile=16, map=None, routes=400):
    dem, outlets, r = in_memory(path, specs, connectivity, tile)
    out = tmp_path / f"out_{tile}_{connectivity}"
    run = run_tiled(path, out, specs=specs, connectivity=connectivity, tile=tile, map=map)
    assert_same(run, out, dem, outlets, r, routes=routes)
    return run, out, r


# --------------------------------------------------------------------------- DEMs


@pytest.fixture(scope="module")
def terrain_tif(tmp_path_factory):
    """Rolling synthetic terrain, 150 x 170, with dozens of depressions across tiles."""
    z = synthetic_terrain(150, 170, 7)
    return write_raster(tmp_path_factory.mktemp("terrain") / "terrain.tif", z)


@pytest.fixture(scope="module")
def coast_tif(tmp_path_factory):
    """Terrain with a nodata sea and lakes whose edges cross tile edges."""
    z = synthetic_terrain(90, 110, 3, smooth=2.0)
    yy, xx = np.mgrid[0:90, 0:110]
    z[(xx + 0.6 * yy) < 25] = -9999.0                    # the sea, a diagonal coast
    z[(yy - 50) ** 2 + (xx - 70) ** 2 < 60] = -9999.0     # a masked lake
    z[10:13, 40:95] = -9999.0                            # a long gap across many tiles
    return write_raster(tmp_path_factory.mktemp("coast") / "coast.tif", z, nodata=-9999.0)


@pytest.mark.slow
def test_synthetic_terrain_equals_in_memory_for_many_tile_sizes(terrain_tif, tmp_path):
    # 16 and 37 do not divide 150 x 170; 512 is one tile; 5 gives tiles of a few cells.
    whole = in_memory(terrain_tif)[2]
    for tile in (16, 37, 64, 512, 5):
        run, out, r = check(terrain_tif, tmp_path, tile=tile, routes=150)
        assert len(run.depressions) > 10
        # The tile-free part also equals the in-memory engine at its default tiles.
        assert np.array_equal(read_band(out / "onset_stage.tif"), whole.onset_stage)
        assert np.array_equal(read_band(out / "depression_id.tif"), whole.depression_id)
        for name in TILE_FREE:
            assert np.array_equal(getattr(run.depressions, name), getattr(whole.depressions, name))


def test_four_neighbour_connectivity(terrain_tif, tmp_path):
    check(terrain_tif, tmp_path, connectivity=4, tile=23, routes=150)


def test_result_files_are_the_in_memory_files(terrain_tif, tmp_path):
    # Same bytes for the rasters and the table files; the summary differs only in
    # its creation time and the engine member.
    dem, outlets, r = in_memory(terrain_tif, tile=32)
    out = tmp_path / "tiled"
    run = run_tiled(terrain_tif, out, tile=32)
    written = [p.name for p in run.files]
    # The engine's files, then README.txt and an SLD style beside each map layer.
    assert [n for n in written if n != "README.txt" and not n.endswith(".sld")] == \
        list(TILED_FILE_NAMES)
    assert "README.txt" in written and {n for n in written if n.endswith(".sld")} == {
        "onset_stage.sld", "fill_depth.sld", "depression_id.sld", "flood_tree.sld",
        "spill_points.sld"}
    ref = tmp_path / "ref"
    ref.mkdir()
    for name, writer in (("onset_stage.tif", write_onset_stage), ("fill_depth.tif", write_fill_depth),
                         ("depression_id.tif", write_depression_ids),
                         ("flood_tree.tif", write_flood_tree),
                         ("depressions.csv", write_depressions_csv),
                         ("spill_points.geojson", write_spill_points_geojson)):
        writer(r, dem, ref / name)
        assert (out / name).read_bytes() == (ref / name).read_bytes(), name
    summary = json.loads((out / "summary.json").read_text())
    assert summary["engine"] == {"kind": "tiled", "tile_size": 32, "tiles": 30}
    assert summary["depressions"]["count"] == len(r.depressions)
    assert summary["outlets"]["cell_count"] == outlets.count
    assert summary["files"] == written
    assert not [p for p in out.iterdir() if p.name.startswith(".")]  # scratch removed


def test_hand_worked_bowls_and_saddles(tmp_path):
    # The twin bowls of test_flood: the saddle at 6 joins them into one depression
    # of 19 cells and volume 87 spilling over the notch (2, 8); at 8.5 they are two.
    for saddle, count in ((6.0, 1), (8.5, 2)):
        z = np.array(TWIN_BOWLS, dtype=np.float32)
        z[2, 4] = saddle
        path = write_raster(tmp_path / f"bowls{saddle}.tif", z)
        for tile in (1, 2, 3, 4):
            run = check(path, tmp_path, tile=tile)[0]
            assert len(run.depressions) == count
        if count == 1:
            row = run.depressions.row(1)
            assert (row["cell_count"], row["volume_m2_vu"]) == (19, 87.0)
            assert (row["spill_row"], row["spill_col"]) == (2, 8)


def test_one_depression_spanning_every_tile(tmp_path):
    # A 62 x 68 basin below a rim at 50 with one notch; tiles of 6 cells (which
    # do not divide the grid) put the basin in all 11 x 12 tiles at once.
    yy, xx = np.mgrid[0:62, 0:68]
    z = (20 + 0.01 * ((yy - 30) ** 2 + (xx - 33) ** 2) + 0.5 * np.sin(xx * 0.7) * np.cos(yy * 0.4))
    z = z.astype(np.float32)
    z[0, :] = z[-1, :] = z[:, 0] = z[:, -1] = 50.0
    z[0, 40] = 45.0
    path = write_raster(tmp_path / "basin.tif", z)
    run, out, r = check(path, tmp_path, tile=6, routes=300)
    big = int(np.argmax(run.depressions.cell_count))
    ids = read_band(out / "depression_id.tif")
    assert run.depressions.spill_elevation[big] == 45.0
    assert (run.depressions.spill_row[big], run.depressions.spill_col[big]) == (0, 40)
    inside = np.argwhere(ids == big + 1)
    tiles = {(int(a) // 6, int(b) // 6) for a, b in inside}
    assert len(tiles) == 11 * 12


def test_nodata_crossing_tile_edges(coast_tif, tmp_path):
    for specs, tile in ((("nodata",), 7), (("nodata", "edge"), 16), (("edge",), 9)):
        run = check(coast_tif, tmp_path, specs=specs, tile=tile, routes=200)[0]
        assert len(run.depressions) > 5


def test_cells_walled_in_by_nodata_across_tiles(tmp_path):
    # A ring of nodata (crossing the 4-cell tile edges) walls in a patch no outlet reaches.
    z = np.full((14, 14), 5.0, dtype=np.float32)
    z[3:11, 3:11] = -9999.0
    z[5:9, 5:9] = 2.0
    z[6, 6] = 1.0
    path = write_raster(tmp_path / "walled.tif", z, nodata=-9999.0)
    run = check(path, tmp_path, tile=4)[0]
    assert run.unreached_cells == 16


def test_geojson_and_mask_outlets_drawn_across_tiles(terrain_tif, tmp_path):
    # A river line and a lake polygon in the DEM's CRS (1 m cells from 500000 E,
    # 5000000 N), both crossing many tile edges, and a mask raster of a channel.
    river = {"type": "LineString", "crs": UTM33_MEMBER,
             "coordinates": [[500003.5, 4999997.2], [500080.1, 4999940.7], [500165.0, 4999860.3]]}
    lake = {"type": "Polygon", "crs": UTM33_MEMBER,
            "coordinates": [[[500100, 4999990], [500140, 4999990], [500140, 4999950.5],
                             [500100.5, 4999950], [500100, 4999990]]]}
    (tmp_path / "river.geojson").write_text(json.dumps(river))
    (tmp_path / "lake.geojson").write_text(json.dumps(lake))
    channel = np.zeros((150, 170), np.uint8)
    channel[75, 20:150] = 1
    channel[40:120, 100] = 1
    write_raster(tmp_path / "channel.tif", channel)
    for specs, tile in (([str(tmp_path / "river.geojson")], 13),
                        ([str(tmp_path / "lake.geojson"), "edge"], 16),
                        ([str(tmp_path / "channel.tif")], 11)):
        check(terrain_tif, tmp_path, specs=specs, tile=tile, routes=150)


def test_geographic_grid_areas_and_volumes_are_the_same_bits(tmp_path):
    # Lon/lat cells: every row has its own area on the ellipsoid, so the totals
    # are sums of different numbers, added in raster order by both engines.
    z = synthetic_terrain(60, 70, 11)
    geo = Affine(0.001, 0.0, 15.0, 0.0, -0.001, 46.0)
    path = write_raster(tmp_path / "geo.tif", z, crs="EPSG:4326", transform=geo)
    run = check(path, tmp_path, tile=9)[0]
    assert len(set(read_dem(path).row_areas.tolist())) == 60


def test_integer_dem_with_many_ties(tmp_path):
    # Heights in whole metres: plateaus, tied rims and tied spill points everywhere.
    rng = np.random.default_rng(4)
    z = rng.integers(0, 6, (40, 45)).astype(np.int16)
    path = write_raster(tmp_path / "ties.tif", z)
    for tile, conn in ((3, 8), (8, 4), (10, 8)):
        check(path, tmp_path, tile=tile, connectivity=conn, routes=300)


@pytest.mark.slow
def test_random_small_dems_and_tiles(tmp_path):
    rng = np.random.default_rng(12)
    for k in range(40):
        rows, cols = (int(v) for v in rng.integers(1, 12, 2))
        z = rng.integers(0, 5, (rows, cols)).astype(np.float32)
        if k % 2:
            z[rng.random((rows, cols)) < 0.15] = -9999.0
        z[0, 0] = 1.0
        path = write_raster(tmp_path / f"r{k}.tif", z, nodata=-9999.0)
        specs = ("edge",) if k % 3 else ("nodata", "edge")
        conn = (4, 8)[k % 2]
        run, out, _ = check(path, tmp_path, specs=specs, connectivity=conn,
                            tile=int(rng.integers(1, 6)))
        # Spill points and sills do not depend on the tile size (ties abound).
        dem, _, whole = in_memory(path, specs, conn, tile=max(rows, cols))
        assert_tile_free(run, out, dem, whole)


@pytest.mark.slow
def test_tied_spill_points_do_not_depend_on_the_tile_size(tmp_path):
    # Whole-metre heights: tied rims and flat saddles everywhere. Tiles of 1 to
    # 7 cells (dividing the grid or not) give the one-tile table and sills.
    rng = np.random.default_rng(31)
    z = rng.integers(0, 4, (23, 29)).astype(np.int16)
    path = write_raster(tmp_path / "ties.tif", z)
    for conn in (4, 8):
        dem, _, whole = in_memory(path, ("edge",), conn, tile=64)
        for tile in (1, 2, 3, 5, 7, 23):
            out = tmp_path / f"free_{tile}_{conn}"
            run = run_tiled(path, out, connectivity=conn, tile=tile)
            assert_tile_free(run, out, dem, whole)


def test_bad_input_gets_the_in_memory_errors(tmp_path):
    allnan = write_raster(tmp_path / "nan.tif", np.full((6, 6), -9999.0, np.float32), nodata=-9999.0)
    with pytest.raises(InvalidDEM, match="every cell"):
        analyse_on_tiles(allnan, tmp_path / "o1", tile_size=4)
    flat = write_raster(tmp_path / "flat.tif", np.zeros((6, 6), np.float32))
    far = {"type": "Point", "coordinates": [10.0, 10.0]}
    with pytest.raises(InvalidOutlets, match="misses the grid"):
        analyse_on_tiles(flat, tmp_path / "o2", outlets=[far], tile_size=4)
    with pytest.raises(InvalidOutlets, match="no nodata"):
        analyse_on_tiles(flat, tmp_path / "o3", outlets=["nodata"], tile_size=4)
    with pytest.raises(InvalidParameter, match="tile_size"):
        analyse_on_tiles(flat, tmp_path / "o4", tile_size=0)
    with pytest.raises(InvalidParameter, match="4 or 8"):
        analyse_on_tiles(flat, tmp_path / "o5", connectivity=6)
    # Nothing half-done is left behind.
    for name in ("o1", "o2", "o3"):
        assert not list((tmp_path / name).iterdir())


# --------------------------------------------------------------------------- on a cluster


@pytest.fixture(scope="module")
def cluster_map():
    """A dask.distributed LocalCluster: 2 worker processes, 1 thread each, on 127.0.0.1."""
    from sillmark.engine.executors import dask_executor

    with loopback_cluster(2) as cluster, dask_executor(scheduler=cluster.scheduler_address) as run_map:
        yield run_map


def test_cluster_run_equals_in_memory(cluster_map, terrain_tif, coast_tif, tmp_path):
    check(coast_tif, tmp_path, specs=("nodata", "edge"), tile=16, map=cluster_map, routes=150)
    before = cluster_map.received_bytes
    check(terrain_tif, tmp_path, tile=64, map=cluster_map, routes=150)
    # Only perimeters, meetings and summaries come back, not the rasters (13 bytes a cell).
    assert 0 < cluster_map.received_bytes - before < 150 * 170 * 13


def test_cluster_run_with_tiny_tiles(cluster_map, tmp_path):
    z = synthetic_terrain(40, 50, 5)
    path = write_raster(tmp_path / "small.tif", z)
    check(path, tmp_path, tile=4, connectivity=4, map=cluster_map)


def test_serial_map_is_a_plain_loop():
    assert serial_map(lambda a, b: a + b, [(1, 2), (3, 4)]) == [3, 7]


def test_cli_tiles_on_a_running_scheduler(cluster_map, terrain_tif, tmp_path, capsys):
    from sillmark.cli import main

    address = cluster_map.client.scheduler.address
    assert address.startswith("tcp://127.0.0.1:")
    tiled, whole = tmp_path / "tiled", tmp_path / "whole"
    assert main(["analyse", str(terrain_tif), "--tiles", "48", "--scheduler", address,
                 "--out", str(tiled), "-q"]) == 0
    printed = capsys.readouterr().out
    assert "Engine: tiled, 16 tiles of up to 48 x 48 cells on the cluster at" in printed
    assert main(["analyse", str(terrain_tif), "--out", str(whole), "-q"]) == 0
    # Tile-free layers are the same files as the in-memory engine's (512-cell tiles).
    for name in ("onset_stage.tif", "fill_depth.tif", "depression_id.tif"):
        assert (tiled / name).read_bytes() == (whole / name).read_bytes(), name
    a = json.loads((tiled / "summary.json").read_text())
    b = json.loads((whole / "summary.json").read_text())
    assert a["depressions"] == b["depressions"] and a["grid"] == b["grid"]


def test_cli_cluster_options_need_tiles(terrain_tif, tmp_path, capsys):
    from sillmark.cli import main

    assert main(["analyse", str(terrain_tif), "--workers", "2", "--out", str(tmp_path / "a")]) == 2
    assert "give --tiles N" in capsys.readouterr().err
    assert main(["analyse", str(terrain_tif), "--tiles", "64", "--workers", "2",
                 "--scheduler", "tcp://127.0.0.1:1", "--out", str(tmp_path / "b")]) == 2
    assert "not allowed with" in capsys.readouterr().err
    assert main(["analyse", str(terrain_tif), "--tiles", "0", "--out", str(tmp_path / "c")]) == 2
