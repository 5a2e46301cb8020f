"""Out-of-core outputs of the tiled engine against the in-memory writers.

The depression outlines (:mod:`sillmark.products.outlines`) and the water-level
exports and stage table (:mod:`sillmark.io.stage_files`) are written once, against a
result source. Here they are built from the folder
:func:`sillmark.run.analyse` writes on tiles, read window by window
(:mod:`sillmark.io.results_folder`), and compared with the same writers on
Sillmark's own in-memory path on the same DEM: the engine with the same tile
size (:func:`sillmark.engine.flood.priority_flood` with ``tile_size``, so that the
spill cells of tied routes agree) held as arrays
(:class:`sillmark.products.source.ArraySource`, one window). Rasters and CSV files must be the same bytes;
outlines the same regions (shapely ``equals``) with the same vertices, and
every GeoJSON property the same value.
"""

from __future__ import annotations

import dataclasses
import json
import shutil

import numpy as np
import pytest
import rasterio
import shapely
import shapely.geometry
from affine import Affine

from sillmark.grid.dem import read_dem
from sillmark.errors import InvalidDEM, InvalidParameter
from sillmark.products.outlines import depression_polygons
from sillmark.io.geojson import write_depressions_geojson
from sillmark.products.stage import stage_levels
from sillmark.io.stage_files import write_stage_results
from tests.loopback import analyse_on_tiles
from sillmark.io.results_folder import _float32_from_text, open_result_folder
from sillmark.products.outlines import depression_outlines
from sillmark.products.source import ArraySource
from tests.loopback import loopback_cluster
from tests.rasters import grid, write_raster
from tests.engine.test_flood import synthetic_terrain
from tests.engine.test_tiled import in_memory


def run_tiled(path, out, *, specs=("edge",), connectivity=8, tile=16):
    if out.exists():
        shutil.rmtree(out)
    return analyse_on_tiles(path, out, outlets=list(specs), connectivity=connectivity, tile_size=tile)


def vertex_set(geom) -> set:
    return set(map(tuple, shapely.get_coordinates(geom).tolist()))


def read_features(path):
    with open(path, encoding="utf-8") as f:
        return json.load(f)


def assert_same_collections(mine, theirs, *, ignore=()):
    """Members and properties the same values (but the properties in ``ignore``);
    geometries the same regions and vertices."""
    a, b = read_features(mine), read_features(theirs)
    assert {k: v for k, v in a.items() if k != "features"} == {k: v for k, v in b.items() if k != "features"}
    assert len(a["features"]) == len(b["features"])
    for fa, fb in zip(a["features"], b["features"]):
        pa = {k: v for k, v in fa["properties"].items() if k not in ignore}
        pb = {k: v for k, v in fb["properties"].items() if k not in ignore}
        assert fa["id"] == fb["id"] and pa == pb
        ga, gb = shapely.geometry.shape(fa["geometry"]), shapely.geometry.shape(fb["geometry"])
        assert ga.geom_type == gb.geom_type and ga.is_valid
        assert ga.equals(gb) and vertex_set(ga) == vertex_set(gb)


# --------------------------------------------------------------------------- DEMs


@pytest.fixture(scope="module")
def terrain_tif(tmp_path_factory):
    """Rolling synthetic terrain, 150 x 170, with dozens of depressions across tiles."""
    return write_raster(tmp_path_factory.mktemp("terrain") / "terrain.tif", synthetic_terrain(150, 170, 7))


@pytest.fixture(scope="module")
def coast_tif(tmp_path_factory):
    """Terrain with a nodata sea, a masked lake and a patch walled in by nodata.

    Cells of 0.7 m: 0.49 m² is no binary fraction, so area sums round, and only
    the in-memory order of additions gives the same bits (with 1 m² cells every
    sum would be exact in any order).
    """
    z = synthetic_terrain(90, 110, 3, smooth=2.0)
    yy, xx = np.mgrid[0:90, 0:110]
    z[(xx + 0.6 * yy) < 25] = -9999.0                  # the sea, a diagonal coast
    z[(yy - 50) ** 2 + (xx - 70) ** 2 < 60] = -9999.0   # a masked lake
    z[60:80, 20:40] = -9999.0                          # a nodata ring round a patch that
    z[64:76, 24:36] = 50.0                             # only "nodata" outlets reach
    return write_raster(tmp_path_factory.mktemp("coast") / "coast.tif", z, nodata=-9999.0,
                        transform=grid(0.7))


@pytest.fixture(scope="module")
def shapes_tif(tmp_path_factory):
    """Hand-made outlines that the window edges cut in awkward places.

    On flat ground at 10 m with the DEM edge as outlet (every depression fills to
    10 m, the level of the ground around it):
    - a ring of cells at 5 m (rows 2-9, cols 2-9, one cell wide) round an
      island at 20 m: one depression whose outline has a hole (the island
      stays above 10 m, so it is in no depression);
    - two cells at 3 m touching only at a corner, (2, 13) and (3, 14): with D8
      they are one depression, whose outline is two squares meeting at a point
      (a MultiPolygon);
    - an L of cells at 4 m, (12, 2)-(12, 12) and (5..12, 12): one depression
      crossing many windows.
    """
    z = np.full((16, 18), 10.0, dtype=np.float32)
    z[2:10, 2:10] = 5.0
    z[3:9, 3:9] = 20.0
    z[2, 13] = z[3, 14] = 3.0
    z[12, 2:13] = 4.0
    z[5:13, 12] = 4.0
    return write_raster(tmp_path_factory.mktemp("shapes") / "shapes.tif", z)


# --------------------------------------------------------------------------- outlines


@pytest.mark.parametrize("window", [2, 5, 16, 37, 512])
def test_hand_made_outlines_equal_the_in_memory_ones(shapes_tif, tmp_path, window):
    dem, _, r = in_memory(shapes_tif, tile=4)
    run = run_tiled(shapes_tif, tmp_path / "out", tile=4)
    ref = depression_polygons(r, dem)
    assert [g.geom_type for g in ref] == ["Polygon", "MultiPolygon", "Polygon"]
    assert len(ref[0].interiors) == 1  # the island
    assert len(run.depressions) == len(ref)
    mine = depression_outlines(open_result_folder(tmp_path / "out"), window=window)
    for a, b in zip(ref, mine):
        assert b.is_valid and a.equals(b) and vertex_set(a) == vertex_set(b)
        assert a.geom_type == b.geom_type and len(shapely.get_parts(a)) == len(shapely.get_parts(b))


@pytest.mark.parametrize(("dem_name", "specs", "connectivity", "tile", "window"), [
    ("terrain_tif", ("edge",), 8, 16, 3),
    ("terrain_tif", ("edge",), 8, 32, 64),
    ("terrain_tif", ("edge",), 4, 23, 40),
    ("coast_tif", ("nodata", "edge"), 8, 16, 17),
])
def test_outlines_and_geojson_equal_the_in_memory_file(request, tmp_path, dem_name, specs,
                                                       connectivity, tile, window):
    path = request.getfixturevalue(dem_name)
    dem, _, r = in_memory(path, specs, connectivity, tile)
    out = tmp_path / "out"
    run = run_tiled(path, out, specs=specs, connectivity=connectivity, tile=tile)
    assert len(run.depressions) > 10
    ref = depression_polygons(r, dem)
    mine = depression_outlines(open_result_folder(out), window=window)
    assert len(mine) == len(ref)
    assert all(a.equals(b) and vertex_set(a) == vertex_set(b) for a, b in zip(ref, mine))
    write_depressions_geojson(ArraySource(dem, r), tmp_path / "memory.geojson")
    write_depressions_geojson(open_result_folder(out), tmp_path / "tiled.geojson", window=window)
    assert_same_collections(tmp_path / "tiled.geojson", tmp_path / "memory.geojson")


def test_outlines_traced_on_other_processes_are_the_same_bits(terrain_tif, tmp_path):
    """Windows traced through a map that pickles each call and its answer, as a cluster
    does, give the outlines traced in this process, vertex for vertex, with and
    without a pick of depressions."""
    import pickle

    def pickling_map(fn, calls):
        return [pickle.loads(pickle.dumps(fn(*pickle.loads(pickle.dumps(c))))) for c in calls]

    run = run_tiled(terrain_tif, tmp_path / "out")
    site = open_result_folder(tmp_path / "out")
    count = len(run.depressions)
    only = np.arange(count) % 3 == 0
    for pick in (None, only):
        here = depression_outlines(site, window=7, only=pick)
        there = depression_outlines(site, window=7, only=pick, map=pickling_map)
        assert sum(g is not None for g in there) == (count if pick is None else only.sum())
        assert [None if g is None else g.wkb for g in here] == \
            [None if g is None else g.wkb for g in there]
    # Windows split depressions: some outlines are joined from pieces of several windows.
    assert any(g.bounds[2] - g.bounds[0] > 7 * abs(site.grid.transform.a) for g in here
               if g is not None)


def test_outlines_refuse_an_id_raster_that_lacks_a_depression(terrain_tif, tmp_path):
    run_tiled(terrain_tif, tmp_path / "out")
    site = open_result_folder(tmp_path / "out")
    # A table with one depression more than the id raster holds.
    longer = {name: np.append(values, values[-1]) for name, values in site.depressions.items()}
    with pytest.raises(InvalidParameter, match="has no cells"):
        depression_outlines(dataclasses.replace(site, depressions=longer))
    with pytest.raises(InvalidParameter, match="window"):
        depression_outlines(site, window=0)


# --------------------------------------------------------------------------- stage exports


def assert_same_stage_files(mine, theirs):
    assert [p.name for p in mine.paths] == [p.name for p in theirs.paths]
    for a, b in zip(mine.paths, theirs.paths):
        if a.suffix == ".geojson":
            assert_same_collections(a, b)
        else:  # GeoTIFF and CSV: the same bytes
            assert a.read_bytes() == b.read_bytes(), a.name
    for la, lb in zip(mine.levels, theirs.levels):
        for name in ("level", "flooded_area_m2", "flooded_volume_m3", "shielded_area_m2",
                     "shielded_volume_m3", "depressions_overtopped", "depressions_cut_off",
                     "depressions_dry"):
            assert getattr(la, name) == getattr(lb, name), name


@pytest.mark.parametrize(("dem_name", "specs", "tile", "window", "unreached"), [
    ("terrain_tif", ("edge",), 16, 29, 0),
    ("coast_tif", ("nodata", "edge"), 24, 16, 0),
    ("coast_tif", ("edge",), 13, 50, 144),  # the walled-in 12 x 12 patch is nodata in every map
])
def test_stage_files_are_the_in_memory_files(request, tmp_path, dem_name, specs, tile, window,
                                             unreached):
    path = request.getfixturevalue(dem_name)
    dem, _, r = in_memory(path, specs, 8, tile)
    run = run_tiled(path, tmp_path / "out", specs=specs, tile=tile)
    assert run.unreached_cells == unreached
    site = open_result_folder(tmp_path / "out")
    s = r.onset_stage[np.isfinite(r.onset_stage)]
    # A level below every onset stage, two inside the range, and one above all ground.
    levels = [float(s.min()) - 1.0, float(np.median(s)), float(np.percentile(s, 80)),
              float(np.nanmax(dem.elevation)) + 0.5]
    table_levels = stage_levels(ArraySource(dem, r), step=0.37)
    assert np.array_equal(stage_levels(site, step=0.37), table_levels)
    theirs = write_stage_results(ArraySource(dem, r), tmp_path / "memory", levels=levels,
                                 table_levels=table_levels)
    mine = write_stage_results(site, tmp_path / "tiled", levels=levels, table_levels=table_levels,
                               window=window)
    assert_same_stage_files(mine, theirs)
    # Not a trivial comparison: some ground is flooded and some shielded at the middle level.
    middle = mine.levels[1]
    assert middle.flooded_area_m2 > 0 and middle.shielded_area_m2 > 0
    assert site.elevation_min == float(np.nanmin(dem.elevation))
    assert site.onset_min == float(s.min())


def test_stage_files_in_feet_on_a_geographic_grid(tmp_path):
    # Lon/lat cells (a different true area on every row) and elevations in
    # international feet: acre-foot columns appear and the volumes carry 0.3048.
    z = synthetic_terrain(60, 70, 11)
    geo = Affine(0.001, 0.0, 15.0, 0.0, -0.001, 46.0)
    path = write_raster(tmp_path / "geo.tif", z, crs="EPSG:4326", transform=geo)
    out = tmp_path / "out"
    analyse_on_tiles(path, out, tile_size=9, vertical_unit="ft")
    dem = read_dem(path, vertical_unit="ft")
    from sillmark.grid.outlets import build_outlets
    from sillmark.engine.flood import priority_flood

    outlets = build_outlets(dem, ("edge",))
    r = priority_flood(dem.elevation, outlets.mask, row_areas=dem.row_areas,
                       transform=dem.transform, tile_size=9)
    site = open_result_folder(out)
    levels = [float(np.nanmedian(r.onset_stage))]
    table = stage_levels(ArraySource(dem, r), step=2.5, start=float(np.nanmin(dem.elevation)))
    theirs = write_stage_results(ArraySource(dem, r), tmp_path / "memory", levels=levels,
                                 table_levels=table)
    mine = write_stage_results(site, tmp_path / "tiled", levels=levels, table_levels=table)
    assert_same_stage_files(mine, theirs)
    header = (tmp_path / "tiled" / "stage_table.csv").read_text().splitlines()
    assert any("flooded_volume_acre_ft" in line for line in header)


def test_a_changed_dem_is_refused(terrain_tif, tmp_path):
    dem_path = tmp_path / "dem.tif"
    shutil.copyfile(terrain_tif, dem_path)
    run_tiled(dem_path, tmp_path / "out")
    open_result_folder(tmp_path / "out")  # unchanged: accepted
    with rasterio.open(dem_path, "r+") as ds:
        z = ds.read(1)
        z[40, 50] -= 1.0
        ds.write(z, 1)
    with pytest.raises(InvalidDEM, match="1 cells differ"):
        open_result_folder(tmp_path / "out")


def test_float32_texts_are_read_back_exactly():
    rng = np.random.default_rng(3)
    values = (rng.standard_normal(5000) * 10.0 ** rng.integers(-6, 6, 5000)).astype(np.float32)
    texts = [np.format_float_positional(v, unique=True, trim="-") for v in values]
    assert np.array_equal(_float32_from_text(texts), values)
    # 1 + 2**-24 lies halfway between the float32 values 1 and 1 + 2**-23, and is a
    # float64; a text a hair above it must round up, one a hair below down, though
    # both read as that same float64 (rounding it to float32 alone gives 1 for both).
    above = "1.00000005960464477539062500000001"
    below = "1.00000005960464477539062499999999"
    assert float(above) == float(below) == 1 + 2.0 ** -24
    got = _float32_from_text([above, below, ""])
    assert got[0] == np.float32(1 + 2.0 ** -23) and got[1] == np.float32(1.0) and np.isnan(got[2])


# --------------------------------------------------------------------------- command line


@pytest.fixture(scope="module")
def cluster_address():
    """A dask.distributed LocalCluster of one worker process on 127.0.0.1, for the CLI."""
    with loopback_cluster(1) as cluster:
        yield cluster.scheduler_address


def test_cli_tiled_analyse_and_stage_write_the_in_memory_files(cluster_address, terrain_tif,
                                                               tmp_path, capsys):
    from sillmark.cli import main

    # Tiles of 512 cells: one tile, as the in-memory engine's default, so even
    # the spill cells of tied routes are the same and whole files can be compared.
    tiled, whole = tmp_path / "tiled", tmp_path / "whole"
    assert main(["analyse", str(terrain_tif), "--tiles", "512", "--scheduler", cluster_address,
                 "--full-inventory", "--out", str(tiled), "-q"]) == 0
    printed = capsys.readouterr().out
    # 11 files, README.txt and an SLD style beside each of the 4 rasters and 2 GeoJSON layers
    assert "Depression hierarchy:" in printed and "Results: 18 files" in printed
    # Both list every depression (the full inventory), so the stage figures below
    # count the same depressions.
    assert main(["analyse", str(terrain_tif), "--full-inventory", "--out", str(whole), "-q"]) == 0
    summary = json.loads((tiled / "summary.json").read_text())
    assert summary["files"] == ["onset_stage.tif", "fill_depth.tif", "depression_id.tif",
                                "flood_tree.tif", "depressions.csv", "depressions.geojson",
                                "spill_points.geojson", "depression_hierarchy.csv",
                                "depression_hierarchy.json", "depression_curves.csv",
                                "README.txt", "onset_stage.sld", "fill_depth.sld",
                                "depression_id.sld", "flood_tree.sld", "depressions.sld",
                                "spill_points.sld", "summary.json"]
    assert summary["engine"]["kind"] == "tiled"
    # Each marks every depression significant or not, the same ones.
    assert_same_collections(tiled / "depressions.geojson", whole / "depressions.geojson")
    assert summary["significance"] == json.loads((whole / "summary.json").read_text())["significance"]
    # The hierarchy, built on the cluster in windows of depressions: the same bytes.
    for name in ("depression_hierarchy.csv", "depression_hierarchy.json", "depression_curves.csv"):
        assert (tiled / name).read_bytes() == (whole / name).read_bytes(), name
    assert not list(tiled.glob(".sillmark-*"))  # scratch removed
    capsys.readouterr()

    args = ["--level", "0", "--level", "20", "--table-step", "1.5", "-q"]
    assert main(["stage", str(tiled), "--out", str(tmp_path / "s_tiled"), *args]) == 0
    out_tiled = capsys.readouterr().out
    assert "tiled results, read block by block" in out_tiled
    assert main(["stage", str(terrain_tif), "--tiles", "512", "--scheduler", cluster_address,
                 "--out", str(tmp_path / "s_dem"), *args]) == 0
    out_dem = capsys.readouterr().out
    assert main(["stage", str(whole), "--out", str(tmp_path / "s_whole"), *args]) == 0
    out_whole = capsys.readouterr().out
    # The same figures printed, level by level (all but the origin and the folder lines).
    def figures(text):
        return [line for line in text.splitlines()
                if not line.startswith(("Analysis:", "Engine:", "Results:"))]

    assert figures(out_tiled) == figures(out_whole) == figures(out_dem)
    assert any(line.startswith("  Shielded low ground:") for line in figures(out_tiled))
    names = sorted(p.name for p in (tmp_path / "s_whole").iterdir())
    assert len(names) == 20  # five per level, four SLD styles per level, the table and README.txt
    for folder in ("s_tiled", "s_dem"):
        assert sorted(p.name for p in (tmp_path / folder).iterdir()) == names  # scratch removed
        for name in names:
            a, b = tmp_path / folder / name, tmp_path / "s_whole" / name
            if name.endswith(".geojson"):
                assert_same_collections(a, b)
            else:
                assert a.read_bytes() == b.read_bytes(), name


def test_cli_tiled_stage_refuses_what_it_cannot_do(terrain_tif, tmp_path, capsys):
    from sillmark.cli import main

    folder = tmp_path / "tiled"
    run_tiled(terrain_tif, folder)
    (tmp_path / "assets.csv").write_text("name,x,y\nPump,500010,4999990\n")
    assert main(["stage", str(folder), "--level", "40", "--assets", str(tmp_path / "assets.csv"),
                 "--out", str(tmp_path / "s")]) == 2
    assert "--assets" in capsys.readouterr().err
    assert main(["stage", str(folder), "--level", "40", "--tiles", "64", "--out", str(tmp_path / "s")]) == 2
    assert "drop --tiles" in capsys.readouterr().err
    assert main(["stage", str(folder), "--level", "40", "--connectivity", "4",
                 "--out", str(tmp_path / "s")]) == 2
    assert "--connectivity" in capsys.readouterr().err
    assert main(["stage", str(terrain_tif), "--level", "40", "--workers", "2",
                 "--out", str(tmp_path / "s")]) == 2
    assert "give --tiles N" in capsys.readouterr().err


BOUNDS_SCRIPT = """
import tempfile
from pathlib import Path
import numpy as np
from tests.loopback import analyse_on_tiles
from sillmark.io.results_folder import open_result_folder
from sillmark.io.stage_files import write_stage_results
from sillmark.products.stage import stage_table
from tests.rasters import write_raster
rng = np.random.default_rng(8)
with tempfile.TemporaryDirectory() as tmp:
    for shape in ((13, 11), (1, 9), (300, 4)):  # 300 rows: more than one block of rows
        z = rng.integers(0, 6, shape).astype(np.float32)
        z[rng.random(shape) < 0.1] = -9999.0
        z[0, 0] = 1.0
        path = write_raster(Path(tmp) / "z.tif", z, nodata=-9999.0)
        out = Path(tmp) / f"out{shape[0]}"
        analyse_on_tiles(path, out, outlets=["edge"], tile_size=4)
        site = open_result_folder(out)
        stage_table(site, np.arange(-1, 7, 0.5))
        write_stage_results(site, Path(tmp) / f"stage{shape[0]}", levels=[2.5])
print("bounds ok")
"""


@pytest.mark.slow
def test_stage_kernel_runs_clean_with_bounds_checking(tmp_path):
    # As tests/engine/test_kernels_boundscheck.py: a fresh interpreter, an empty numba
    # cache and NUMBA_BOUNDSCHECK=1, so a stray index raises IndexError.
    import os
    import subprocess
    import sys
    from pathlib import Path

    root = Path(__file__).resolve().parents[2]
    env = dict(os.environ)
    env["NUMBA_BOUNDSCHECK"] = "1"
    env["NUMBA_CACHE_DIR"] = str(tmp_path / "numba-cache")
    env["PYTHONPATH"] = str(root) + os.pathsep + env.get("PYTHONPATH", "")
    done = subprocess.run([sys.executable, "-c", BOUNDS_SCRIPT], env=env, cwd=root,
                          capture_output=True, text=True, timeout=900)
    assert done.returncode == 0, done.stderr[-3000:]
    assert "bounds ok" in done.stdout
