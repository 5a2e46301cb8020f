"""Hostile and broken input: every case gets a 4xx with a clear message, the server
keeps answering, and nothing already stored changes.

One analysed Lowbank site (tests/web_support.py, invented) is built once for the
module; each case is sent to the same app through the Flask test client with
the inline job runner. After each case the site's files (by SHA-256), its
metadata rows and its figures at 10.5 m must be exactly as before.
"""

from __future__ import annotations

import hashlib
import io
import json
import sqlite3
import struct
import zlib
from html import unescape
from pathlib import Path

import numpy as np
import pytest
from affine import Affine

from sillmark import SCREENING_CAUTION
from tests.rasters import write_raster
from tests.web_support import (Client, analysed_site, cell_centre, confirm, lonlat, make_app, upload_dem,
                               write_lowbank)
from sillmark.web import layout

# --------------------------------------------------------------------------- the shared site


@pytest.fixture(scope="module")
def world(tmp_path_factory):
    """(app, client, site_id, files folder): one analysed site with assets, built once."""
    folder = tmp_path_factory.mktemp("hostile")
    app = make_app(folder / "data")
    client = Client(app)
    site_id = analysed_site(client, write_lowbank(folder / "lowbank.tif"))
    return app, client, site_id, folder


def stored_state(app) -> dict:
    """Every file under the data folder's sites/ by SHA-256, and every metadata row."""
    data = app.extensions["sillmark"].data_dir
    files = {str(p.relative_to(data)): hashlib.sha256(p.read_bytes()).hexdigest()
             for p in sorted((data / "sites").rglob("*")) if p.is_file()}
    conn = sqlite3.connect(app.extensions["sillmark"].db_path)
    try:
        rows = {t: conn.execute(f"SELECT * FROM {t} ORDER BY id").fetchall()
                for t in ("sites", "runs", "asset_sets")}
    finally:
        conn.close()
    return {"files": files, "rows": rows}


def leftovers(app) -> list[str]:
    """Files left in the uploads folder; a DEM waiting for its CRS or band is kept on
    purpose in ``pending/`` (for a day), so that folder is not a leftover."""
    return sorted(p.name for p in layout.uploads_dir(app.extensions["sillmark"].data_dir).iterdir()
                  if p.name != "pending")


def message_of(response) -> str:
    """The error message: JSON ``error``, or the text of the error page."""
    if response.mimetype == "application/json":
        body = response.get_json()
        assert isinstance(body, dict) and isinstance(body.get("error"), str), body
        assert body["status"] == response.status_code
        return body["error"]
    html = response.get_data(as_text=True)
    assert response.mimetype == "text/html"
    assert SCREENING_CAUTION in html  # the error page keeps the banner
    start = html.index('class="message error-box">') + len('class="message error-box">')
    return unescape(html[start:html.index("</p>", start)])


# --------------------------------------------------------------------------- hostile files


def tif_bytes(folder: Path, data, **options) -> bytes:
    path = folder / "case.tif"
    write_raster(path, data, **options)
    return path.read_bytes()


def bomb_tiff(width: int = 200_000, height: int = 200_000) -> bytes:
    """A GeoTIFF of a few KB declaring width × height float32 cells in one deflate strip
    (the strip holds a few MB of zeros: reading it all would need 160 GB)."""
    payload = zlib.compress(b"\0" * 4_000_000, 9)
    tags = [(256, 4, 1, width), (257, 4, 1, height), (258, 3, 1, 32), (259, 3, 1, 8),
            (262, 3, 1, 1), (273, 4, 1, None), (277, 3, 1, 1), (278, 4, 1, height),
            (279, 4, 1, len(payload)), (284, 3, 1, 1), (339, 3, 1, 3),
            (33550, 12, 3, struct.pack("<3d", 2.0, 2.0, 0.0)),
            (33922, 12, 6, struct.pack("<6d", 0, 0, 0, 500_000.0, 5_000_000.0, 0)),
            (34735, 3, 16, struct.pack("<16H", 1, 1, 0, 3, 1024, 0, 1, 1, 1025, 0, 1, 1,
                                       3072, 0, 1, 32633))]
    extra_at = 8 + 2 + 12 * len(tags) + 4
    extra = b""
    ifd = struct.pack("<H", len(tags))
    data_at = extra_at + sum(len(v) for *_, v in tags if isinstance(v, bytes))
    for tag, kind, count, value in tags:
        if isinstance(value, bytes):
            ifd += struct.pack("<HHII", tag, kind, count, extra_at + len(extra))
            extra += value
            continue
        value = data_at if value is None else value
        packed = struct.pack("<HH", value, 0) if kind == 3 else struct.pack("<I", value)
        ifd += struct.pack("<HHI", tag, kind, count) + packed
    ifd += struct.pack("<I", 0)
    return b"II*\x00" + struct.pack("<I", 8) + ifd + extra + payload


#: A planetary-data label whose image lives in another file it names (here the
#: installation's secret key, next to the uploads folder).
LABEL_NAMING_ANOTHER_FILE = (
    b"PDS_VERSION_ID = PDS3\r\nRECORD_TYPE = FIXED_LENGTH\r\nRECORD_BYTES = 16\r\n"
    b'^IMAGE = ("../secret_key", 1)\r\nOBJECT = IMAGE\r\n  LINES = 4\r\n  LINE_SAMPLES = 4\r\n'
    b"  SAMPLE_TYPE = PC_REAL\r\n  SAMPLE_BITS = 32\r\n  BANDS = 1\r\nEND_OBJECT = IMAGE\r\nEND\r\n"
)

VRT_POINTING_AWAY = (
    b'<VRTDataset rasterXSize="10" rasterYSize="10"><VRTRasterBand dataType="Float32" band="1">'
    b"<SimpleSource><SourceFilename>/vsicurl/http://127.0.0.1:9/elsewhere.tif</SourceFilename>"
    b"</SimpleSource></VRTRasterBand></VRTDataset>"
)


def dem_cases(folder: Path) -> dict[str, tuple[bytes, str, str]]:
    """id -> (body, file name, fragment of the message)."""
    lowbank = write_lowbank(folder / "whole.tif").read_bytes()
    ones = np.ones((10, 12), np.float32)
    return {
        "empty-file": (b"", "empty.tif", "empty (0 bytes)"),
        "truncated-geotiff": (lowbank[: len(lowbank) // 2], "half.tif", "truncated or damaged"),
        "text-renamed-tif": (b"Mill Lane levels, surveyed 2024\n" * 40, "levels.tif",
                             "is not a raster Sillmark can read"),
        "decompression-bomb": (bomb_tiff(), "huge.tif", "200,000 × 200,000 = 40,000,000,000 cells"),
        "several-bands": (tif_bytes(folder, np.ones((3, 10, 12), np.float32)), "rgb.tif", "has 3 bands"),
        "no-crs": (tif_bytes(folder, ones, crs=None), "nocrs.tif", "has no CRS"),
        "no-geotransform": (tif_bytes(folder, ones, transform=False), "plain.tif", "no geotransform"),
        "rotated-transform": (tif_bytes(folder, ones, transform=Affine(2, 0.3, 500_000, 0.2, -2, 5e6)),
                              "rotated.tif", "rotated or sheared"),
        "not-north-up": (tif_bytes(folder, ones, transform=Affine(2, 0, 500_000, 0, 2, 5e6)),
                         "southup.tif", "not north-up"),
        "all-nodata": (tif_bytes(folder, np.full((10, 12), -9999, np.float32), nodata=-9999),
                       "void.tif", "every cell"),
        "nan-everywhere": (tif_bytes(folder, np.full((10, 12), np.nan, np.float32)), "nan.tif", "every cell"),
        "inf-everywhere": (tif_bytes(folder, np.where(np.arange(120).reshape(10, 12) % 2, np.inf, -np.inf)
                                     .astype(np.float32)), "inf.tif", "every cell"),
        "int16-nodata-at-type-minimum": (tif_bytes(folder, np.full((10, 12), -32768, np.int16), nodata=-32768),
                                         "int16.tif", "every cell"),
        "elevations-of-1e30": (tif_bytes(folder, np.full((10, 12), 1e30, np.float32)), "fill.tif",
                               "no terrain is that high or deep"),
        "one-by-one-cell": (tif_bytes(folder, np.ones((1, 1), np.float32)), "dot.tif", "1 × 1 cells"),
        "one-by-n-strip": (tif_bytes(folder, np.arange(40, dtype=np.float32)[None, :]), "strip.tif",
                           "1 × 40 cells"),
        "n-by-one-strip": (tif_bytes(folder, np.arange(40, dtype=np.float32)[:, None]), "column.tif",
                           "40 × 1 cells"),
        "virtual-raster-pointing-away": (VRT_POINTING_AWAY, "mosaic.vrt", "virtual raster"),
        "label-naming-another-file": (LABEL_NAMING_ANOTHER_FILE, "cube.lbl", "is not a raster Sillmark can read"),
        "gzip-instead-of-tif": (zlib.compress(lowbank), "lowbank.tif.gz", "is not a raster Sillmark can read"),
        "path-traversal-name": (b"not a raster", "../../x.tif", "'x.tif'"),
        "windows-traversal-name": (b"not a raster", "..\\..\\windows\\x.tif", "'x.tif'"),
        "nul-byte-name": (b"not a raster", "x%00.tif", "is not a raster"),
        "very-long-name": (b"not a raster", "a" * 5000 + ".tif", "is not a raster"),
        "unicode-name": (b"not a raster", "Ufer%C3%A4nderung%20%E2%80%94%20%E6%B2%B3.tif",
                         "'Uferänderung — 河.tif'"),
    }


def _dem_case_ids() -> list[str]:
    import tempfile

    with tempfile.TemporaryDirectory() as tmp:
        return list(dem_cases(Path(tmp)))


DEM_CASE_IDS = _dem_case_ids()


@pytest.fixture(scope="module")
def dem_bodies(world):
    return dem_cases(world[3])


def check_refusal(response, fragment: str, app, tmp_hint: Path | None = None) -> str:
    assert 400 <= response.status_code < 500, (response.status_code, response.get_data(as_text=True)[:300])
    message = message_of(response)
    assert fragment in message, message
    data_dir = str(app.extensions["sillmark"].data_dir)
    for leak in ("Traceback", data_dir, ".part", "File \"", "Error:"):
        assert leak not in message, (leak, message)
    if tmp_hint is not None:
        assert str(tmp_hint) not in message
    assert len(message) < 1000
    return message


def still_serving(client, site_id: int, baseline: dict) -> None:
    """A follow-up request to the existing site answers as before."""
    r = client.get(f"/api/sites/{site_id}/stage?level=10.5")
    assert r.status_code == 200
    assert r.get_json() == baseline


@pytest.fixture(scope="module")
def baseline(world):
    app, client, site_id, _ = world
    return client.get(f"/api/sites/{site_id}/stage?level=10.5").get_json()


@pytest.mark.parametrize("case", DEM_CASE_IDS)
def test_hostile_dem_upload_is_refused_and_changes_nothing(world, baseline, dem_bodies, case):
    app, client, site_id, _ = world
    body, name, fragment = dem_bodies[case]
    before = stored_state(app)
    r = client.post("/uploads/dem", data=body, headers={
        "Content-Type": "application/octet-stream", "X-File-Name": name, "Accept": "application/json"})
    message = check_refusal(r, fragment, app)
    assert "\x00" not in message and len(message) < 600
    assert stored_state(app) == before
    assert leftovers(app) == []
    still_serving(client, site_id, baseline)


def test_an_upload_larger_than_the_limit_is_refused_with_413(world, baseline):
    app, client, site_id, folder = world
    body = write_lowbank(folder / "big.tif").read_bytes()
    before = stored_state(app)
    limit = app.config["MAX_UPLOAD_BYTES"]
    app.config["MAX_UPLOAD_BYTES"] = 4096
    try:
        r = client.post("/uploads/dem", data=body, headers={
            "Content-Type": "application/octet-stream", "X-File-Name": "big.tif", "Accept": "application/json"})
        check_refusal(r, "larger than the upload limit of 4 KiB", app)
        assert r.status_code == 413
        stream = client.post("/uploads/dem", input_stream=io.BytesIO(body),
                             environ_overrides={"wsgi.input_terminated": True}, headers={
            "Content-Type": "application/octet-stream", "X-File-Name": "big.tif", "Accept": "application/json"})
        assert stream.status_code == 413  # no Content-Length: counted as it streams
    finally:
        app.config["MAX_UPLOAD_BYTES"] = limit
    assert stored_state(app) == before and leftovers(app) == []
    still_serving(client, site_id, baseline)


def test_a_form_upload_without_the_file_field_is_refused(world, baseline):
    app, client, site_id, _ = world
    r = client.post("/uploads/dem", data={"other": (io.BytesIO(b"x"), "x.tif")},
                    content_type="multipart/form-data", headers={"Accept": "application/json"})
    check_refusal(r, "no file in the upload", app)
    still_serving(client, site_id, baseline)


# --------------------------------------------------------------------------- settings of the site


def water(obj) -> tuple[bytes, str]:
    return (json.dumps(obj).encode() if not isinstance(obj, bytes) else obj), "water.geojson"


def square(lon: float, lat: float, d: float) -> dict:
    return {"type": "Polygon", "coordinates": [[[lon, lat], [lon + d, lat], [lon + d, lat + d],
                                                [lon, lat + d], [lon, lat]]]}


SETTINGS_CASES = {
    "water-geojson-not-json": ({"outlets": ("file",), "water": (b"{'type': Feature", "brook.geojson")},
                               "'brook.geojson' is not valid JSON"),
    "water-geojson-binary": ({"outlets": ("file",), "water": (b"\xff\xfe\x00\x01" * 20, "brook.geojson")},
                             "not UTF-8"),
    "outlet-polygon-misses-the-grid": ({"outlets": ("file",), "water": water(square(100.0, -60.0, 0.01))},
                                       "water.geojson"),
    "water-crs-is-a-proj-string": ({"outlets": ("file",), "water": water({
        "type": "Feature", "properties": {},
        "crs": {"type": "name", "properties": {"name": "+proj=longlat +nadgrids=/etc/passwd"}},
        "geometry": square(15.0, 45.15, 0.001)})}, "give an authority name"),
    "water-geojson-of-no-geometry": ({"outlets": ("file",), "water": water({"type": "FeatureCollection",
                                                                            "features": []})},
                                     "water.geojson"),
    "water-nested-too-deep": ({"outlets": ("file",), "water": (b"[" * 100_000 + b"]" * 100_000,
                                                               "deep.geojson")}, "deep.geojson"),
    "connectivity-is-sql": ({"connectivity": "8; DROP TABLE sites"}, "connectivity must be 8"),
    "unit-is-nonsense": ({"unit": "cubits"}, "unknown vertical unit"),
    "outlet-kind-is-a-path": ({"outlets": ("/etc/passwd",)}, "unknown outlet kind"),
    "no-outlet-at-all": ({"outlets": ()}, "give at least one outlet"),
}


@pytest.mark.parametrize("case", list(SETTINGS_CASES))
def test_hostile_settings_are_refused_and_the_site_keeps_its_results(world, baseline, case):
    app, client, site_id, _ = world
    change, fragment = SETTINGS_CASES[case]
    before = stored_state(app)
    r = confirm(client, site_id, **change)
    check_refusal(r, fragment, app)
    assert stored_state(app) == before and leftovers(app) == []
    still_serving(client, site_id, baseline)


# --------------------------------------------------------------------------- asset tables


def asset_geojson(coords, crs_name: str | None = None) -> bytes:
    obj = {"type": "FeatureCollection", "features": [
        {"type": "Feature", "properties": {"name": f"Pump {k}"}, "geometry": {"type": "Point", "coordinates": c}}
        for k, c in enumerate(coords)]}
    if crs_name is not None:
        obj["crs"] = {"type": "name", "properties": {"name": crs_name}}
    return json.dumps(obj).encode()


def _lowbank_lonlat(row: int, col: int) -> list[float]:
    return list(lonlat(*cell_centre(row, col)))


ASSET_CASES = {
    "assets-missing-name-column": (b"title,x,y\nschool,500010,4999990\n", "bad.csv", "no 'name' column"),
    "assets-missing-coordinates": (b"name,kind\nschool,school\n", "nocoords.csv", "nocoords.csv"),
    "assets-coordinate-is-text": (b"name,x,y\nschool,east,north\n", "text.csv", "text.csv"),
    "assets-header-only": (b"name,x,y\n", "empty_rows.csv", "empty_rows.csv"),
    "assets-not-utf8": ("name,x,y\nSchüle,500010,4999990\n".encode("latin-1"), "latin.csv", "not UTF-8"),
    "assets-geojson-not-json": (b"{\"type\": \"FeatureCollection\", features: [", "pts.geojson", "not valid JSON"),
    "assets-geojson-polygon": (json.dumps({"type": "Feature", "properties": {"name": "Yard"},
                                           "geometry": square(15.0, 45.15, 0.001)}).encode(),
                               "yard.geojson", "not a Point"),
    "assets-in-the-wrong-crs": (f"name,x,y\nSchool,{_lowbank_lonlat(18, 25)[0]},{_lowbank_lonlat(18, 25)[1]}\n"
                                .encode(), "lonlat_as_xy.csv", "none of the 1 assets lies on the DEM"),
    "assets-geojson-wrong-crs": (asset_geojson([list(cell_centre(18, 25))]), "utm_as_lonlat.geojson",
                                 "utm_as_lonlat.geojson"),
    "assets-all-outside-the-dem": (asset_geojson([[100.0, -60.0], [101.0, -61.0]]), "faraway.geojson",
                                   "none of the 2 assets lies on the DEM"),
    "assets-crs-is-a-proj-string": (asset_geojson([_lowbank_lonlat(18, 25)], "+init=/etc/passwd:root"),
                                    "init.geojson", "give an authority name"),
    "assets-nan-coordinates": (b"name,x,y\nschool,nan,nan\n", "nan.csv", "nan.csv"),
}


@pytest.mark.parametrize("case", list(ASSET_CASES))
def test_hostile_asset_table_is_refused_and_the_active_set_stays(world, baseline, case):
    app, client, site_id, _ = world
    body, name, fragment = ASSET_CASES[case]
    before = stored_state(app)
    listed = client.get(f"/api/sites/{site_id}/assets?level=10.5").get_json()
    r = client.post(f"/uploads/sites/{site_id}/assets", data={"assets": (io.BytesIO(body), name)},
                    content_type="multipart/form-data", headers={"Accept": "application/json"})
    check_refusal(r, fragment, app)
    assert stored_state(app) == before and leftovers(app) == []
    assert client.get(f"/api/sites/{site_id}/assets?level=10.5").get_json() == listed
    still_serving(client, site_id, baseline)


# --------------------------------------------------------------------------- absurd levels


LEVEL_VALUES = {"nan": "finite number", "inf": "finite number", "-inf": "finite number",
                "1e30": "far from this site's ground", "-1e30": "far from this site's ground",
                "high": "finite number", "%20": "give a water level", "0x1p4": "finite number"}


def level_urls(site_id: int, level: str) -> dict[str, str]:
    lon, lat = _lowbank_lonlat(18, 25)
    return {
        "stage": f"/api/sites/{site_id}/stage?level={level}",
        "cell": f"/api/sites/{site_id}/cell?lon={lon}&lat={lat}&level={level}",
        "assets": f"/api/sites/{site_id}/assets?level={level}",
        "level-file": f"/api/sites/{site_id}/files/level/{level}/depth",
        "level-zip": f"/api/sites/{site_id}/files/level/{level}.zip",
        "water-tile": f"/tiles/{site_id}/{level}/18/141449/92100.png",
        "site-page": f"/sites/{site_id}?level={level}",
        "print-page": f"/sites/{site_id}/print?level={level}",
    }


@pytest.mark.parametrize("value", list(LEVEL_VALUES))
@pytest.mark.parametrize("endpoint", list(level_urls(1, "0")))
def test_absurd_levels_are_refused_on_every_level_endpoint(world, baseline, endpoint, value):
    app, client, site_id, _ = world
    before = stored_state(app)
    r = client.get(level_urls(site_id, value)[endpoint])
    check_refusal(r, LEVEL_VALUES[value], app)
    assert r.status_code == 400
    assert stored_state(app) == before
    still_serving(client, site_id, baseline)


def test_an_empty_level_in_a_path_is_not_found(world, baseline):
    app, client, site_id, _ = world
    for url in (f"/api/sites/{site_id}/files/level//depth", f"/tiles/{site_id}//18/141449/92100.png"):
        r = client.get(url)
        assert r.status_code == 404
        message_of(r)
    still_serving(client, site_id, baseline)


# --------------------------------------------------------------------------- other parameters


def other_cases(site_id: int) -> dict[str, tuple[str, str, dict | None, int, str]]:
    """id -> (method, url, JSON body, status, fragment)."""
    lon, lat = _lowbank_lonlat(18, 25)
    s = f"/api/sites/{site_id}"
    return {
        "barrier-level-nan": ("POST", f"{s}/barrier", {"asset": 0, "level": "nan"}, 400, "finite number"),
        "barrier-level-inf": ("POST", f"{s}/barrier", {"asset": 0, "level": "inf"}, 400, "finite number"),
        "barrier-level-text": ("POST", f"{s}/barrier", {"asset": 0, "level": "half a metre"}, 400, "finite number"),
        "barrier-level-missing": ("POST", f"{s}/barrier", {"asset": 0}, 400, "give the target level"),
        "barrier-asset-unknown": ("POST", f"{s}/barrier", {"asset": 99, "level": 11.5}, 400, "there is no asset 99"),
        "barrier-asset-text": ("POST", f"{s}/barrier", {"asset": "school", "level": 11.5}, 400, "index"),
        "barrier-lon-nan": ("POST", f"{s}/barrier", {"lon": "nan", "lat": lat, "level": 11.5}, 400, "finite number of degrees"),
        "cell-lon-nan": ("GET", f"{s}/cell?lon=nan&lat={lat}&level=10.5", None, 400, "finite number of degrees"),
        "cell-lat-1e30": ("GET", f"{s}/cell?lon={lon}&lat=1e30&level=10.5", None, 400, "lat in [-90, 90]"),
        "cell-lon-text": ("GET", f"{s}/cell?lon=east&lat={lat}&level=10.5", None, 400, "number of degrees"),
        "cell-outside-the-dem": ("GET", f"{s}/cell?lon=100&lat=-60&level=10.5", None, 400, "outside the DEM"),
        "tile-zoom-99": ("GET", f"/tiles/{site_id}/hillshade/99/0/0.png", None, 404, "there is no tile"),
        "tile-x-beyond-the-zoom": ("GET", f"/tiles/{site_id}/hillshade/3/9/0.png", None, 404, "there is no tile"),
        "depression-curve-unknown": ("GET", f"{s}/depressions/99999/curve", None, 404, "no depression 99999"),
        "result-file-traversal": ("GET", f"{s}/files/results/..%2F..%2F..%2Fsecret_key", None, 404,
                                  "was not found"),
        "result-file-dot-dot": ("GET", f"{s}/files/results/..", None, 404, "no result file"),
        "result-file-unknown": ("GET", f"{s}/files/results/sillmark.sqlite3", None, 404, "no result file"),
        "level-file-kind-unknown": ("GET", f"{s}/files/level/10.5/passwd", None, 404, "no level file"),
        "unknown-site": ("GET", "/api/sites/987654/stage?level=10.5", None, 404, "there is no site 987654"),
        "site-id-beyond-64-bits": ("GET", f"/api/sites/{2**64}/files/level/10.5/depth", None, 404, "no site"),
        "rerun-unknown-site": ("POST", "/api/sites/987654/rerun", None, 404, "there is no site 987654"),
        "settings-of-unknown-site": ("POST", "/uploads/sites/987654/settings", None, 404, "there is no site"),
        "assets-of-unknown-site": ("POST", "/uploads/sites/987654/assets", None, 404, "there is no site"),
        "run-unknown": ("GET", "/api/runs/987654", None, 404, "there is no run 987654"),
    }


@pytest.mark.parametrize("case", list(other_cases(1)))
def test_hostile_parameters_are_refused(world, baseline, case):
    app, client, site_id, _ = world
    method, url, body, status, fragment = other_cases(site_id)[case]
    before = stored_state(app)
    if method == "GET":
        r = client.get(url)
    else:
        r = client.post(url, json=body, headers={"Accept": "application/json"}) if body is not None \
            else client.post(url, headers={"Accept": "application/json"})
    check_refusal(r, fragment, app)
    assert r.status_code == status
    assert stored_state(app) == before
    still_serving(client, site_id, baseline)


# --------------------------------------------------------------------------- accepted edge inputs


@pytest.mark.parametrize("name", ["../../x.tif", "..%2F..%2Fetc%2Fx.tif", "x%00.tif", "a" * 3000 + ".tif",
                                  "Uferm%C3%BChle%20%E6%B2%B3.tif"])
def test_a_good_dem_under_a_hostile_name_is_kept_under_a_server_made_name(world, baseline, name):
    app, client, site_id, folder = world
    data_dir = app.extensions["sillmark"].data_dir
    good = write_lowbank(folder / "good.tif")
    outside = sorted(p.name for p in data_dir.parent.iterdir())
    r = upload_dem(client, good, name=name)
    assert r.status_code == 201, r.get_json()
    new_site = r.get_json()["site_id"]
    site = client.get(f"/api/sites/{new_site}").get_json()
    shown = site["original_name"]
    assert "/" not in shown and "\\" not in shown and "\x00" not in shown and ".." not in shown.split("/")
    assert len(shown) <= 120 and len(site["name"]) <= 80
    stored = [p for p in (data_dir / "sites" / str(new_site)).rglob("*") if p.is_file()]
    assert len(stored) == 1 and stored[0].parent.name == "dem"
    assert len(stored[0].stem) == 24 and all(ch in "0123456789abcdef" for ch in stored[0].stem)
    assert sorted(p.name for p in data_dir.parent.iterdir()) == outside  # nothing written beside the data folder
    assert leftovers(app) == []
    still_serving(client, site_id, baseline)


def test_int16_with_nodata_at_the_type_minimum_is_read_as_nodata(world, baseline):
    app, client, site_id, folder = world
    z = np.full((10, 12), 40, np.int16)
    z[2:4, 3:9] = -32768
    r = client.post("/uploads/dem", data=tif_bytes(folder, z, nodata=-32768), headers={
        "Content-Type": "application/octet-stream", "X-File-Name": "int16.tif", "Accept": "application/json"})
    assert r.status_code == 201
    dem = r.get_json()["dem"]
    assert dem["nodata_share"] == pytest.approx(12 / 120)
    assert dem["elevation_min"] == dem["elevation_max"] == 40.0  # -32768 is not ground
    still_serving(client, site_id, baseline)


# --------------------------------------------------------------------------- failures inside a run


def test_a_dem_damaged_on_disk_fails_the_rerun_with_a_reason_and_the_results_stay(world, baseline):
    """The worker reads the site's stored DEM again; a damaged copy fails that run only."""
    app, client, site_id, folder = world
    other = analysed_site(client, write_lowbank(folder / "second.tif"), assets=False)
    data_dir = app.extensions["sillmark"].data_dir
    figures = client.get(f"/api/sites/{other}/stage?level=10.5").get_json()
    tile = client.get(f"/tiles/{other}/hillshade/18/141449/92100.png")
    assert tile.status_code == 200
    before = stored_state(app)
    current = client.get(f"/api/sites/{other}").get_json()["current_run"]
    (dem_file,) = (data_dir / "sites" / str(other) / "dem").iterdir()
    body = dem_file.read_bytes()
    dem_file.write_bytes(body[: len(body) // 2])
    try:
        r = client.post(f"/api/sites/{other}/rerun", headers={"Accept": "application/json"})
        assert r.status_code == 202
        status = client.get(f"/api/sites/{other}/status").get_json()
        assert status["run"]["status"] == "failed" and status["run"]["id"] != current
        reason = status["run"]["message"]
        assert "truncated or damaged" in reason and "Traceback" not in reason
        assert str(data_dir) not in reason
        assert status["state"] == "ready" and status["current_run"] == current  # the last good results
        assert client.get(f"/api/sites/{other}/stage?level=10.5").get_json() == figures
        again = client.get(f"/tiles/{other}/hillshade/18/141449/92100.png")
        assert again.status_code == 200 and again.get_data() == tile.get_data()
        after = stored_state(app)
        # Only the failed run's own log was added; every earlier file is unchanged.
        added = set(after["files"]) - set(before["files"])
        assert all(f.endswith("worker.log") for f in added), added
        assert {k: v for k, v in after["files"].items() if k in before["files"]
                and "/dem/" not in k} == {k: v for k, v in before["files"].items() if "/dem/" not in k}
    finally:
        dem_file.write_bytes(body)
    still_serving(client, site_id, baseline)


# --------------------------------------------------------------------------- GDAL sees no user path


REMOTE_OR_VIRTUAL = ["/vsicurl/http://127.0.0.1:9/x.tif", "/VSIZIP//tmp/site.zip/x.tif", "/vsis3/bucket/x.tif",
                     "\\vsicurl\\http://127.0.0.1:9/x.tif", "/vsimem/x.tif", "http://127.0.0.1:9/x.tif",
                     "zip://site.zip!x.tif", 'HDF5:"site.h5"://elevation', "GTIFF_DIR:1:x.tif",
                     "WMTS:http://127.0.0.1:9/caps.xml", "x.tif\x00.png"]


@pytest.mark.parametrize("path", REMOTE_OR_VIRTUAL)
def test_gdal_virtual_and_remote_paths_are_refused_by_every_reader(path):
    from sillmark.grid.assets import InvalidAssets, read_assets
    from sillmark.grid.dem import dem_from_array, read_dem
    from sillmark.grid.dem_grid import read_dem_grid
    from sillmark.errors import InvalidDEM, InvalidOutlets
    from sillmark.grid.outlets import outlets_from_geojson, outlets_from_raster

    expected = "NUL byte" if "\x00" in path else "virtual or remote path"
    for reader in (read_dem, read_dem_grid):
        with pytest.raises(InvalidDEM, match=expected):
            reader(path)
    dem = dem_from_array(np.zeros((3, 3), np.float32))
    for reader in (outlets_from_geojson, outlets_from_raster):
        with pytest.raises(InvalidOutlets, match=expected):
            reader(dem, path)
    with pytest.raises(InvalidAssets, match=expected):
        read_assets(path, dem)


def test_gdal_fetches_nothing_over_the_network_in_the_web_server(world, tmp_path):
    """Even a path that reached GDAL unchecked would fetch nothing: remote access is off."""
    import http.server
    import threading

    import rasterio

    (tmp_path / "remote.tif").write_bytes(write_lowbank(tmp_path / "remote.tif").read_bytes())
    requests = []

    class Handler(http.server.SimpleHTTPRequestHandler):
        def __init__(self, *a, **k):
            super().__init__(*a, directory=str(tmp_path), **k)

        def log_message(self, *args):
            requests.append(args)

    server = http.server.ThreadingHTTPServer(("127.0.0.1", 0), Handler)
    threading.Thread(target=server.serve_forever, daemon=True).start()
    try:
        url = f"http://127.0.0.1:{server.server_address[1]}/remote.tif"
        for path in (f"/vsicurl/{url}", url):
            with pytest.raises(rasterio.errors.RasterioError):
                with rasterio.open(path):
                    pass
        assert requests == []  # GDAL did not even ask
        # The same server answers an ordinary client, so the check above can fail.
        import urllib.request

        with urllib.request.urlopen(url, timeout=5) as fh:
            assert fh.read(4) == b"II*\x00"
        assert len(requests) == 1
    finally:
        server.shutdown()
        server.server_close()


def test_a_raster_that_names_another_file_is_refused(tmp_path):
    """The files GDAL reads for a dataset must be the file itself or its own sidecars."""
    import rasterio

    from sillmark.grid.raster_files import check_own_files
    from sillmark.errors import InvalidDEM

    (tmp_path / "secret_key").write_bytes(np.arange(16, dtype=np.float32).tobytes())
    (tmp_path / "up").mkdir()
    label = tmp_path / "up" / "cube.bin"
    label.write_bytes(LABEL_NAMING_ANOTHER_FILE)
    import warnings

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", rasterio.errors.NotGeoreferencedWarning)
        with rasterio.open(label, driver="PDS") as src:
            assert len(src.files) == 2  # GDAL would read the other file
            with pytest.raises(InvalidDEM, match="read together with other files it names"):
                check_own_files(src, str(label), InvalidDEM, "the DEM")
    lowbank = write_lowbank(tmp_path / "own.tif")
    with rasterio.open(lowbank) as src:
        check_own_files(src, str(lowbank), InvalidDEM, "the DEM")  # a GeoTIFF alone passes
