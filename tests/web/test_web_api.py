"""The JSON API and downloads, checked against the engine run directly on the same DEM.

Reference for every figure: analysis (water_level_map, stage_table, SpillResult.route,
assess_assets) on the Lowbank DEM of tests/web_support.py, which the app must reproduce.
"""

from __future__ import annotations

import csv
import io
import json
import zipfile

import numpy as np
import pytest

from sillmark.products.source import ArraySource
from sillmark import SCREENING_CAUTION
from sillmark.products.stage import stage_table, water_level_map
from tests.web_support import NOTCH, SPILL, cell_centre, lonlat


def get(ready, url):
    _, client, site_id = ready
    return client.get(url.format(site=site_id))


# --------------------------------------------------------------------------- sites


def test_site_list_and_description(ready):
    r = get(ready, "/api/sites")
    assert r.status_code == 200
    sites = r.get_json()["sites"]
    assert [s["state"] for s in sites] == ["ready"]
    d = get(ready, "/api/sites/{site}").get_json()
    assert d["summary"]["depressions"] >= 1 and d["summary"]["vertical_unit"] == "m"
    west, south, east, north = d["summary"]["lonlat_bounds"]
    assert west < east and south < north
    st = get(ready, "/api/sites/{site}/status")
    assert st.headers["Cache-Control"] == "no-store"
    assert st.get_json()["run"]["status"] == "done"


def test_run_endpoint(ready):
    _, client, site_id = ready
    run_id = client.get(f"/api/sites/{site_id}").get_json()["current_run"]
    r = client.get(f"/api/runs/{run_id}")
    assert r.status_code == 200 and r.get_json()["site_id"] == site_id
    assert client.get("/api/runs/9999").status_code == 404


# --------------------------------------------------------------------------- figures at a level


@pytest.mark.parametrize("level", [9.5, 10.5, 11.0, 12.2])
def test_stage_figures_equal_water_level_map(ready, reference, level):
    dem, _, result = reference
    expected = water_level_map(result, level, row_areas=dem.row_areas, unit=dem.vertical_unit)
    f = get(ready, f"/api/sites/{{site}}/stage?level={level}").get_json()
    assert f["level"] == pytest.approx(level)
    assert f["unit"] == "m" and f["unit_symbol"] == "m"
    assert f["flooded_area_m2"] == expected.flooded_area_m2
    assert f["flooded_volume_m3"] == expected.flooded_volume_m3
    assert f["shielded_area_m2"] == expected.shielded_area_m2
    assert f["shielded_volume_m3"] == expected.shielded_volume_m3
    assert f["flooded_area_ha"] == pytest.approx(expected.flooded_area_m2 / 1e4)
    assert f["caution"] == SCREENING_CAUTION


def test_behind_the_bank_is_shielded_below_the_notch_and_floods_at_it(ready):
    below = get(ready, "/api/sites/{site}/stage?level=10.9").get_json()
    at = get(ready, f"/api/sites/{{site}}/stage?level={SPILL}").get_json()
    basin = 16 * 21 * 4.0  # cells of the basin, 4 m² each
    assert below["shielded_area_m2"] >= basin
    assert at["shielded_area_m2"] < below["shielded_area_m2"] - basin + 1
    assert at["flooded_area_m2"] > below["flooded_area_m2"] + basin
    assert below["depressions"]["cut_off"] >= 1 and at["depressions"]["overtopped"] >= 1


def test_assets_wet_count_follows_the_onset_stage(ready, reference, tmp_path):
    from sillmark.products.assets import assess_assets
    from sillmark.grid.assets import read_assets
    from tests.web_support import ASSETS_CSV

    dem, _, result = reference
    path = tmp_path / "assets.csv"
    path.write_text(ASSETS_CSV, encoding="utf-8")
    placed = read_assets(path, dem)
    for level in (10.3, 10.9, 11.0, 12.5):
        f = get(ready, f"/api/sites/{{site}}/stage?level={level}").get_json()
        table = assess_assets(placed, dem, result, level)
        assert f["assets"]["flooded"] == table.state.count("flooded"), level
        assert f["assets"]["shielded"] == table.state.count("shielded"), level
        assert f["assets"]["total"] == 4 and f["assets"]["without_figures"] == 1


def test_repeated_level_is_served_from_the_cache(ready):
    app, client, site_id = ready
    client.get(f"/api/sites/{site_id}/stage?level=10.25")
    data = next(iter(app.extensions["sillmark"].cache._open.values()))
    size = len(data._levels)
    a = client.get(f"/api/sites/{site_id}/stage?level=10.25").get_json()
    b = client.get(f"/api/sites/{site_id}/stage?level=10.250").get_json()
    assert a == b and len(data._levels) == size


@pytest.mark.parametrize("query,fragment", [
    ("level=nan", "finite number"),
    ("level=NaN", "finite number"),
    ("level=inf", "finite number"),
    ("level=-inf", "finite number"),
    ("level=abc", "finite number"),
    ("level=", "give a water level"),
    ("", "give a water level"),
    ("level=1e39", "finite number"),
    ("level=47,6", "finite number"),
])
def test_bad_levels_are_400_with_a_message(ready, query, fragment):
    for url in ("/api/sites/{site}/stage?", "/api/sites/{site}/assets?", "/api/sites/{site}/cell?lon=15&lat=45&"):
        r = get(ready, url + query)
        assert r.status_code == 400, (url, query)
        assert fragment in r.get_json()["error"]


# --------------------------------------------------------------------------- stage table, legend


def test_stage_table_matches_the_engine_and_never_shrinks(ready, reference):
    dem, _, result = reference
    t = get(ready, "/api/sites/{site}/stage_table").get_json()
    levels = np.asarray(t["level"], dtype=np.float32)
    assert len(levels) >= 50 and np.all(np.diff(levels) > 0)
    expected = stage_table(ArraySource(dem, result), levels)
    np.testing.assert_allclose(t["flooded_area_m2"], expected.flooded_area_m2)
    np.testing.assert_allclose(t["flooded_volume_m3"], expected.flooded_volume_m3)
    np.testing.assert_allclose(t["shielded_area_m2"], expected.shielded_area_m2)
    assert np.all(np.diff(t["flooded_area_m2"]) >= 0)  # flooded area never shrinks as the stage rises
    assert t["unit"] == "m"


def test_legend_names_the_unit_and_the_shielded_style(ready):
    g = get(ready, "/api/sites/{site}/legend").get_json()
    assert g["unit_symbol"] == "m"
    assert g["depth_classes"][0]["label"] == "0–0.1 m"
    assert g["depth_classes"][-1]["label"] == "over 5 m"
    assert "Shielded low ground" in g["shielded"]["label"]


# --------------------------------------------------------------------------- depressions


def test_depressions_match_the_engine_table(ready, reference):
    _, _, result = reference
    t = result.depressions
    body = get(ready, "/api/sites/{site}/depressions").get_json()
    rows = body["depressions"]
    assert [d["id"] for d in rows] == list(t.id)
    basin = max(rows, key=lambda d: d["area_m2"])
    assert basin["spill_elevation"] == pytest.approx(SPILL)
    assert basin["pit_elevation"] == pytest.approx(9.0)
    assert basin["area_m2"] == pytest.approx(16 * 21 * 4.0)  # the basin's cells (the notch is its rim)
    w, s, e, n = basin["bounds"]
    assert w < basin["pit_lon"] < e and s < basin["pit_lat"] < n
    assert basin["spill_lon"] < w < basin["spill_lon"] + 0.0001  # the notch: just west of the basin


def test_depression_outlines_and_spill_points_are_geojson(ready):
    for name in ("depressions.geojson", "spill_points.geojson"):
        r = get(ready, "/api/sites/{site}/" + name)
        assert r.status_code == 200 and r.mimetype == "application/geo+json"
        doc = json.loads(r.get_data())
        assert doc["type"] == "FeatureCollection" and doc["caution"] == SCREENING_CAUTION
        assert len(doc["features"]) >= 1


def test_depression_curve_runs_from_pit_to_spill(ready):
    rows = get(ready, "/api/sites/{site}/depressions").get_json()["depressions"]
    basin = max(rows, key=lambda d: d["area_m2"])
    c = get(ready, f"/api/sites/{{site}}/depressions/{basin['id']}/curve").get_json()
    assert c["level"][0] == pytest.approx(9.0) and c["level"][-1] == pytest.approx(SPILL)
    storage = [v for v in c["storage_m3"] if v is not None]
    assert storage[0] == 0 and np.all(np.diff(storage) >= -1e-9)
    # Full to the spill elevation it holds the basin's volume: 16 × 21 cells of 4 m², 2 m deep.
    assert storage[-1] == pytest.approx(16 * 21 * 4.0 * 2.0, rel=1e-6)
    assert get(ready, "/api/sites/{site}/depressions/999/curve").status_code == 404


# --------------------------------------------------------------------------- clicking a cell


def test_cell_report_gives_the_route_and_its_controlling_sill(ready, reference):
    dem, _, result = reference
    lon, lat = lonlat(*cell_centre(18, 25))
    c = get(ready, f"/api/sites/{{site}}/cell?lon={lon}&lat={lat}&level=10.5").get_json()
    assert (c["row"], c["col"]) == (18, 25)
    assert c["elevation"] == pytest.approx(9.0) and c["onset_stage"] == pytest.approx(SPILL)
    assert c["state"] == "shielded" and c["depth"] == 0.0
    assert c["depth_if_reached"] == pytest.approx(1.5) and c["freeboard"] == pytest.approx(0.5)
    assert (c["sill"]["row"], c["sill"]["col"]) == NOTCH
    assert c["sill"]["elevation"] == pytest.approx(c["onset_stage"])
    route = result.route(18, 25)
    assert c["route_cells"] == len(route) and c["reaches_outlet"]
    coords = c["route"]["coordinates"]
    assert coords[-1] == pytest.approx([c["lon"], c["lat"]], abs=1e-7)  # ends at the clicked cell
    start = lonlat(*dem.xy(int(route.rows[-1]), int(route.cols[-1])))
    assert coords[0] == pytest.approx(list(start), abs=1e-7)  # starts at the outlet


def test_cell_report_on_flooded_ground_gives_its_depth(ready):
    lon, lat = lonlat(*cell_centre(5, 4))  # z = 10.20, on the open slope
    c = get(ready, f"/api/sites/{{site}}/cell?lon={lon}&lat={lat}&level=10.5").get_json()
    assert c["state"] == "flooded" and c["depth"] == pytest.approx(0.3, abs=1e-5)
    assert c["sill"]["is_own_cell"]


@pytest.mark.parametrize("where,fragment", [
    ("lon=0&lat=0", "outside the DEM"),
    ("lon=abc&lat=45", "lon must be a number"),
    ("lon=nan&lat=45", "finite"),
    ("lat=45", "give lon"),
    ("lon=500&lat=45", "lon must lie in"),
])
def test_cell_report_refuses_bad_points(ready, where, fragment):
    r = get(ready, f"/api/sites/{{site}}/cell?{where}&level=10")
    assert r.status_code == 400
    assert fragment in r.get_json()["error"]


def test_cell_report_on_nodata_is_400(ready):
    lon, lat = lonlat(*cell_centre(32, 42))
    r = get(ready, f"/api/sites/{{site}}/cell?lon={lon}&lat={lat}&level=10")
    assert r.status_code == 400 and "nodata" in r.get_json()["error"]


# --------------------------------------------------------------------------- assets and the what-if


def test_asset_table_at_a_level(ready):
    body = get(ready, "/api/sites/{site}/assets?level=10.5").get_json()
    assets = {a["name"]: a for a in body["assets"]}
    assert body["source"]["name"] == "assets.csv" and body["unit"] == "m"
    school = assets["Basin school"]
    assert school["state"] == "shielded" and school["onset_stage"] == pytest.approx(SPILL)
    assert school["sill_elevation"] == pytest.approx(SPILL) and not school["sill_is_own_cell"]
    assert assets["West pump"]["state"] == "flooded"
    assert assets["Hill farm"]["state"] == "dry"
    assert assets["Far away"]["status"] == "outside DEM" and assets["Far away"]["onset_stage"] is None


def test_what_if_raising_the_notch(ready):
    _, client, site_id = ready
    index = [a["name"] for a in client.get(f"/api/sites/{site_id}/assets?level=10.5").get_json()["assets"]].index(
        "Basin school")
    r = client.post(f"/api/sites/{site_id}/whatif", json={"asset": index, "height": 0.5})
    assert r.status_code == 200, r.get_json()
    w = r.get_json()
    assert w["onset_before"] == pytest.approx(SPILL)
    assert w["onset_before"] <= w["onset_after"] <= w["onset_before"] + 0.5 + 1e-6
    assert w["onset_after"] == pytest.approx(11.5)  # the notch raised to 11.5 m still controls (bank 12 m)
    assert (w["raised"]["row"], w["raised"]["col"]) == NOTCH
    assert w["raised_cell_controls"] and w["explanation"]
    assert w["route_after"]["type"] == "LineString"


@pytest.mark.parametrize("body,fragment", [
    ({"asset": 0, "height": -1}, "positive"),
    ({"asset": 0, "height": "tall"}, "must be a number"),
    ({"asset": 0}, "give the height"),
    ({"asset": "first", "height": 1}, "index in the asset table"),
    ({"asset": 99, "height": 1}, "there is no asset 99"),
    ({"asset": 3, "height": 1}, "outside DEM"),
])
def test_what_if_refuses_bad_requests(ready, body, fragment):
    _, client, site_id = ready
    r = client.post(f"/api/sites/{site_id}/whatif", json=body)
    assert r.status_code == 400
    assert fragment in r.get_json()["error"]


def test_site_without_assets_lists_none_and_refuses_the_what_if(fresh, lowbank_tif):
    from tests.web_support import analysed_site

    _, client = fresh
    site_id = analysed_site(client, lowbank_tif, assets=False)
    body = client.get(f"/api/sites/{site_id}/assets?level=10").get_json()
    assert body["assets"] == [] and body["source"] is None
    f = client.get(f"/api/sites/{site_id}/stage?level=10").get_json()
    assert f["assets"] is None
    r = client.post(f"/api/sites/{site_id}/whatif", json={"asset": 0, "height": 1})
    assert r.status_code == 400 and "no assets" in r.get_json()["error"]


def test_rerun_queues_and_runs_again(fresh, lowbank_tif):
    from tests.web_support import analysed_site

    _, client = fresh
    site_id = analysed_site(client, lowbank_tif, assets=False)
    first = client.get(f"/api/sites/{site_id}").get_json()["current_run"]
    r = client.post(f"/api/sites/{site_id}/rerun")
    assert r.status_code == 202
    d = client.get(f"/api/sites/{site_id}").get_json()
    assert d["current_run"] == r.get_json()["run_id"] != first
    assert client.get(f"/api/sites/{site_id}/stage?level=10.5").status_code == 200


def test_api_on_a_site_not_analysed_yet_is_409(fresh, lowbank_tif):
    from tests.web_support import upload_dem

    _, client = fresh
    site_id = upload_dem(client, lowbank_tif).get_json()["site_id"]
    for url in ("stage?level=1", "stage_table", "depressions", "files/stage_table.csv"):
        r = client.get(f"/api/sites/{site_id}/{url}")
        assert r.status_code == 409, url
        assert "no finished analysis" in r.get_json()["error"]
    assert client.get(f"/tiles/{site_id}/1.0/10/0/0.png").status_code == 409
    r = client.post(f"/api/sites/{site_id}/rerun")
    assert r.status_code == 409 and "confirm" in r.get_json()["error"]


# --------------------------------------------------------------------------- downloads


@pytest.mark.parametrize("name", ["onset_stage.tif", "fill_depth.tif", "depression_id.tif", "flood_tree.tif",
                                  "depressions.csv", "depressions.geojson", "spill_points.geojson", "summary.json"])
def test_result_files_download(ready, name):
    r = get(ready, "/api/sites/{site}/files/results/" + name)
    assert r.status_code == 200
    assert r.headers["Content-Disposition"].startswith("attachment;") and name in r.headers["Content-Disposition"]
    body = r.get_data()
    if name.endswith(".tif"):
        assert body[:4] == b"II*\x00"
    else:
        assert SCREENING_CAUTION.encode() in body


def test_unknown_result_file_is_404(ready):
    r = get(ready, "/api/sites/{site}/files/results/secret_key")
    assert r.status_code == 404 and "no result file" in r.get_json()["error"]
    assert get(ready, "/api/sites/{site}/files/results/..%2F..%2Fsecret_key").status_code == 404


@pytest.mark.parametrize("kind,mimetype,start", [
    ("depth", "image/tiff", b"II*\x00"),
    ("water_state", "image/tiff", b"II*\x00"),
    ("flood_extent", "application/geo+json", b"{"),
    ("shielded", "application/geo+json", b"{"),
    ("depressions", "text/csv", b"# Sillmark"),
    ("assets_csv", "text/csv", b"# Sillmark"),
    ("assets_geojson", "application/geo+json", b"{"),
])
def test_level_files_download(ready, kind, mimetype, start):
    r = get(ready, f"/api/sites/{{site}}/files/level/10.50/{kind}")
    assert r.status_code == 200, r.get_data(as_text=True)
    assert r.mimetype == mimetype
    assert r.get_data().startswith(start)
    assert "10.50m" in r.headers["Content-Disposition"]


def test_level_zip_holds_every_file_and_the_caution(ready):
    r = get(ready, "/api/sites/{site}/files/level/10.5.zip")
    assert r.status_code == 200 and r.mimetype == "application/zip"
    with zipfile.ZipFile(io.BytesIO(r.get_data())) as zf:
        names = set(zf.namelist())
        readme = " ".join(zf.read("README.txt").decode().split())
        assert " ".join(SCREENING_CAUTION.split()) in readme
        assert "depth_10.50m.tif GeoTIFF, float32: depth of water" in readme
        shielded = json.loads(zf.read("shielded_10.50m.geojson"))
    assert {"depth_10.50m.tif", "water_state_10.50m.tif", "flood_extent_10.50m.geojson",
            "shielded_10.50m.geojson", "depressions_at_10.50m.csv", "assets_10.50m.csv",
            "assets_10.50m.geojson"} <= names
    assert shielded["caution"] == SCREENING_CAUTION


def test_stage_table_csv(ready):
    r = get(ready, "/api/sites/{site}/files/stage_table.csv")
    assert r.status_code == 200 and r.mimetype == "text/csv"
    lines = r.get_data(as_text=True).splitlines()
    assert any(SCREENING_CAUTION in line for line in lines if line.startswith("#"))
    rows = list(csv.reader(line for line in lines if not line.startswith("#")))
    assert rows[0][0] == "level_m" and len(rows) > 50


@pytest.mark.parametrize("url,status", [
    ("/api/sites/{site}/files/level/nan/depth", 400),
    ("/api/sites/{site}/files/level/high/depth", 400),
    ("/api/sites/{site}/files/level/10.5/everything", 404),
    ("/api/sites/{site}/files/level/inf.zip", 400),
])
def test_bad_download_requests(ready, url, status):
    r = get(ready, url)
    assert r.status_code == status
    assert "error" in r.get_json()


# --------------------------------------------------------------------------- the printable map


def test_print_page_has_level_unit_date_scale_north_legend_and_caution(ready):
    html = get(ready, "/sites/{site}/print?level=10.5").get_data(as_text=True)
    assert 'Outlet water level <strong id="print-level">10.50 m, datum not stated</strong>' in html
    assert "(metres)" in html and "printed 2" in html
    assert "L.control.scale()" in html  # the scale bar
    assert "North arrow" in html
    assert 'id="legend"' in html
    assert html.count(SCREENING_CAUTION) >= 1 and "sheet-caution" in html
    assert "print.css" in html
    css = (__import__("pathlib").Path(__file__).resolve().parents[2] / "sillmark/web/static/css/print.css").read_text()
    assert "@media print" in css and "size: A4 landscape" in css


def test_print_page_needs_a_good_level(ready):
    assert get(ready, "/sites/{site}/print").status_code == 400
    r = get(ready, "/sites/{site}/print?level=NaN")
    assert r.status_code == 400 and "finite number" in r.get_data(as_text=True)


def test_outlet_cells_outline_is_the_dem_edge_ring(ready):
    """Lowbank with the DEM edge as its only outlet: the outlet cells are the
    2·(40 + 50) − 4 = 176 border cells; their outline (in WGS84) is a ring whose
    outer edge is the grid's bounds and whose hole is the interior."""
    import shapely.geometry

    r = get(ready, "/api/sites/{site}/outlets.geojson")
    assert r.status_code == 200
    fc = r.get_json()
    assert fc["caution"] == SCREENING_CAUTION
    (feature,) = fc["features"]
    assert feature["properties"]["cells"] == 176
    assert feature["properties"]["sources"] == ["edge"]
    ring = shapely.geometry.shape(feature["geometry"])
    assert ring.geom_type == "Polygon" and len(ring.interiors) == 1
    # Corners of the grid and of the interior, from the grid's own geometry.
    outer_nw = lonlat(*cell_centre(0, 0))  # a border cell's centre lies inside the ring
    inner = lonlat(*cell_centre(20, 25))  # an interior cell's centre lies in the hole
    assert ring.contains(shapely.geometry.Point(outer_nw))
    assert not ring.contains(shapely.geometry.Point(inner))
    assert shapely.geometry.Polygon(ring.interiors[0]).contains(shapely.geometry.Point(inner))
