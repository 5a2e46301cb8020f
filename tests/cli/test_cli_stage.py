"""Tests for ``sillmark stage``: from a DEM and from an analysis folder, output, errors."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
import rasterio

from sillmark import SCREENING_CAUTION
from sillmark.products.stage import water_level_map
from tests.cli.test_cli import SITE, assert_one_line_error, run_cli, write_dem

#: Files of one level, with {h} the level's label.
LEVEL_FILES = ("depth_{h}.tif", "water_state_{h}.tif", "flood_extent_{h}.geojson",
               "shielded_{h}.geojson", "depressions_at_{h}.csv")


def level_files(label: str) -> list[str]:
    return [name.format(h=label) for name in LEVEL_FILES]


@pytest.fixture
def dem_tif(tmp_path: Path) -> Path:
    """10 × 12 invented site: ground at 6 m, the edge at 4 m, a 3 × 4 basin at 2 m
    and a 2 × 2 hollow at 5 m, one nodata cell.

    At 4.5 m the edge (40 cells of 25 m²) floods 0.5 m deep; the basin (12
    cells, 2.5 m below the level) is shielded; the 5 m hollow stays dry.
    """
    z = np.full((10, 12), 6.0, dtype=np.float32)
    z[0, :] = z[-1, :] = z[:, 0] = z[:, -1] = 4.0
    z[3:6, 3:7] = 2.0
    z[6:8, 8:10] = 5.0
    z[8, 9] = -9999.0
    return write_dem(tmp_path / "site.tif", z)


@pytest.fixture
def analysed(capsys, dem_tif, tmp_path) -> Path:
    out = tmp_path / "analysis"
    code, _, _ = run_cli(capsys, "analyse", str(dem_tif), "--out", str(out))
    assert code == 0
    return out


def names_in(folder: Path) -> list[str]:
    return sorted(p.name for p in folder.iterdir())


# --------------------------------------------------------------------------- help


def test_stage_help(capsys):
    code, out, err = run_cli(capsys, "stage", "--help")
    assert code == 0 and err == ""
    assert out.startswith("usage: sillmark stage")
    for option in ("SOURCE", "--level", "--table-step", "--table-from", "--table-to", "--out",
                   "--outlet", "--connectivity", "--vertical-unit", "--crs", "--force"):
        assert option in out
    assert "depth_47.60m.tif" in out and "Screening analysis only" in out


def test_stage_is_listed_in_the_main_help(capsys):
    code, out, _ = run_cli(capsys, "--help")
    assert code == 0 and "stage" in out and "analyse" in out


# --------------------------------------------------------------------------- runs


def test_stage_on_a_dem_writes_the_files_and_reports_with_units(capsys, dem_tif, tmp_path):
    out_dir = tmp_path / "stage"
    code, out, err = run_cli(capsys, "stage", str(dem_tif), "--level", "4.5", "--level", "6",
                             "--table-step", "0.5", "--out", str(out_dir))
    assert code == 0, err
    assert err == ""
    assert names_in(out_dir) == sorted(level_files("4.50m") + level_files("6.00m")
                                       + ["stage_table.csv", "README.txt"])
    lines = out.splitlines()
    assert lines[0].startswith("Site: site.tif")
    # 4.5 m: 40 edge cells of 25 m² = 1000 m², 0.5 m deep = 500 m³; the basin is
    # shielded: 12 cells = 300 m², 2.5 m below the level = 750 m³.
    block = out[out.index("Water level 4.50 m:"):out.index("Water level 6.00 m:")]
    assert "Flooded: 0.10 ha (1,000 m" in block and "volume 500.0 m" in block
    assert "Shielded low ground: 0.03 ha (300 m" in block and "750.0 m" in block
    assert "Depressions: 0 overtopped, 1 cut off below the level, 1 dry (of 2)" in block
    assert "depth_4.50m.tif" in block
    assert "Depressions: 2 overtopped, 0 cut off below the level, 0 dry (of 2)" in out
    assert "Stage table:" in out and "stage_table.csv" in out
    assert f"Results: 11 files in {out_dir}" in out
    assert SCREENING_CAUTION in out


def test_stage_from_an_analysis_folder_gives_identical_files(capsys, dem_tif, analysed, tmp_path):
    argv = ["--level", "4.5", "--level", "-1", "--level", "5.25", "--table-step", "0.25"]
    assert run_cli(capsys, "stage", str(dem_tif), *argv, "--out", str(tmp_path / "a"))[0] == 0
    code, out, err = run_cli(capsys, "stage", str(analysed), *argv, "--out", str(tmp_path / "b"))
    assert code == 0, err
    assert f"Analysis: {analysed}" in out
    assert names_in(tmp_path / "a") == names_in(tmp_path / "b")
    assert len(names_in(tmp_path / "a")) == 17  # README.txt too: no path nor time in it
    for name in names_in(tmp_path / "a"):
        assert (tmp_path / "a" / name).read_bytes() == (tmp_path / "b" / name).read_bytes(), name


def test_folder_with_file_outlets_and_four_neighbours_gives_identical_files(capsys, tmp_path):
    # Outlets from a mask raster (only its name is kept in summary.json) and
    # 4-connectivity: the folder's flood tree and summary carry both.
    z = np.full((9, 9), 6.0, dtype=np.float32)
    z[2:5, 2:5] = 3.0
    z[5, 5] = 2.0  # touches the basin only at a corner: separate with 4 neighbours
    z[6:8, 1:3] = 1.0
    dem = write_dem(tmp_path / "site.tif", z)
    mask = np.zeros((9, 9), np.uint8)
    mask[7, 1] = 1  # a pond as the only outlet
    with rasterio.open(tmp_path / "pond.tif", "w", driver="GTiff", width=9, height=9, count=1,
                       dtype="uint8", crs="EPSG:32633", transform=SITE) as ds:
        ds.write(mask, 1)
    site = ["--outlet", str(tmp_path / "pond.tif"), "--connectivity", "4"]
    assert run_cli(capsys, "analyse", str(dem), *site, "--out", str(tmp_path / "an"))[0] == 0
    levels = ["--level", "2.5", "--level", "6", "--table-step", "1"]
    assert run_cli(capsys, "stage", str(dem), *site, *levels, "--out", str(tmp_path / "a"))[0] == 0
    code, out, err = run_cli(capsys, "stage", str(tmp_path / "an"), *levels, "--out", str(tmp_path / "b"))
    assert code == 0, err
    assert "Outlets: pond.tif (1 cells); connectivity 4" in out
    for name in names_in(tmp_path / "a"):
        assert (tmp_path / "a" / name).read_bytes() == (tmp_path / "b" / name).read_bytes(), name


def test_rasters_hold_the_water_level_map(capsys, dem_tif, tmp_path):
    from sillmark.grid.dem import read_dem
    from sillmark.engine.flood import analyse_site
    from sillmark.grid.outlets import build_outlets

    assert run_cli(capsys, "stage", str(dem_tif), "--level", "4.5", "--out", str(tmp_path / "s"))[0] == 0
    dem = read_dem(dem_tif)
    result = analyse_site(dem, build_outlets(dem, ("edge",)))
    m = water_level_map(result, 4.5, row_areas=dem.row_areas)
    with rasterio.open(tmp_path / "s" / "depth_4.50m.tif") as ds:
        np.testing.assert_array_equal(ds.read(1), m.depth)
    with rasterio.open(tmp_path / "s" / "water_state_4.50m.tif") as ds:
        np.testing.assert_array_equal(ds.read(1), m.state)


def test_negative_level_and_table_only(capsys, dem_tif, tmp_path):
    code, out, _ = run_cli(capsys, "stage", str(dem_tif), "--table-step", "1", "--table-from", "-1",
                           "--table-to", "6", "--out", str(tmp_path / "t"))
    assert code == 0
    assert names_in(tmp_path / "t") == ["README.txt", "stage_table.csv"]
    assert "8 levels from -1.00 m to 6.00 m" in out
    code, out, _ = run_cli(capsys, "stage", str(dem_tif), "--level", "-1.5", "--out", str(tmp_path / "n"))
    assert code == 0
    assert "depth_-1.50m.tif" in names_in(tmp_path / "n")


def test_level_below_every_cell_is_a_note_and_still_writes(capsys, dem_tif, tmp_path):
    code, out, err = run_cli(capsys, "stage", str(dem_tif), "--level", "3", "--out", str(tmp_path / "s"))
    assert code == 0 and err == ""
    assert "Note: nothing floods at 3.00 m: the lowest onset stage is 4.00 m" in out
    assert names_in(tmp_path / "s") == sorted(level_files("3.00m") + ["README.txt"])
    doc = json.loads((tmp_path / "s" / "flood_extent_3.00m.geojson").read_text())
    assert doc["features"] == [] and doc["area_m2"] == 0
    # The basin (2 m) is below 3 m but cut off: shielded.
    assert json.loads((tmp_path / "s" / "shielded_3.00m.geojson").read_text())["area_m2"] == 300


def test_feet_site_reports_acre_feet_and_names_files_in_feet(capsys, tmp_path):
    z = np.full((10, 12), 6.0, dtype=np.float32)
    z[0, :] = z[-1, :] = z[:, 0] = z[:, -1] = 4.0
    z[3:6, 3:7] = 2.0
    dem = write_dem(tmp_path / "feet.tif", z)
    code, out, _ = run_cli(capsys, "stage", str(dem), "--vertical-unit", "ft", "--level", "4.5",
                           "--out", str(tmp_path / "s"))
    assert code == 0
    assert "Water level 4.50 ft:" in out and "acre-ft" in out
    assert "depth_4.50ft.tif" in names_in(tmp_path / "s")


# --------------------------------------------------------------------------- errors


@pytest.mark.parametrize("value", ["nan", "NaN", "inf", "-inf", "high", "4,5", "1e39"])
def test_a_level_that_is_not_a_number(capsys, dem_tif, tmp_path, value):
    code, out, err = run_cli(capsys, "stage", str(dem_tif), f"--level={value}", "--out", str(tmp_path / "s"))
    assert_one_line_error(code, out, err, "--level")
    assert not (tmp_path / "s").exists()


@pytest.mark.parametrize("value", ["0", "-0.5", "nan"])
def test_a_table_step_that_is_not_positive(capsys, dem_tif, tmp_path, value):
    code, out, err = run_cli(capsys, "stage", str(dem_tif), f"--table-step={value}", "--out", str(tmp_path / "s"))
    assert_one_line_error(code, out, err, "--table-step")


def test_more_than_fifty_levels(capsys, dem_tif, tmp_path):
    argv = [arg for k in range(51) for arg in ("--level", str(4 + k / 100))]
    code, out, err = run_cli(capsys, "stage", str(dem_tif), *argv, "--out", str(tmp_path / "s"))
    assert_one_line_error(code, out, err, "51 water levels", "at most 50")
    assert not (tmp_path / "s").exists()
    assert run_cli(capsys, "stage", str(dem_tif), *argv[:100], "--out", str(tmp_path / "s"))[0] == 0


def test_a_level_that_looks_like_the_wrong_unit(capsys, dem_tif, tmp_path):
    # Elevations 2..6 m: range 4 m, so the limit is 6 + 10 × 4 = 46 m. 150 (feet,
    # say) is refused; 45 is allowed.
    code, out, err = run_cli(capsys, "stage", str(dem_tif), "--level", "150", "--out", str(tmp_path / "s"))
    assert_one_line_error(code, out, err, "150.00 m", "wrong unit", "metres", "--force")
    assert not (tmp_path / "s").exists()
    code, out, err = run_cli(capsys, "stage", str(dem_tif), "--level", "150", "--force",
                             "--out", str(tmp_path / "s"))
    assert code == 0 and "Water level 150.00 m:" in out
    assert "Note: 150.00 m is above the highest ground (6.00 m)" in out and "wrong unit?" in out
    code, out, _ = run_cli(capsys, "stage", str(dem_tif), "--level", "45", "--level", "7",
                           "--out", str(tmp_path / "t"))
    assert code == 0
    assert "Note: 7.00 m is above the highest ground (6.00 m): every cell an outlet reaches floods\n" in out


def test_a_table_range_that_looks_like_the_wrong_unit(capsys, dem_tif, tmp_path):
    code, out, err = run_cli(capsys, "stage", str(dem_tif), "--table-step", "1", "--table-to", "500",
                             "--out", str(tmp_path / "s"))
    assert_one_line_error(code, out, err, "--table-to", "wrong unit")


def test_nothing_asked_for(capsys, dem_tif, tmp_path):
    code, out, err = run_cli(capsys, "stage", str(dem_tif), "--out", str(tmp_path / "s"))
    assert_one_line_error(code, out, err, "--level", "--table-step")
    code, out, err = run_cli(capsys, "stage", str(dem_tif), "--level", "5", "--table-from", "4",
                             "--out", str(tmp_path / "s"))
    assert_one_line_error(code, out, err, "--table-from", "--table-step")


def test_missing_out_and_missing_source(capsys, dem_tif, tmp_path):
    assert_one_line_error(*run_cli(capsys, "stage", str(dem_tif), "--level", "5"), "--out")
    code, out, err = run_cli(capsys, "stage", str(tmp_path / "nowhere.tif"), "--level", "5",
                             "--out", str(tmp_path / "s"))
    assert_one_line_error(code, out, err, "nowhere.tif", "does not exist")


def test_folder_without_a_summary(capsys, tmp_path):
    (tmp_path / "empty").mkdir()
    code, out, err = run_cli(capsys, "stage", str(tmp_path / "empty"), "--level", "5",
                             "--out", str(tmp_path / "s"))
    assert_one_line_error(code, out, err, "no summary.json")


def test_folder_with_dem_options(capsys, analysed, tmp_path):
    code, out, err = run_cli(capsys, "stage", str(analysed), "--level", "5", "--connectivity", "4",
                             "--outlet", "nodata", "--out", str(tmp_path / "s"))
    assert_one_line_error(code, out, err, "--outlet, --connectivity", "only when SOURCE is a DEM")


def test_folder_whose_dem_changed(capsys, dem_tif, analysed, tmp_path):
    with rasterio.open(dem_tif, "r+") as ds:
        z = ds.read(1)
        z[4, 4] = 5.5  # a mound in the basin: the onset stage stays, the ground does not
        z[4, 10] = 1.0  # a new hollow: the onset stage changes
        ds.write(z, 1)
    code, out, err = run_cli(capsys, "stage", str(analysed), "--level", "5", "--out", str(tmp_path / "s"))
    assert_one_line_error(code, out, err, "changed after the analysis", "sillmark analyse")
    assert not (tmp_path / "s").exists()


def test_folder_whose_dem_is_gone(capsys, dem_tif, analysed, tmp_path):
    dem_tif.unlink()
    code, out, err = run_cli(capsys, "stage", str(analysed), "--level", "5", "--out", str(tmp_path / "s"))
    assert_one_line_error(code, out, err, "not found", "give the DEM file as SOURCE")


def test_folder_with_a_damaged_summary(capsys, analysed, tmp_path):
    (analysed / "summary.json").write_text("{not json")
    code, out, err = run_cli(capsys, "stage", str(analysed), "--level", "5", "--out", str(tmp_path / "s"))
    assert_one_line_error(code, out, err, "summary.json", "sillmark analyse")


def test_analyse_records_the_dem_path_so_other_folders_can_use_it(capsys, dem_tif, tmp_path, monkeypatch):
    monkeypatch.chdir(dem_tif.parent)
    assert run_cli(capsys, "analyse", dem_tif.name, "--out", str(tmp_path / "an"))[0] == 0
    summary = json.loads((tmp_path / "an" / "summary.json").read_text())
    assert summary["dem"] == str(dem_tif)
    monkeypatch.chdir(tmp_path / "an")
    code, _, err = run_cli(capsys, "stage", ".", "--level", "5", "--out", str(tmp_path / "s"))
    assert code == 0, err
