"""``sillmark analyse --edits``: the edits in place, reported, and recorded in summary.json."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import rasterio

from tests.cli.test_cli import assert_one_line_error, run_cli, write_dem

UTM = {"type": "name", "properties": {"name": "EPSG:32633"}}


def centre(row: int, col: int) -> list[float]:
    """Centre of a cell of the 5 m test grid (tests/cli/test_cli.py: SITE)."""
    return [500_000.0 + 5 * col + 2.5, 5_000_000.0 - 5 * row - 2.5]


def basin(tmp_path: Path) -> Path:
    # 8 x 8 cells: ground at 6 m, the edge ring at 4 m (the outlets), a basin
    # of 3 x 3 cells at 2 m in rows 3-5, columns 3-5. Without edits the basin
    # fills to 6 m (it spills over the ground into the edge ring).
    z = np.full((8, 8), 6.0, dtype=np.float32)
    z[0, :] = z[-1, :] = z[:, 0] = z[:, -1] = 4.0
    z[3:6, 3:6] = 2.0
    return write_dem(tmp_path / "basin.tif", z)


def write_edits(tmp_path: Path, *features) -> Path:
    path = tmp_path / "edits.geojson"
    path.write_text(json.dumps({"type": "FeatureCollection", "crs": UTM,
                                "features": list(features)}))
    return path


def onset(folder: Path) -> np.ndarray:
    with rasterio.open(folder / "onset_stage.tif") as ds:
        return ds.read(1)


def test_analyse_with_a_culvert_and_a_barrier_reports_and_records_them(tmp_path, capsys):
    dem = basin(tmp_path)
    edits = write_edits(
        tmp_path,
        # Culvert from the basin cell (4, 4) to the edge cell (4, 0), invert 3 m:
        # the basin is reached at max(4 (edge ground), 3, 2) = 4 m.
        {"type": "Feature", "properties": {"kind": "culvert", "invert": 3.0, "name": "C1"},
         "geometry": {"type": "LineString", "coordinates": [centre(4, 4), centre(4, 0)]}},
        # A 7 m barrier along row 1 from column 1 to column 6: six cells at 6 m
        # raised to 7 m; nothing else changes, the basin drains by the culvert.
        {"type": "Feature", "properties": {"kind": "barrier", "crest": 7.0, "name": "wall"},
         "geometry": {"type": "LineString", "coordinates": [centre(1, 1), centre(1, 6)]}},
    )
    code, out, err = run_cli(capsys, "analyse", str(dem), "--out", str(tmp_path / "base"))
    assert code == 0
    assert np.all(onset(tmp_path / "base")[3:6, 3:6] == 6.0)

    code, out, err = run_cli(capsys, "analyse", str(dem), "--edits", str(edits),
                             "--out", str(tmp_path / "edited"))
    assert code == 0, err
    s = onset(tmp_path / "edited")
    assert np.all(s[3:6, 3:6] == 4.0)
    assert np.all(s[1, 1:7] == 7.0)
    assert "Edits: 2 from the GeoJSON 'edits.geojson'" in out
    assert "feature 0 (culvert 'C1'): invert 3.00 m, datum not stated" in out
    assert "feature 1 (barrier 'wall'): crest 7.00 m, datum not stated, 25.0 m long; " \
           "6 cells touched, 6 of them raised to the crest" in out
    summary = json.loads((tmp_path / "edited" / "summary.json").read_text())
    features = summary["edits"]["features"]
    assert [f["kind"] for f in features] == ["culvert", "barrier"]
    assert features[0]["invert"] == 3.0 and features[0]["one_way"] is False
    assert features[1]["cells_changed"] == 6
    assert summary["caution"]
    with rasterio.open(dem) as ds:  # the DEM file itself is untouched
        assert ds.read(1)[1, 1] == 6.0


def test_a_bad_edit_stops_the_command_with_one_line_naming_it(tmp_path, capsys):
    dem = basin(tmp_path)
    edits = write_edits(
        tmp_path,
        {"type": "Feature", "properties": {"kind": "sluice", "name": "gate"},
         "geometry": {"type": "LineString", "coordinates": [centre(4, 4), centre(4, 0)]}})
    code, out, err = run_cli(capsys, "analyse", str(dem), "--edits", str(edits),
                             "--out", str(tmp_path / "out"))
    assert_one_line_error(code, out, err, "feature 0 ('gate') has kind 'sluice'",
                          "culvert, barrier, breach")
    assert not (tmp_path / "out" / "summary.json").exists()


def test_a_dem_read_by_tiles_takes_culverts_across_tile_edges(tmp_path):
    # The same culvert on the DEM file read in tiles of 3 x 3 cells (the basin
    # cell (4, 4) and the edge cell (4, 0) lie in different tiles) gives the
    # in-memory onset stage.
    from sillmark.engine.executors import SerialExecutor
    from sillmark.grid.dem import read_dem
    from sillmark.run import analyse

    dem = basin(tmp_path)
    culvert = {"type": "Feature", "properties": {"kind": "culvert", "invert": 3.0},
               "geometry": {"type": "LineString", "coordinates": [centre(4, 4), centre(4, 0)]}}
    edits = write_edits(tmp_path, culvert)
    whole = analyse(read_dem(dem), ["edge"], tmp_path / "whole", edits=edits)
    tiled = analyse(str(dem), ["edge"], tmp_path / "tiled", edits=edits, tile_size=3,
                    executor=SerialExecutor())
    assert tiled.tiles == 9
    assert np.array_equal(onset(tmp_path / "tiled"), whole.result.onset_stage, equal_nan=True)
    assert np.all(whole.result.onset_stage[3:6, 3:6] == 4.0)
    summary = json.loads((tmp_path / "tiled" / "summary.json").read_text())
    assert summary["edits"]["features"][0]["kind"] == "culvert"


def test_a_dem_read_by_tiles_takes_barriers_and_breaches_across_tile_edges(tmp_path):
    # Tiles of 3 x 3 cells: tile edges after rows 2 and 5 and after columns 2
    # and 5. Worked by hand on the basin DEM:
    # - a 7 m barrier along row 1, columns 1-6, crossing the column edges:
    #   six 6 m cells raised to 7 m, whose onset stage is then 7 m;
    # - a breach at 2 m along row 4 from the basin cell (4, 4) to the edge cell
    #   (4, 0), crossing the column edge after column 2: (4, 0) at 4 m and
    #   (4, 1), (4, 2) at 6 m are lowered (3 cells); (4, 3), (4, 4) are at 2 m
    #   already. The basin now drains down the cut to the edge outlet at 2 m:
    #   its onset stage is 2 m, its fill depth 0 (without the edits: 6 m and 4 m).
    from sillmark.engine.executors import SerialExecutor
    from sillmark.grid.dem import read_dem
    from sillmark.io.results_folder import open_result_folder
    from sillmark.run import analyse

    dem = basin(tmp_path)
    edits = write_edits(
        tmp_path,
        {"type": "Feature", "properties": {"kind": "barrier", "crest": 7.0},
         "geometry": {"type": "LineString", "coordinates": [centre(1, 1), centre(1, 6)]}},
        {"type": "Feature", "properties": {"kind": "breach", "level": 2.0},
         "geometry": {"type": "LineString", "coordinates": [centre(4, 4), centre(4, 0)]}},
    )
    whole = analyse(read_dem(dem), ["edge"], tmp_path / "whole", edits=edits)
    tiled = analyse(str(dem), ["edge"], tmp_path / "tiled", edits=edits, tile_size=3,
                    executor=SerialExecutor())
    assert tiled.tiles == 9
    s = onset(tmp_path / "tiled")
    assert np.array_equal(s, whole.result.onset_stage, equal_nan=True)
    assert np.all(s[3:6, 3:6] == 2.0) and np.all(s[1, 1:7] == 7.0)
    with rasterio.open(tmp_path / "tiled" / "fill_depth.tif") as ds:
        fill = ds.read(1)
    assert np.array_equal(fill, whole.result.fill_depth, equal_nan=True)
    assert np.all(fill[3:6, 3:6] == 0.0)
    assert tiled.edit_changes == whole.edit_changes == [6, 3]
    summary = json.loads((tmp_path / "tiled" / "summary.json").read_text())
    assert [f["cells_changed"] for f in summary["edits"]["features"]] == [6, 3]
    assert "edits_input.geojson" in summary["files"]
    # Reopening the folder reads the DEM again with the kept edits in place:
    # onset minus edited ground is the stored fill depth in every cell.
    folder = open_result_folder(tmp_path / "tiled")
    assert folder.grid.read_window(4, 5, 0, 3).tolist() == [[2.0, 2.0, 2.0]]
    with rasterio.open(dem) as ds:  # the DEM file itself is untouched
        assert ds.read(1)[4, 1] == 6.0 and ds.read(1)[1, 1] == 6.0


def test_stage_on_a_folder_re_applies_the_edits_kept_in_it(tmp_path, capsys):
    # The basin DEM with the culvert (basin onset 4 m) and the 7 m wall along
    # row 1, columns 1-6. At a water level of 6.5 m, worked by hand:
    # - the basin cells (2 m) are flooded through the culvert (onset 4 m <= 6.5),
    #   3 x 3 = 9 cells at depth 6.5 - 2 = 4.5 m; without the culvert they are
    #   flooded too (onset 6 m), so the culvert alone would not show here;
    # - the wall cells (7 m after the edit) stay dry: 6 cells of state 1. On the
    #   bare DEM they are 6 m ground reached from the edge at 6 m, so flooded.
    # At 5 m the basin is flooded with the culvert (state 2, depth 3 m) but only
    # shielded on the bare DEM (state 3: below the level, onset 6 m).
    dem = basin(tmp_path)
    edits = write_edits(
        tmp_path,
        {"type": "Feature", "properties": {"kind": "culvert", "invert": 3.0},
         "geometry": {"type": "LineString", "coordinates": [centre(4, 4), centre(4, 0)]}},
        {"type": "Feature", "properties": {"kind": "barrier", "crest": 7.0},
         "geometry": {"type": "LineString", "coordinates": [centre(1, 1), centre(1, 6)]}},
    )
    folder = tmp_path / "edited"
    code, _, err = run_cli(capsys, "analyse", str(dem), "--edits", str(edits), "--out", str(folder))
    assert code == 0, err
    edits.unlink()  # the folder's own copy is what counts from here on
    summary = json.loads((folder / "summary.json").read_text())
    assert "edits_input.geojson" in summary["files"]
    assert summary["edits"]["file"] == "edits_input.geojson"
    assert "edits_input.geojson" in (folder / "README.txt").read_text()

    code, out, err = run_cli(capsys, "stage", str(folder), "--level", "5", "--level", "6.5",
                             "--out", str(tmp_path / "stage"))
    assert code == 0, err
    assert "with its edits" in out
    with rasterio.open(tmp_path / "stage" / "water_state_5.00m.tif") as ds:
        state5 = ds.read(1)
    with rasterio.open(tmp_path / "stage" / "depth_5.00m.tif") as ds:
        depth5 = ds.read(1)
    with rasterio.open(tmp_path / "stage" / "water_state_6.50m.tif") as ds:
        state65 = ds.read(1)
    assert np.all(state5[3:6, 3:6] == 2) and np.allclose(depth5[3:6, 3:6], 3.0)
    assert np.all(state65[1, 1:7] == 1)
    assert np.all(state65[2, 1:7] == 2)

    # The same folder without its copy of the edits: one line saying so.
    (folder / "edits_input.geojson").unlink()
    code, out, err = run_cli(capsys, "stage", str(folder), "--level", "5",
                             "--out", str(tmp_path / "stage2"))
    assert_one_line_error(code, out, err, "was made with edits", "edits_input.geojson")
