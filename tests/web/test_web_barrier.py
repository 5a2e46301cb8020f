"""The barrier planner in the browser app, on a hand-worked levee with a gap.

The site ("Gapford polder", invented): 12 × 14 cells of 2 m in UTM zone 33N.
Floodplain ground at 10.00 m; a levee ring at 13.00 m on rows 2–9, cols 2–9
round a polder at 9.00 m (rows 3–8, cols 3–8); the east wall (col 9) has a gap
at rows 4–6 whose ground is 11.00 m. The DEM edge is the outlet.

Working, by hand:
- The polder fills through the gap: the lowest path from the edge to the barn
  (row 5, col 5) runs over the floodplain (10.00) and through the gap (11.00),
  so the barn's onset stage is 11.00 m.
- At a target level L = 12.00 m the cells below L are the floodplain, the gap
  and the polder; the levee (13.00) is not. Separating the barn from the edge
  means closing the gap. The gap column (col 9, rows 4–6) does it with 3 cells.
  Any cut inside (col 8) must also cover rows 3 and 7, because the gap cells
  touch (3, 8) and (7, 8) diagonally: 5 cells; outside (col 10) likewise 5.
  So the shortest barrier is the 3 gap cells.
- Its length: the line through the three cell centres is 2 steps of 2 m, plus
  half a step at each end to reach the levee: 4 + 1 + 1 = 6.0 m.
- With the gap raised to 12.00 m, every path to the barn crosses 12.00 (gap) or
  13.00 (levee): the new onset stage is 12.00 m, at least L.
- The "Bank hut" (row 1, col 12) sits on floodplain at 10.00 m beside edge
  outlets at 10.00 m: water stands against it from an outlet at any level above
  10.00 m, so no barrier can keep it dry.
"""

from __future__ import annotations

import numpy as np
import pytest
from affine import Affine

from sillmark.engine.flood import OUTLET_CODE, analyse_site
from sillmark.grid.dem import read_dem
from sillmark.grid.edits import read_edits
from sillmark.grid.outlets import build_outlets
from sillmark.products.barrier_planner import plan_barrier
from tests.rasters import write_raster
from tests.web_support import Client, analysed_site, lonlat, make_app

WEST, NORTH, CELL = 510_000.0, 5_010_000.0, 2.0
GAP = [(4, 9), (5, 9), (6, 9)]
BARN, HUT = (5, 5), (1, 12)


def centre(row: int, col: int) -> tuple[float, float]:
    return WEST + (col + 0.5) * CELL, NORTH - (row + 0.5) * CELL


def polder_elevation() -> np.ndarray:
    z = np.full((12, 14), 10.0, dtype=np.float32)
    z[2:10, 2:10] = 13.0  # the levee ring
    z[3:9, 3:9] = 9.0  # the polder
    for r, c in GAP:
        z[r, c] = 11.0  # the gap in the east wall
    return z


def polder_site(folder):
    """(app, client, site_id, tif): the Gapford polder analysed, with its two assets."""
    tif = write_raster(folder / "gapford.tif", polder_elevation(),
                       transform=Affine(CELL, 0, WEST, 0, -CELL, NORTH), nodata=-9999.0)
    app = make_app(folder / "data")
    client = Client(app)
    site_id = analysed_site(client, tif, assets=(
        "name,kind,x,y\n"
        f"Polder barn,barn,{centre(*BARN)[0]},{centre(*BARN)[1]}\n"
        f"Bank hut,hut,{centre(*HUT)[0]},{centre(*HUT)[1]}\n"))
    return app, client, site_id, tif


@pytest.fixture(scope="module")
def polder(tmp_path_factory):
    _, client, site_id, tif = polder_site(tmp_path_factory.mktemp("polder"))
    return client, site_id, tif


def plan(client, site_id, **body):
    return client.post(f"/api/sites/{site_id}/barrier", json=body)


def test_served_barrier_closes_the_gap_as_the_planner_does(polder):
    client, site_id, tif = polder
    r = plan(client, site_id, asset=0, level=12.0)
    assert r.status_code == 200, r.get_json()
    b = r.get_json()
    assert b["possible"] and b["needed"] and b["onset_stage"] == pytest.approx(11.0)
    assert b["cells"] == 3 and b["pieces"] == 1
    assert b["length"] == pytest.approx(6.0) and b["length_unit"] == "m"  # working in the docstring
    assert "6.0 m" in b["message"] and "3 cells" in b["message"]
    # The same cells as the library planner run directly on the DEM.
    dem = read_dem(tif)
    outlets = analyse_site(dem, build_outlets(dem, ("edge",))).flood_tree == OUTLET_CODE
    place = np.zeros(dem.shape, bool)
    place[BARN] = True
    direct = plan_barrier(dem.elevation, outlets, place, 12.0, cell_size=CELL)
    assert sorted(zip(direct.rows.tolist(), direct.cols.tolist())) == GAP
    edits = read_edits(b["edits"], dem)
    (edit,) = edits.items
    assert edit.kind == "barrier" and edit.level == pytest.approx(12.0)
    assert sorted(zip(edit.rows.tolist(), edit.cols.tolist())) == GAP
    assert b["edit_cells"] == 3
    line = b["line"]["coordinates"][0]
    assert len(line) == 3 and line[0] == pytest.approx(list(lonlat(*centre(*GAP[0]))), abs=1e-8)


def test_applying_the_served_barrier_raises_the_onset_stage_to_the_level(polder, tmp_path):
    from sillmark.run import analyse

    client, site_id, tif = polder
    b = plan(client, site_id, asset=0, level=12.0).get_json()
    dem = read_dem(tif)
    done = analyse(dem, build_outlets(dem, ("edge",)), tmp_path / "out", edits=b["edits"],
                   derived=False)
    assert float(done.result.onset_stage[BARN]) >= 12.0  # was 11.00 m (docstring)
    assert float(done.result.onset_stage[BARN]) == pytest.approx(12.0)


def test_a_clicked_location_gets_the_same_barrier(polder):
    client, site_id, _ = polder
    lon, lat = lonlat(*centre(*BARN))
    b = plan(client, site_id, lon=lon, lat=lat, level=12.0).get_json()
    assert (b["row"], b["col"]) == BARN and b["cells"] == 3 and b["length"] == pytest.approx(6.0)
    assert "the location at x 510011.0 m" in b["name"]


def test_no_barrier_for_a_place_an_outlet_touches(polder):
    client, site_id, _ = polder
    b = plan(client, site_id, asset=1, level=12.0).get_json()
    assert not b["possible"] and b["cells"] == 0 and b["line"] is None and b["edits"] is None
    assert "No barrier can keep it dry" in b["message"] and "outlet" in b["message"]


def test_a_level_at_or_below_the_onset_stage_needs_no_barrier(polder):
    client, site_id, _ = polder
    b = plan(client, site_id, asset=0, level=10.5).get_json()
    assert b["possible"] and not b["needed"] and b["edits"] is None
    assert "stays dry" in b["message"]


@pytest.mark.parametrize("body,fragment", [
    ({"asset": 0}, "give the target level"),
    ({"asset": 0, "level": "high"}, "finite number"),
    ({"asset": 7, "level": 12}, "there is no asset 7"),
    ({"level": 12}, "as an asset index"),
    ({"lon": 0.0, "lat": 0.0, "level": 12}, "outside the DEM"),
])
def test_bad_barrier_requests_get_a_clear_message(polder, body, fragment):
    client, site_id, _ = polder
    r = plan(client, site_id, **body)
    assert r.status_code == 400, r.get_json()
    assert fragment in r.get_json()["error"]


def test_a_drawn_polygon_keeps_every_cell_it_covers_dry(polder, tmp_path):
    # The polygon covers the cell centres of rows 3-8, cols 3-9: the polder and
    # the gap itself (and three levee cells), 6 x 7 = 42 cells. Working: the gap
    # is now part of the place, so the wall cannot stand in it; the gap cells
    # (4-6, 9) touch the floodplain (10.00 m) at col 10, rows 3-7 (rows 3 and 7
    # diagonally), and every other side of the place is levee (13.00 m). The
    # shortest barrier is those 5 floodplain cells, a straight run 5 cells long:
    # 4 steps of 2 m plus half a step at each end, 10.0 m. The first of the
    # place's cells to get wet is on the gap or in the polder, at 11.00 m.
    from sillmark.run import analyse

    client, site_id, tif = polder
    corners = [centre(3, 3), centre(3, 9), centre(8, 9), centre(8, 3)]
    ring = [[x + dx * CELL / 4, y + dy * CELL / 4] for (x, y), (dx, dy) in
            zip(corners, [(-1, 1), (1, 1), (1, -1), (-1, -1)])]
    polygon = {"type": "Polygon", "coordinates": [[*map(list, (lonlat(*p) for p in ring)),
                                                   list(lonlat(*ring[0]))]]}
    r = plan(client, site_id, polygon=polygon, level=12.0)
    assert r.status_code == 200, r.get_json()
    b = r.get_json()
    assert b["place_cells"] == 42 and b["onset_stage"] == pytest.approx(11.0)
    assert b["possible"] and b["needed"] and b["cells"] == 5
    assert b["length"] == pytest.approx(10.0)
    assert "drawn place of 42 cells" in b["name"]
    dem = read_dem(tif)
    (edit,) = read_edits(b["edits"], dem).items
    assert sorted(zip(edit.rows.tolist(), edit.cols.tolist())) == [(r, 10) for r in range(3, 8)]
    done = analyse(dem, build_outlets(dem, ("edge",)), tmp_path / "out", edits=b["edits"],
                   derived=False)
    s = done.result.onset_stage
    assert float(s[3:9, 3:10].min()) >= 12.0  # was 11.00 m on the gap and in the polder
    # The same polygon in the DEM's own CRS, named as the outlet files name it.
    named = {"type": "Polygon", "crs": {"type": "name", "properties": {"name": "EPSG:32633"}},
             "coordinates": [[*ring, ring[0]]]}
    again = plan(client, site_id, polygon=named, level=12.0).get_json()
    assert again["cells"] == 5 and again["place_cells"] == 42


@pytest.mark.parametrize("polygon,fragment", [
    ({"type": "LineString", "coordinates": [[0.0, 0.0], [0.1, 0.1]]}, "as a Polygon"),
    ({"type": "Polygon", "coordinates": [[[0.0, 0.0], [0.1, 0.0], [0.1, 0.1], [0.0, 0.0]]]},
     "covers no cell"),
    ([1, 2], "GeoJSON geometry"),
])
def test_a_bad_polygon_gets_a_clear_message(polder, polygon, fragment):
    client, site_id, _ = polder
    r = plan(client, site_id, polygon=polygon, level=12)
    assert r.status_code == 400, r.get_json()
    assert fragment in r.get_json()["error"]


def test_a_polygon_given_as_a_server_path_is_not_opened(polder, tmp_path):
    # A valid polygon file on the server: its path as the polygon's text must be
    # refused as text that is not JSON, never read as a file.
    import json

    client, site_id, _ = polder
    ring = [list(lonlat(*centre(r, c))) for r, c in ((3, 3), (3, 8), (8, 8), (8, 3), (3, 3))]
    path = tmp_path / "place.geojson"
    path.write_text(json.dumps({"type": "Polygon", "coordinates": [ring]}))
    for r in (plan(client, site_id, polygon=str(path), level=12),
              client.post(f"/api/sites/{site_id}/barrier",
                          data={"polygon": str(path), "level": "12"})):
        assert r.status_code == 400, r.get_json()
        assert "not valid JSON" in r.get_json()["error"]
