"""Tests of sillmark.products.assets and sillmark.io.asset_files: when each asset gets wet, and why.

Outside references used here, each named beside its check:
- hand-worked DEMs (the working is in the comments);
- the separate textbook minimax Dijkstra in tests/textbook_flood.py, for the
  what-if on random DEMs;
- pyproj (the installed version) for the expected coordinates of points given
  in another CRS;
- the demo site's construction, demo_dem/README.md (onset stages of the assets
  behind the Caddlewick flood bank, and the position of its notch).

All DEMs are invented. Cells are 1 m in UTM zone 33N with the north-west corner
at (500 000 E, 5 000 000 N), so cell (row, col) has its centre at
x = 500 000.5 + col, y = 4 999 999.5 - row.
"""

from __future__ import annotations

import csv
import dataclasses
import json
import math
from pathlib import Path

import numpy as np
import pyproj
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from sillmark import SCREENING_CAUTION
from sillmark.io.asset_files import (
    FEATURE_ASSET,
    FEATURE_ROUTE,
    FEATURE_SILL,
    asset_columns,
    write_assets_csv,
    write_assets_geojson,
)
from sillmark.grid.assets import Assets, InvalidAssets, assets_from_points, read_assets
from sillmark.products.assets import assess_assets
from sillmark.products.what_if import raise_sill, sill_crest
from sillmark.grid.dem import dem_from_array, read_dem
from sillmark.errors import InvalidParameter, LocationOutsideDEM, SillmarkError
from sillmark.engine.flood import analyse_site
from sillmark.grid.outlets import Outlets, build_outlets
from tests.textbook_flood import minimax_stage

REPO = Path(__file__).resolve().parents[2]
DEMO = REPO / "demo_dem"
UTM33 = "EPSG:32633"


def centre(row: int, col: int) -> tuple[float, float]:
    return 500_000.5 + col, 4_999_999.5 - row


def north_edge(shape) -> Outlets:
    """Outlets on row 0 only: a river along the north edge of the grid."""
    mask = np.zeros(shape, bool)
    mask[0, :] = True
    return Outlets(mask=mask, sources=("north edge",))


def site(z, outlets=None):
    dem = dem_from_array(np.asarray(z, dtype=np.float32))
    out = outlets if outlets is not None else build_outlets(dem, ["edge"])
    if not isinstance(out, Outlets):
        out = out(dem.shape)
    return dem, out, analyse_site(dem, out)


def one(dem, row, col, name="asset"):
    return assets_from_points(dem, [(name, *centre(row, col))])


# --------------------------------------------------------------------------
# Hand-worked DEMs
# --------------------------------------------------------------------------

# A basin (rows 3-5, ground 2 m) behind a ridge (row 2, 9 m) with two gaps:
# gap A at (2, 1), 4 m, and gap B at (2, 5), 6 m. North of the ridge the
# floodplain (1 m) and the river (row 0, 0 m, the only outlets).
#
# Every path from row 0 to the basin steps on a row-2 cell (the ridge spans the
# grid), so the basin's onset stage is the lowest ridge cell: gap A, 4 m.
RIDGE = [
    [0, 0, 0, 0, 0, 0, 0],
    [1, 1, 1, 1, 1, 1, 1],
    [9, 4, 9, 9, 9, 6, 9],
    [2, 2, 2, 2, 2, 2, 2],
    [2, 2, 2, 2, 2, 2, 2],
    [2, 2, 2, 2, 2, 2, 2],
]
GAP_A, GAP_B = (2, 1), (2, 5)
BEHIND = (4, 3)


@pytest.fixture(scope="module")
def ridge():
    return site(RIDGE, north_edge)


def test_asset_behind_a_ridge_is_controlled_by_the_lower_gap(ridge):
    dem, _, result = ridge
    # At 3 m: ground 2 < 3 < onset 4, so shielded; it would stand 1 m deep if
    # reached; freeboard 4 - 3 = 1.
    t = assess_assets(one(dem, *BEHIND, "school"), dem, result, 3.0)
    assert t.status == ("ok",) and t.state == ("shielded",)
    assert (t.row[0], t.col[0]) == BEHIND
    assert t.ground_elevation[0] == 2 and t.onset_stage[0] == 4
    assert t.depth[0] == 0 and t.depth_if_reached[0] == 1 and t.freeboard[0] == 1
    assert (t.sill_row[0], t.sill_col[0], t.sill_elevation[0]) == (*GAP_A, 4)
    assert (t.sill_x[0], t.sill_y[0]) == centre(*GAP_A)
    assert not t.sill_is_own_cell[0]
    assert t.depression_id[0] == 1
    # The route runs from an outlet (row 0) over gap A to the asset's cell.
    cells = [tuple(c) for c in t.route_cells[0]]
    assert cells[0][0] == 0 and cells[-1] == BEHIND and GAP_A in cells
    assert np.array_equal(t.route_xy(0)[-1], centre(*BEHIND))
    # At 4 m the water comes over gap A: flooded, 4 - 2 = 2 m deep.
    t4 = assess_assets(one(dem, *BEHIND), dem, result, 4.0)
    assert t4.state == ("flooded",) and t4.depth[0] == 2 and t4.freeboard[0] == 0
    # At 1.5 m the ground (2 m) is above the water: dry.
    t1 = assess_assets(one(dem, *BEHIND), dem, result, 1.5)
    assert t1.state == ("dry",) and t1.depth[0] == 0 and t1.depth_if_reached[0] == 0


def test_raising_the_lower_gap_by_more_than_the_difference_hands_control_to_the_higher_gap(ridge):
    dem, outlets, result = ridge
    # Gap A 4 + 3 = 7 m is now above gap B (6 m): the lowest way in is gap B.
    w = raise_sill(dem, outlets, result, one(dem, *BEHIND)[0], 3.0)
    assert (w.raised.row, w.raised.col, w.raised.elevation) == (*GAP_A, 4.0)
    assert w.raised_elevation == 7.0
    assert w.onset_before == 4.0 and w.onset_after == 6.0 and w.gain == 2.0
    assert (w.sill_after.row, w.sill_after.col, w.sill_after.elevation) == (*GAP_B, 6.0)
    assert not w.raised_cell_controls and not w.own_sill
    assert GAP_B in [tuple(c) for c in w.route_after]
    assert GAP_A not in [tuple(c) for c in w.route_after]
    # The explanation names gap B by its coordinates (cell centre), never by row and column.
    gx, gy = dem.xy(*GAP_B)
    assert f"x {gx:.1f} m, y {gy:.1f} m" in w.explanation and "now controls" in w.explanation
    assert "row" not in w.explanation
    # The recomputed flood is the whole site: the basin fills to 6 m everywhere.
    assert np.all(w.result.onset_stage[3:, :] == 6)


def test_raising_the_lower_gap_by_less_than_the_difference_gives_the_raised_elevation(ridge):
    dem, outlets, result = ridge
    # Gap A 4 + 1 = 5 m is still below gap B (6 m): it still controls, at 5 m.
    w = raise_sill(dem, outlets, result, BEHIND, 1.0)
    assert w.onset_after == 5.0 and w.raised_cell_controls
    assert (w.sill_after.row, w.sill_after.col, w.sill_after.elevation) == (*GAP_A, 5.0)
    assert "still controls" in w.explanation
    # Raising it to exactly gap B's height (4 + 2 = 6 m): 6 m either way.
    assert raise_sill(dem, outlets, result, BEHIND, 2.0).onset_after == 6.0


def test_raising_one_cell_of_a_flat_sill_changes_nothing():
    # As RIDGE but gap A is two cells wide, (2, 1) and (2, 2), both at 4 m.
    # Raising only the one the route crosses leaves the other: the water goes
    # round it at the same 4 m, and that neighbour is named as the new sill.
    z = [row[:] for row in RIDGE]
    z[2][2] = 4
    dem, outlets, result = site(z, north_edge)
    w = raise_sill(dem, outlets, result, BEHIND, 3.0, across_crest=False)
    assert w.raised_cells == 1
    first = (w.raised.row, w.raised.col)
    assert first in {(2, 1), (2, 2)}
    assert w.onset_after == w.onset_before == 4.0 and not w.changed
    other = ({(2, 1), (2, 2)} - {first}).pop()
    assert (w.sill_after.row, w.sill_after.col, w.sill_after.elevation) == (*other, 4.0)
    assert "changes nothing" in w.explanation


def test_raising_the_whole_crest_of_a_flat_sill_hands_control_on():
    # Same two-cell gap at 4 m. Raising its whole crest (both cells, the
    # default) by 3 m to 7 m leaves gap B at 6 m as the lowest way in, so the
    # onset stage goes from 4 m to 6 m and gap B controls.
    z = [row[:] for row in RIDGE]
    z[2][2] = 4
    dem, outlets, result = site(z, north_edge)
    w = raise_sill(dem, outlets, result, BEHIND, 3.0)
    assert w.raised_cells == 2
    assert (w.onset_before, w.onset_after) == (4.0, 6.0)
    assert w.sill_after.elevation == 6.0
    assert "crest" in w.explanation


# A bowl with a single notch: rim ring at 5 m (rows/cols 1-5), notch at (1, 3)
# 3 m, floor 1 m inside, a 0 m margin on the grid edge (the outlets). The rim is
# a closed 4-connected ring, so every 8-neighbour path into the floor crosses it;
# its lowest cell is the notch: onset stage of the floor 3 m.
BOWL = [
    [0, 0, 0, 0, 0, 0, 0],
    [0, 5, 5, 3, 5, 5, 0],
    [0, 5, 1, 1, 1, 5, 0],
    [0, 5, 1, 1, 1, 5, 0],
    [0, 5, 1, 1, 1, 5, 0],
    [0, 5, 5, 5, 5, 5, 0],
    [0, 0, 0, 0, 0, 0, 0],
]
NOTCH = (1, 3)


def test_asset_in_a_bowl_with_one_notch():
    dem, outlets, result = site(BOWL)
    t = assess_assets(one(dem, 3, 3, "pump"), dem, result, 2.0)
    # 1 < 2 < 3: shielded, 1 m below the level, 1 m of freeboard.
    assert t.state == ("shielded",) and t.onset_stage[0] == 3 and t.freeboard[0] == 1
    assert (t.sill_row[0], t.sill_col[0], t.sill_elevation[0]) == (*NOTCH, 3)
    # Notch 3 + 1 = 4 m < rim 5 m: the notch still controls, at 4 m.
    w = raise_sill(dem, outlets, result, (3, 3), 1.0)
    assert w.onset_after == 4.0 and w.raised_cell_controls
    # Notch 3 + 3 = 6 m > rim 5 m: some rim cell at 5 m controls instead.
    w = raise_sill(dem, outlets, result, (3, 3), 3.0)
    assert w.onset_after == 5.0 and w.sill_after.elevation == 5.0
    assert (w.sill_after.row, w.sill_after.col) != NOTCH
    assert BOWL[w.sill_after.row][w.sill_after.col] == 5
    assert w.name is None


def test_asset_on_open_slope_is_its_own_controlling_point():
    # Ground rising 1 m per row away from the river on row 0. A cell on the
    # slope is reached straight up the fall line, whose highest cell is itself:
    # s = z = 3 at (3, 2).
    z = np.repeat(np.arange(6, dtype=np.float32)[:, None], 5, axis=1)
    dem, outlets, result = site(z, north_edge)
    t = assess_assets(one(dem, 3, 2, "barn"), dem, result, 3.5)
    assert t.onset_stage[0] == 3 and t.sill_is_own_cell[0]
    assert (t.sill_row[0], t.sill_col[0]) == (3, 2)
    assert t.state == ("flooded",) and t.depth[0] == 0.5 and t.freeboard[0] == -0.5
    assert t.depression_id[0] == 0
    # Raising the asset's own cell: every path ends on it, so the onset stage
    # rises by exactly the height, 3 + 0.5 = 3.5 m.
    w = raise_sill(dem, outlets, result, one(dem, 3, 2, "barn")[0], 0.5)
    assert w.own_sill and w.name == "barn"
    assert w.onset_after == 3.5 and w.gain == 0.5
    assert "own ground" in w.explanation


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    st.integers(3, 7).flatmap(
        lambda rows: st.integers(3, 7).flatmap(
            lambda cols: st.tuples(
                st.lists(st.integers(0, 9), min_size=rows * cols, max_size=rows * cols).map(
                    lambda v: np.array(v, dtype=np.float32).reshape(rows, cols)
                ),
                st.integers(0, rows - 1),
                st.integers(0, cols - 1),
            )
        )
    ),
    st.sampled_from([0.5, 1.0, 2.0, 5.0]),
    st.booleans(),
)
def test_what_if_matches_a_textbook_flood_of_the_raised_dem(case, height, across_crest):
    z, r, c = case
    dem = dem_from_array(z)
    outlets = build_outlets(dem, ["edge"])
    result = analyse_site(dem, outlets)
    w = raise_sill(dem, outlets, result, (r, c), height, across_crest=across_crest)
    raised = z.copy()
    top = z[w.raised.row, w.raised.col] + np.float32(height)
    if across_crest and not w.own_sill:
        raised[sill_crest(result, w.raised.row, w.raised.col, top)] = top
    else:
        raised[w.raised.row, w.raised.col] = top
    assert w.raised_cells == np.count_nonzero(raised != z)
    expected = minimax_stage(raised, outlets.mask)[r, c]
    assert w.onset_after == expected
    assert w.onset_before <= w.onset_after <= w.onset_before + height
    assert w.sill_after.elevation == w.onset_after


def test_raise_sill_rejects_bad_heights_and_places(ridge):
    dem, outlets, result = ridge
    for bad in (0, -1.0, math.nan, math.inf, "high", True):
        with pytest.raises(InvalidParameter, match="height"):
            raise_sill(dem, outlets, result, BEHIND, bad)
    with pytest.raises(LocationOutsideDEM):
        raise_sill(dem, outlets, result, (99, 0), 1.0)
    with pytest.raises(InvalidParameter, match="connectivity"):
        raise_sill(dem, outlets, result, BEHIND, 1.0, connectivity=4)
    with pytest.raises(InvalidParameter, match="outlets differ"):
        raise_sill(dem, build_outlets(dem, ["edge"]), result, BEHIND, 1.0)
    far = assets_from_points(dem, [("far", 0.0, 0.0)])[0]
    with pytest.raises(LocationOutsideDEM, match="outside DEM"):
        raise_sill(dem, outlets, result, far, 1.0)
    with pytest.raises(InvalidParameter, match="precision"):
        raise_sill(dem, outlets, result, BEHIND, 1e-9)


def test_raise_sill_accepts_a_plain_mask_and_leaves_the_inputs_alone(ridge):
    dem, outlets, result = ridge
    before = result.onset_stage.copy()
    w = raise_sill(dem, np.array(outlets.mask), result, BEHIND, 3.0)
    assert w.onset_after == 6.0
    assert np.array_equal(result.onset_stage, before)
    assert dem.elevation[GAP_A] == 4


# --------------------------------------------------------------------------
# Placement: outside the DEM, on nodata, not reached
# --------------------------------------------------------------------------


def test_points_outside_the_dem_or_on_nodata_are_kept_and_flagged():
    # 5 x 5 ground at 1 m with one nodata cell at (1, 1), and a valid cell at
    # (3, 3) walled in by nodata on all eight sides (no outlet reaches it).
    z = np.ones((7, 7), dtype=np.float32)
    z[1, 1] = np.nan
    z[2:5, 2:5] = np.nan
    z[3, 3] = 2.0
    dem, _, result = site(z)
    assets = assets_from_points(
        dem,
        [("ok", *centre(0, 0)), ("sea", *centre(1, 1)), ("island", *centre(3, 3)),
         ("far", 400_000.0, 4_000_000.0), ("east edge", 500_007.0, 4_999_999.5)],
    )
    assert [a.status for a in assets] == ["ok", "on nodata", "ok", "outside DEM", "outside DEM"]
    assert (assets[3].row, assets[3].col) == (-1, -1)
    assert assets.status_counts == {"ok": 2, "on nodata": 1, "outside DEM": 2}
    t = assess_assets(assets, dem, result, 1.5)
    assert t.status == ("ok", "on nodata", "not reached", "outside DEM", "outside DEM")
    assert t.state == ("flooded", "", "", "", "")
    for k in range(1, 5):
        assert math.isnan(t.onset_stage[k]) and math.isnan(t.depth[k]) and math.isnan(t.freeboard[k])
        assert t.sill_row[k] == -1 and t.route_cells[k].shape == (0, 2) and t.sill(k) is None
        assert t.record(k)["onset_stage"] is None
    assert not math.isnan(t.ground_elevation[0])


def test_assets_from_another_dem_are_refused(ridge):
    dem, _, result = ridge
    other = dem_from_array(np.zeros((3, 3), np.float32))
    with pytest.raises(InvalidParameter, match="read them again"):
        assess_assets(one(other, 1, 1), dem, result, 1.0)
    with pytest.raises(InvalidParameter, match="not computed on this DEM"):
        assess_assets(one(other, 1, 1), other, result, 1.0)
    with pytest.raises(InvalidParameter, match="water level"):
        assess_assets(one(dem, 1, 1), dem, result, math.nan)


# --------------------------------------------------------------------------
# Reading CSV and GeoJSON
# --------------------------------------------------------------------------


@pytest.fixture
def flat_dem():
    return dem_from_array(np.zeros((6, 8), dtype=np.float32))


def write(tmp_path: Path, name: str, text: str) -> Path:
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


def test_csv_with_x_y_keeps_kind_and_extra_columns(tmp_path, flat_dem):
    path = write(
        tmp_path, "a.csv",
        "# exported from the asset register\n"
        " Name , X,Y ,Kind,Owner\n"
        "Pump house,500002.5,4999997.5,pumping_station,Water Co\n"
        "\n"
        ",500007.25,4999994.75,,\n",
    )
    assets = read_assets(path, flat_dem)
    assert len(assets) == 2 and assets.source == "'a.csv'"
    a, b = assets
    assert (a.name, a.kind, a.row, a.col, a.status) == ("Pump house", "pumping_station", 2, 2, "ok")
    assert a.properties == {"Owner": "Water Co"}
    assert (a.x, a.y) == (500002.5, 4999997.5)
    # A blank name gets its row number; the point (7.25, 5.25 m in) is cell (5, 7).
    assert (b.name, b.kind, b.row, b.col) == ("asset 2", "", 5, 7)


@pytest.mark.parametrize("names", [("lon", "lat"), ("Longitude", "LATITUDE"), ("lng", "lat")])
def test_csv_with_lon_lat_is_reprojected(tmp_path, flat_dem, names):
    # Expected: the centre of cell (1, 3), taken to WGS 84 with pyproj.
    lon, lat = pyproj.Transformer.from_crs(UTM33, "EPSG:4326", always_xy=True).transform(*centre(1, 3))
    path = write(tmp_path, "ll.csv", f"name,{names[0]},{names[1]}\nweir,{lon!r},{lat!r}\n")
    a = read_assets(path, flat_dem)[0]
    assert (a.row, a.col, a.status) == (1, 3, "ok")
    assert a.x == pytest.approx(centre(1, 3)[0], abs=1e-6)
    assert (a.lon, a.lat) == (lon, lat)


def test_csv_with_semicolons_and_decimal_commas(tmp_path, flat_dem):
    path = write(tmp_path, "eu.csv", "name;x;y\nSchleuse;500002,5;4999997,5\n")
    a = read_assets(path, flat_dem)[0]
    assert (a.name, a.row, a.col) == ("Schleuse", 2, 2)


def test_csv_x_y_in_another_crs(tmp_path, flat_dem):
    # The centre of cell (4, 6), given in ETRS89-LAEA (EPSG:3035) via pyproj.
    x, y = pyproj.Transformer.from_crs(UTM33, "EPSG:3035", always_xy=True).transform(*centre(4, 6))
    path = write(tmp_path, "laea.csv", f"name,x,y\nmast,{x!r},{y!r}\n")
    a = read_assets(path, flat_dem, crs=3035)[0]
    assert (a.row, a.col) == (4, 6)
    # crs only means something for x/y columns.
    lonlat = write(tmp_path, "ll.csv", "name,lon,lat\nmast,15,45\n")
    with pytest.raises(InvalidParameter, match="omit crs"):
        read_assets(lonlat, flat_dem, crs=3035)
    with pytest.raises(InvalidParameter, match="omit crs"):
        read_assets({"type": "FeatureCollection", "features": []}, flat_dem, crs=3035)
    with pytest.raises(InvalidParameter, match="not a CRS"):
        read_assets(path, flat_dem, crs="EPSG:999999")


def feature(name, coords, **props):
    return {"type": "Feature", "properties": {"Name": name, **props},
            "geometry": {"type": "Point", "coordinates": coords}}


def test_geojson_in_wgs84(tmp_path, flat_dem):
    to_ll = pyproj.Transformer.from_crs(UTM33, "EPSG:4326", always_xy=True)
    fc = {"type": "FeatureCollection", "features": [
        feature("school", list(to_ll.transform(*centre(0, 0))), kind="school", pupils=240),
        feature("depot", list(to_ll.transform(*centre(5, 7))) + [12.0]),
    ]}
    path = write(tmp_path, "a.geojson", json.dumps(fc))
    a, b = read_assets(path, flat_dem)
    assert (a.name, a.kind, a.row, a.col) == ("school", "school", 0, 0)
    assert a.properties == {"pupils": 240}
    assert (b.name, b.kind, b.row, b.col, b.status) == ("depot", "", 5, 7, "ok")
    # The same object as a dict and as text.
    assert read_assets(fc, flat_dem)[1].col == 7
    assert read_assets(json.dumps(fc), flat_dem)[1].col == 7


def test_geojson_in_another_epsg(tmp_path, flat_dem):
    # Web Mercator coordinates of cell (3, 4)'s centre (pyproj), with a legacy
    # named-CRS member as GeoJSON 2008 wrote it.
    x, y = pyproj.Transformer.from_crs(UTM33, "EPSG:3857", always_xy=True).transform(*centre(3, 4))
    fc = {"type": "FeatureCollection",
          "crs": {"type": "name", "properties": {"name": "urn:ogc:def:crs:EPSG::3857"}},
          "features": [{"type": "Feature", "id": "hydrant 7", "properties": None,
                        "geometry": {"type": "Point", "coordinates": [x, y]}}]}
    a = read_assets(write(tmp_path, "m.json", json.dumps(fc)), flat_dem)[0]
    assert (a.name, a.row, a.col) == ("hydrant 7", 3, 4)
    assert "Pseudo-Mercator" in read_assets(fc, flat_dem).source_crs


def test_the_demo_geojson_and_csv_assets_agree():
    dem = read_dem(DEMO / "riverbend.tif")
    a_csv = read_assets(DEMO / "riverbend_assets.csv", dem)
    a_json = read_assets(DEMO / "riverbend_assets.geojson", dem)
    assert [a.name for a in a_csv] == [a.name for a in a_json]
    # The GeoJSON's 7-decimal lon/lat put each point within a few cm of the CSV's.
    for a, b in zip(a_csv, a_json):
        assert math.hypot(a.x - b.x, a.y - b.y) < 0.05


@pytest.mark.parametrize(
    "name, text, match",
    [
        ("a.csv", "name,east,north\nx,1,2\n",
         r"no pair of coordinate columns \(found: 'name', 'east', 'north'\).*'x' and 'y'.*'lon' and 'lat'"),
        ("a.csv", "label,x,y\nx,1,2\n", r"no 'name' column \(found: 'label', 'x', 'y'\)"),
        ("a.csv", "name,x,y\na,500001,4999999\nb,abc,4999999\n", r"'x' on line 3 \(asset row 2\) is 'abc'"),
        ("a.csv", "# note\nname,x,y\na,500001,\n", r"'y' on line 3 \(asset row 1\) is empty"),
        ("a.csv", "name,x,y\na,nan,4999999\n", "finite"),
        ("a.csv", "name,x,y\n\n", "no asset rows"),
        ("a.csv", "# only a comment\n", "no header"),
        ("a.csv", "name,x,X\na,1,2\n", "twice"),
        ("a.csv", "name,lon,longitude\na,1,2\n", "mean the same"),
        ("a.csv", "name,x,y\na,1,2,3\n", "line 2 has 4 fields"),
        ("a.csv", "name,lon,lat\nmast,500001,4999999\n", "not a longitude, latitude"),
        ("a.geojson", '{"type": "FeatureCollection", "features": [', "not valid JSON"),
        ("a.geojson", "[1, 2]", "not a GeoJSON object"),
        ("a.geojson", '{"type": "Point", "coordinates": [1, 2]}', "FeatureCollection of Point"),
        ("a.geojson", '{"type": "FeatureCollection", "features": []}', "no features"),
        ("a.geojson",
         '{"type": "FeatureCollection", "features": [{"type": "Feature", "properties": {"name": "bank"},'
         ' "geometry": {"type": "LineString", "coordinates": [[15, 45], [15.1, 45]]}}]}',
         r"feature 0 \('bank'\) is a LineString, not a Point"),
        ("a.geojson",
         '{"type": "FeatureCollection", "features": [{"type": "Feature", "properties": {},'
         ' "geometry": null}]}', "no geometry"),
        ("a.geojson",
         '{"type": "Feature", "properties": {}, "geometry": {"type": "Point", "coordinates": ["a", 1]}}',
         "give \\[x, y\\] numbers"),
        ("a.geojson",
         '{"type": "Feature", "properties": {}, "geometry": {"type": "Point", "coordinates": [500001, 4999999]}}',
         "not a longitude, latitude"),
        ("a.geojson", '{"type": "Feature", "crs": {"type": "link"}, "properties": {}, "geometry": null}',
         "'crs' member"),
    ],
)
def test_bad_asset_files_get_clear_errors(tmp_path, flat_dem, name, text, match):
    with pytest.raises(InvalidAssets, match=match) as info:
        read_assets(write(tmp_path, name, text), flat_dem)
    assert isinstance(info.value, SillmarkError) and isinstance(info.value, ValueError)


def test_missing_empty_and_non_utf8_files(tmp_path, flat_dem):
    with pytest.raises(InvalidAssets, match="does not exist"):
        read_assets(tmp_path / "none.csv", flat_dem)
    with pytest.raises(InvalidAssets, match="empty"):
        read_assets(write(tmp_path, "e.csv", ""), flat_dem)
    bad = tmp_path / "latin.csv"
    bad.write_bytes("name,x,y\nM\xfchle,1,2\n".encode("latin-1"))
    with pytest.raises(InvalidAssets, match="not UTF-8"):
        read_assets(bad, flat_dem)
    with pytest.raises(InvalidAssets, match="file path"):
        read_assets(42, flat_dem)


def test_too_many_assets(tmp_path, flat_dem):
    rows = "".join(f"a{k},500001,4999999\n" for k in range(5))
    with pytest.raises(InvalidAssets, match="holds 5 assets, more than the limit of 3"):
        read_assets(write(tmp_path, "many.csv", "name,x,y\n" + rows), flat_dem, max_assets=3)
    fc = {"type": "FeatureCollection", "features": [feature("p", [15.0, 45.0])] * 4}
    with pytest.raises(InvalidAssets, match="holds 4 assets"):
        read_assets(fc, flat_dem, max_assets=3)
    assert len(read_assets(write(tmp_path, "ok.csv", "name,x,y\n" + rows), flat_dem, max_assets=5)) == 5
    with pytest.raises(InvalidParameter, match="max_assets"):
        read_assets(fc, flat_dem, max_assets=0)


# --------------------------------------------------------------------------
# The demo site
# --------------------------------------------------------------------------


@pytest.fixture(scope="module")
def demo():
    dem = read_dem(DEMO / "riverbend.tif")
    outlets = build_outlets(dem, ["edge", str(DEMO / "river.geojson")])
    return dem, outlets, analyse_site(dem, outlets)


BEHIND_THE_BANK = (
    "Caddlewick Primary School",
    "Alder Court Care Home",
    "Mill Lane Substation",
    "Carr Lane Pumping Station",
    "Caddlewick Health Centre",
)


def test_demo_assets_behind_the_bank_wait_for_the_levee_notch(demo):
    # Source: demo_dem/README.md (the demo's construction): these five assets
    # have onset stage 47.60 m, set by the flood-bank notch at col 1000,
    # row 820, 6 m long.
    dem, outlets, result = demo
    table = assess_assets(read_assets(DEMO / "riverbend_assets.csv", dem), dem, result, 47.0)
    assert len(table) == 14 and set(table.status) == {"ok"}
    for name in BEHIND_THE_BANK:
        k = table.name.index(name)
        assert table.onset_stage[k] == np.float32(47.60)
        assert table.sill_elevation[k] == np.float32(47.60)
        assert abs(table.sill_col[k] - 1000) <= 3 and abs(table.sill_row[k] - 820) <= 5
        # Ground 46.26-46.86 m (README table) is below 47.0, so at 47.0 they are shielded.
        assert table.state[k] == "shielded"
    # The notch is a flat stretch of crest: raising the one cell the school's
    # route crosses lets the water round it, over the next notch cell at 47.60.
    school = table.assets[table.name.index(BEHIND_THE_BANK[0])]
    w = raise_sill(dem, outlets, result, school, 1.0, across_crest=False)
    assert w.onset_after == w.onset_before == np.float32(47.60)
    assert (w.sill_after.row, w.sill_after.col) != (w.raised.row, w.raised.col)
    assert w.sill_after.elevation == np.float32(47.60)
    # A barrier along the whole flat crest of the notch lifts the onset stage
    # to the next lowest way in, which then controls: above 47.60 m, below the
    # bank's crest (48.20-48.40 m, demo_dem/README.md).
    w = raise_sill(dem, outlets, result, school, 1.0)
    assert w.raised_cells > 1
    assert np.float32(47.60) < w.onset_after < 48.20
    assert w.sill_after.elevation == w.onset_after


# --------------------------------------------------------------------------
# Export
# --------------------------------------------------------------------------


def read_csv(path: Path) -> tuple[list[str], list[dict]]:
    lines = path.read_text(encoding="utf-8").splitlines()
    comments = [ln for ln in lines if ln.startswith("#")]
    rows = list(csv.DictReader(ln for ln in lines if not ln.startswith("#")))
    return comments, rows


@pytest.fixture
def bowl_table():
    dem, _, result = site(BOWL)
    assets = assets_from_points(
        dem, [("pump", *centre(3, 3), "pumping_station"), ("far", 0.0, 0.0), ("rim", *centre(5, 2))]
    )
    return assess_assets(assets, dem, result, 2.0)


def test_csv_export_starts_with_its_header_and_carries_units(tmp_path, bowl_table):
    # The caution and the level live in the folder's README.txt; the CSV opens
    # in any reader with its header on the first line.
    path = write_assets_csv(bowl_table, tmp_path / "assets.csv")
    comments, rows = read_csv(path)
    assert comments == []
    assert path.read_text(encoding="utf-8").splitlines()[0].startswith("name,kind,status,state")
    pump, far, rim = rows
    assert pump["name"] == "pump" and pump["kind"] == "pumping_station"
    assert pump["state"] == "shielded" and pump["onset_stage_m"] == "3"
    assert pump["ground_elevation_m"] == "1" and pump["freeboard_m"] == "1"
    assert pump["depth_m"] == "0" and pump["depth_if_reached_m"] == "1"
    assert (pump["sill_row"], pump["sill_col"], pump["sill_elevation_m"]) == ("1", "3", "3")
    assert pump["sill_is_own_cell"] == "false" and pump["x_m"] == "500003.5"
    assert far["status"] == "outside DEM" and far["onset_stage_m"] == "" and far["row"] == ""
    # The rim cell (5 m) is its own controlling point and dry at 2 m.
    assert rim["state"] == "dry" and rim["sill_is_own_cell"] == "true"
    assert not [p for p in tmp_path.iterdir() if p.name != "assets.csv"]  # no temporary left


def test_csv_export_in_feet_names_the_unit():
    dem = dem_from_array(np.array(BOWL, np.float32), vertical_unit="ft")
    result = analyse_site(dem, build_outlets(dem))
    table = assess_assets(one(dem, 3, 3), dem, result, 2.5)
    columns = asset_columns(table)
    assert "onset_stage_ft" in columns and "freeboard_ft" in columns
    assert columns["freeboard_ft"] == [0.5] and columns["depth_if_reached_ft"] == [1.5]
    assert not any(c.endswith("_m") and c.startswith(("onset", "depth", "ground")) for c in columns)


def test_decimal_figures_on_the_demo_scale(tmp_path):
    # 47.6 - 47.0 is 0.5999985 in float32 arithmetic; the file says 0.6.
    z = np.full((3, 3), 47.6, np.float32)
    z[1, 1] = 46.69
    dem = dem_from_array(z)
    result = analyse_site(dem, build_outlets(dem))
    table = assess_assets(one(dem, 1, 1), dem, result, 47.0)
    _, rows = read_csv(write_assets_csv(table, tmp_path / "a.csv"))
    assert rows[0]["freeboard_m"] == "0.6" and rows[0]["depth_if_reached_m"] == "0.31"
    assert rows[0]["onset_stage_m"] == "47.6" and rows[0]["ground_elevation_m"] == "46.69"


def test_property_names_that_clash_with_output_columns_are_prefixed(tmp_path, flat_dem):
    path = write(tmp_path, "p.csv", "name,x,y,state,Depth_m\na,500001,4999999,NSW,3\n")
    dem = flat_dem
    result = analyse_site(dem, build_outlets(dem))
    columns = asset_columns(assess_assets(read_assets(path, dem), dem, result, 1.0))
    assert columns["input_state"] == ["NSW"] and columns["input_Depth_m"] == ["3"]
    assert columns["state"] == ["flooded"]


def test_geojson_export_points_routes_and_sills(tmp_path, bowl_table):
    path = write_assets_geojson(bowl_table, tmp_path / "assets.geojson")
    fc = json.loads(path.read_text(encoding="utf-8"))
    assert fc["type"] == "FeatureCollection" and "crs" not in fc
    assert fc["caution"] == SCREENING_CAUTION and fc["water_level"] == {"value": 2.0, "unit": "m"}
    kinds = [f["properties"]["feature_kind"] for f in fc["features"]]
    # Three assets; the pump and the rim cell have figures, so each gets a
    # route and a sill (the rim cell's route is 2 cells: rim -> margin).
    assert kinds == [FEATURE_ASSET] * 3 + [FEATURE_ROUTE, FEATURE_SILL] * 2
    assert all(f["properties"]["caution"] == SCREENING_CAUTION for f in fc["features"])
    pump = fc["features"][0]
    assert pump["geometry"]["type"] == "Point" and pump["properties"]["onset_stage_m"] == 3
    far = fc["features"][1]["properties"]
    assert far["status"] == "outside DEM" and far["onset_stage_m"] is None
    to_ll = pyproj.Transformer.from_crs(UTM33, "EPSG:4326", always_xy=True)
    route = fc["features"][3]
    assert route["geometry"]["type"] == "LineString" and route["properties"]["name"] == "pump"
    line = np.array(route["geometry"]["coordinates"])
    # From an outlet (the 0 m margin) over the notch (1, 3) to the pump at (3, 3);
    # the vertices are the route's cell centres (none dropped: the route zigzags).
    cells = bowl_table.route_cells[0]
    assert bowl_table.dem.elevation[cells[0][0], cells[0][1]] == 0
    assert tuple(cells[-1]) == (3, 3) and NOTCH in [tuple(c) for c in cells]
    expected = np.column_stack(to_ll.transform(*bowl_table.dem.xy(cells[:, 0], cells[:, 1])))
    assert line.shape == expected.shape and np.allclose(line, expected, atol=1e-8)
    assert route["properties"]["direction"] == "outlet to asset"
    sill = fc["features"][4]
    assert np.allclose(sill["geometry"]["coordinates"], to_ll.transform(*centre(*NOTCH)), atol=1e-8)
    assert sill["properties"]["sill_elevation_m"] == 3
    # Without routes and sills only the asset points remain.
    bare = json.loads(write_assets_geojson(bowl_table, tmp_path / "b.geojson", routes=False,
                                           sills=False).read_text(encoding="utf-8"))
    assert [f["properties"]["feature_kind"] for f in bare["features"]] == [FEATURE_ASSET] * 3


def test_straight_runs_of_a_route_become_one_segment(tmp_path):
    # A 1-cell-wide channel 9 cells long at 0 m runs from the outlet on the
    # north edge down to a cell at the south end; the route is one straight
    # run, so the line has just its two ends.
    z = np.full((10, 3), 9.0, np.float32)
    z[:, 1] = 0.0
    dem, _, result = site(z, north_edge)
    table = assess_assets(one(dem, 9, 1), dem, result, 0.0)
    assert table.route_cells[0].shape == (10, 2)
    fc = json.loads(write_assets_geojson(table, tmp_path / "r.geojson").read_text(encoding="utf-8"))
    assert len(fc["features"][1]["geometry"]["coordinates"]) == 2
    assert fc["features"][1]["properties"]["route_cells"] == 10
    # Ten cells in a straight line: nine side steps of one cell (1 m here) = 9 m
    # on the ground, in the asset's row and on its route feature.
    cell = dem.cell_size[1]
    assert fc["features"][0]["properties"]["route_length_m"] == pytest.approx(9 * cell)
    assert fc["features"][1]["properties"]["route_length_m"] == pytest.approx(9 * cell)


def test_a_failed_write_keeps_the_old_file(tmp_path, bowl_table):
    path = tmp_path / "assets.geojson"
    path.write_text("old", encoding="utf-8")
    broken_asset = dataclasses.replace(bowl_table.assets[0], properties={"bad": object()})
    assets = Assets(items=(broken_asset,), source="test", source_crs="", dem_shape=bowl_table.dem.shape)
    dem = bowl_table.dem
    table = assess_assets(assets, dem, analyse_site(dem, build_outlets(dem)), 2.0)
    with pytest.raises(TypeError):
        write_assets_geojson(table, path)
    assert path.read_text(encoding="utf-8") == "old"
    assert [p.name for p in tmp_path.iterdir()] == ["assets.geojson"]


def test_raising_a_sill_keeps_the_culverts_of_the_flood():
    # The what-if of a controlling sill floods again with the same culverts.
    # Hand-worked, 5 x 7 cells of 9 m with the west column at 0 m (outlets):
    # a corridor along row 2, (2, 1) at 1, the sill (2, 2) at 3, (2, 3) and
    # (2, 4) at 1, the place (2, 5) at 0; a culvert from (2, 1) to (2, 4),
    # invert 5. The place's onset stage is 3 (over the sill; the culvert would
    # need 5). Raising the sill by 4 m to 7: water comes through the culvert
    # at 5, not over the sill at 7.
    from affine import Affine

    from sillmark.engine.culverts import culvert_edges
    from sillmark.engine.flood import priority_flood

    z = np.full((5, 7), 9.0, np.float32)
    z[:, 0] = 0.0
    z[2, 1:6] = [1.0, 3.0, 1.0, 1.0, 0.0]
    dem = dem_from_array(z, transform=Affine(5, 0, 500000, 0, -5, 5000000))
    outlets = np.zeros(z.shape, bool)
    outlets[:, 0] = True
    edges = culvert_edges(z.shape, [2], [1], [2], [4], [5.0])
    result = priority_flood(dem.elevation, outlets, row_areas=dem.row_areas,
                            transform=dem.transform, culverts=edges)
    assert result.onset_stage[2, 5] == 3.0
    w = raise_sill(dem, outlets, result, (2, 5), 4.0)
    assert w.onset_after == 5.0
