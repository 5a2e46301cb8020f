"""Uploads without dead ends: the CRS chooser and its search, the band chooser, the
vertical datum kept with the site and shown beside every level, unit names in words."""

from __future__ import annotations

import re
import sqlite3

import numpy as np
import pytest
import rasterio

from tests.rasters import write_raster
from tests.web_support import (
    TRANSFORM,
    Client,
    confirm,
    lowbank_elevation,
    make_app,
    upload_dem,
)
from sillmark.web import db as web_db


def write_nocrs(path):
    return write_raster(path, lowbank_elevation(), transform=TRANSFORM, nodata=-9999.0, crs=None)


def write_two_bands(path):
    """Band 1 is a flat plate (no depression), band 2 the Lowbank terrain with its basin."""
    z = lowbank_elevation()
    plate = np.full_like(z, 20.0)
    return write_raster(path, np.stack([plate, z]), transform=TRANSFORM, nodata=-9999.0)


def visible_text(html: str) -> str:
    html = re.sub(r"<script.*?</script>", " ", html, flags=re.S)
    return re.sub(r"<[^>]+>", " ", html)


def settings_form(unit="m", datum=None, **extra):
    data = {"vertical_unit": unit, "outlet": ["edge"], "connectivity": "8", **extra}
    if datum is not None:
        data["vertical_datum"] = datum
    return data


def post_settings(client, site_id, data):
    return client.post(f"/uploads/sites/{site_id}/settings", data=data,
                       content_type="multipart/form-data", headers={"Accept": "application/json"})


# --------------------------------------------------------------------------- CRS search


def test_crs_search_finds_a_code_and_words_of_a_name_from_the_epsg_registry(fresh):
    _, client = fresh
    by_code = client.get("/api/crs?q=32633").get_json()["results"]
    assert by_code[0]["code"] == "EPSG:32633" and by_code[0]["name"] == "WGS 84 / UTM zone 33N"
    by_name = client.get("/api/crs?q=british national grid").get_json()["results"]
    assert "EPSG:27700" in [c["code"] for c in by_name]


def test_crs_search_is_bounded_and_refuses_an_empty_or_huge_question(fresh):
    _, client = fresh
    assert len(client.get("/api/crs?q=utm").get_json()["results"]) == 10
    assert len(client.get("/api/crs?q=utm&limit=25").get_json()["results"]) == 25
    for url in ("/api/crs?q=", "/api/crs?q=utm&limit=26", "/api/crs?q=utm&limit=x",
                "/api/crs?q=" + "a" * 200):
        r = client.get(url)
        assert r.status_code == 400 and "error" in r.get_json(), url


# --------------------------------------------------------------------------- CRS-less DEM


def test_a_dem_without_crs_is_kept_and_read_once_its_epsg_is_chosen_then_analysed(fresh, tmp_path):
    app, client = fresh
    path = write_nocrs(tmp_path / "field.asc.tif")
    r = upload_dem(client, path, name="field.tif")
    assert r.status_code == 400
    body = r.get_json()
    assert body["needs"] == ["crs"] and re.fullmatch(r"[0-9a-f]{32}", body["pending"])
    assert "has no CRS" in body["error"] and "CRS of the DEM" in body["error"]
    # The kept file is read again with the chosen CRS: no second upload.
    r = client.post(f"/uploads/dem?pending={body['pending']}&crs=EPSG:32633",
                    headers={"Accept": "application/json"})
    assert r.status_code == 201, r.get_data(as_text=True)
    site_id = r.get_json()["site_id"]
    site = client.get(f"/api/sites/{site_id}").get_json()
    assert site["dem_crs"] == "EPSG:32633" and site["dem"]["crs"].startswith("EPSG:32633")
    r = post_settings(client, site_id, settings_form(datum="NAVD88"))
    assert r.status_code == 202, r.get_data(as_text=True)
    site = client.get(f"/api/sites/{site_id}").get_json()
    assert site["state"] == "ready" and site["summary"]["depressions"] >= 1
    # The token was used up.
    r = client.post(f"/uploads/dem?pending={body['pending']}&crs=EPSG:32633",
                    headers={"Accept": "application/json"})
    assert r.status_code == 400 and "choose the DEM file again" in r.get_json()["error"]


def test_an_unknown_epsg_code_or_a_forged_token_gets_one_line(fresh, tmp_path):
    _, client = fresh
    body = upload_dem(client, write_nocrs(tmp_path / "a.tif")).get_json()
    r = client.post(f"/uploads/dem?pending={body['pending']}&crs=EPSG:1",
                    headers={"Accept": "application/json"})
    assert r.status_code == 400 and "EPSG:1 is not a CRS" in r.get_json()["error"]
    r = client.post("/uploads/dem?pending=../../secret&crs=32633", headers={"Accept": "application/json"})
    assert r.status_code == 400 and "token" in r.get_json()["error"]


def test_the_crs_can_be_given_with_the_upload(fresh, tmp_path):
    _, client = fresh
    r = client.post("/uploads/dem?crs=32633", data=write_nocrs(tmp_path / "b.tif").read_bytes(),
                    headers={"Content-Type": "application/octet-stream", "X-File-Name": "b.tif",
                             "Accept": "application/json"})
    assert r.status_code == 201, r.get_data(as_text=True)


# --------------------------------------------------------------------------- two bands


def test_a_two_band_dem_with_band_2_analyses_band_2(fresh, tmp_path):
    _, client = fresh
    path = write_two_bands(tmp_path / "two.tif")
    r = upload_dem(client, path)
    body = r.get_json()
    assert r.status_code == 400 and body["needs"] == ["band"]
    assert [b["band"] for b in body["bands"]] == [1, 2] and "has 2 bands" in body["error"]
    r = client.post(f"/uploads/dem?pending={body['pending']}&band=2", headers={"Accept": "application/json"})
    assert r.status_code == 201, r.get_data(as_text=True)
    site_id = r.get_json()["site_id"]
    html = client.get(f"/sites/{site_id}/settings").get_data(as_text=True)
    assert "band 2 of 2" in html
    assert post_settings(client, site_id, settings_form()).status_code == 202
    site = client.get(f"/api/sites/{site_id}").get_json()
    # Band 1 is a flat plate with no depression; band 2 holds the basin.
    assert site["dem"]["elevation_min"] == pytest.approx(9.0)
    assert site["summary"]["depressions"] >= 1


def test_a_band_out_of_range_is_refused_in_words(fresh, tmp_path):
    _, client = fresh
    body = upload_dem(client, write_two_bands(tmp_path / "two.tif")).get_json()
    r = client.post(f"/uploads/dem?pending={body['pending']}&band=3", headers={"Accept": "application/json"})
    assert r.status_code == 400 and "choose a band from 1 to 2" in r.get_json()["error"]


# --------------------------------------------------------------------------- the vertical datum


def test_the_datum_survives_a_restart_and_appears_in_pages_and_json(tmp_path):
    from tests.web_support import write_lowbank

    data_dir = tmp_path / "data"
    app = make_app(data_dir)
    client = Client(app)
    site_id = upload_dem(client, write_lowbank(tmp_path / "lowbank.tif")).get_json()["site_id"]
    assert post_settings(client, site_id, settings_form(datum="Ordnance Datum Newlyn")).status_code == 202

    again = Client(make_app(data_dir))  # a new app on the same data folder: a restart
    site = again.get(f"/api/sites/{site_id}").get_json()
    assert site["vertical_datum"] == "Ordnance Datum Newlyn"
    assert again.get(f"/api/sites/{site_id}/stage?level=10.5").get_json()["vertical_datum"] \
        == "Ordnance Datum Newlyn"
    assert again.get(f"/api/sites/{site_id}/stage_table").get_json()["datum_phrase"] \
        == "above Ordnance Datum Newlyn"
    page = visible_text(again.get(f"/sites/{site_id}").get_data(as_text=True))
    assert "heights in metres above Ordnance Datum Newlyn" in page
    printed = visible_text(again.get(f"/sites/{site_id}/print?level=10.5").get_data(as_text=True))
    assert "10.50 m above Ordnance Datum Newlyn" in printed
    # The level exports carry it in their GeoTIFF tags.
    r = again.get(f"/api/sites/{site_id}/files/level/10.5/depth")
    assert r.status_code == 200
    with rasterio.MemoryFile(r.data) as mem, mem.open() as ds:
        tags = ds.tags()
    assert tags["VERTICAL_DATUM"] == "Ordnance Datum Newlyn" and "SILLMARK_CAUTION" in tags


def test_no_datum_reads_datum_not_stated(fresh, tmp_path):
    from tests.web_support import write_lowbank

    _, client = fresh
    site_id = upload_dem(client, write_lowbank(tmp_path / "lowbank.tif")).get_json()["site_id"]
    assert confirm(client, site_id).status_code == 202
    page = visible_text(client.get(f"/sites/{site_id}").get_data(as_text=True))
    assert "datum not stated" in page
    assert client.get(f"/api/sites/{site_id}").get_json()["vertical_datum"] is None


def test_a_datum_with_control_characters_or_too_long_is_refused(fresh, tmp_path):
    from tests.web_support import write_lowbank

    _, client = fresh
    site_id = upload_dem(client, write_lowbank(tmp_path / "lowbank.tif")).get_json()["site_id"]
    for datum, words in (("NAV\x00D88", "control characters"), ("x" * 81, "at most 80")):
        r = post_settings(client, site_id, settings_form(datum=datum))
        assert r.status_code == 400 and words in r.get_json()["error"]


def test_a_version_1_database_gains_the_new_columns(tmp_path):
    data_dir = tmp_path / "data"
    data_dir.mkdir()
    path = data_dir / web_db.DB_NAME
    conn = sqlite3.connect(path)
    old = web_db._SCHEMA.split("vertical_datum")[0].rstrip().rstrip(",") + "\n);"
    conn.executescript(old.split("CREATE TABLE IF NOT EXISTS runs")[0])
    conn.execute("INSERT INTO settings VALUES ('schema_version', '1')")
    conn.commit()
    conn.close()
    make_app(data_dir)
    conn = sqlite3.connect(path)
    columns = {r[1] for r in conn.execute("PRAGMA table_info(sites)")}
    version = conn.execute("SELECT value FROM settings WHERE key = 'schema_version'").fetchone()[0]
    conn.close()
    assert {"vertical_datum", "dem_crs", "dem_band", "dem_source"} <= columns
    assert version == str(web_db.SCHEMA_VERSION)


# --------------------------------------------------------------------------- units in words


def test_no_page_shows_an_internal_unit_code(fresh, tmp_path):
    from tests.web_support import write_lowbank

    _, client = fresh
    site_id = upload_dem(client, write_lowbank(tmp_path / "lowbank.tif")).get_json()["site_id"]
    assert confirm(client, site_id, unit="us-ft").status_code == 202
    pages = ["/", "/sites/new", f"/sites/{site_id}", f"/sites/{site_id}/settings",
             f"/sites/{site_id}/print?level=10.5"]
    for url in pages:
        html = client.get(url).get_data(as_text=True)
        assert "us-ft" not in visible_text(html), url
    assert "US survey feet" in visible_text(client.get(f"/sites/{site_id}/settings").get_data(as_text=True))
    r = post_settings(client, site_id, settings_form(unit="furlongs"))
    assert r.status_code == 400 and "us-ft" not in r.get_json()["error"]
    assert "US survey feet" in r.get_json()["error"]


# --------------------------------------------------------------------------- lon/lat cell sizes


def test_a_lon_lat_dem_shows_its_cell_size_in_metres(fresh, tmp_path):
    from affine import Affine

    _, client = fresh
    z = lowbank_elevation()
    # 1/1200 degree cells at 60° N (about 46 m east-west and 93 m north-south).
    path = write_raster(tmp_path / "ll.tif", z, transform=Affine(1 / 1200, 0, 10.0, 0, -1 / 1200, 60.0),
                        nodata=-9999.0, crs="EPSG:4326")
    site_id = upload_dem(client, path).get_json()["site_id"]
    metres = client.get(f"/api/sites/{site_id}").get_json()["dem"]["cell_size_m"]
    # Expected from the WGS 84 ellipsoid (pyproj.Geod, recalled magnitudes): a degree of
    # longitude at 60° is about 55.8 km, of latitude about 111.4 km.
    assert metres[0] == pytest.approx(55_800 / 1200, rel=0.01)
    assert metres[1] == pytest.approx(111_400 / 1200, rel=0.01)
    html = client.get(f"/sites/{site_id}/settings").get_data(as_text=True)
    assert re.search(r"about 46\.\d m × 92\.\d m", visible_text(html)) or \
        re.search(r"about 46\.\d m × 93\.\d m", visible_text(html))
