"""Tests for the ``sillmark`` command line: help, exit codes, one-line errors, a full run."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import rasterio
from affine import Affine

from sillmark import SCREENING_CAUTION
from sillmark.io.summary import FILE_NAMES
from sillmark import __version__
from sillmark.cli import main


ROOT = Path(__file__).resolve().parents[2]
#: 5 m cells in UTM zone 33N (invented site).
SITE = Affine(5.0, 0.0, 500_000.0, 0.0, -5.0, 5_000_000.0)


def write_dem(path: Path, z: np.ndarray, *, crs: str = "EPSG:32633", nodata: float | None = -9999.0) -> Path:
    with rasterio.open(
        path, "w", driver="GTiff", width=z.shape[1], height=z.shape[0], count=1,
        dtype="float32", crs=crs, transform=SITE, nodata=nodata,
    ) as ds:
        ds.write(z.astype(np.float32), 1)
    return path


@pytest.fixture
def dem_tif(tmp_path: Path) -> Path:
    """10 × 12 invented site: a 3 × 4 basin at 2 m in ground at 6 m, edge at 4 m."""
    z = np.full((10, 12), 6.0, dtype=np.float32)
    z[0, :] = z[-1, :] = z[:, 0] = z[:, -1] = 4.0
    z[3:6, 3:7] = 2.0
    z[8, 9] = -9999.0  # one nodata cell
    return write_dem(tmp_path / "site.tif", z)


def run_cli(capsys, *argv: str) -> tuple[int, str, str]:
    code = main(list(argv))
    captured = capsys.readouterr()
    return code, captured.out, captured.err


def assert_one_line_error(code: int, out: str, err: str, *fragments: str) -> None:
    assert code == 2
    assert out == ""
    lines = err.splitlines()
    assert len(lines) == 1, err
    assert lines[0].startswith("sillmark: error: ")
    assert "Traceback" not in err
    for fragment in fragments:
        assert fragment in lines[0]


# --------------------------------------------------------------------------- help


@pytest.mark.parametrize("argv", [["--help"], ["-h"], ["analyse", "--help"]])
def test_help_exits_zero_and_explains(capsys, argv):
    code, out, err = run_cli(capsys, *argv)
    assert code == 0 and err == ""
    assert out.startswith("usage: sillmark")
    if "analyse" in argv:
        for option in ("--outlet", "--out", "--connectivity", "--vertical-unit", "--crs",
                       "--band", "--max-cells", "--quiet"):
            assert option in out
        assert "Screening analysis only" in out
    else:
        assert "analyse" in out


def test_version(capsys):
    code, out, _ = run_cli(capsys, "--version")
    assert code == 0 and out.strip() == f"sillmark {__version__}"


def test_python_dash_m_runs_the_same_command():
    done = subprocess.run(
        [sys.executable, "-m", "sillmark", "--help"], cwd=ROOT, capture_output=True, text=True,
        timeout=60,
    )
    assert done.returncode == 0 and done.stdout.startswith("usage: sillmark")


# --------------------------------------------------------------------------- errors


def test_no_command_is_a_usage_error(capsys):
    assert_one_line_error(*run_cli(capsys), "COMMAND")


def test_missing_out_is_a_usage_error(capsys, dem_tif):
    assert_one_line_error(*run_cli(capsys, "analyse", str(dem_tif)), "--out")


def test_nonexistent_dem(capsys, tmp_path):
    code, out, err = run_cli(capsys, "analyse", str(tmp_path / "nowhere.tif"), "--out", str(tmp_path / "o"))
    assert_one_line_error(code, out, err, "nowhere.tif", "does not exist")
    assert not (tmp_path / "o").exists()


def test_text_file_as_dem(capsys, tmp_path):
    notes = tmp_path / "notes.tif"
    notes.write_text("these are field notes, not elevations\n")
    code, out, err = run_cli(capsys, "analyse", str(notes), "--out", str(tmp_path / "o"))
    assert_one_line_error(code, out, err, "notes.tif", "not a raster")


@pytest.mark.parametrize("value", ["5", "six", "0"])
def test_bad_connectivity(capsys, dem_tif, tmp_path, value):
    code, out, err = run_cli(
        capsys, "analyse", str(dem_tif), "--connectivity", value, "--out", str(tmp_path / "o")
    )
    assert_one_line_error(code, out, err, "--connectivity", "8", "4")


def test_bad_vertical_unit(capsys, dem_tif, tmp_path):
    code, out, err = run_cli(
        capsys, "analyse", str(dem_tif), "--vertical-unit", "furlong", "--out", str(tmp_path / "o")
    )
    assert_one_line_error(code, out, err, "--vertical-unit", "us-ft")


def test_outlet_file_that_misses_the_grid(capsys, dem_tif, tmp_path):
    # A river drawn at 0° E, 0° N (RFC 7946 WGS84 lon/lat): far from a UTM 33N site.
    river = tmp_path / "river.geojson"
    river.write_text(json.dumps({
        "type": "FeatureCollection",
        "features": [{"type": "Feature", "properties": {},
                      "geometry": {"type": "LineString", "coordinates": [[0.0, 0.0], [0.01, 0.01]]}}],
    }))
    code, out, err = run_cli(capsys, "analyse", str(dem_tif), "--outlet", str(river), "--out", str(tmp_path / "o"))
    assert_one_line_error(code, out, err, "river.geojson", "misses the grid")


def test_unknown_outlet_kind(capsys, dem_tif, tmp_path):
    code, out, err = run_cli(capsys, "analyse", str(dem_tif), "--outlet", "sea", "--out", str(tmp_path / "o"))
    assert_one_line_error(code, out, err, "sea")


def test_output_folder_that_is_a_file(capsys, dem_tif, tmp_path):
    taken = tmp_path / "taken"
    taken.write_text("someone's file\n")
    code, out, err = run_cli(capsys, "analyse", str(dem_tif), "--out", str(taken))
    assert_one_line_error(code, out, err, "is a file")
    assert taken.read_text() == "someone's file\n"


def test_output_folder_that_cannot_be_created(capsys, dem_tif, tmp_path):
    (tmp_path / "plain").write_text("x")
    code, out, err = run_cli(capsys, "analyse", str(dem_tif), "--out", str(tmp_path / "plain" / "sub"))
    assert_one_line_error(code, out, err, "plain")


def test_too_many_cells(capsys, dem_tif, tmp_path):
    code, out, err = run_cli(capsys, "analyse", str(dem_tif), "--max-cells", "50", "--out", str(tmp_path / "o"))
    assert_one_line_error(code, out, err, "120 cells", "50")


# --------------------------------------------------------------------------- a full run


def test_full_run_writes_every_file_and_summarises_with_units(capsys, dem_tif, tmp_path):
    out_dir = tmp_path / "results" / "site"  # parent missing too: created
    code, out, err = run_cli(capsys, "analyse", str(dem_tif), "--out", str(out_dir))
    assert code == 0
    assert err == ""  # stderr is not a terminal here: no progress display
    for name in FILE_NAMES:
        assert (out_dir / name).is_file() and (out_dir / name).stat().st_size > 0
    assert sorted(p.name for p in out_dir.iterdir()) == sorted([*FILE_NAMES, "README.txt"])
    # The basin: 12 cells of 25 m² = 300 m² = 0.03 ha, 4 m deep to the 6 m ground.
    assert "Depressions: 1, total area 0.03 ha" in out
    assert ("1,200.0 m³" in out) or ("1,200.0 m3" in out)
    assert "Highest spill elevation: 6.00 m" in out
    assert str(out_dir) in out
    assert SCREENING_CAUTION in out
    summary = json.loads((out_dir / "summary.json").read_text())
    assert summary["outlets"]["sources"] == ["edge"]
    assert summary["depressions"]["total_volume_m3"] == pytest.approx(1200.0)
    assert summary["dem"] == str(dem_tif)


def test_rerun_replaces_own_files_and_keeps_others(capsys, dem_tif, tmp_path):
    out_dir = tmp_path / "o"
    out_dir.mkdir()
    (out_dir / "notes.txt").write_text("mine\n")
    assert run_cli(capsys, "analyse", str(dem_tif), "--out", str(out_dir), "--quiet")[0] == 0
    first = (out_dir / "summary.json").read_text()
    assert run_cli(capsys, "analyse", str(dem_tif), "--out", str(out_dir), "-q",
                   "--connectivity", "4")[0] == 0
    assert (out_dir / "notes.txt").read_text() == "mine\n"
    assert json.loads((out_dir / "summary.json").read_text())["connectivity"] == 4
    assert json.loads(first)["connectivity"] == 8


def test_outlet_options_combine_and_feet_show_acre_feet(capsys, tmp_path):
    z = np.full((10, 12), 6.0, dtype=np.float32)
    z[0, :] = np.nan  # open water along the north edge
    z[3:6, 3:7] = 2.0
    dem = write_dem(tmp_path / "feet.tif", z, nodata=None)
    code, out, _ = run_cli(
        capsys, "analyse", str(dem), "--outlet", "nodata", "--outlet", "edge",
        "--vertical-unit", "ft", "--out", str(tmp_path / "o"),
    )
    assert code == 0
    assert "Outlets: nodata, edge" in out
    assert "acre-ft" in out and "ft (depression 1)" in out
    summary = json.loads((tmp_path / "o" / "summary.json").read_text())
    assert summary["grid"]["vertical_unit"] == "ft"
    assert summary["outlets"]["sources"] == ["nodata", "edge"]


def test_crs_option_supplies_a_missing_crs(capsys, tmp_path):
    z = np.full((6, 7), 6.0, dtype=np.float32)
    z[2:4, 2:5] = 3.0
    bare = tmp_path / "bare.tif"
    with rasterio.open(bare, "w", driver="GTiff", width=7, height=6, count=1, dtype="float32",
                       transform=SITE) as ds:
        ds.write(z, 1)
    code, out, err = run_cli(capsys, "analyse", str(bare), "--out", str(tmp_path / "o"))
    assert_one_line_error(code, out, err, "no CRS")
    code, out, _ = run_cli(capsys, "analyse", str(bare), "--crs", "32633", "--out", str(tmp_path / "o"))
    assert code == 0 and "EPSG:32633" in out
