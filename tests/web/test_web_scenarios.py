"""Named scenarios in the web app, on a hand-worked road embankment with and without a culvert.

The site ("Brookend", invented): 7 × 9 cells of 2 m in UTM zone 33N; the DEM edge
is the outlet.

    row 0 and row 6: 14.0 (high ground along the edge)
    rows 1-5: col 0  10.0  the river at the west edge (outlet)
              col 1  10.5  the brook's bank
              col 2  13.0  the road embankment
              cols 3-6 11.0 a meadow behind the road, its lowest cell (3, 4) at 10.8
              col 7  14.0, col 8 14.0 (edge)

Working, by hand:
- Base: the only way into the meadow is over the road (13.0), so all 20 meadow
  cells have onset stage 13.0; they form one depression with its pit at (3, 4).
- Scenario "Brookend culvert": a culvert from the bank cell (3, 1) to the meadow
  cell (3, 3), invert 10.6. The meadow end is reached at max(10.5 at the bank,
  10.6, ground 11.0) = 11.0, and every other meadow cell (ground 11.0, the pit
  10.8) at 11.0.
- At L = 12.0: the meadow is dry in the base (13.0 > 12.0) and wet with the
  culvert (11.0 <= 12.0): 20 cells of 4 m² = 80 m² newly flooded, none
  protected. The barn at (2, 5) and the depression (pit (3, 4)) change by
  11.0 - 13.0 = -2.0.
"""

from __future__ import annotations

import io
import json
import math
import zipfile

import numpy as np
import pytest
import rasterio
from affine import Affine

from sillmark import SCREENING_CAUTION
from sillmark.products.scenario_compare import compare_at_level
from sillmark.web import layout
from tests.rasters import write_raster
from tests.web_support import Client, analysed_site, make_app

WEST, NORTH, CELL = 520_000.0, 5_020_000.0, 2.0
BARN = (2, 5)
UTM = {"type": "name", "properties": {"name": "EPSG:32633"}}


def centre(row: int, col: int) -> list[float]:
    return [WEST + (col + 0.5) * CELL, NORTH - (row + 0.5) * CELL]


def brookend() -> np.ndarray:
    z = np.full((7, 9), 14.0, np.float32)
    z[1:6, 0] = 10.0
    z[1:6, 1] = 10.5
    z[1:6, 2] = 13.0
    z[1:6, 3:7] = 11.0
    z[3, 4] = 10.8
    return z


def culvert_edits(**props) -> dict:
    feature = {"type": "Feature",
               "properties": {"kind": "culvert", "name": "Brook culvert", "invert": 10.6, **props},
               "geometry": {"type": "LineString", "coordinates": [centre(3, 1), centre(3, 3)]}}
    return {"type": "FeatureCollection", "crs": UTM, "features": [feature]}


@pytest.fixture(scope="module")
def site(tmp_path_factory):
    folder = tmp_path_factory.mktemp("brookend")
    tif = write_raster(folder / "brookend.tif", brookend(),
                       transform=Affine(CELL, 0, WEST, 0, -CELL, NORTH), nodata=-9999.0)
    app = make_app(folder / "data")
    client = Client(app)
    site_id = analysed_site(
        client, tif, assets=f"name,kind,x,y\nMeadow barn,barn,{centre(*BARN)[0]},{centre(*BARN)[1]}\n")
    # An uploaded edits file; the inline job runner analyses it before the answer.
    r = client.post(f"/api/sites/{site_id}/scenarios",
                    data={"name": "Brookend culvert",
                          "edits": (io.BytesIO(json.dumps(culvert_edits()).encode()), "culvert.geojson")},
                    content_type="multipart/form-data")
    assert r.status_code == 202, r.get_data(as_text=True)
    return app, client, site_id, r.get_json()["id"]


def test_the_scenario_is_analysed_in_the_background_and_listed(site):
    _, client, site_id, sid = site
    listed = client.get(f"/api/sites/{site_id}/scenarios").get_json()
    (s,) = listed["scenarios"]
    assert s["id"] == sid and s["name"] == "Brookend culvert" and s["edits_name"] == "culvert.geojson"
    assert s["state"] == "done" and s["run"]["percent"] == 100 and s["up_to_date"]
    assert s["edit_count"] == 1 and listed["caution"] == SCREENING_CAUTION
    # The scenario run is not the site's own: the site still shows its base run.
    status = client.get(f"/api/sites/{site_id}/status").get_json()
    assert status["run"]["id"] == status["current_run"] != s["run"]["id"]


def test_compare_at_12_gives_the_hand_worked_figures_and_equals_the_products_function(site):
    app, client, site_id, sid = site
    r = client.get(f"/api/sites/{site_id}/scenarios/{sid}/compare?level=12.0")
    assert r.status_code == 200, r.get_json()
    c = r.get_json()
    assert c["areas"]["newly_flooded_m2"] == pytest.approx(80.0)  # 20 cells x 4 m², by hand
    assert c["areas"]["newly_flooded_ha"] == pytest.approx(0.008)
    assert c["areas"]["newly_protected_m2"] == 0.0
    assert c["cells"]["newly flooded"] == 20 and c["cells"]["newly protected"] == 0
    assert c["datum"] == "datum not stated" and "12.00 m, datum not stated" == c["level_text"]
    assert [item["key"] for item in c["legend"]] == ["newly_flooded", "newly_protected"]
    assert c["caution"] == SCREENING_CAUTION
    (barn,) = c["assets"]["rows"]
    assert (barn["name"], barn["onset_base"], barn["onset_scenario"], barn["change"]) == \
        ("Meadow barn", 13.0, 11.0, -2.0)
    assert (barn["state_base"], barn["state_scenario"]) == ("dry", "wet")
    (dep,) = c["depressions"]["rows"]
    assert dep["change"] == -2.0 and dep["pit_x"] == centre(3, 4)[0] and dep["pit_y"] == centre(3, 4)[1]
    # The same numbers from the two results folders, read from the files.
    data_dir = app.extensions["sillmark"].data_dir
    status = client.get(f"/api/sites/{site_id}/status").get_json()
    scenario_run = client.get(f"/api/sites/{site_id}/scenarios/{sid}").get_json()["run"]["id"]
    onsets = []
    for run_id in (status["current_run"], scenario_run):
        with rasterio.open(layout.results_dir(data_dir, site_id, run_id) / "onset_stage.tif") as ds:
            onsets.append(ds.read(1, masked=True).filled(np.nan))
    direct = compare_at_level(onsets[0], onsets[1], 12.0, row_areas=np.full(7, CELL * CELL))
    assert direct.area_m2 == pytest.approx({k: v * CELL * CELL for k, v in c["cells"].items()})
    assert direct.cells == c["cells"]


def test_compare_tiles_paint_the_newly_flooded_meadow(site):
    _, client, site_id, sid = site
    from tests.web_support import read_png

    r = client.get(f"/api/sites/{site_id}/scenarios/{sid}/compare?level=12.0")
    url = r.get_json()["tiles"]
    # Zoom 0 holds the whole 18 m site in less than a pixel: take the tile at zoom 19
    # holding the meadow's pit (the web-mercator tile formula, OpenStreetMap wiki
    # "Slippy map tilenames").
    lon, lat = _lonlat(*centre(3, 4))
    n = 2 ** 19
    tx = int((lon + 180.0) / 360.0 * n)
    ty = int((1.0 - math.asinh(math.tan(math.radians(lat))) / math.pi) / 2.0 * n)
    png = client.get(url.replace("{z}/{x}/{y}", f"19/{tx}/{ty}"))
    assert png.status_code == 200 and png.mimetype == "image/png", png.get_data(as_text=True)
    image = read_png(png.data)
    assert tuple(image["palette"][1]) == (196, 58, 38)  # the newly flooded colour is drawn
    assert np.any(image["pixels"] == 1) and not np.any(image["pixels"] == 2)


def _lonlat(x, y):
    import pyproj

    t = pyproj.Transformer.from_crs("EPSG:32633", "OGC:CRS84", always_xy=True)
    return t.transform(x, y)


def test_the_zip_holds_the_compare_raster_csvs_edits_and_caution(site, tmp_path):
    _, client, site_id, sid = site
    r = client.get(f"/sites/{site_id}/files/scenario/{sid}/12.000.zip")
    assert r.status_code == 200 and r.mimetype == "application/zip"
    with zipfile.ZipFile(io.BytesIO(r.data)) as zf:
        names = set(zf.namelist())
        assert {"README.txt", "scenario_compare_12.00m.tif", "scenario_areas_12.00m.csv",
                "scenario_assets_12.00m.csv", "scenario_depressions.csv",
                "scenario_edits.geojson"} == names
        assert SCREENING_CAUTION.split()[0] in zf.read("README.txt").decode()
        areas = zf.read("scenario_areas_12.00m.csv").decode().splitlines()
        assert areas[0].startswith("code,ground,cells,area_m2,area_ha")
        assert "3,newly flooded,20,80," in areas[4]
        assets = zf.read("scenario_assets_12.00m.csv").decode().splitlines()
        assert assets[0].split(",")[:6] == ["name", "x", "y", "onset_base_m", "onset_scenario_m",
                                            "change_m"]
        assert json.loads(zf.read("scenario_edits.geojson"))["features"][0]["properties"]["invert"] == 10.6
        zf.extract("scenario_compare_12.00m.tif", tmp_path)
    with rasterio.open(tmp_path / "scenario_compare_12.00m.tif") as ds:
        codes = ds.read(1)
        assert ds.tags()["SILLMARK_CAUTION"] == SCREENING_CAUTION
    assert (codes[1:6, 3:7] == 3).all() and codes[3, 0] == 2 and codes[0, 0] == 1


def test_a_bad_edit_is_refused_in_one_line_and_nothing_is_lost(site):
    _, client, site_id, _ = site
    bad = culvert_edits()
    del bad["features"][0]["properties"]["invert"]
    r = client.post(f"/api/sites/{site_id}/scenarios", json={"name": "broken", "edits": bad})
    assert r.status_code == 400
    message = r.get_json()["error"]
    assert "Brook culvert" in message and "invert" in message and "\n" not in message
    names = [s["name"] for s in client.get(f"/api/sites/{site_id}/scenarios").get_json()["scenarios"]]
    assert names == ["Brookend culvert"]
    # A name already taken is refused too.
    r = client.post(f"/api/sites/{site_id}/scenarios", json={"name": "Brookend culvert",
                                                            "edits": culvert_edits()})
    assert r.status_code == 400 and "already has a scenario" in r.get_json()["error"]


def test_a_scenario_from_json_edits_can_be_deleted_with_its_files(site):
    app, client, site_id, _ = site
    r = client.post(f"/api/sites/{site_id}/scenarios",
                    json={"name": "Planned wall", "source": "barrier planner",
                          "edits": culvert_edits(one_way=True)})
    assert r.status_code == 202, r.get_json()
    made = r.get_json()
    assert made["edits_name"] == "barrier planner" and made["state"] == "done"
    data_dir = app.extensions["sillmark"].data_dir
    folder = layout.run_dir(data_dir, site_id, made["run"]["id"])
    assert (folder / "results" / "summary.json").is_file()
    r = client.raw.delete(f"/api/sites/{site_id}/scenarios/{made['id']}",
                          headers={"X-Sillmark-Token": client.token})
    assert r.status_code == 200 and r.get_json()["deleted"] == made["id"]
    assert not folder.exists()
    r = client.get(f"/api/sites/{site_id}/scenarios/{made['id']}")
    assert r.status_code == 404


def test_the_barrier_planner_plans_on_a_scenario_with_its_culvert(site):
    # By hand: on the site as it is the barn's onset stage is 13.0, so at 12.0 it
    # needs no barrier. On the culvert scenario it is 11.0: water comes through the
    # culvert, so one cell must be raised to 12.0 on the culvert's way (its bank
    # end (3, 1), or its meadow end (3, 3)); the road (13.0) and the edge (14.0)
    # already hold everything else. The edits file keeps the culvert first.
    from sillmark.engine.culverts import culvert_edges
    from sillmark.engine.flood import priority_flood
    from sillmark.grid.dem import dem_from_array
    from sillmark.grid.edits import read_edits

    _, client, site_id, sid = site
    r = client.post(f"/api/sites/{site_id}/barrier", json={"asset": 0, "level": 12.0})
    plain = r.get_json()
    assert r.status_code == 200 and plain["needed"] is False and plain["onset_stage"] == 13.0
    r = client.post(f"/api/sites/{site_id}/barrier",
                    json={"asset": 0, "level": 12.0, "scenario": sid})
    plan = r.get_json()
    assert r.status_code == 200, plan
    assert plan["needed"] and plan["possible"] and plan["cells"] == 1, plan["message"]
    assert plan["onset_stage"] == 11.0 and plan["ground"] == "scenario 'Brookend culvert'"
    kinds = [f["properties"]["kind"] for f in plan["edits"]["features"]]
    assert kinds == ["culvert", "barrier"]
    # The scenario's edits and the wall together keep the barn dry up to 12.0.
    dem = dem_from_array(brookend(), transform=Affine(CELL, 0, WEST, 0, -CELL, NORTH),
                         crs="EPSG:32633")
    placed = read_edits(plan["edits"], dem)
    z, _ = placed.apply(dem.elevation)
    edge = np.zeros(z.shape, bool)
    edge[0, :] = edge[-1, :] = edge[:, 0] = edge[:, -1] = True
    result = priority_flood(z, edge, culverts=culvert_edges(z.shape, **placed.culvert_ends(),
                                                            elevation=z))
    assert result.onset_stage[BARN] >= 12.0
    # Without the wall the culvert floods it at 11.0 (the check can fail).
    only_culvert = read_edits({**plan["edits"], "features": plan["edits"]["features"][:1]}, dem)
    z1, _ = only_culvert.apply(dem.elevation)
    result1 = priority_flood(z1, edge, culverts=culvert_edges(z1.shape, **only_culvert.culvert_ends(),
                                                              elevation=z1))
    assert result1.onset_stage[BARN] == 11.0
    r = client.post(f"/api/sites/{site_id}/barrier", json={"asset": 0, "level": 12.0,
                                                          "scenario": "nine"})
    assert r.status_code == 400 and "scenario" in r.get_json()["error"]
