"""The browser app's frame: configuration, secret key, SQLite, security headers,
local resources only, the caution on every page, and errors without tracebacks."""

from __future__ import annotations

import os
import sqlite3
import stat
from pathlib import Path

import folium
import pytest

from sillmark import SCREENING_CAUTION
from tests.web_support import external_references, make_app
from sillmark.web import CONTENT_SECURITY_POLICY, config as web_config

ROOT = Path(__file__).resolve().parents[2]


def test_config_is_defaults_then_instance_file_then_test_dict(tmp_path):
    data = tmp_path / "data"
    data.mkdir()
    (data / "config.py").write_text("TILE_MAX_AGE = 77\nLEVEL_CACHE = 5\n", encoding="utf-8")
    app = make_app(data, LEVEL_CACHE=9)
    assert app.config["TILE_MAX_AGE"] == 77  # instance file over the default (3600)
    assert app.config["LEVEL_CACHE"] == 9  # test dict over the instance file
    assert app.config["MAX_UPLOAD_BYTES"] == web_config.DEFAULTS["MAX_UPLOAD_BYTES"]


def test_secret_key_is_made_per_installation_and_kept(tmp_path):
    a = make_app(tmp_path / "one")
    b = make_app(tmp_path / "one")
    c = make_app(tmp_path / "two")
    key_file = tmp_path / "one" / web_config.SECRET_KEY_FILE
    assert a.config["SECRET_KEY"] == b.config["SECRET_KEY"] == key_file.read_text().strip()
    assert a.config["SECRET_KEY"] != c.config["SECRET_KEY"]
    assert len(a.config["SECRET_KEY"]) >= 32
    assert stat.S_IMODE(os.stat(key_file).st_mode) == 0o600
    assert web_config.DEFAULTS["SECRET_KEY"] is None  # no fixed default anywhere


def test_metadata_is_sqlite_in_wal_mode(fresh):
    app, _ = fresh
    path = app.extensions["sillmark"].db_path
    conn = sqlite3.connect(path)
    try:
        assert conn.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
        tables = {r[0] for r in conn.execute("SELECT name FROM sqlite_master WHERE type='table'")}
    finally:
        conn.close()
    assert {"sites", "runs", "asset_sets", "settings"} <= tables


def pages(site_id: int) -> list[str]:
    return ["/", "/sites/new", f"/sites/{site_id}", f"/sites/{site_id}/settings",
            f"/sites/{site_id}/print?level=10.5", "/method"]


@pytest.mark.parametrize("which", range(6))
def test_every_page_carries_the_caution_and_only_local_resources(ready, which):
    _, client, site_id = ready
    url = pages(site_id)[which]
    r = client.get(url)
    assert r.status_code == 200, url
    html = r.get_data(as_text=True)
    assert SCREENING_CAUTION in html
    assert external_references(html) == [], url
    assert r.headers["Content-Security-Policy"] == CONTENT_SECURITY_POLICY
    assert "default-src 'self'" in CONTENT_SECURITY_POLICY and "connect-src 'self'" in CONTENT_SECURITY_POLICY
    assert r.headers["X-Content-Type-Options"] == "nosniff"
    assert r.mimetype == "text/html"


def test_map_page_uses_the_vendored_leaflet_not_folium_cdns(ready):
    _, client, site_id = ready
    html = client.get(f"/sites/{site_id}").get_data(as_text=True)
    assert '<script src="/static/vendor/leaflet/leaflet.js"></script>' in html
    assert '<link rel="stylesheet" href="/static/vendor/leaflet/leaflet.css"/>' in html
    for cdn in ("cdn.jsdelivr", "code.jquery", "cdnjs", "bootstrapcdn", "unpkg", "openstreetmap"):
        assert cdn not in html
    # folium's own module lists are left as they were (only our map instances differ).
    assert any("cdn.jsdelivr" in url for _, url in folium.Map.default_js)


def test_vendored_leaflet_is_served_with_its_licence_and_images(ready):
    _, client, _ = ready
    for path in ("leaflet.js", "leaflet.css", "LICENSE", "VENDORED.md", "images/layers.png",
                 "images/marker-icon.png"):
        r = client.get(f"/static/vendor/leaflet/{path}")
        assert r.status_code == 200, path
        r.close()
    licence = (ROOT / "sillmark/web/static/vendor/leaflet/LICENSE").read_text()
    assert "BSD 2-Clause" in licence
    assert "1.9.4" in (ROOT / "sillmark/web/static/vendor/leaflet/VENDORED.md").read_text()
    css = (ROOT / "sillmark/web/static/vendor/leaflet/leaflet.css").read_text()
    assert external_references(css) == []


@pytest.mark.parametrize("static", ["css/sillmark.css", "css/print.css", "js/common.js", "js/site.js",
                                    "js/chart.js", "js/upload.js", "js/progress.js", "js/print.js"])
def test_own_scripts_and_styles_reference_nothing_outside(static):
    text = (ROOT / "sillmark/web/static" / static).read_text()
    assert external_references(text) == []
    assert "http://" not in text.replace("http://www.w3.org/2000/svg", "") and "https://" not in text


@pytest.mark.parametrize("url", ["/sites/999", "/sites/999/settings", "/sites/999/print?level=1"])
def test_unknown_site_page_is_a_404_page_with_the_caution(ready, url):
    _, client, _ = ready
    r = client.get(url)
    assert r.status_code == 404
    html = r.get_data(as_text=True)
    assert "there is no site 999" in html
    assert SCREENING_CAUTION in html
    assert "Traceback" not in html


@pytest.mark.parametrize("url", ["/api/sites/999", "/api/sites/999/stage?level=1",
                                 "/tiles/999/1.0/1/0/0.png", "/tiles/999/hillshade/1/0/0.png"])
def test_unknown_site_in_the_api_and_tiles_is_a_json_404(ready, url):
    _, client, _ = ready
    r = client.get(url)
    assert r.status_code == 404
    assert r.get_json() == {"error": "there is no site 999", "status": 404}


def test_unknown_route_is_404(ready):
    _, client, _ = ready
    assert client.get("/no/such/page").status_code == 404


def test_changes_without_the_form_token_are_refused(ready, lowbank_tif):
    app, client, site_id = ready
    raw = app.test_client()
    for url in ("/uploads/dem", f"/uploads/sites/{site_id}/settings", f"/api/sites/{site_id}/rerun",
                f"/api/sites/{site_id}/whatif"):
        r = raw.post(url, data=b"x", headers={"Accept": "application/json"})
        assert r.status_code == 403, url
        assert "token" in r.get_json()["error"]
    r = raw.post("/uploads/dem", data=lowbank_tif.read_bytes(),
                 headers={"X-Sillmark-Token": "forged", "Accept": "application/json"})
    assert r.status_code == 403


def test_index_lists_the_site(ready):
    _, client, site_id = ready
    html = client.get("/").get_data(as_text=True)
    assert f'href="/sites/{site_id}"' in html
    assert "lowbank" in html
    assert "ready" in html


def test_the_computation_never_loads_flask_or_the_web_app():
    """Importing every module below the web app and the command line loads neither them nor Flask."""
    import subprocess
    import sys

    code = (
        "import sys, pkgutil, importlib\n"
        "for pkg in ('grid', 'engine', 'products', 'io'):\n"
        "    p = importlib.import_module('sillmark.' + pkg)\n"
        "    for m in pkgutil.iter_modules(p.__path__):\n"
        "        importlib.import_module(f'sillmark.{pkg}.{m.name}')\n"
        "bad = [n for n in sys.modules if n.split('.')[0] in ('flask', 'folium', 'waitress')\n"
        "       or n.startswith(('sillmark.web', 'sillmark.cli'))]\n"
        "assert not bad, bad\n"
    )
    done = subprocess.run([sys.executable, "-c", code], cwd=ROOT, capture_output=True, text=True)
    assert done.returncode == 0, done.stderr


def test_an_operator_configured_online_base_layer_is_offered_and_allowed(tmp_path, lowbank_tif):
    """Off by default; when set, the map offers it beside the hillshade (which stays
    the default) and the page policy allows images from that origin only."""
    from tests.web_support import Client, analysed_site

    url = "https://{s}.tiles.example.org:8443/base/{z}/{x}/{y}.png"
    app = make_app(tmp_path / "data", BASE_LAYER_URL=url,
                   BASE_LAYER_ATTRIBUTION="Example tiles, invented for this test")
    client = Client(app)
    site_id = analysed_site(client, lowbank_tif, assets=False)
    r = client.get(f"/sites/{site_id}")
    html = r.get_data(as_text=True)
    assert url in html and "Example tiles, invented for this test" in html
    csp = r.headers["Content-Security-Policy"]
    assert "img-src 'self' data: blob: https://*.tiles.example.org:8443;" in csp
    assert "connect-src 'self'" in csp and "script-src 'self' 'unsafe-inline'" in csp
    # The hillshade is added first, so Leaflet opens on it; the online layer waits in the control.
    assert html.index("/tiles/" + str(site_id) + "/hillshade/") < html.index(url)


@pytest.mark.parametrize("url, attribution, words", [
    ("ftp://tiles.example.org/{z}/{x}/{y}.png", "x", "not a tile URL"),
    ("https://tiles.example.org/{z}/{x}.png", "x", "not a tile URL"),
    ("https:///{z}/{x}/{y}.png", "x", "not a tile URL"),
    ("https://tiles.example.org/{z}/{x}/{y}.png\"><script>", "x", "not a tile URL"),
    ("https://tiles.example.org/{z}/{x}/{y}.png", "", "attribution"),
])
def test_a_malformed_base_layer_setting_stops_the_start_with_a_reason(tmp_path, url, attribution, words):
    from sillmark.errors import InvalidParameter

    with pytest.raises(InvalidParameter, match=words):
        make_app(tmp_path / "data", BASE_LAYER_URL=url, BASE_LAYER_ATTRIBUTION=attribution)
