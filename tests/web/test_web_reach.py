"""The web app's river profile and cut-off stage (sillmark.web.reach).

Two hand-worked sites (the same as in tests/products/test_cutoff.py and
tests/products/test_profile.py, on 10 m cells in UTM zone 33N) are uploaded,
given their GeoJSON inputs through the upload form and analysed by the app's own
worker; the figures and map tiles it serves must equal the result files the
run wrote and the values worked by hand below.
"""

from __future__ import annotations

import io
import json
import math
from pathlib import Path

import numpy as np
import pyproj
import pytest
import rasterio
from affine import Affine

from sillmark.web import layout, render
from tests.rasters import write_raster
from tests.web_support import Client, confirm, make_app, read_png, upload_dem

CELL = 10.0
WEST, NORTH = 500_000.0, 5_000_030.0
UTM = {"type": "name", "properties": {"name": "EPSG:32633"}}


def centre(row: float, col: float) -> list[float]:
    return [WEST + (col + 0.5) * CELL, NORTH - (row + 0.5) * CELL]


def collection(*features) -> bytes:
    return json.dumps({"type": "FeatureCollection", "crs": UTM, "features": [
        {"type": "Feature", "properties": props, "geometry": {"type": kind, "coordinates": xy}}
        for kind, xy, props in features]}).encode()


# The village (hand-worked in tests/products/test_cutoff.py): the river is column 5,
#   row 1 is the road: refuge (9) - road (7) - hollow (3) - road (6) - village (8) - river.
# Onset stages: row 1 = [9, 7, 3, 6, 8, 0]. Along the road the village's best route
# to the refuge crosses the hollow: min(8, 6, 3, 7, 9) = 3, so it is cut off at 3
# and floods at 8 (island window 3 <= h < 8), the last route going under at the
# hollow (row 1, col 2). At h = 5 the road cells (1, 3) (k = 3, s = 6) and (1, 4)
# (k = 3, s = 8) are cut off; (1, 2) is flooded (s = 3) and (1, 1) still has its
# route (k = 7).
VILLAGE = np.array([[9, 9, 2, 2, 2, 0],
                    [9, 7, 3, 6, 8, 0],
                    [9, 9, 9, 9, 9, 0]], dtype=np.float32)
RIVER = collection(("LineString", [centre(0, 5), centre(2, 5)], {}))
REFUGES = collection(("Point", centre(1, 0), {"name": "rest centre"}))
ROADS = collection(("LineString", [centre(1, 0), centre(1, 5)], {}))
VILLAGE_ASSETS = f"name,kind,x,y\nMound village,village,{centre(1, 4)[0]},{centre(1, 4)[1]}\n"

# The sloped channel (hand-worked in tests/products/test_profile.py): the river
# along row 0 falls from 10 at column 0 to 5 at column 5 (W0 = 10 - col); row 0 is
# one below the profile, row 1 a ridge one above it, row 2 a bowl half a unit
# above it. Onset offset: row 0 = -1, rows 1 and 2 = +1 (over the ridge). At
# D = 0.75 the bowl is shielded; at D = 1 it is wet, W0 + 1 - z = 0.5 deep.
W0 = 10.0 - np.arange(6)
CHANNEL = np.vstack([W0 - 1.0, W0 + 1.0, W0 + 0.5]).astype(np.float32)
PROFILE = collection(("LineString", [centre(0, 0), centre(0, 5)], {}),
                     ("Point", centre(0, 0), {"level": 10.0, "name": "upper gauge"}),
                     ("Point", centre(0, 5), {"level": 5.0, "name": "lower gauge"}))
CHANNEL_ASSETS = f"name,kind,x,y\nBowl cottage,house,{centre(2, 3)[0]},{centre(2, 3)[1]}\n"


def site_with_reach(client, tmp_path, z, outlets, water, assets, reach):
    """Upload, confirm and analyse a site with assets and its reach inputs; (site id, results folder)."""
    tif = write_raster(tmp_path / f"site{len(list(tmp_path.glob('site*.tif')))}.tif", z, transform=Affine(CELL, 0, WEST, 0, -CELL, NORTH))
    site_id = upload_dem(client, tif).get_json()["site_id"]
    r = confirm(client, site_id, outlets=outlets, water=water)
    assert r.status_code == 202, r.get_data(as_text=True)
    r = client.post(f"/uploads/sites/{site_id}/assets",
                    data={"assets": (io.BytesIO(assets.encode()), "assets.csv")},
                    content_type="multipart/form-data")
    assert r.status_code == 201, r.get_data(as_text=True)
    r = client.post(f"/uploads/sites/{site_id}/reach", content_type="multipart/form-data",
                    data={k: (io.BytesIO(v), f"{k}.geojson") for k, v in reach.items()})
    assert r.status_code == 202, r.get_data(as_text=True)
    assert client.get(f"/api/sites/{site_id}/status").get_json()["state"] == "ready"
    run_id = client.get(f"/api/sites/{site_id}").get_json()["current_run"]
    results = layout.results_dir(Path(client.app.config["DATA_DIR"]), site_id, run_id)
    return site_id, results


def village_site(client, tmp_path):
    return site_with_reach(client, tmp_path, VILLAGE, ("file",), (RIVER, "river.geojson"),
                           VILLAGE_ASSETS, {"refuges": REFUGES, "roads": ROADS})


def channel_site(client, tmp_path):
    return site_with_reach(client, tmp_path, CHANNEL, ("edge",), None, CHANNEL_ASSETS,
                           {"profile": PROFILE})


@pytest.fixture(scope="module")
def village(tmp_path_factory):
    folder = tmp_path_factory.mktemp("village")
    client = Client(make_app(folder / "data"))
    return (client, *village_site(client, folder))


@pytest.fixture(scope="module")
def channel(tmp_path_factory):
    folder = tmp_path_factory.mktemp("channel")
    client = Client(make_app(folder / "data"))
    return (client, *channel_site(client, folder))


def _read(path):
    with rasterio.open(path) as ds:
        return ds.read(1, masked=True).filled(np.nan)


def _tile_cells(client, site_id, z):
    """Each tile's (x, y, row, col) of every pixel centre, placed here with pyproj."""
    w, s, e, n = client.get(f"/api/sites/{site_id}").get_json()["summary"]["lonlat_bounds"]
    x0, y0 = render.lonlat_to_tile(w, n, z)
    x1, y1 = render.lonlat_to_tile(e, s, z)
    t = pyproj.Transformer.from_crs("EPSG:3857", "EPSG:32633", always_xy=True)
    size = 2 * math.pi * 6378137.0 / 2**z
    centres = (np.arange(256) + 0.5) * size / 256
    for x in range(x0, x1 + 1):
        for y in range(y0, y1 + 1):
            mx, my = np.meshgrid(-math.pi * 6378137.0 + x * size + centres,
                                 math.pi * 6378137.0 - y * size - centres)
            gx, gy = t.transform(mx.ravel(), my.ravel())
            col = np.floor((np.asarray(gx) - WEST) / CELL).astype(int)
            row = np.floor((NORTH - np.asarray(gy)) / CELL).astype(int)
            yield x, y, row.reshape(256, 256), col.reshape(256, 256)


def test_village_island_window_served_equals_the_hand_worked_values(village):
    client, site_id, results = village
    stage = _read(results / "cutoff_stage.tif")
    assert stage[1].tolist()[1:5] == [7.0, 3.0, 3.0, 3.0]  # the road, worked above
    assert np.isnan(stage[0, 0])  # off the road
    described = client.get(f"/api/sites/{site_id}/reach").get_json()
    assert described["cutoff"]["roads"] is True and described["profile"] is None
    assert set(described["inputs"]) == {"refuges", "roads"}
    rows = client.get(f"/api/sites/{site_id}/reach/assets?level=5").get_json()["assets"]
    (village_row,) = rows
    assert village_row["cutoff_stage"] == float(stage[1, 4]) == 3.0
    assert (village_row["island_from"], village_row["island_to"]) == (3.0, 8.0)
    assert village_row["island_now"] is True
    assert village_row["cut_at"]["x"] == centre(1, 2)[0] and village_row["cut_at"]["y"] == centre(1, 2)[1]
    at_two = client.get(f"/api/sites/{site_id}/reach/assets?level=2").get_json()["assets"][0]
    assert at_two["island_now"] is False  # below its window: the road is still dry


def test_cut_off_tiles_mark_exactly_the_cells_the_files_give(village):
    client, site_id, results = village
    k = _read(results / "cutoff_stage.tif")
    s = _read(results / "onset_stage.tif")
    wet = np.where(np.isnan(s), np.inf, s)
    with np.errstate(invalid="ignore"):
        want_cells = (k <= 5.0) & (5.0 < wet)
    assert sorted(zip(*np.nonzero(want_cells))) == [(1, 3), (1, 4)]  # worked above
    seen = 0
    for x, y, row, col in _tile_cells(client, site_id, 19):
        r = client.get(f"/tiles/{site_id}/cutoff/5/19/{x}/{y}.png")
        assert r.status_code == 200
        png = read_png(r.get_data())
        inside = (row >= 0) & (row < 3) & (col >= 0) & (col < 6)
        want = np.zeros((256, 256), np.uint8)
        want[inside] = want_cells[row[inside], col[inside]]
        if png["colour_type"] == 3 and len(png["palette"]) == 2:
            got = png["pixels"]
        else:  # a tile with nothing cut off is the blank tile
            got = np.zeros((256, 256), np.uint8)
        assert np.count_nonzero(got != want) <= 20, (x, y)  # pixels on a cell edge may round
        seen += int(np.count_nonzero(got))
    assert seen > 0


def test_channel_onset_offset_and_profile_served_equal_the_files(channel):
    client, site_id, results = channel
    offset = _read(results / "onset_offset.tif")
    assert np.allclose(offset, [[-1] * 6, [1] * 6, [1] * 6])  # worked above
    described = client.get(f"/api/sites/{site_id}/reach").get_json()
    profile = described["profile"]
    assert [st["name"] for st in profile["stations"]] == ["upper gauge", "lower gauge"]
    assert [st["level"] for st in profile["stations"]] == [10.0, 5.0]
    assert profile["stations"][1]["chainage"] - profile["stations"][0]["chainage"] == pytest.approx(50.0)
    assert described["offset_range"] == [-1.0, 1.0] and described["cutoff"] is None
    (row,) = client.get(f"/api/sites/{site_id}/reach/assets?level=0").get_json()["assets"]
    assert row["onset_offset"] == float(offset[2, 3]) == 1.0


@pytest.mark.parametrize("d, bowl", [(0.75, "shielded"), (1.0, "flooded")])
def test_offset_tiles_threshold_the_onset_offset(channel, d, bowl):
    client, site_id, _ = channel
    codes = set()
    for x, y, row, col in _tile_cells(client, site_id, 19):
        r = client.get(f"/tiles/{site_id}/offset/{d}/19/{x}/{y}.png")
        assert r.status_code == 200
        png = read_png(r.get_data())
        if png["colour_type"] != 3:
            continue
        pick = (row == 2) & (col >= 1) & (col <= 4)  # the bowl, away from the map's edge
        codes |= set(np.unique(png["pixels"][pick]).tolist())
    if bowl == "shielded":
        assert codes <= {render.W_STRIPE, render.W_WASH} and codes
    else:
        # depth W0 + 1 - z = 0.5 everywhere in the bowl: one depth class
        (code,) = codes
        want = np.searchsorted(np.float32(render.DEPTH_BOUNDS_M), np.float32(0.5), side="right")
        assert code == render.W_DEPTH0 + want


def test_bad_reach_files_are_refused_in_words(village, channel):
    client, site_id, _ = channel
    r = client.post(f"/uploads/sites/{site_id}/reach", content_type="multipart/form-data",
                    data={"refuges": (io.BytesIO(b"name,x\nA,1\n"), "refuges.csv")})
    assert r.status_code == 400 and "GeoJSON" in r.get_json()["error"]
    lines = collection(("LineString", [centre(0, 0), centre(2, 2)], {}))
    r = client.post(f"/uploads/sites/{site_id}/reach", content_type="multipart/form-data",
                    data={"refuges": (io.BytesIO(lines), "refuges.geojson")})
    assert r.status_code == 400 and "LineString" in r.get_json()["error"]
    r = client.post(f"/uploads/sites/{site_id}/reach", content_type="multipart/form-data",
                    data={"roads": (io.BytesIO(ROADS), "roads.geojson")})
    assert r.status_code == 400 and "refuges" in r.get_json()["error"]
    r = client.get(f"/tiles/{site_id}/cutoff/5/19/0/0.png")
    assert r.status_code == 409


def test_demo_site_is_registered_with_the_demo_roads_and_refuges(tmp_path):
    from sillmark.web import db

    app = make_app(tmp_path / "data")  # the demo is not registered on start here
    svc = app.extensions["sillmark"]
    demo = Path(app.config["DEMO_DIR"])
    if not (demo / "riverbend.tif").is_file():
        pytest.skip("demo_dem/riverbend.tif is missing")
    conn = db.connect(svc.db_path)
    try:
        run_id, culvert_run = svc.registry.register_demo(conn)
        settings = db.loads(db.get_run(conn, run_id)["settings"])
        # The demo's culvert scenario is queued after the site's run, with its settings.
        scenario = conn.execute("SELECT * FROM scenarios WHERE site_id = 1").fetchone()
        culvert_settings = db.loads(db.get_run(conn, culvert_run)["settings"])
        assert svc.registry.register_demo(conn) == []  # once per data folder
    finally:
        conn.close()
    assert (scenario["name"], scenario["base_run"], scenario["run_id"]) == \
        ("Ford Road culvert", run_id, culvert_run)
    assert culvert_settings["scenario"]["edits_name"] == "ford_road_culvert.geojson"
    assert {k: v for k, v in culvert_settings.items() if k != "scenario"} == settings
    assert set(settings["reach"]) == {"refuges", "roads"}
    folder = layout.site_dir(svc.data_dir, 1)
    for kind, entry in settings["reach"].items():
        assert (folder / entry["file"]).read_bytes() == (demo / f"{kind}.geojson").read_bytes()


def test_settings_page_offers_the_reach_form_and_names_the_files_in_use(village):
    client, site_id, _ = village
    html = client.get(f"/sites/{site_id}/settings").get_data(as_text=True)
    assert 'id="reach-form"' in html and f"/uploads/sites/{site_id}/reach" in html
    assert "Drop the refuges file in use (refuges.geojson)" in html
    assert "Drop the roads file in use (roads.geojson)" in html
    assert "Drop the profile file" not in html
