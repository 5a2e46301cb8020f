"""Tests for ``sillmark stage --assets`` and ``--raise-sill``: printed figures, files, errors."""

from __future__ import annotations

import csv
import json
from pathlib import Path

import numpy as np
import pytest

from sillmark import SCREENING_CAUTION
from tests.cli.test_cli import assert_one_line_error, run_cli, write_dem

# The grid of tests.cli.test_cli: 5 m cells, north-west corner at (500000, 5000000),
# so the centre of cell (row, col) is x = 500002.5 + 5 col, y = 4999997.5 - 5 row.


def centre(row: int, col: int) -> tuple[float, float]:
    return 500_002.5 + 5.0 * col, 4_999_997.5 - 5.0 * row


#: Cells of the ridge's two gaps.
HIGH_GAP = (2, 5)
LOW_GAP = (6, 5)


@pytest.fixture
def ridge_tif(tmp_path: Path) -> Path:
    """9 × 12 invented site behind a ridge with two gaps.

    - col 0: a river at 1 m along the west edge (edge outlets);
    - cols 1-4: a meadow at 2 m, open to the river, with a 5 m knoll at (4, 2);
    - col 5: a ridge at 6 m with a gap at 4 m (row 2) and a lower gap at 3 m (row 6);
    - cols 6-10: a basin at 2.5 m behind the ridge;
    - the other edges at 10 m.

    The basin's onset stage is the lower gap, 3 m: at 2.8 m it lies below the
    water but is cut off (shielded); the meadow is flooded 0.8 m deep.
    """
    z = np.full((9, 12), 10.0, dtype=np.float32)
    z[:, 0] = 1.0
    z[1:8, 1:5] = 2.0
    z[4, 2] = 5.0
    z[1:8, 5] = 6.0
    z[HIGH_GAP] = 4.0
    z[LOW_GAP] = 3.0
    z[1:8, 6:11] = 2.5
    return write_dem(tmp_path / "ridge.tif", z)


def write_assets(path: Path, rows: list[tuple[str, str, float, float]]) -> Path:
    lines = ["name,kind,x,y"] + [f"{n},{k},{x},{y}" for n, k, x, y in rows]
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


@pytest.fixture
def four_assets(tmp_path: Path) -> Path:
    """One asset flooded at 2.8 m, one shielded behind the ridge, one dry, one off the DEM."""
    return write_assets(tmp_path / "assets.csv", [
        ("Meadow pump", "pump", *centre(4, 3)),
        ("Basin school", "school", *centre(4, 8)),
        ("Knoll barn", "barn", *centre(4, 2)),
        ("Far depot", "depot", 600_000.0, 4_999_977.5),
    ])


def read_rows(path: Path) -> tuple[list[str], list[dict[str, str]]]:
    lines = path.read_text(encoding="utf-8").splitlines()
    comments = [line for line in lines if line.startswith("#")]
    return comments, list(csv.DictReader(line for line in lines if not line.startswith("#")))


# --------------------------------------------------------------------------- assets per level


def test_assets_are_counted_listed_and_written_per_level(capsys, ridge_tif, four_assets, tmp_path):
    out_dir = tmp_path / "stage"
    code, out, err = run_cli(capsys, "stage", str(ridge_tif), "--level", "2.8", "--level", "3.5",
                             "--assets", str(four_assets), "--out", str(out_dir))
    assert code == 0, err
    assert "Assets: 4 from 'assets.csv' (1 outside DEM: no figures)" in out
    low = out[out.index("Water level 2.80 m:"):out.index("Water level 3.50 m:")]
    assert "  Assets: 1 flooded, 1 shielded, 1 dry, 1 without figures (of 4)" in low
    assert "flooded: Meadow pump (pump): depth 0.80 m (ground 2.00 m)" in low
    x, y = centre(*LOW_GAP)
    assert ("next to flood: Basin school (school, shielded): onset stage 3.00 m, freeboard 0.20 m; "
            f"controlling sill 3.00 m at row 6, col 5 (x {x:.1f} m, y {y:.1f} m)") in low
    assert ("next to flood: Knoll barn (barn, dry): onset stage 5.00 m, freeboard 2.20 m; "
            "no sill, its own ground controls") in low
    assert "assets_2.80m.csv, assets_2.80m.geojson" in low
    # At 3.5 m the water is over the lower gap: the school floods 1 m deep.
    high = out[out.index("Water level 3.50 m:"):]
    assert "Assets: 2 flooded, 0 shielded, 1 dry, 1 without figures (of 4)" in high
    assert "flooded: Basin school (school): depth 1.00 m (ground 2.50 m)" in high
    assert "Results: 14 files" in out  # 5 + 2 per level

    comments, rows = read_rows(out_dir / "assets_2.80m.csv")
    assert comments == []  # the header first; the caution is in README.txt
    assert " ".join(SCREENING_CAUTION.split()) in " ".join((out_dir / "README.txt").read_text().split())
    assert [r["state"] for r in rows] == ["flooded", "shielded", "dry", ""]
    assert [r["status"] for r in rows] == ["ok", "ok", "ok", "outside DEM"]
    assert rows[1]["onset_stage_m"] == "3" and (rows[1]["sill_row"], rows[1]["sill_col"]) == ("6", "5")
    doc = json.loads((out_dir / "assets_2.80m.geojson").read_text(encoding="utf-8"))
    assert doc["caution"] == SCREENING_CAUTION
    kinds = [f["properties"]["feature_kind"] for f in doc["features"]]
    assert kinds.count("asset") == 4
    assert kinds.count("route") == 3 and kinds.count("controlling_sill") == 3
    assert all(f["properties"]["caution"] == SCREENING_CAUTION for f in doc["features"])


def test_asset_geojson_input_works_like_csv(capsys, ridge_tif, tmp_path):
    import pyproj

    to_lonlat = pyproj.Transformer.from_crs("EPSG:32633", "EPSG:4326", always_xy=True)
    lon, lat = to_lonlat.transform(*centre(4, 8))
    (tmp_path / "a.geojson").write_text(json.dumps({
        "type": "FeatureCollection",
        "features": [{"type": "Feature", "properties": {"name": "Basin school"},
                      "geometry": {"type": "Point", "coordinates": [lon, lat]}}],
    }))
    code, out, err = run_cli(capsys, "stage", str(ridge_tif), "--level", "2.8",
                             "--assets", str(tmp_path / "a.geojson"), "--out", str(tmp_path / "s"))
    assert code == 0, err
    assert "Assets: 0 flooded, 1 shielded, 0 dry (of 1)" in out


# --------------------------------------------------------------------------- raising sills


@pytest.fixture
def basin_assets(tmp_path: Path) -> Path:
    """Two assets in the basin behind the lower gap, and the pump on the open meadow."""
    return write_assets(tmp_path / "basin.csv", [
        ("Basin school", "school", *centre(4, 8)),
        ("Basin clinic", "clinic", *centre(2, 9)),
        ("Meadow pump", "pump", *centre(4, 3)),
    ])


def test_raising_the_lower_gap_lets_the_higher_one_control(capsys, monkeypatch, ridge_tif,
                                                           basin_assets, tmp_path):
    import sillmark.products.what_if

    floods = []
    original = sillmark.products.what_if.priority_flood

    def counted(*args, **kwargs):
        floods.append(1)
        return original(*args, **kwargs)

    monkeypatch.setattr(sillmark.products.what_if, "priority_flood", counted)
    out_dir = tmp_path / "s"
    code, out, err = run_cli(capsys, "stage", str(ridge_tif), "--level", "2.8", "--assets",
                             str(basin_assets), "--raise-sill", "2", "--out", str(out_dir))
    assert code == 0, err
    # Worked by hand: the basin is reached over the ridge (6 m), the high gap
    # (4 m) or the low gap (3 m); the onset stage is the lowest of those
    # bottlenecks, 3 m. Raising the low gap by 2 m makes it 5 m, so the best
    # way in is now the high gap: onset 4 m, a gain of 1 m (not the 2 m raised).
    assert len(floods) == 1  # both basin assets share the low gap: one recompute
    assert "What if each controlling sill were 2.00 m higher (what_if_raise_2.00m.csv):" in out
    assert "2 assets behind 1 distinct sill (1 recompute); passed over: 1 whose own ground controls" in out
    assert "raised from 3.00 to 5.00 m: 2 assets, onset stage 3.00 -> 4.00 m (gain 1.00 m)" in out
    x, y = centre(*HIGH_GAP)
    assert f"then water comes over the sill at row 2, col 5 (x {x:.1f} m, y {y:.1f} m) at 4.00 m" in out
    assert "Results: 8 files" in out

    comments, rows = read_rows(out_dir / "what_if_raise_2.00m.csv")
    assert comments == []
    readme = " ".join((out_dir / "README.txt").read_text().split())
    assert "1 asset(s) whose own ground is the controlling point" in readme
    assert [r["name"] for r in rows] == ["Basin school", "Basin clinic"]
    for r in rows:
        assert (r["onset_before_m"], r["onset_after_m"], r["gain_m"]) == ("3", "4", "1")
        assert (r["sill_before_row"], r["sill_before_col"], r["sill_before_elevation_m"]) == ("6", "5", "3")
        assert (r["sill_after_row"], r["sill_after_col"], r["sill_after_elevation_m"]) == ("2", "5", "4")
        assert (r["sill_before_x_m"], r["sill_before_y_m"]) == (str(centre(*LOW_GAP)[0]), str(centre(*LOW_GAP)[1]))
        assert r["raised_elevation_m"] == "5" and r["raised_cell_controls"] == "false"
        assert r["assets_behind_sill"] == "2"
        assert "now controls" in r["explanation"]


def test_a_small_raise_keeps_the_raised_gap_in_control(capsys, ridge_tif, basin_assets, tmp_path):
    # 3 m + 0.5 m = 3.5 m, still below the high gap (4 m): onset 3.5 m, the full 0.5 m gained.
    code, out, err = run_cli(capsys, "stage", str(ridge_tif), "--level", "2.8", "--assets",
                             str(basin_assets), "--raise-sill", "0.5", "--out", str(tmp_path / "s"))
    assert code == 0, err
    assert "onset stage 3.00 -> 3.50 m (gain 0.50 m)" in out
    assert "the raised cell still controls" in out
    _, rows = read_rows(tmp_path / "s" / "what_if_raise_0.50m.csv")
    assert [(r["onset_after_m"], r["gain_m"], r["raised_cell_controls"]) for r in rows] == [
        ("3.5", "0.5", "true"), ("3.5", "0.5", "true")]


def test_no_asset_behind_a_sill_writes_a_header_only_file(capsys, ridge_tif, tmp_path):
    meadow = write_assets(tmp_path / "m.csv", [("Meadow pump", "pump", *centre(4, 3))])
    code, out, err = run_cli(capsys, "stage", str(ridge_tif), "--level", "2.8", "--assets", str(meadow),
                             "--raise-sill", "1", "--out", str(tmp_path / "s"))
    assert code == 0, err
    assert "No asset stands behind a sill: nothing to raise" in out
    _, rows = read_rows(tmp_path / "s" / "what_if_raise_1.00m.csv")
    assert rows == []


# --------------------------------------------------------------------------- errors


def test_asset_file_without_coordinate_columns(capsys, ridge_tif, tmp_path):
    bad = tmp_path / "bad.csv"
    bad.write_text("label,east,north\nschool,500042.5,4999977.5\n")
    code, out, err = run_cli(capsys, "stage", str(ridge_tif), "--level", "2.8", "--assets", str(bad),
                             "--out", str(tmp_path / "s"))
    assert_one_line_error(code, out, err, "bad.csv")
    assert not (tmp_path / "s").exists()  # nothing written


def test_asset_file_that_is_not_json(capsys, ridge_tif, tmp_path):
    bad = tmp_path / "bad.geojson"
    bad.write_text("{this is not json")
    code, out, err = run_cli(capsys, "stage", str(ridge_tif), "--level", "2.8", "--assets", str(bad),
                             "--out", str(tmp_path / "s"))
    assert_one_line_error(code, out, err, "bad.geojson", "JSON")
    assert not (tmp_path / "s").exists()


def test_missing_asset_file(capsys, ridge_tif, tmp_path):
    code, out, err = run_cli(capsys, "stage", str(ridge_tif), "--level", "2.8",
                             "--assets", str(tmp_path / "none.csv"), "--out", str(tmp_path / "s"))
    assert_one_line_error(code, out, err, "none.csv", "does not exist")


def test_raise_sill_needs_assets(capsys, ridge_tif, tmp_path):
    code, out, err = run_cli(capsys, "stage", str(ridge_tif), "--level", "2.8", "--raise-sill", "1",
                             "--out", str(tmp_path / "s"))
    assert_one_line_error(code, out, err, "--raise-sill", "--assets")
    assert not (tmp_path / "s").exists()


def test_assets_need_a_level(capsys, ridge_tif, four_assets, tmp_path):
    code, out, err = run_cli(capsys, "stage", str(ridge_tif), "--table-step", "1", "--assets",
                             str(four_assets), "--out", str(tmp_path / "s"))
    assert_one_line_error(code, out, err, "--assets", "--level")


@pytest.mark.parametrize("value", ["0", "-0.5", "nan", "inf", "high"])
def test_a_sill_height_that_is_not_positive(capsys, ridge_tif, four_assets, tmp_path, value):
    code, out, err = run_cli(capsys, "stage", str(ridge_tif), "--level", "2.8", "--assets",
                             str(four_assets), f"--raise-sill={value}", "--out", str(tmp_path / "s"))
    assert_one_line_error(code, out, err, "--raise-sill", "positive")
    assert not (tmp_path / "s").exists()


def test_help_names_the_asset_options(capsys):
    code, out, _ = run_cli(capsys, "stage", "--help")
    assert code == 0
    assert "--assets" in out and "--raise-sill" in out and "what_if_raise" in out


def test_an_analysis_folder_gives_the_same_asset_files(capsys, ridge_tif, basin_assets, tmp_path):
    assert run_cli(capsys, "analyse", str(ridge_tif), "--out", str(tmp_path / "an"))[0] == 0
    argv = ["--level", "2.8", "--assets", str(basin_assets), "--raise-sill", "2"]
    assert run_cli(capsys, "stage", str(ridge_tif), *argv, "--out", str(tmp_path / "a"))[0] == 0
    code, _, err = run_cli(capsys, "stage", str(tmp_path / "an"), *argv, "--out", str(tmp_path / "b"))
    assert code == 0, err
    for name in ("assets_2.80m.csv", "assets_2.80m.geojson", "what_if_raise_2.00m.csv"):
        assert (tmp_path / "a" / name).read_bytes() == (tmp_path / "b" / name).read_bytes(), name
