"""The hierarchy files of a results folder (read by windows) against those of the result in memory.

The reference is Sillmark's own in-memory path on the same DEM and outlets:
:func:`sillmark.engine.flood.priority_flood` and
:func:`sillmark.io.hierarchy_writer.write_hierarchy_files` on an
:class:`~sillmark.products.source.ArraySource`, one window of the whole grid,
whose hierarchy is :func:`sillmark.products.hierarchy_sweep.site_hierarchy` (checked
elsewhere against hand-worked DEMs, a separate basin construction after Barnes,
Callaghan & Wickert 2020, and closed-form volumes; its JSON against
``to_json`` below). The three files written from a tiled folder, window of
depressions by window (in this process or on a Dask cluster), must be the same
bytes, for any tile size and any batch budget, and so must the files of the
array source cut into small batches: these files hold no creation time.
"""

from __future__ import annotations

import json
import shutil

import numpy as np
import pytest
import rasterio
from affine import Affine

from sillmark.engine.flood import priority_flood
from sillmark.errors import InvalidDEM, InvalidParameter
from sillmark.grid.dem import read_dem
from sillmark.grid.outlets import build_outlets
from sillmark.io import hierarchy_files as hx
from sillmark.io.hierarchy_writer import write_hierarchy_files
from sillmark.io.results_folder import add_hierarchy_files, open_result_folder
from sillmark.products.hierarchy_sweep import site_hierarchy
from sillmark.products.hierarchy_windows import hierarchy_batches
from sillmark.products.source import ArraySource
from tests.engine.test_flood import synthetic_terrain
from tests.loopback import analyse_on_tiles, loopback_cluster
from tests.products.test_hierarchy import THREE_LEVELS
from tests.rasters import grid, write_raster


def in_memory(path, *, specs=("edge",), connectivity=8):
    """The DEM and the in-memory result as an array source."""
    dem = read_dem(path)
    outlets = build_outlets(dem, list(specs), connectivity=connectivity)
    r = priority_flood(dem.elevation, outlets.mask, connectivity=connectivity,
                       row_areas=dem.row_areas, transform=dem.transform)
    return ArraySource(dem, r)


def reference_files(path, folder, *, specs=("edge",), connectivity=8):
    """The three files of the in-memory path, in ``folder``; returns the hierarchy."""
    source = in_memory(path, specs=specs, connectivity=connectivity)
    h = site_hierarchy(source.dem, source.result)
    folder.mkdir(parents=True, exist_ok=True)
    written = write_hierarchy_files(source, folder)
    assert written.batches == min(1, len(h))  # the whole grid fits the default budget
    assert (written.nodes, written.pits) == (len(h), len(h.leaves))
    return h


def tiled_folder(path, out, *, specs=("edge",), connectivity=8, tile=16, map=None):
    if out.exists():
        shutil.rmtree(out)
    analyse_on_tiles(path, out, outlets=list(specs), connectivity=connectivity, tile_size=tile,
                     executor=map)
    return out


def assert_same_files(mine, ref):
    for name in hx.HIERARCHY_FILE_NAMES:
        assert (mine / name).read_bytes() == (ref / name).read_bytes(), name


def check(path, tmp_path, *, specs=("edge",), connectivity=8, tiles=(16,), budgets=(1 << 24,),
          map=None):
    """Every tile size and budget gives the in-memory files; returns the last run and the
    in-memory hierarchy."""
    ref = tmp_path / f"ref_{connectivity}"
    h = reference_files(path, ref, specs=specs, connectivity=connectivity)
    source = in_memory(path, specs=specs, connectivity=connectivity)
    for budget in budgets:  # the array source cut into batches too
        cut = tmp_path / f"memory_{connectivity}_{budget}"
        cut.mkdir(exist_ok=True)
        write_hierarchy_files(source, cut, window_cells=budget)
        assert_same_files(cut, ref)
    for tile in tiles:
        out = tiled_folder(path, tmp_path / f"tiled_{tile}_{connectivity}", specs=specs,
                           connectivity=connectivity, tile=tile, map=map)
        for budget in budgets:
            for name in hx.HIERARCHY_FILE_NAMES:
                (out / name).unlink(missing_ok=True)
            run = add_hierarchy_files(out, window_cells=budget, map=map)
            assert_same_files(out, ref)
            assert (run.nodes, run.pits) == (len(h), len(h.leaves))
            assert not [p for p in out.iterdir() if p.name.startswith(".")]  # scratch removed
    return run, h


@pytest.fixture(scope="module")
def terrain_tif(tmp_path_factory):
    """Rolling synthetic terrain, 150 x 170, with dozens of nested depressions."""
    return write_raster(tmp_path_factory.mktemp("terrain") / "terrain.tif",
                        synthetic_terrain(150, 170, 7))


# --------------------------------------------------------------------------- same bytes


def test_synthetic_terrain_for_tile_sizes_and_budgets(terrain_tif, tmp_path):
    # 16 and 37 do not divide 150 x 170; budgets from the whole grid in one window
    # down to 50 cells (each depression a batch of its own, many larger than that).
    run, h = check(terrain_tif, tmp_path, tiles=(16, 37), budgets=(1 << 24, 2000, 50))
    assert len(h) > 100 and len(h.leaves) < len(h)  # nested, not only pits
    assert run.batches == len(h.tops)  # at 50 cells no two depressions share a window
    assert run.window_cells > 50


def test_four_neighbour_connectivity(terrain_tif, tmp_path):
    check(terrain_tif, tmp_path, connectivity=4, tiles=(23,), budgets=(3000,))


@pytest.mark.parametrize("connectivity", [8, 4])
def test_hand_worked_three_levels_of_nesting(tmp_path, connectivity):
    # tests/products/test_hierarchy.py works this DEM by hand: pits A, B meet at 4 (AB),
    # AB and C meet at 6, the top spills over (2, 7) at 7, volumes 6, 2, 17, 4, 29.
    path = write_raster(tmp_path / "three.tif", np.array(THREE_LEVELS, dtype=np.float32))
    check(path, tmp_path, connectivity=connectivity, tiles=(1, 2, 3), budgets=(1, 1 << 24))
    out = tmp_path / f"tiled_3_{connectivity}"
    rows = [line for line in (out / hx.HIERARCHY_CSV).read_text().splitlines()
            if not line.startswith("#")]
    header = rows[0].split(",")
    volumes = [float(r.split(",")[header.index("volume_m3")]) for r in rows[1:]]
    assert volumes == [6, 2, 17, 4, 29]


def test_several_hand_worked_sites_side_by_side(tmp_path):
    # Three trenches of tests/products/test_hierarchy.py in one DEM, apart from each other:
    # three pools meeting at one level (one node with three children), a plateau pit
    # and a flat saddle, and the three-level nest; small budgets cut them apart.
    # Each trench ends in its low outlet on the right edge of the grid.
    z = np.full((17, 9), 9, np.float32)
    z[1, 1:] = [9, 1, 5, 2, 5, 3, 6, 0]
    z[5, :] = [9, 2, 2, 4, 4, 4, 1, 7, 0]
    z[9:14, :9] = np.array(THREE_LEVELS, dtype=np.float32)
    path = write_raster(tmp_path / "trenches.tif", z)
    run, h = check(path, tmp_path, tiles=(2, 5), budgets=(1, 30, 1 << 24))
    assert len(h.tops) == 3 and [len(h.children(v)) for v in h.tops] == [3, 2, 2]


def test_one_depression_spanning_every_tile_and_larger_than_the_budget(tmp_path):
    # A 62 x 68 basin below a rim at 50 with one notch: in all 11 x 12 tiles of
    # 6 cells, and far more cells than a 100-cell budget.
    yy, xx = np.mgrid[0:62, 0:68]
    z = (20 + 0.01 * ((yy - 30) ** 2 + (xx - 33) ** 2)
         + 0.5 * np.sin(xx * 0.7) * np.cos(yy * 0.4)).astype(np.float32)
    z[0, :] = z[-1, :] = z[:, 0] = z[:, -1] = 50.0
    z[0, 40] = 45.0
    path = write_raster(tmp_path / "basin.tif", z)
    run, h = check(path, tmp_path, tiles=(6,), budgets=(100, 1 << 24))
    big = int(np.argmax(h.nodes.cell_count))
    assert h.nodes.cell_count[big] > 100 and h.nodes.spill_elevation[big] == 45.0
    assert run.window_cells > 100  # that depression was a batch of its own


def test_integer_dems_with_many_ties(tmp_path):
    # Whole metres: plateau pits, flats at merge levels and tied saddles everywhere.
    rng = np.random.default_rng(4)
    z = rng.integers(0, 6, (40, 45)).astype(np.int16)
    path = write_raster(tmp_path / "ties.tif", z)
    for connectivity in (8, 4):
        check(path, tmp_path, connectivity=connectivity, tiles=(3,), budgets=(40, 400))
    # Rounded terrain: large flat-bottomed pools, every node written in full.
    terrain = np.round(synthetic_terrain(70, 90, 2) * 0.5).astype(np.int16)
    path = write_raster(tmp_path / "rounded.tif", terrain)
    check(path, tmp_path, tiles=(11,), budgets=(60, 1 << 24))


def test_nodata_crossing_tiles_and_cells_of_half_a_square_metre(tmp_path):
    # A nodata sea, a masked lake and a long gap across many tiles; 0.7 m cells
    # (0.49 m² is no binary fraction, so areas and storage only agree to the bit
    # if the additions are made in the in-memory order).
    z = synthetic_terrain(90, 110, 3, smooth=2.0)
    yy, xx = np.mgrid[0:90, 0:110]
    z[(xx + 0.6 * yy) < 25] = -9999.0
    z[(yy - 50) ** 2 + (xx - 70) ** 2 < 60] = -9999.0
    z[10:13, 40:95] = -9999.0
    path = write_raster(tmp_path / "coast.tif", z, nodata=-9999.0, transform=grid(0.7))
    check(path, tmp_path, specs=("nodata", "edge"), tiles=(7, 16), budgets=(500,))
    check(path, tmp_path, specs=("nodata",), tiles=(9,), budgets=(1 << 24,))


def test_geographic_grid_and_feet(tmp_path):
    # Lon/lat cells (a different true area in every row, and spill lon/lat from
    # the grid coordinates) and a site in feet (acre-feet columns).
    geo = Affine(0.001, 0.0, 15.0, 0.0, -0.001, 46.0)
    path = write_raster(tmp_path / "geo.tif", synthetic_terrain(60, 70, 11), crs="EPSG:4326",
                        transform=geo)
    check(path, tmp_path, tiles=(9,), budgets=(300,))
    feet = write_raster(tmp_path / "feet.tif", synthetic_terrain(50, 60, 5) * 3.3,
                        crs="EPSG:2263")  # NAD83 / New York Long Island, US survey feet
    check(feet, tmp_path / "ft", tiles=(13,), budgets=(200,))
    assert "storage_acre_ft" in (tmp_path / "ft" / "ref_8" / hx.CURVES_CSV).read_text()


def test_a_site_without_depressions_gives_the_empty_files(tmp_path):
    z = np.add.outer(np.arange(12.0), np.arange(14.0)).astype(np.float32)  # a plane
    path = write_raster(tmp_path / "plane.tif", z)
    run, h = check(path, tmp_path, tiles=(5,))
    assert len(h) == 0 and run.batches == 0


# --------------------------------------------------------------------------- the folder


def test_summary_lists_the_files_and_progress_counts_batches(terrain_tif, tmp_path):
    out = tiled_folder(terrain_tif, tmp_path / "tiled", tile=32)
    before = json.loads((out / "summary.json").read_text())
    seen = []
    run = add_hierarchy_files(out, window_cells=3000,
                                progress=lambda step, done, total: seen.append((step, done, total)))
    after = json.loads((out / "summary.json").read_text())
    base = ["onset_stage.tif", "fill_depth.tif", "depression_id.tif", "flood_tree.tif",
            "depressions.csv", "spill_points.geojson"]
    files = after["files"]
    assert files[:6] == base and files[-1] == "summary.json" and "README.txt" in files
    assert files[6:9] == list(hx.HIERARCHY_FILE_NAMES)  # in their place, before the summary
    assert set(files) == {*before["files"], *hx.HIERARCHY_FILE_NAMES}
    assert {k: v for k, v in after.items() if k != "files"} == \
        {k: v for k, v in before.items() if k != "files"}
    batches = [(d, t) for s, d, t in seen if s == "hierarchy"]
    assert batches == [(k, run.batches) for k in range(run.batches + 1)] and run.batches > 3
    assert [d for s, d, _ in seen if s == "hierarchy_write"] == [0, 1, 2, 3]
    assert [p.name for p in run.files] == list(hx.HIERARCHY_FILE_NAMES)


def test_batches_are_runs_of_consecutive_ids_covering_their_depressions(terrain_tif, tmp_path):
    out = tiled_folder(terrain_tif, tmp_path / "tiled", tile=37)
    with rasterio.open(out / "depression_id.tif") as ds:
        ids = ds.read(1)
    count = int(ids.max())
    folder = open_result_folder(out)
    for budget in (1, 900, 5000):
        b = hierarchy_batches(folder, window_cells=budget)
        assert b[0, 0] == 1 and b[-1, 1] == count and np.array_equal(b[1:, 0], b[:-1, 1] + 1)
        for first, last, r0, r1, c0, c1 in b.tolist():
            inside = np.zeros_like(ids, dtype=bool)
            inside[r0:r1, c0:c1] = True
            mine = (ids >= first) & (ids <= last)
            assert not (mine & ~inside).any()  # every cell of the batch in its window
            rows, cols = np.nonzero(mine)
            assert (rows.min(), rows.max() + 1, cols.min(), cols.max() + 1) == (r0, r1, c0, c1)
            assert first == last or (r1 - r0) * (c1 - c0) <= budget


def test_files_that_do_not_belong_together_are_refused(terrain_tif, tmp_path):
    out = tiled_folder(terrain_tif, tmp_path / "tiled", tile=32)
    other = tiled_folder(write_raster(tmp_path / "other.tif", synthetic_terrain(150, 170, 8)),
                         tmp_path / "other", tile=32)
    shutil.copy(other / "depressions.csv", out / "depressions.csv")
    with pytest.raises(InvalidParameter, match="do not belong together|cell counts"):
        add_hierarchy_files(out, grid=_grid(terrain_tif))
    assert not (out / hx.HIERARCHY_CSV).exists()
    assert not [p for p in out.iterdir() if p.name.startswith(".")]
    with pytest.raises(InvalidParameter, match="window_cells"):
        add_hierarchy_files(other, window_cells=0)


def test_a_changed_dem_is_refused(tmp_path):
    z = synthetic_terrain(40, 50, 3)
    path = write_raster(tmp_path / "site.tif", z)
    out = tiled_folder(path, tmp_path / "tiled", tile=16)
    write_raster(path, z + 0.5)
    with pytest.raises(InvalidDEM, match="changed"):
        add_hierarchy_files(out)
    assert not (out / hx.HIERARCHY_CSV).exists()


def _grid(path):
    from sillmark.grid.dem_grid import read_dem_grid

    return read_dem_grid(path)


def test_in_memory_json_is_the_to_json_document(terrain_tif, tmp_path):
    # The streamed JSON writer against the document built the direct way: the
    # flat to_json() with name, version, caution, crs and units in front and the
    # float32 fields as shortest decimals (sillmark.io.json_values.json_number).
    from sillmark import __version__
    from sillmark.grid.crs import crs_label
    from sillmark.io.json_values import json_number

    ref = tmp_path / "ref"
    h = reference_files(terrain_tif, ref)
    dem = read_dem(terrain_tif)
    doc = json.loads(h.to_json())
    for k, node in enumerate(doc["nodes"]):
        for name in ("pit_elevation", "merge_elevation", "spill_elevation", "max_depth"):
            node[name] = json_number(getattr(h.nodes, name)[k])
    units = {n: "m" for n in ("pit_elevation", "merge_elevation", "spill_elevation", "max_depth")}
    units.update({"spill_x": "m", "spill_y": "m", "area_m2": "m2", "volume_m3": "m3"})
    whole = {"name": "depression_hierarchy", "sillmark_version": __version__,
             "caution": doc.pop("caution"), "crs": crs_label(dem), "units": units, **doc}
    text = json.dumps(whole, ensure_ascii=False, allow_nan=False, separators=(",", ":")) + "\n"
    assert (ref / hx.HIERARCHY_JSON).read_text(encoding="utf-8") == text


# --------------------------------------------------------------------------- on a cluster


@pytest.fixture(scope="module")
def cluster_address():
    """A dask.distributed LocalCluster of two worker processes on 127.0.0.1."""
    with loopback_cluster(2) as cluster:
        yield cluster.scheduler_address


def test_cli_tiled_analyse_on_a_cluster_writes_the_in_memory_files(cluster_address, terrain_tif,
                                                                  tmp_path, capsys):
    from sillmark.cli import main

    tiled, whole = tmp_path / "tiled", tmp_path / "whole"
    assert main(["analyse", str(terrain_tif), "--tiles", "40", "--scheduler", cluster_address,
                 "--out", str(tiled), "-q"]) == 0
    printed = capsys.readouterr().out
    # Both apply the default significance minimum: the tiled run decides it window
    # by window on the cluster, and lists the same nodes.
    assert main(["analyse", str(terrain_tif), "--out", str(whole), "-q"]) == 0
    in_memory = capsys.readouterr().out
    assert_same_files(tiled, whole)
    line = [t for t in printed.splitlines() if t.startswith("Depression hierarchy:")]
    assert line and line == [t for t in in_memory.splitlines() if t.startswith("Depression hierarchy:")]
    assert "Results: 18 files" in printed and "no hierarchy" not in printed  # 11 + README + 6 SLD
    summary = json.loads((tiled / "summary.json").read_text())
    assert summary["files"] == json.loads((whole / "summary.json").read_text())["files"]
    assert summary["significance"] == json.loads((whole / "summary.json").read_text())["significance"]
    assert summary["significance"]["counts"]["significant"] < summary["significance"]["counts"][
        "hierarchy_nodes"]  # the minimum left some nodes out
    for name in ("depressions.csv", "spill_points.geojson"):
        assert (tiled / name).read_bytes() == (whole / name).read_bytes(), name
    assert not [p for p in tiled.iterdir() if p.name.startswith(".")]


def test_cli_tiled_geopackage_layers_hold_the_in_memory_features(cluster_address, terrain_tif,
                                                                 tmp_path, capsys):
    # --vector-format reaches the tiled run too (it used to write GeoJSON whatever
    # was asked, and so ignored the "auto" default's GeoPackage for large layers).
    import pyogrio
    import shapely

    from sillmark.cli import main

    tiled, whole = tmp_path / "tiled", tmp_path / "whole"
    assert main(["analyse", str(terrain_tif), "--tiles", "40", "--scheduler", cluster_address,
                 "--vector-format", "gpkg", "--out", str(tiled), "-q"]) == 0
    assert main(["analyse", str(terrain_tif), "--vector-format", "gpkg", "--out", str(whole),
                 "-q"]) == 0
    capsys.readouterr()
    files = json.loads((tiled / "summary.json").read_text())["files"]
    assert files == json.loads((whole / "summary.json").read_text())["files"]
    assert files.index("depressions.gpkg") == files.index("depressions.csv") + 1
    assert not list(tiled.glob("*.geojson"))
    for name in ("depressions.gpkg", "spill_points.gpkg"):
        mine, ref = pyogrio.raw.read(tiled / name), pyogrio.raw.read(whole / name)
        assert mine[0]["crs"] == ref[0]["crs"] == "EPSG:32633"
        ids = list(mine[0]["fields"]).index("id")
        assert mine[3][ids].tolist() == ref[3][ids].tolist() and len(mine[3][ids]) > 1, name
        a, b = shapely.from_wkb(mine[2]), shapely.from_wkb(ref[2])
        assert shapely.equals(shapely.normalize(a), shapely.normalize(b)).all(), name


def test_a_folder_in_small_windows_on_a_cluster_gives_the_in_memory_files(cluster_address,
                                                                          terrain_tif, tmp_path):
    # The tiled engine and the hierarchy batches on a two-worker cluster, with a
    # budget that cuts the depressions into many windows; each task is sent a
    # reader of the folder (path and DEM grid) and its batch's rows only, never
    # the depression table or a raster.
    import pickle

    from distributed import Client

    from sillmark.engine.executors import DaskExecutor

    ref = tmp_path / "ref"
    reference_files(terrain_tif, ref)
    with Client(cluster_address) as client:
        run_map = DaskExecutor(client)
        out = tiled_folder(terrain_tif, tmp_path / "tiled", tile=40, map=run_map)
        table_bytes = len(pickle.dumps(open_result_folder(out).depressions))
        before = run_map.sent_bytes
        run = add_hierarchy_files(out, map=run_map, window_cells=2000)
        sent = run_map.sent_bytes - before
    assert_same_files(out, ref)
    assert run.batches > 10
    per_task = sent / (2 * run.batches)  # a hierarchy task and a format task per batch
    # A task carries the folder's reader (its grid, CRS text included: a few kB) and its
    # batch's rows; one that carried the whole depression table would exceed its size.
    assert per_task < 16_000 and per_task < table_bytes, (per_task, table_bytes)
    assert not [p for p in out.iterdir() if p.name.startswith(".")]


def test_batch_kernels_compiled_and_plain_python_agree(terrain_tif, tmp_path):
    # The compiled batch cutter against its own plain-Python loop (the same source
    # run by the interpreter). tests/engine/test_kernels_boundscheck.py runs both kernels
    # of sillmark.products._hierarchy_windows_kernels once more with numba's index checks on.
    from sillmark.products import _hierarchy_windows_kernels as kernels
    from sillmark.products.hierarchy_windows import bounding_boxes

    out = tiled_folder(terrain_tif, tmp_path / "tiled", tile=64)
    ids_path = out / "depression_id.tif"
    with rasterio.open(ids_path) as ds:
        ids = ds.read(1)
    count = int(ids.max())
    folder = open_result_folder(out)
    expected = hierarchy_batches(folder, window_cells=900)
    bounds = bounding_boxes(folder, count)
    assert np.array_equal(kernels.batches.py_func(*bounds, 900), expected)
    # Each depression's box, the direct way.
    for d in (1, count // 2, count):
        r, c = np.nonzero(ids == d)
        assert [b[d] for b in bounds] == [r.min(), r.max(), c.min(), c.max()]


# --------------------------------------------------------------------------- listed and capped


@pytest.mark.parametrize("cap", [10**9, 1500, 300])
def test_listed_and_capped_curves_are_the_same_bytes_in_any_batches(terrain_tif, tmp_path, cap):
    # Only the tops (one per depression) listed, rows capped: one window, small
    # windows one after another, and small windows through a map (each batch's
    # hierarchy built again for its curves) give the same bytes.
    from sillmark.engine.executors import serial_map
    from sillmark.products import hierarchy_curves as hc

    source = in_memory(terrain_tif)
    h = site_hierarchy(source.dem, source.result)
    listed = h.nodes.parent == 0
    runs = {}
    for name, options in (("one", {}), ("cut", {"window_cells": 400}),
                          ("mapped", {"window_cells": 400, "map": serial_map})):
        out = tmp_path / name
        out.mkdir()
        runs[name] = write_hierarchy_files(source, out, listed=listed, max_curve_rows=cap,
                                           **options)
    assert runs["cut"].batches > 1
    for name in ("cut", "mapped"):
        assert_same_files(tmp_path / name, tmp_path / "one")
    run = runs["one"]
    counts = hc.natural_counts(h)
    natural = int(counts.rows[listed].sum())
    assert run.curve_rows_natural == natural and run.listed == int(listed.sum())
    text = (tmp_path / "one" / hx.CURVES_CSV).read_text()
    rows = [line for line in text.splitlines() if not line.startswith("#")][1:]
    assert len(rows) == run.curve_rows <= cap
    assert {int(r.split(",")[0]) for r in rows} <= set(h.tops.tolist())
    assert (run.curve_rows == natural) == (cap >= natural)
    assert not text.startswith("#")  # the header row first; the cap is in summary.json
    doc = json.loads((tmp_path / "one" / hx.HIERARCHY_JSON).read_text())
    assert [n["id"] for n in doc["nodes"]] == h.tops.tolist()
    assert doc["node_count"] == len(h.tops) and doc["hierarchy_node_count"] == len(h)


def test_a_listed_mask_of_the_wrong_length_is_refused(terrain_tif, tmp_path):
    source = in_memory(terrain_tif)
    with pytest.raises(InvalidParameter, match="listed"):
        write_hierarchy_files(source, tmp_path, listed=np.ones(3, bool))
    with pytest.raises(InvalidParameter, match="cap"):
        write_hierarchy_files(source, tmp_path, max_curve_rows=1)
