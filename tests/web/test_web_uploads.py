"""Uploads: a DEM becomes a draft site, its settings are checked against the DEM,
bad files get the engine's message with a 4xx, and nothing stored is touched."""

from __future__ import annotations

import io
import json
import sqlite3

import pytest

from tests.web_support import ASSETS_CSV, Client, confirm, make_app, upload_dem, write_lowbank
from sillmark.web import layout


def site_files(app) -> list[str]:
    data = app.extensions["sillmark"].data_dir
    return sorted(str(p.relative_to(data)) for p in (data / "sites").rglob("*") if p.is_file()) \
        if (data / "sites").exists() else []


def leftovers(app) -> list[str]:
    return [p.name for p in layout.uploads_dir(app.extensions["sillmark"].data_dir).iterdir()]


def site_count(app) -> int:
    conn = sqlite3.connect(app.extensions["sillmark"].db_path)
    try:
        return conn.execute("SELECT count(*) FROM sites").fetchone()[0]
    finally:
        conn.close()


def test_dem_upload_reports_what_was_read_and_keeps_a_server_named_copy(fresh, lowbank_tif):
    app, client = fresh
    r = upload_dem(client, lowbank_tif, name="My Site (survey 2024).tif")
    assert r.status_code == 201
    body = r.get_json()
    dem = body["dem"]
    assert (dem["rows"], dem["cols"]) == (40, 50)
    assert dem["cell_size"] == [2.0, 2.0] and dem["cell_unit"] == "metre"
    assert dem["epsg"] == 32633 and "32633" in dem["crs"]
    assert dem["vertical_unit"] == "m" and dem["vertical_unit_source"] == "horizontal-unit"
    assert dem["vertical_unit_certain"] is False
    assert dem["nodata_share"] == pytest.approx(30 / 2000)
    assert dem["elevation_min"] == pytest.approx(9.0) and dem["elevation_max"] == pytest.approx(12.45)
    assert body["name"] == "My Site (survey 2024)"
    assert body["settings_url"] == f"/sites/{body['site_id']}/settings"
    files = site_files(app)
    assert len(files) == 1 and files[0].startswith(f"sites/{body['site_id']}/dem/")
    assert "My Site" not in files[0] and files[0].endswith(".tif")
    assert leftovers(app) == []
    state = client.get(f"/api/sites/{body['site_id']}/status").get_json()
    assert state["state"] == "draft"


def test_dem_upload_as_multipart_form_works_too(fresh, lowbank_tif):
    app, client = fresh
    r = client.post("/uploads/dem", data={"dem": (io.BytesIO(lowbank_tif.read_bytes()), "lowbank.tif")},
                    content_type="multipart/form-data", headers={"Accept": "application/json"})
    assert r.status_code == 201
    assert r.get_json()["dem"]["rows"] == 40
    assert leftovers(app) == []


def test_draft_site_page_asks_to_confirm_the_settings(fresh, lowbank_tif):
    app, client = fresh
    site_id = upload_dem(client, lowbank_tif).get_json()["site_id"]
    html = client.get(f"/sites/{site_id}").get_data(as_text=True)
    assert "Check what was read" in html
    assert "40 rows × 50 columns" in html
    assert "Sillmark assumed metres. Please confirm." in html
    assert "1.50 % of the cells" in html


@pytest.mark.parametrize("body,name,fragment", [
    (b"station,level\nA,47.6\n", "levels.csv", "is not a raster Sillmark can read"),
    (b"\x89PNG\r\n\x1a\nnot really", "photo.tif", "is not a raster Sillmark can read"),
    (b'<VRTDataset rasterXSize="1"></VRTDataset>', "mosaic.vrt", "virtual raster"),
])
def test_a_file_that_is_not_a_usable_dem_gets_the_engines_message(fresh, tmp_path, body, name, fragment):
    app, client = fresh
    r = client.post("/uploads/dem", data=body, headers={
        "Content-Type": "application/octet-stream", "X-File-Name": name, "Accept": "application/json"})
    assert r.status_code == 400
    message = r.get_json()["error"]
    assert fragment in message
    assert f"'{name}'" in message  # the user's file name, not the server-made one
    assert "Traceback" not in message and str(tmp_path) not in message and ".part" not in message
    assert site_count(app) == 0 and site_files(app) == [] and leftovers(app) == []


def test_an_empty_upload_is_refused(fresh):
    app, client = fresh
    r = client.post("/uploads/dem", data=b"", headers={"X-File-Name": "x.tif", "Accept": "application/json"})
    assert r.status_code == 400
    assert "empty" in r.get_json()["error"]
    assert leftovers(app) == []


def test_an_oversize_upload_is_refused_with_413_and_nothing_kept(tmp_path, lowbank_tif):
    app = make_app(tmp_path / "data", MAX_UPLOAD_BYTES=2048)
    client = Client(app)
    body = lowbank_tif.read_bytes()
    assert len(body) > 2048
    r = client.post("/uploads/dem", data=body, headers={
        "Content-Type": "application/octet-stream", "X-File-Name": "big.tif", "Accept": "application/json"})
    assert r.status_code == 413
    assert "upload limit of 2 KiB" in r.get_json()["error"]
    r = client.post("/uploads/dem", data={"dem": (io.BytesIO(body), "big.tif")},
                    content_type="multipart/form-data", headers={"Accept": "application/json"})
    assert r.status_code == 413
    assert site_count(app) == 0 and leftovers(app) == []


def test_a_stream_longer_than_the_limit_is_cut_off(tmp_path):
    """A body without Content-Length is counted as it arrives."""
    app = make_app(tmp_path / "data", MAX_UPLOAD_BYTES=1000)
    client = Client(app)

    r = client.post("/uploads/dem", input_stream=io.BytesIO(b"x" * 5000),
                    environ_overrides={"wsgi.input_terminated": True}, headers={
        "Content-Type": "application/octet-stream", "X-File-Name": "s.tif", "Accept": "application/json"})
    assert r.status_code == 413
    assert leftovers(app) == []


def test_confirmed_settings_queue_the_analysis_and_the_site_becomes_ready(fresh, lowbank_tif):
    app, client = fresh
    site_id = upload_dem(client, lowbank_tif).get_json()["site_id"]
    r = confirm(client, site_id, name="Lowbank (test)", outlets=("edge", "nodata"), connectivity="4")
    assert r.status_code == 202
    body = r.get_json()
    assert body["site_url"] == f"/sites/{site_id}"
    st = client.get(f"/api/sites/{site_id}/status").get_json()
    assert st["state"] == "ready" and st["run"]["status"] == "done" and st["run"]["percent"] == 100
    site = client.get(f"/api/sites/{site_id}").get_json()
    assert site["name"] == "Lowbank (test)"
    assert site["connectivity"] == 4
    assert [o["kind"] for o in site["outlets"]] == ["edge", "nodata"]
    assert site["summary"]["connectivity"] == 4
    assert client.get(f"/sites/{site_id}").status_code == 200


def test_water_body_geojson_is_an_outlet(fresh, lowbank_tif):
    from tests.web_support import cell_centre, lonlat

    app, client = fresh
    site_id = upload_dem(client, lowbank_tif).get_json()["site_id"]
    a, b = lonlat(*cell_centre(20, 5)), lonlat(*cell_centre(20, 8))
    line = {"type": "Feature", "properties": {},
            "geometry": {"type": "LineString", "coordinates": [list(a), list(b)]}}
    r = confirm(client, site_id, outlets=("edge", "file"), water=(json.dumps(line).encode(), "brook.geojson"))
    assert r.status_code == 202, r.get_json()
    site = client.get(f"/api/sites/{site_id}").get_json()
    assert site["outlets"][1]["kind"] == "file" and site["outlets"][1]["name"] == "brook.geojson"
    assert site["summary"]["outlet_sources"] == ["edge", "brook.geojson"]
    assert leftovers(app) == []


@pytest.mark.parametrize("change,fragment", [
    ({"unit": "furlongs"}, "unknown vertical unit"),
    ({"connectivity": "5"}, "connectivity must be 8"),
    ({"outlets": ()}, "give at least one outlet"),
    ({"outlets": ("file",)}, "gave no GeoJSON file"),
    ({"outlets": ("sea",)}, "unknown outlet kind"),
    ({"outlets": ("file",), "water": (b"{not json", "river.geojson")}, "river.geojson"),
    ({"outlets": ("file",), "water": (json.dumps({"type": "Point", "coordinates": [100.0, -60.0]}).encode(),
                                      "elsewhere.geojson")}, "elsewhere.geojson"),
])
def test_bad_settings_are_refused_and_change_nothing(fresh, lowbank_tif, change, fragment):
    app, client = fresh
    site_id = upload_dem(client, lowbank_tif).get_json()["site_id"]
    before = client.get(f"/api/sites/{site_id}").get_json()
    files_before = site_files(app)
    r = confirm(client, site_id, **change)
    assert r.status_code == 400, r.get_json()
    assert fragment in r.get_json()["error"]
    after = client.get(f"/api/sites/{site_id}").get_json()
    assert after == before and after["state"] == "draft" and after["latest_run"] is None
    assert site_files(app) == files_before and leftovers(app) == []


def test_settings_of_an_unknown_site_are_404(fresh):
    _, client = fresh
    r = confirm(client, 42)
    assert r.status_code == 404


def test_asset_upload_replaces_the_active_set_and_a_bad_one_keeps_it(fresh, lowbank_tif):
    from tests.web_support import analysed_site

    app, client = fresh
    site_id = analysed_site(client, lowbank_tif, assets=False)
    url = f"/uploads/sites/{site_id}/assets"
    r = client.post(url, data={"assets": (io.BytesIO(ASSETS_CSV.encode()), "assets.csv")},
                    content_type="multipart/form-data")
    assert r.status_code == 201
    body = r.get_json()
    assert body["count"] == 4 and body["status_counts"] == {"ok": 3, "outside DEM": 1}
    bad = b"title,x,y\nschool,1,2\n"
    r = client.post(url, data={"assets": (io.BytesIO(bad), "bad.csv")}, content_type="multipart/form-data")
    assert r.status_code == 400
    assert "no 'name' column" in r.get_json()["error"]
    listed = client.get(f"/api/sites/{site_id}/assets?level=10.5").get_json()
    assert listed["source"]["name"] == "assets.csv" and len(listed["assets"]) == 4
    geo = {"type": "FeatureCollection", "features": [
        {"type": "Feature", "properties": {"name": "Gauge"},
         # On the DEM (a table none of whose points is on it is refused: tests/web/test_web_hostile.py).
         "geometry": {"type": "Point", "coordinates": [15.00116, 45.15338]}}]}
    r = client.post(url, data=json.dumps(geo).encode(), headers={
        "Content-Type": "application/octet-stream", "X-File-Name": "gauges.geojson"})
    assert r.status_code == 201 and r.get_json()["count"] == 1
    assert leftovers(app) == []


def test_assets_before_the_analysis_are_refused_with_409(fresh, lowbank_tif):
    app, client = fresh
    site_id = upload_dem(client, lowbank_tif).get_json()["site_id"]
    r = client.post(f"/uploads/sites/{site_id}/assets",
                    data={"assets": (io.BytesIO(ASSETS_CSV.encode()), "assets.csv")},
                    content_type="multipart/form-data")
    assert r.status_code == 409
    assert "analysis has finished" in r.get_json()["error"]


def test_a_new_upload_leaves_other_sites_alone(fresh, lowbank_tif, tmp_path):
    from tests.web_support import analysed_site

    app, client = fresh
    first = analysed_site(client, lowbank_tif)
    before = site_files(app)
    r = client.post("/uploads/dem", data=b"not a raster", headers={"X-File-Name": "x.tif",
                                                                  "Accept": "application/json"})
    assert r.status_code == 400
    assert site_files(app) == before
    other = write_lowbank(tmp_path / "second.tif")
    second = upload_dem(client, other).get_json()["site_id"]
    assert second != first
    assert all(f in site_files(app) for f in before)
