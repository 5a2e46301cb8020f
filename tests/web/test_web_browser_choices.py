"""The CRS chooser and the vertical datum in a real browser (Playwright driving Debian's
Chromium, as in tests/web/test_web_browser.py): a DEM without a CRS is given one by
searching, uploaded, confirmed with a datum, and the map page shows levels above it."""

from __future__ import annotations

import threading
from pathlib import Path

import pytest

from tests.rasters import write_raster
from tests.web.test_web_browser import CHROMIUM, LAUNCH_ARGS, sync_playwright
from tests.web_support import TRANSFORM, lowbank_elevation, make_app

pytestmark = [pytest.mark.browser]
if sync_playwright is None or not Path(CHROMIUM).is_file():
    pytestmark.append(pytest.mark.skip(reason="BROWSER TESTS SKIPPED: playwright or Chromium missing"))


@pytest.fixture(scope="module")
def origin(tmp_path_factory):
    import waitress

    app = make_app(tmp_path_factory.mktemp("choices-data"))
    srv = waitress.create_server(app, host="127.0.0.1", port=0, threads=4)
    threading.Thread(target=srv.run, daemon=True).start()
    yield f"http://127.0.0.1:{srv.effective_port}"
    srv.close()
    app.extensions["sillmark"].runner.stop()


def test_choose_a_crs_by_search_upload_and_see_the_datum_on_the_map(origin, tmp_path):
    dem = write_raster(tmp_path / "nocrs.tif", lowbank_elevation(), transform=TRANSFORM,
                       nodata=-9999.0, crs=None)
    with sync_playwright() as p:
        browser = p.chromium.launch(executable_path=CHROMIUM, args=LAUNCH_ARGS)
        try:
            page = browser.new_page(viewport={"width": 1280, "height": 860})
            page.goto(origin + "/sites/new")
            page.click("#dem-choices summary")
            page.fill("#crs-search", "utm zone 33n")
            page.wait_for_selector("#crs-results li[data-code='EPSG:32633']", timeout=10_000)
            page.click("#crs-results li[data-code='EPSG:32633']")
            assert page.input_value("#crs-code") == "EPSG:32633"
            assert "WGS 84 / UTM zone 33N" in page.inner_text("#crs-picked")
            page.set_input_files("#dem-file", str(dem))
            page.click("#upload-button")
            page.wait_for_url("**/settings", timeout=20_000)
            assert "chosen by you" in page.inner_text("main")
            page.fill("#vertical-datum", "NAVD88")
            page.click("#settings-form button[type=submit]")
            page.wait_for_selector("#level-datum", timeout=60_000)
            page.wait_for_function(
                "document.getElementById('level-datum').textContent.includes('above NAVD88')")
            assert "heights in metres above NAVD88" in page.inner_text(".site-meta")
            box = page.locator(".leaflet-container").first.bounding_box()
            page.mouse.click(box["x"] + box["width"] / 2, box["y"] + box["height"] / 2)
            page.wait_for_selector(".leaflet-popup-content :text('above NAVD88')", timeout=20_000)
            assert "us-ft" not in page.inner_text("body")
        finally:
            browser.close()
