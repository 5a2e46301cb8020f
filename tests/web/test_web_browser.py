"""The app in a real browser: headless Chromium from the system (never downloaded),
driven by Playwright, against waitress serving the demo site.

Checks: the page loads with no request leaving the server's origin (every other
request is blocked and fails the test); moving the stage control redraws the
water-level tiles at the new level and shows the flooded area that
sillmark.products.stage.water_level_map gives for that level; clicking a cell draws its
route with the controlling sill. Screenshots go to test-artifacts/.

Needs: the Python package ``playwright`` and Debian's ``chromium``
(``apt-get install -y chromium``). Skipped, with the reason, without them.
"""

from __future__ import annotations

import json
import threading
import urllib.request
from pathlib import Path

import pytest

from tests.web_support import make_app

ROOT = Path(__file__).resolve().parents[2]
ARTIFACTS = ROOT / "test-artifacts"
CHROMIUM = "/usr/bin/chromium"
LAUNCH_ARGS = [
    "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
    "--disable-background-networking", "--disable-component-update", "--disable-sync",
]

try:
    from playwright.sync_api import sync_playwright
except ImportError:  # pragma: no cover - depends on the machine
    sync_playwright = None

if sync_playwright is None:
    pytestmark = pytest.mark.skip(
        reason="BROWSER TESTS SKIPPED: the Python package 'playwright' is not installed "
               "(pip install playwright; no browser download needed)")
elif not Path(CHROMIUM).is_file():
    pytestmark = pytest.mark.skip(
        reason=f"BROWSER TESTS SKIPPED: no Chromium at {CHROMIUM} (apt-get install -y chromium)")
elif not (ROOT / "demo_dem" / "riverbend.tif").is_file():
    pytestmark = pytest.mark.skip(reason="BROWSER TESTS SKIPPED: demo_dem/riverbend.tif is missing")


@pytest.fixture(scope="module")
def server(tmp_path_factory):
    """(origin, app): waitress serving an app with the demo site analysed."""
    import waitress

    app = make_app(tmp_path_factory.mktemp("browser-data"), REGISTER_DEMO=True, WARM_ZOOMS=2)
    srv = waitress.create_server(app, host="127.0.0.1", port=0, threads=8)
    thread = threading.Thread(target=srv.run, daemon=True)
    thread.start()
    yield f"http://127.0.0.1:{srv.effective_port}", app
    srv.close()
    app.extensions["sillmark"].runner.stop()


@pytest.fixture(scope="module")
def browser():
    with sync_playwright() as p:
        b = p.chromium.launch(executable_path=CHROMIUM, args=LAUNCH_ARGS)
        yield b
        b.close()


@pytest.fixture
def page(browser, server):
    """A page whose every request outside the server's origin is blocked and recorded."""
    origin, _ = server
    context = browser.new_context(viewport={"width": 1440, "height": 900})
    foreign: list[str] = []
    errors: list[str] = []

    def route(r):
        url = r.request.url
        if url.startswith(origin + "/") or url == origin or url.startswith("data:") or url.startswith("blob:"):
            r.continue_()
        else:
            foreign.append(url)
            r.abort()

    context.route("**/*", route)
    pg = context.new_page()
    pg.on("pageerror", lambda e: errors.append(str(e)))
    pg.foreign = foreign
    pg.errors = errors
    yield pg
    context.close()
    assert foreign == [], f"requests left the origin: {foreign}"
    assert errors == [], f"script errors: {errors}"


def _site_data(app):
    """The server's open results of the demo site (site 1)."""
    from sillmark.web import db

    svc = app.extensions["sillmark"]
    conn = db.connect(svc.db_path)
    try:
        run = db.get_site(conn, 1)["current_run"]
    finally:
        conn.close()
    return svc.cache.get(1, run)


def _shot(pg, name: str) -> None:
    ARTIFACTS.mkdir(exist_ok=True)
    pg.screenshot(path=str(ARTIFACTS / name))


def test_stage_control_redraws_and_shows_the_engines_flooded_area(page, server):
    from sillmark.products.stage import water_level_map

    origin, app = server
    tiles_seen: list[tuple[str, int]] = []
    page.on("response", lambda r: tiles_seen.append((r.url, r.status)) if "/tiles/1/" in r.url else None)
    page.goto(origin + "/sites/1")
    page.wait_for_selector('body[data-figures-level="47.50"]')
    page.wait_for_load_state("networkidle")
    _shot(page, "browser_site_47.50.png")
    slider = page.locator("#level-slider")
    slider.focus()
    for _ in range(7):  # seven steps of 0.01 m up: 47.57 m
        page.keyboard.press("ArrowRight")
    page.wait_for_selector('body[data-figures-level="47.57"]')
    page.wait_for_selector('body[data-water-level="47.57"]')  # the new tiles have loaded
    assert page.locator("#level-number").input_value() == "47.57"
    shown_m2 = float(page.locator("#fig-flooded-area").get_attribute("data-m2"))
    data = _site_data(app)
    expected = water_level_map(data.result, 47.57, row_areas=data.dem.row_areas, unit=data.unit)
    assert shown_m2 == pytest.approx(expected.flooded_area_m2, rel=1e-12)
    assert page.locator("#fig-flooded-area").inner_text().replace("\u202f", " ") == \
        f"{expected.flooded_area_m2 / 1e4:,.2f} ha"
    water = [(u, s) for u, s in tiles_seen if "/47.57/" in u]
    assert water and all(s == 200 for _, s in water)
    assert "#level=47.57" in page.url
    _shot(page, "browser_site_47.57.png")


def test_number_box_and_a_bad_value(page, server):
    origin, _ = server
    page.goto(origin + "/sites/1#level=46.80")
    page.wait_for_selector('body[data-figures-level="46.80"]')
    page.fill("#level-number", "")
    page.keyboard.press("Enter")
    assert "Give the level as a number" in page.locator("#level-error").inner_text()
    page.fill("#level-number", "48.25")
    page.keyboard.press("Enter")
    page.wait_for_selector('body[data-figures-level="48.25"]')
    assert page.locator("#level-error").is_hidden()


def test_clicking_a_cell_draws_its_route_and_controlling_sill(page, server):
    origin, _ = server
    page.goto(origin + "/sites/1")
    page.wait_for_selector('body[data-figures-level="47.50"]')
    page.wait_for_load_state("networkidle")
    # The lowest ground of the lower town behind the flood bank (the largest
    # depression's pit), placed on screen by the page's own map.
    with urllib.request.urlopen(origin + "/api/sites/1/depressions?sort=area_m2&order=desc&per_page=1") as resp:
        rows = json.load(resp)["depressions"]
    town = max(rows, key=lambda d: d["area_m2"])
    names = json.loads(page.locator("#site-config").text_content())["names"]
    point = page.evaluate(
        "([name, lat, lon]) => { const p = window[name].latLngToContainerPoint([lat, lon]); return [p.x, p.y]; }",
        [names["map"], town["pit_lat"], town["pit_lon"]])
    box = page.locator(".folium-map").bounding_box()
    page.mouse.click(box["x"] + point[0], box["y"] + point[1])
    page.wait_for_selector("body[data-route-cells]")
    assert int(page.evaluate("document.body.dataset.routeCells")) > 10
    assert page.locator("path.route-line").count() >= 1
    label = page.locator(".sill-label").first
    assert "controlling sill 47.60" in label.inner_text().replace("\u202f", " ")
    popup = page.locator(".leaflet-popup-content").inner_text()
    assert "Onset stage" in popup and "47.60" in popup and "shielded" in popup
    _shot(page, "browser_route.png")


def test_print_page_renders_with_legend_and_caution(page, server):
    from sillmark import SCREENING_CAUTION

    origin, _ = server
    page.goto(origin + "/sites/1/print?level=47.5")
    page.wait_for_load_state("networkidle")
    cautions = page.locator(".sheet-caution")
    assert cautions.count() == 2  # on the map page and on the report page
    assert all(SCREENING_CAUTION in cautions.nth(k).inner_text() for k in range(2))
    assert page.locator(".leaflet-control-scale-line").count() >= 1
    assert page.locator("#legend .legend-grid li").count() == 9
    assert "ha" in page.locator("#pf-flooded-area").inner_text()
    _shot(page, "browser_print.png")
    page.emulate_media(media="print")
    assert page.locator(".print-toolbar").is_hidden()


def test_uploading_a_dem_through_the_page(page, server, tmp_path):
    """Choose a file, watch the upload, check what was read, confirm, reach the map."""
    from tests.web_support import write_lowbank

    origin, _ = server
    bad = tmp_path / "notes.tif"
    bad.write_text("not a raster at all")
    page.goto(origin + "/sites/new")
    page.set_input_files("#dem-file", str(bad))
    page.click("#upload-button")
    page.wait_for_selector("#upload-error:not([hidden])")
    assert "'notes.tif' is not a raster Sillmark can read" in page.locator("#upload-error").inner_text()
    good = write_lowbank(tmp_path / "lowbank.tif")
    page.set_input_files("#dem-file", str(good))
    page.click("#upload-button")
    page.wait_for_url("**/sites/*/settings")
    assert "40 rows × 50 columns" in page.locator("table.facts").inner_text()
    _shot(page, "browser_settings.png")
    assert not page.is_checked("input[name=outlet][value=file]")
    page.check("input[name=outlet][value=edge]")
    page.click("#settings-form button[type=submit]")
    page.wait_for_selector('body[data-figures-level]', timeout=30000)
    assert "lowbank" in page.locator(".site-title").inner_text()


def test_tracing_a_water_body_makes_it_an_outlet(page, server, tmp_path):
    """Trace an area over Lowbank's walled basin; the re-run floods it from there.

    Lowbank (tests/web_support.py): the basin (rows 10-25, cols 15-35, 9.00 m)
    lies behind a 12.00 m bank with an 11.00 m notch, so with the DEM edge as the
    only outlet it is shielded at 10.50 m. A water body traced inside it makes
    the basin's cells outlets: at 10.50 m the basin floods. The page's flooded
    area must equal sillmark.products.stage.water_level_map on the engine run with the
    edge and the traced file (as stored by the server) as outlets.
    """
    from sillmark.grid.dem import read_dem
    from sillmark.engine.flood import analyse_site
    from sillmark.grid.outlets import build_outlets
    from sillmark.products.stage import water_level_map
    from tests.web_support import Client, analysed_site, cell_centre, lonlat, write_lowbank
    from sillmark.web import db, layout

    origin, app = server
    dem_path = write_lowbank(tmp_path / "lowbank.tif")
    site_id = analysed_site(Client(app), dem_path, assets=False)
    page.goto(origin + f"/sites/{site_id}#level=10.50")
    page.wait_for_selector('body[data-figures-level="10.50"]')
    before = float(page.locator("#fig-flooded-area").get_attribute("data-m2"))
    page.click("button[data-tab=tab-outlets]")
    page.click("#draw-start")
    names = json.loads(page.locator("#site-config").text_content())["names"]
    box = page.locator(".folium-map").bounding_box()
    for row, col in [(14, 20), (14, 30), (21, 30), (21, 20)]:  # inside the basin
        lon, lat = lonlat(*cell_centre(row, col))
        x, y = page.evaluate(
            "([n, lat, lon]) => { const p = window[n].latLngToContainerPoint([lat, lon]); return [p.x, p.y]; }",
            [names["map"], lat, lon])
        page.mouse.click(box["x"] + x, box["y"] + y)
    assert page.evaluate("document.body.dataset.tracedPoints") == "4"
    assert page.locator("path.traced-water").count() == 1
    page.fill("#draw-name", "Basin pond")
    page.click("#draw-submit")
    # The page follows the new run and reloads on its results.
    page.wait_for_selector(".site-meta:has-text('Basin pond')", timeout=60000)
    page.wait_for_selector('body[data-figures-level="10.50"]')
    shown = float(page.locator("#fig-flooded-area").get_attribute("data-m2"))
    page.wait_for_selector("body[data-outlet-cells]")  # the map's outlet layer: edge + traced cells
    assert int(page.evaluate("document.body.dataset.outletCells")) > 176
    assert page.locator("path.outlet-cells").count() >= 1

    svc = app.extensions["sillmark"]
    conn = db.connect(svc.db_path)
    try:
        outlets = db.loads(db.get_site(conn, site_id)["outlets"])
    finally:
        conn.close()
    traced = next(o for o in outlets if o["kind"] == "file")
    stored = layout.site_dir(svc.data_dir, site_id) / traced["file"]
    geo = json.loads(stored.read_text())
    assert geo["features"][0]["geometry"]["type"] == "Polygon"
    dem = read_dem(dem_path)
    marked = build_outlets(dem, ("edge", str(stored)))
    assert marked.mask[10:26, 15:36].sum() >= 40  # about 8 x 11 basin cells traced
    expected = water_level_map(analyse_site(dem, marked), 10.5, row_areas=dem.row_areas)
    assert int(page.evaluate("document.body.dataset.outletCells")) == marked.count
    assert shown == pytest.approx(expected.flooded_area_m2, rel=1e-12)
    # The basin (16 x 21 cells of 4 m2) now floods at 10.50 m instead of lying shielded.
    assert shown - before == pytest.approx(16 * 21 * 4.0, rel=1e-9)
    _shot(page, "browser_traced_water_body.png")


def test_downloading_the_depth_at_the_level_gives_the_engines_depths(page, server, tmp_path):
    """Files tab → depth at 47.75 m: the GeoTIFF the browser saves opens with
    rasterio and holds sillmark.products.stage.water_level_map's depths, in the DEM's grid."""
    import numpy as np
    import rasterio

    from sillmark import SCREENING_CAUTION
    from sillmark.products.stage import water_level_map

    origin, app = server
    page.goto(origin + "/sites/1#level=47.75")
    page.wait_for_selector('body[data-figures-level="47.75"]')
    page.click("button[data-tab=tab-files]")
    link = page.locator("#level-files a", has_text="depth").first
    with page.expect_download() as info:
        link.click()
    saved = tmp_path / info.value.suggested_filename
    info.value.save_as(saved)
    assert saved.suffix == ".tif" and "47.75" in saved.name
    data = _site_data(app)
    expected = water_level_map(data.result, 47.75, row_areas=data.dem.row_areas, unit=data.unit)
    with rasterio.open(saved) as src:
        assert src.shape == data.dem.shape
        assert src.crs == data.dem.crs and src.transform == data.dem.transform
        assert SCREENING_CAUTION in src.tags()["SILLMARK_CAUTION"]
        depth = src.read(1)
    np.testing.assert_array_equal(np.isnan(depth), np.isnan(expected.depth))
    np.testing.assert_array_equal(depth[~np.isnan(depth)], expected.depth[~np.isnan(expected.depth)])
    assert np.count_nonzero(~np.isnan(depth)) > 1000  # the river and the notch's side of the bank are wet
