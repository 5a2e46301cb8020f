"""`sillmark analyse` with a significance minimum, readable CSVs, GeoPackage layers and README.txt.

The site is a hand-worked trench (1 m cells, metres, outlets on the DEM edge).
Rows 0 and 2 are walls at 9 m; row 1 holds, from west to east:

    col:  0    1     2     3     4    5    6    7     8     9    10
    z:    9   2.0  2.95  2.90  3.0  2.5  4.0  3.6  3.55  3.6   1.0
              A    sad   D     sad  B    sill      C          outlet (edge)

Working, rising water from the outlet at col 10 (1.0 m):
- C (col 8, pit 3.55) is walled by cols 7 and 9 at 3.6: a top of its own, 0.05 m
  deep, spilling at 3.6 towards col 10.
- A (col 1, pit 2.0) and D (col 3, pit 2.90) meet over col 2 at 2.95: A is
  0.95 m deep there, D only 0.05 m. Their union X (pit 2.0) meets B (col 5,
  pit 2.5) over col 4 at 3.0: X is 1.0 m deep, B 0.5 m. The union AB spills
  over col 6 at 4.0 (2.0 m deep).
- Default minimum: 3 x 0.10 m = 0.30 m. Reaching it: A, X, B, AB. D and C do not.
- Significant: AB (a top), X and B (their parent AB joins two nodes that reach
  the minimum). A is not: its parent X joins it only with D, which does not
  reach, so A and D are listed as part of X.
- So 3 significant depressions (1 whole, 2 nested), 2 depressions in all (AB
  and C), 6 hierarchy nodes (A, D, X, B, AB, C).
- Storage of AB at 4.0 m (cells 1..5): (4-2) + (4-2.95) + (4-2.9) + (4-3) +
  (4-2.5) = 2 + 1.05 + 1.1 + 1 + 1.5 = 6.65 m3, area 5 m2.
With --vertical-accuracy 0.6 the minimum is 1.8 m: only AB reaches it.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pyogrio
import pytest

from sillmark import SCREENING_CAUTION
from sillmark.cli import main
from tests.rasters import write_raster

TRENCH = [9, 2.0, 2.95, 2.90, 3.0, 2.5, 4.0, 3.6, 3.55, 3.6, 1.0]


@pytest.fixture
def trench_tif(tmp_path: Path) -> Path:
    z = np.full((3, len(TRENCH)), 9.0, dtype=np.float32)
    z[1] = TRENCH
    return write_raster(tmp_path / "trench.tif", z)


def _analyse(capsys, tif: Path, out: Path, *extra: str) -> str:
    code = main(["analyse", str(tif), "--out", str(out), "-q", *extra])
    captured = capsys.readouterr()
    assert code == 0, captured.err
    return captured.out


def test_default_minimum_lists_the_significant_depressions_and_counts_all(capsys, trench_tif, tmp_path):
    out = tmp_path / "res"
    printed = _analyse(capsys, trench_tif, out)
    summary = json.loads((out / "summary.json").read_text())
    sig = summary["significance"]
    assert sig["min_depth"] == {"value": pytest.approx(0.3), "unit": "m"}
    assert "default vertical accuracy 0.1 m" in sig["source"]
    assert sig["vertical_accuracy"]["stated"] is False
    assert sig["counts"] == {"significant": 3, "significant_top": 1, "all_depressions": 2,
                             "hierarchy_nodes": 6}
    assert ("Significant depressions: 3 (1 whole, 2 nested in those), of 2 depressions and "
            "6 nested pits and pools in all") in printed
    assert "Minimum depth: 0.3 m" in printed

    # Only AB is listed: the micro-pit C is neither listed nor mapped.
    table = pd.read_csv(out / "depressions.csv")
    assert list(table["id"]) == [1]
    assert table.loc[0, "pit_elevation_m"] == pytest.approx(2.0)
    assert table.loc[0, "spill_elevation_m"] == pytest.approx(4.0)
    assert table.loc[0, "area_m2"] == pytest.approx(5.0)
    assert table.loc[0, "volume_m3"] == pytest.approx(6.65, abs=1e-5)
    spills = json.loads((out / "spill_points.geojson").read_text())
    assert [f["id"] for f in spills["features"]] == [1]
    outlines = json.loads((out / "depressions.geojson").read_text())
    assert [f["id"] for f in outlines["features"]] == [1]

    # Totals stay over every depression, C's 0.05 m3 included: nothing was altered.
    assert summary["depressions"]["count"] == 2
    assert summary["depressions"]["total_volume_m3"] == pytest.approx(6.65 + 0.05, abs=1e-5)

    # Curves only for the three significant nodes: X, B and AB; their containment
    # is in the hierarchy file (parent of X and B is AB).
    nodes = pd.read_csv(out / "depression_hierarchy.csv")
    curves = pd.read_csv(out / "depression_curves.csv")
    curve_ids = set(curves["node_id"])
    assert len(curve_ids) == 3
    listed = nodes[nodes["id"].isin(curve_ids)]
    pits = sorted(listed["pit_elevation_m"].round(3))
    assert pits == [2.0, 2.0, 2.5]  # X and AB share A's pit; B
    top = listed[listed["parent"] == 0]
    assert len(top) == 1
    assert set(listed[listed["parent"] != 0]["parent"]) == set(top["id"])
    # The node table lists the significant nodes only (3 of the 6), and each
    # row's children are listed ones: AB's are X and B, theirs none.
    assert set(nodes["id"]) == curve_ids
    children = {int(r.id): str(r.children) for r in nodes.itertuples()}
    assert sorted(children[int(top["id"].iloc[0])].split(";")) == sorted(
        str(i) for i in curve_ids - set(top["id"]))


def test_stated_accuracy_raises_the_minimum(capsys, trench_tif, tmp_path):
    out = tmp_path / "res"
    _analyse(capsys, trench_tif, out, "--vertical-accuracy", "0.6")
    sig = json.loads((out / "summary.json").read_text())["significance"]
    assert sig["min_depth"]["value"] == pytest.approx(1.8)
    assert sig["vertical_accuracy"] == {"value": 0.6, "unit": "m", "stated": True}
    assert sig["counts"]["significant"] == 1  # AB alone is 1.8 m deep or more
    assert len(set(pd.read_csv(out / "depression_curves.csv")["node_id"])) == 1


def test_full_inventory_lists_every_depression_marked(capsys, trench_tif, tmp_path):
    out = tmp_path / "res"
    _analyse(capsys, trench_tif, out, "--full-inventory")
    table = pd.read_csv(out / "depressions.csv")
    assert list(table["id"]) == [1, 2]
    assert list(table["significant"]) == [True, False]
    assert len(set(pd.read_csv(out / "depression_curves.csv")["node_id"])) == 6
    assert len(pd.read_csv(out / "depression_hierarchy.csv")) == 6
    assert json.loads((out / "summary.json").read_text())["significance"]["full_inventory"] is True


def test_geopackage_layers_hold_the_listed_features_crs_and_caution(capsys, trench_tif, tmp_path):
    out = tmp_path / "res"
    _analyse(capsys, trench_tif, out, "--vector-format", "gpkg", "--full-inventory")
    assert not (out / "depressions.geojson").exists()
    info = pyogrio.read_info(out / "depressions.gpkg")
    assert info["features"] == 2
    assert info["crs"] == "EPSG:32633"
    assert info["geometry_type"] == "MultiPolygon"
    meta = pyogrio.read_info(out / "depressions.gpkg")["layer_metadata"]
    assert meta["caution"] == SCREENING_CAUTION
    _, _, geometry, fields = pyogrio.raw.read(out / "depressions.gpkg")
    assert fields[list(info["fields"]).index("id")].tolist() == [1, 2]
    import shapely

    areas = shapely.area(shapely.from_wkb(geometry))
    assert areas.tolist() == pytest.approx([5.0, 1.0])  # AB's 5 cells, C's one, 1 m2 each
    points = pyogrio.read_info(out / "spill_points.gpkg")
    assert points["features"] == 2 and points["geometry_type"] == "Point"
    _, _, geometry, _ = pyogrio.raw.read(out / "spill_points.gpkg")
    xy = shapely.get_coordinates(shapely.from_wkb(geometry))
    # Spill cells: AB over col 6, C over col 7 or 9 (either rim cell at 3.6), row 1:
    # centres at x = 500000 + col + 0.5, y = 5000000 - 1.5.
    assert xy[0].tolist() == [500006.5, 4999998.5]
    assert xy[1, 1] == 4999998.5 and xy[1, 0] in (500007.5, 500009.5)


def test_every_csv_opens_with_pandas_defaults_and_readme_describes_the_folder(capsys, trench_tif,
                                                                             tmp_path):
    out = tmp_path / "res"
    _analyse(capsys, trench_tif, out)
    stage = tmp_path / "stage"
    code = main(["stage", str(trench_tif), "--level", "3.2", "--table-step", "0.5",
                 "--out", str(stage), "-q"])
    assert code == 0, capsys.readouterr().err
    capsys.readouterr()
    expected = {
        out / "depressions.csv": "id",
        out / "depression_hierarchy.csv": "id",
        out / "depression_curves.csv": "node_id",
        stage / "depressions_at_3.20m.csv": "id",
        stage / "stage_table.csv": "level_m",
    }
    for path, first in expected.items():
        assert path.read_text().splitlines()[0].split(",")[0] == first, path.name
        frame = pd.read_csv(path)
        assert frame.columns[0] == first and len(frame) > 0, path.name
    # Below 3.6 m only the outlet cell at col 10 is flooded (1 m2); from 3.6 m cols
    # 7-9 join (C spills at 3.6), and at 4.0 m the trench AB too: cols 1-10, 10 m2.
    table = pd.read_csv(stage / "stage_table.csv").set_index("level_m")["flooded_area_m2"]
    assert table.loc[3.5] == pytest.approx(1.0)
    assert table.loc[4.0] == pytest.approx(10.0)
    for folder in (out, stage):
        raw = (folder / "README.txt").read_text()
        text = " ".join(raw.split())
        assert " ".join(SCREENING_CAUTION.split()) in text
        assert "measured from: datum not stated" in text
        for name in {p.name for p in folder.iterdir()} - {"README.txt"}:
            assert f"  {name}\n" in raw, name
    readme = " ".join((out / "README.txt").read_text().split())
    assert "Minimum depth of a depression of its own: 0.3 m" in readme
    assert "Significant depressions: 3" in readme
