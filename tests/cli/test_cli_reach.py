"""``sillmark analyse --profile/--refuge/--roads`` and ``sillmark stage --offset``, end to end.

The DEMs are the hand-worked ones of tests/products/test_profile.py (a sloped
channel with a ridge and a bowl) and tests/products/test_cutoff.py (a village on
a mound whose only road dips through a hollow); the working is shown there.
"""

from __future__ import annotations

import csv
import json
from pathlib import Path

import numpy as np
import pytest
import rasterio

from sillmark import SCREENING_CAUTION
from sillmark.cli import main
from sillmark.engine.executors import SerialExecutor
from sillmark.grid.dem import read_dem
from sillmark.run import analyse
from tests.rasters import NORTH, WEST, write_raster

UTM = {"type": "name", "properties": {"name": "EPSG:32633"}}
W0 = 10.0 - np.arange(6)
CHANNEL = np.vstack([W0 - 1.0, W0 + 1.0, W0 + 0.5])


def write_json(path: Path, obj: dict) -> Path:
    path.write_text(json.dumps(obj), encoding="utf-8")
    return path


def river(path: Path, cols: int = 6, levels=(10.0, 5.0), y_row: int = 0) -> Path:
    y = NORTH - y_row - 0.5
    x0, x1 = WEST + 0.5, WEST + cols - 0.5
    return write_json(path, {"type": "FeatureCollection", "crs": UTM, "features": [
        {"type": "Feature", "properties": {}, "geometry": {"type": "LineString",
                                                           "coordinates": [[x0, y], [x1, y]]}},
        {"type": "Feature", "properties": {"level": levels[0], "name": "upper weir"},
         "geometry": {"type": "Point", "coordinates": [x0, y]}},
        {"type": "Feature", "properties": {"level": levels[1], "name": "town bridge"},
         "geometry": {"type": "Point", "coordinates": [x1, y]}}]})


def read(path: Path) -> np.ndarray:
    with rasterio.open(path) as ds:
        return ds.read(1)


def test_profile_through_analyse_and_stage_offset(tmp_path, capsys):
    dem = write_raster(tmp_path / "channel.tif", CHANNEL.astype(np.float32))
    out = tmp_path / "out"
    assert main(["analyse", str(dem), "--profile", str(river(tmp_path / "river.geojson")),
                 "--out", str(out), "-q"]) == 0
    printed = capsys.readouterr().out
    assert "upper weir 10.00 m" in printed and "from offset -1.00 to 1.00 m" in printed
    assert printed.rstrip().endswith(SCREENING_CAUTION)
    assert np.allclose(read(out / "onset_offset.tif"), [[-1] * 6, [1] * 6, [1] * 6])
    assert np.allclose(read(out / "profile_level.tif"), np.tile(W0, (3, 1)))
    summary = json.loads((out / "summary.json").read_text())
    assert summary["files"][-1] == "summary.json"
    assert {"onset_offset.tif", "profile_level.tif", "onset_stage.tif"} <= set(summary["files"])
    assert [s["level"] for s in summary["profile"]["stations"]] == [10.0, 5.0]
    # Offset 0.75: the river wet (depth W0 + 0.75 - z = 1.75), the bowl shielded.
    stage_out = tmp_path / "offsets"
    assert main(["stage", str(out), "--offset", "0.75", "--offset", "1", "--out", str(stage_out),
                 "-q"]) == 0
    printed = capsys.readouterr().out
    assert "offset 0.75 m" in printed
    state = read(stage_out / "water_state_offset_0.75m.tif")
    assert state[0].tolist() == [2] * 6 and state[1].tolist() == [1] * 6 and state[2].tolist() == [3] * 6
    assert np.allclose(read(stage_out / "depth_offset_0.75m.tif")[0], 1.75)
    assert np.allclose(read(stage_out / "depth_offset_1.00m.tif")[2], 0.5)
    with rasterio.open(stage_out / "depth_offset_1.00m.tif") as ds:
        assert "offset" in ds.tags()["WATER_LEVEL_MEANING"]
    assert not list(stage_out.glob("depressions_at_*"))


def test_offset_needs_a_profile_folder(tmp_path, capsys):
    dem = write_raster(tmp_path / "channel.tif", CHANNEL.astype(np.float32))
    out = tmp_path / "out"
    assert main(["analyse", str(dem), "--out", str(out), "-q"]) == 0
    capsys.readouterr()
    assert main(["stage", str(out), "--offset", "0", "--out", str(tmp_path / "o")]) != 0
    assert "--profile" in capsys.readouterr().err


def test_bad_profile_is_refused_before_anything_is_written(tmp_path, capsys):
    dem = write_raster(tmp_path / "channel.tif", CHANNEL.astype(np.float32))
    bad = write_json(tmp_path / "bad.geojson", {"type": "FeatureCollection", "crs": UTM,
                                                "features": []})
    out = tmp_path / "out"
    assert main(["analyse", str(dem), "--profile", str(bad), "--out", str(out)]) != 0
    assert "LineString" in capsys.readouterr().err
    assert not out.exists() or not any(out.iterdir())


# The village of tests/products/test_cutoff.py: the river is column 5.
VILLAGE = np.array([[9, 9, 2, 2, 2, 0],
                    [9, 7, 3, 6, 8, 0],
                    [9, 9, 9, 9, 9, 0]], dtype=np.float32)


def test_cutoff_stage_along_the_roads(tmp_path, capsys):
    dem = write_raster(tmp_path / "village.tif", VILLAGE)
    mask = np.zeros(VILLAGE.shape, np.uint8)
    mask[:, 5] = 1
    outlets = write_raster(tmp_path / "river.tif", mask)
    y = NORTH - 1.5
    refuge = write_json(tmp_path / "refuge.geojson", {"type": "FeatureCollection", "crs": UTM,
        "features": [{"type": "Feature", "properties": {"name": "rest centre"},
                      "geometry": {"type": "Point", "coordinates": [WEST + 0.5, y]}}]})
    roads = write_json(tmp_path / "roads.geojson", {"type": "FeatureCollection", "crs": UTM,
        "features": [{"type": "Feature", "properties": {},
                      "geometry": {"type": "LineString",
                                   "coordinates": [[WEST + 0.5, y], [WEST + 4.5, y]]}}]})
    out = tmp_path / "out"
    assert main(["analyse", str(dem), "--outlet", str(outlets), "--refuge", str(refuge),
                 "--roads", str(roads), "--out", str(out), "-q"]) == 0
    assert "Cut-off stage" in capsys.readouterr().out
    cut = read(out / "cutoff_stage.tif")
    # Along the road (row 1): refuge 9, then min(7, 9) = 7, then the hollow 3 for
    # everything beyond it; off the road NaN.
    assert cut[1, :5].tolist() == [9, 7, 3, 3, 3] and np.isnan(cut[0]).all()
    summary = json.loads((out / "summary.json").read_text())
    assert summary["cutoff"]["road_cells"] == 5 and "cutoff_stage.tif" in summary["files"]
    assert main(["analyse", str(dem), "--roads", str(roads), "--out", str(tmp_path / "x")]) != 0
    assert "refuges" in capsys.readouterr().err
    # At level 4 the hollow (onset 3) is under water; the road beyond it (onset 6)
    # and the village (onset 8) are dry but cut off: island window 3 <= h < 8.
    assets = write_json(tmp_path / "assets.geojson", {"type": "FeatureCollection", "crs": UTM,
        "features": [{"type": "Feature", "properties": {"name": "Mound Farm"},
                      "geometry": {"type": "Point", "coordinates": [WEST + 4.5, y]}}]})
    staged = tmp_path / "staged"
    assert main(["stage", str(out), "--level", "4", "--assets", str(assets), "--out", str(staged),
                 "-q"]) == 0
    ground = read(staged / "cut_off_4.00m.tif")
    assert ground[1].tolist() == [0, 0, 0, 1, 1, 255] and (ground[0] == 255).all()
    outline = json.loads((staged / "cut_off_4.00m.geojson").read_text())
    assert outline["area_m2"] == 2.0 and outline["caution"] == SCREENING_CAUTION
    rows = [line for line in (staged / "assets_4.00m.csv").read_text().splitlines()
            if not line.startswith("#")]
    farm = next(csv.DictReader(rows))
    figures = [float(farm[k]) for k in ("cutoff_stage_m", "island_from_m", "island_to_m",
                                        "cut_at_x_m", "cut_at_y_m")]
    assert figures == [3, 3, 8, WEST + 2.5, y] and farm["island_now"] == "true"


def test_tiled_onset_offset_equals_in_memory(tmp_path):
    rng = np.random.default_rng(7)
    rows, cols = 37, 45
    z = (np.add.outer(np.linspace(0, 3, rows), np.linspace(6, 0, cols))
         + rng.normal(0, 0.4, (rows, cols))).astype(np.float32)
    z[rng.random(z.shape) < 0.03] = -9999
    dem_path = write_raster(tmp_path / "terrain.tif", z, nodata=-9999)
    profile = river(tmp_path / "river.geojson", cols=cols, levels=(6.0, 1.5), y_row=3)
    memory = analyse(read_dem(dem_path), ("edge",), tmp_path / "memory", profile=profile)
    tiled = analyse(dem_path, ("edge",), tmp_path / "tiled", profile=profile, tile_size=16,
                    store="files", executor=SerialExecutor())
    assert tiled.tiles > 4
    for name in ("onset_offset.tif", "profile_level.tif", "onset_stage.tif"):
        a, b = read(tmp_path / "memory" / name), read(tmp_path / "tiled" / name)
        assert np.array_equal(a, b, equal_nan=True), name
    # The line runs along row 3's centres: it seeds that row's cells with data.
    assert memory.reach.profile["centreline_cells"] == int(np.count_nonzero(z[3] != -9999))


def test_tiled_cutoff_stage_equals_in_memory(tmp_path):
    # The widest-route flood on tiles (the folder's onset stage read by windows,
    # the refuges and roads burned per window) gives the in-memory raster.
    rng = np.random.default_rng(11)
    rows, cols = 41, 47
    z = (np.add.outer(np.linspace(0, 4, rows), np.linspace(5, 0, cols))
         + rng.normal(0, 0.5, (rows, cols))).astype(np.float32)
    z[rng.random(z.shape) < 0.04] = -9999
    dem_path = write_raster(tmp_path / "terrain.tif", z, nodata=-9999)
    refuge = write_json(tmp_path / "r.geojson", {"type": "FeatureCollection", "crs": UTM,
        "features": [{"type": "Feature", "properties": {}, "geometry": {"type": "Polygon",
            "coordinates": [[[WEST + 1, NORTH - 38], [WEST + 6, NORTH - 38], [WEST + 6, NORTH - 33],
                             [WEST + 1, NORTH - 33], [WEST + 1, NORTH - 38]]]}}]})
    roads = write_json(tmp_path / "roads.geojson", {"type": "FeatureCollection", "crs": UTM,
        "features": [{"type": "Feature", "properties": {}, "geometry": {"type": "LineString",
            "coordinates": [[WEST + 3, NORTH - 35], [WEST + 40, NORTH - 5], [WEST + 44, NORTH - 30]]}}]})
    for label, kwargs in (("all", {}), ("roads", {"roads": roads})):
        memory = tmp_path / f"memory_{label}"
        tiled = tmp_path / f"tiled_{label}"
        analyse(read_dem(dem_path), ("edge",), memory, refuges=refuge, **kwargs)
        run = analyse(dem_path, ("edge",), tiled, refuges=refuge, tile_size=16, store="files",
                      executor=SerialExecutor(), **kwargs)
        assert run.tiles > 4
        a, b = read(memory / "cutoff_stage.tif"), read(tiled / "cutoff_stage.tif")
        assert np.array_equal(a, b, equal_nan=True), label
        assert np.isfinite(a).any() and np.isnan(a).any() == bool(kwargs or (z == -9999).any())


def test_a_profile_takes_barriers_by_tiles_as_in_memory_and_refuses_culverts(tmp_path):
    # A barrier across the terrain (crest 9, above every cell) changes the ground the
    # offset is measured on: tiled and in-memory offsets agree with it in place, and
    # the cells under it read the crest. A culvert has an invert level, no height
    # above the profile: both engines refuse it with a profile, writing nothing.
    rng = np.random.default_rng(11)
    rows, cols = 30, 40
    z = (np.add.outer(np.linspace(0, 3, rows), np.linspace(6, 0, cols))
         + rng.normal(0, 0.4, (rows, cols))).astype(np.float32)
    dem_path = write_raster(tmp_path / "terrain.tif", z)
    profile = river(tmp_path / "river.geojson", cols=cols, levels=(6.0, 1.5), y_row=3)
    x = WEST + 20.5
    wall = {"type": "Feature", "properties": {"kind": "barrier", "crest": 9.0},
            "geometry": {"type": "LineString",
                         "coordinates": [[x, NORTH - 8.5], [x, NORTH - 27.5]]}}
    edits = {"type": "FeatureCollection", "crs": UTM, "features": [wall]}
    analyse(read_dem(dem_path), ("edge",), tmp_path / "memory", profile=profile, edits=edits)
    analyse(dem_path, ("edge",), tmp_path / "tiled", profile=profile, edits=edits,
            tile_size=16, store="files", executor=SerialExecutor())
    for name in ("onset_offset.tif", "onset_stage.tif"):
        a, b = read(tmp_path / "memory" / name), read(tmp_path / "tiled" / name)
        assert np.array_equal(a, b, equal_nan=True), name
    stage = read(tmp_path / "memory" / "onset_stage.tif")
    assert np.all(stage[8:28, 20] == 9.0)  # the wall's cells: reached over their crest
    culvert = {"type": "Feature", "properties": {"kind": "culvert", "invert": 2.0},
               "geometry": {"type": "LineString",
                            "coordinates": [[WEST + 2.5, NORTH - 10.5], [WEST + 30.5, NORTH - 10.5]]}}
    for where, source in (("memory2", read_dem(dem_path)), ("tiled2", dem_path)):
        with pytest.raises(Exception, match="does not take culverts"):
            analyse(source, ("edge",), tmp_path / where, profile=profile,
                    edits={**edits, "features": [wall, culvert]},
                    **({} if where == "memory2" else {"tile_size": 16, "store": "files",
                                                      "executor": SerialExecutor()}))
        assert not any((tmp_path / where).glob("*.tif"))
