"""The command line on DEMs it must refuse: one line, no traceback, no partial results."""

from __future__ import annotations

import json

import numpy as np
import pytest
from affine import Affine

from sillmark.cli import main
from tests.rasters import write_raster

LOCAL_GRID = ('LOCAL_CS["Works grid",LOCAL_DATUM["Arbitrary",0],UNIT["metre",1],'
              'AXIS["Easting",EAST],AXIS["Northing",NORTH]]')


def small_site() -> np.ndarray:
    """20 × 20 invented site: ground at 10 m round a 5 m basin with a notch at 8 m."""
    z = np.full((20, 20), 10.0, np.float32)
    z[5:10, 5:10] = 5.0
    z[7, 4] = 8.0
    return z


UNPLACEABLE = {
    "cells-of-1e7-m": (dict(transform=Affine(1e7, 0, 500_000, 0, -1e7, 5e6)), "more than the Earth's circumference"),
    "origin-at-1e15-m": (dict(transform=Affine(2, 0, 1e15, 0, -2, 1e15)), "cannot be placed on the Earth"),
    "local-grid-without-datum": (dict(crs=LOCAL_GRID, transform=Affine(2, 0, 1000, 0, -2, 2000)),
                                 "has no geodetic datum"),
}


def run(capsys, *argv):
    code = main(list(argv))
    out, err = capsys.readouterr()
    return code, out, err


def one_line_error(code, out, err, fragment):
    assert code == 2, (code, out, err)
    assert out == ""
    assert len(err.splitlines()) == 1, err
    assert err.startswith("sillmark: error: ") and "Traceback" not in err
    assert fragment in err, err


@pytest.mark.parametrize("case", list(UNPLACEABLE))
def test_analyse_refuses_unplaceable_georeferencing_in_one_line_and_writes_nothing(tmp_path, capsys, case):
    options, fragment = UNPLACEABLE[case]
    dem = write_raster(tmp_path / "site.tif", small_site(), **options)
    out = tmp_path / "results"
    one_line_error(*run(capsys, "analyse", str(dem), "--out", str(out)), fragment)
    assert not out.exists()
    assert sorted(p.name for p in tmp_path.iterdir()) == ["site.tif"]


def test_a_failure_after_the_engine_leaves_the_output_folder_as_it_was(tmp_path, capsys):
    """A folder where a result file goes is found only when the results are moved in:
    by then every file has been written, yet none may reach the output folder."""
    dem = write_raster(tmp_path / "site.tif", small_site(), transform=Affine(2, 0, 500_000, 0, -2, 5e6))
    out = tmp_path / "results"
    (out / "onset_stage.tif").mkdir(parents=True)
    (out / "notes.txt").write_text("kept\n")
    one_line_error(*run(capsys, "analyse", str(dem), "--out", str(out)), "holds a folder named onset_stage.tif")
    assert sorted(p.name for p in out.iterdir()) == ["notes.txt", "onset_stage.tif"]
    assert sorted(p.name for p in tmp_path.iterdir()) == ["results", "site.tif"]  # no staging folder left


def test_analyse_into_an_existing_folder_replaces_the_results_and_keeps_other_files(tmp_path, capsys):
    dem = write_raster(tmp_path / "site.tif", small_site(), transform=Affine(2, 0, 500_000, 0, -2, 5e6))
    out = tmp_path / "results"
    out.mkdir()
    (out / "notes.txt").write_text("kept\n")
    (out / "summary.json").write_text("{}")
    code, stdout, err = run(capsys, "analyse", str(dem), "--out", str(out))
    assert code == 0, err
    assert str(out) in stdout
    summary = json.loads((out / "summary.json").read_text())
    assert summary["grid"]["rows"] == 20
    assert (out / "notes.txt").read_text() == "kept\n" and (out / "onset_stage.tif").is_file()
    assert sorted(p.name for p in tmp_path.iterdir()) == ["results", "site.tif"]


def data_rows(path):
    import csv
    import io

    lines = [line for line in path.read_text(encoding="utf-8").splitlines(keepends=True) if not line.startswith("#")]
    return list(csv.DictReader(io.StringIO("".join(lines), newline="")))


def test_stage_csvs_neutralise_formula_names_and_keep_negative_numbers(tmp_path, capsys):
    dem = write_raster(tmp_path / "site.tif", small_site(), transform=Affine(2, 0, 500_000, 0, -2, 5e6))
    names = ["=1+1", "+SUM(A1:A2)", "-3", "@cmd", "Mill school"]
    assets = tmp_path / "assets.csv"
    assets.write_text("name,kind,x,y\n" + "".join(
        f"{n},@risky,{500_011 + 2 * k},4999985\n" for k, n in enumerate(names)), encoding="utf-8")
    out = tmp_path / "stage"
    code, _, err = run(capsys, "stage", str(dem), "--level", "10.5", "--assets", str(assets),
                       "--raise-sill", "0.5", "--out", str(out))
    assert code == 0, err
    for path in (out / "assets_10.50m.csv", out / "what_if_raise_0.50m.csv"):
        rows = data_rows(path)
        assert sorted(r["name"] for r in rows) == sorted(("'" + n if n[0] in "=+-@" else n) for n in names), path
        assert {r["kind"] for r in rows} == {"'@risky"}
    numbers = [v for r in data_rows(out / "assets_10.50m.csv") for c, v in r.items() if c.startswith("freeboard_")]
    assert numbers and all(v.startswith("-") and float(v) < 0 for v in numbers)  # flooded: below the level


# --------------------------------------------------------------------------- 0-360 degree longitudes


def all_positions(geometry) -> list:
    """Every [lon, lat] position of a GeoJSON geometry."""
    found = []

    def walk(coords) -> None:
        if coords and isinstance(coords[0], (int, float)):
            found.append(coords)
        else:
            for part in coords:
                walk(part)

    walk(geometry["coordinates"])
    return found


def test_a_dem_stored_with_0_to_360_longitudes_places_wgs84_assets_and_writes_rfc7946_geojson(tmp_path, capsys):
    """Invented site straddling the antimeridian: columns from 179.90° to 180.10° (stored as
    179.90..180.10), cells of 0.005°; the basin lies east of 180°, i.e. at -179.97° in WGS 84."""
    z = np.full((40, 40), 10.0, np.float32)
    z[10:30, 22:36] = 5.0  # the basin: 180.01° to 180.08° as stored
    dem = write_raster(tmp_path / "geo.tif", z, crs="EPSG:4326",
                       transform=Affine(0.005, 0, 179.9, 0, -0.005, -16.9))
    assets = tmp_path / "assets.geojson"
    assets.write_text(json.dumps({"type": "FeatureCollection", "features": [
        {"type": "Feature", "properties": {"name": "Reef store"},
         "geometry": {"type": "Point", "coordinates": [-179.955, -17.0]}}]}))
    out = tmp_path / "stage"
    code, stdout, err = run(capsys, "stage", str(dem), "--level", "7", "--assets", str(assets), "--out", str(out))
    assert code == 0, err
    table = data_rows(out / "assets_7.00m.csv")
    assert table[0]["status"] == "ok", table[0]
    analysed = tmp_path / "results"
    assert run(capsys, "analyse", str(dem), "--out", str(analysed))[0] == 0
    for path in [*analysed.glob("*.geojson"), *out.glob("*.geojson")]:
        for feature in json.loads(path.read_text())["features"]:
            for lon, lat in (p[:2] for p in all_positions(feature["geometry"])):
                assert -180.0 <= lon <= 180.0, (path.name, lon)
    spill = json.loads((analysed / "spill_points.geojson").read_text())["features"]
    assert spill and all(f["geometry"]["coordinates"][0] < -179.0 for f in spill)
