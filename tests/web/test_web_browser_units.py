"""Ground units and the map page in a real browser (Playwright driving Debian's Chromium,
as in tests/web/test_web_browser.py).

Two copies of the invented Lowbank site (tests/web_support.py: 40 × 50 cells of
2 m in UTM 33N, a walled basin at 9.00 behind a bank at 12.00 with a notch at
11.00, ground rising east from 10.00 to 12.45, a nodata lake): site 1 with heights
in metres, site 2 with the same numbers read as US survey feet. At a level of
10.50 the basin is shielded low ground; the "Basin school" asset stands in it.
"""

from __future__ import annotations

import re
import threading
from pathlib import Path

import pytest

from tests.web.test_web_browser import CHROMIUM, LAUNCH_ARGS, sync_playwright
from tests.web_support import (
    Client,
    analysed_site,
    cell_centre,
    confirm,
    lonlat,
    make_app,
    upload_dem,
    write_lowbank,
)

pytestmark = [pytest.mark.browser]
if sync_playwright is None or not Path(CHROMIUM).is_file():
    pytestmark.append(pytest.mark.skip(reason="BROWSER TESTS SKIPPED: playwright or Chromium missing"))

BASIN = (21, 20)  # a basin cell away from the assets (whose markers take their own clicks)


@pytest.fixture(scope="module")
def served(tmp_path_factory):
    """(origin, app, metric_site, feet_site): waitress serving both Lowbank sites with assets."""
    import io

    import waitress

    from tests.web_support import ASSETS_CSV

    folder = tmp_path_factory.mktemp("units-data")
    tif = write_lowbank(folder / "lowbank.tif")
    app = make_app(folder / "data")
    client = Client(app)
    metric = analysed_site(client, tif)
    r = upload_dem(client, tif, name="lowbank_feet.tif")
    feet = r.get_json()["site_id"]
    assert confirm(client, feet, unit="us-ft").status_code == 202
    r = client.post(f"/uploads/sites/{feet}/assets",
                    data={"assets": (io.BytesIO(ASSETS_CSV.encode()), "assets.csv")},
                    content_type="multipart/form-data")
    assert r.status_code == 201
    srv = waitress.create_server(app, host="127.0.0.1", port=0, threads=6)
    threading.Thread(target=srv.run, daemon=True).start()
    yield f"http://127.0.0.1:{srv.effective_port}", app, metric, feet
    srv.close()
    app.extensions["sillmark"].runner.stop()


@pytest.fixture(scope="module")
def chromium():
    with sync_playwright() as p:
        b = p.chromium.launch(executable_path=CHROMIUM, args=LAUNCH_ARGS)
        yield b
        b.close()


def _open(chromium, url: str, width: int = 1440, height: int = 900):
    context = chromium.new_context(viewport={"width": width, "height": height})
    page = context.new_page()
    errors: list[str] = []
    page.on("pageerror", lambda e: errors.append(str(e)))
    page.errors = errors
    page.goto(url)
    page.wait_for_selector("body[data-figures-level]", timeout=30_000)
    return context, page


def _site_data(app, site_id: int):
    from sillmark.web import db

    svc = app.extensions["sillmark"]
    conn = db.connect(svc.db_path)
    try:
        run = db.get_site(conn, site_id)["current_run"]
    finally:
        conn.close()
    return svc.cache.get(site_id, run)


def _text(page, selector: str) -> str:
    return page.locator(selector).inner_text().replace("\u202f", " ")


def _click_cell(page, row: int, col: int) -> None:
    import json

    names = json.loads(page.locator("#site-config").text_content())["names"]
    lon, lat = lonlat(*cell_centre(row, col))
    point = page.evaluate(
        "([name, lat, lon]) => { const p = window[name].latLngToContainerPoint([lat, lon]); return [p.x, p.y]; }",
        [names["map"], lat, lon])
    box = page.locator(".folium-map").bounding_box()
    page.mouse.click(box["x"] + point[0], box["y"] + point[1])


def _overlap(a, b) -> bool:
    """Do two boxes (x, y, w, h) share any area?"""
    return a[0] < b[0] + b[2] and b[0] < a[0] + a[2] and a[1] < b[1] + b[3] and b[1] < a[1] + a[3]


def test_a_feet_site_shows_acres_and_acre_feet_in_panel_table_and_chart(served, chromium):
    from sillmark.products.stage import water_level_map
    from sillmark.units import ACRE_FOOT_M3, ACRE_M2

    origin, app, _, feet = served
    context, page = _open(chromium, f"{origin}/sites/{feet}#level=10.50")
    try:
        data = _site_data(app, feet)
        wm = water_level_map(data.result, 10.5, row_areas=data.dem.row_areas, unit=data.unit)
        # The shielded basin: 21 × 16 cells of 2 m × 2 m = 1344 m² = 0.33 acres
        # (1 acre = 4046.8564224 m², NIST Handbook 44).
        assert wm.shielded_area_m2 == pytest.approx(1344.0)
        assert _text(page, "#fig-shielded-area") == f"{wm.shielded_area_m2 / ACRE_M2:.2f} acres"
        assert "acre-ft" in _text(page, "#fig-shielded-volume")
        volume = wm.shielded_volume_m3 / ACRE_FOOT_M3
        assert f"{volume:.2f} acre-ft" in _text(page, "#fig-shielded-volume")
        assert "ft²" in _text(page, "#fig-flooded-area-m2")
        panel = page.locator(".panel").inner_text()
        assert not re.search(r"\bha\b|m²|m³", panel), panel
        # The depression table: its area in acres, as its header says.
        headers = page.locator("#depressions-table thead").inner_text().lower()
        assert "acres" in headers and "acre-ft" in headers
        page.wait_for_selector("#depressions-table tbody tr")
        row = page.locator("#depressions-table tbody tr").first.locator("td")
        shown = int(row.nth(0).inner_text())  # the depression's id, whatever the sort
        area_m2 = float(data.result.depressions.area_m2[shown - 1])
        assert row.nth(3).inner_text() == f"{area_m2 / ACRE_M2:.2f}"
        # The stage chart uses the tables' unit.
        labels = page.evaluate("(() => { const c = document.getElementById('stage-chart').sillmarkChart;"
                               " return [c.options.left.label, c.options.right.label]; })()")
        assert labels == ["area (acres)", "volume (acre-ft)"]
        assert "acres" in page.locator(".chart-key").inner_text()
        assert page.errors == []
    finally:
        context.close()


def test_a_route_gives_its_ground_length_and_the_point_its_coordinates(served, chromium):
    from sillmark.grid.ground import path_length

    origin, app, metric, _ = served
    context, page = _open(chromium, f"{origin}/sites/{metric}#level=10.50")
    try:
        page.wait_for_load_state("networkidle")
        _click_cell(page, *BASIN)
        page.wait_for_selector('body[data-route-state="shown"]')
        data = _site_data(app, metric)
        route = data.result.route(*BASIN)
        expected = path_length(data.dem, route.rows, route.cols).value
        # Through the notch at (17, 14): the route is more than its cell count times 2 m
        # whenever it takes a diagonal step, and never less.
        assert float(page.evaluate("document.body.dataset.routeLength")) == pytest.approx(expected, rel=1e-9)
        assert expected >= 2.0 * (len(route) - 1)
        popup = page.locator(".leaflet-popup-content").inner_text().replace("\u202f", " ")
        assert f"{expected:,.1f} m along the ground" in popup
        x, y = cell_centre(*BASIN)
        assert f"x {x:.2f} m, y {y:.2f} m" in popup and "EPSG:32633" in popup
        for word in ("cells", "row", "col "):
            assert word not in popup.lower()
        assert page.errors == []
    finally:
        context.close()


def test_a_level_out_of_range_clears_figures_and_water_and_keeps_the_last_level(served, chromium):
    origin, _, metric, _ = served
    context, page = _open(chromium, f"{origin}/sites/{metric}#level=10.50")
    try:
        page.wait_for_selector('body[data-water-level="10.50"]')
        water_layers = ("(() => { const n = JSON.parse(document.getElementById('site-config').textContent).names;"
                        " return window[n.water].getLayers().length; })()")
        assert page.evaluate(water_layers) == 1
        page.fill("#level-number", "13.5")
        page.keyboard.press("Enter")
        message = _text(page, "#level-error")
        # The range: lowest outlet 10.00 m (the west edge) to highest ground 12.45 m (the east edge).
        assert "above the highest ground (12.45 m)" in message
        assert "stays at 10.50 m" in message and "from 10.00 m to 12.45 m" in message
        assert page.evaluate(water_layers) == 0
        assert page.locator("#fig-flooded-area").inner_text() == "–"
        assert page.locator("#fig-shielded-area").inner_text() == "–"
        assert page.evaluate("document.body.dataset.figuresLevel") is None
        assert "#level=10.50" in page.url
        page.fill("#level-number", "9.5")
        page.keyboard.press("Enter")
        assert "below the lowest outlet (10.00 m)" in _text(page, "#level-error")
        # Back in range: figures and water return.
        page.fill("#level-number", "11.00")
        page.keyboard.press("Enter")
        page.wait_for_selector('body[data-figures-level="11.00"]')
        page.wait_for_selector('body[data-water-level="11.00"]')
        assert page.locator("#level-error").is_hidden()
        assert page.locator("#fig-flooded-area").inner_text() != "–"
        assert page.errors == []
    finally:
        context.close()


def test_spill_points_sills_and_assets_have_distinct_shapes_and_the_old_route_clears(served, chromium):
    origin, _, metric, _ = served
    context, page = _open(chromium, f"{origin}/sites/{metric}#level=10.50")
    try:
        page.wait_for_selector(".symbol-spill svg")
        page.wait_for_selector(".symbol-asset-shielded svg")
        page.wait_for_load_state("networkidle")
        held: list = []
        hold = {"on": False}

        def gate(route):
            if hold["on"]:
                held.append(route)
            else:
                route.continue_()

        page.route("**/cell?*", gate)
        _click_cell(page, *BASIN)
        page.wait_for_selector('body[data-route-state="shown"]')
        page.wait_for_selector(".symbol-sill svg")
        shape = {kind: page.locator(f".symbol-{kind} svg").first.get_attribute("data-shape")
                 for kind in ("spill", "sill", "asset-shielded", "asset-flooded", "asset-dry")}
        assert shape["spill"] == "triangle" and shape["sill"] == "diamond"
        assert shape["asset-shielded"] == "square"
        assert len({shape["spill"], shape["sill"], shape["asset-shielded"]}) == 3
        assert len(set(shape.values())) == 5
        fills = {page.locator(f".symbol-{k} svg").first.get_attribute("fill") for k in ("spill", "sill", "asset-shielded")}
        assert len(fills) == 3
        # The legend draws the same shapes.
        legend = {page.locator(f"#legend li[data-kind='{k}'] svg").first.get_attribute("data-shape")
                  for k in ("spill", "sill")}
        assert legend == {"triangle", "diamond"}
        # A second click: while its route loads, the first one's route and sill are gone.
        assert page.locator(".route-line").count() >= 1
        hold["on"] = True
        _click_cell(page, 3, 40)  # high ground in the north-east, away from the markers
        page.wait_for_selector('body[data-route-state="loading"]')
        assert page.locator(".symbol-sill").count() == 0 and page.locator(".route-line").count() == 0
        page.wait_for_timeout(300)
        assert held, "the second click asked for its route"
        hold["on"] = False
        for r in held:
            r.continue_()
        page.wait_for_selector('body[data-route-state="shown"]')
        assert page.locator(".symbol-sill").count() == 1
        assert page.errors == []
    finally:
        context.close()


@pytest.mark.parametrize("width,height", [(390, 844), (820, 1180)])
def test_the_legend_folds_and_keeps_off_the_map_on_phones_and_tablets(served, chromium, width, height):
    origin, _, metric, _ = served
    context, page = _open(chromium, f"{origin}/sites/{metric}#level=10.50", width, height)
    try:
        assert page.locator("#legend .legend-body").is_hidden()
        assert page.locator("#legend .legend-head").get_attribute("aria-expanded") == "false"
        box = page.locator("#legend").bounding_box()
        m = page.locator(".folium-map").bounding_box()
        assert not _overlap((box["x"], box["y"], box["width"], box["height"]),
                            (m["x"], m["y"], m["width"], m["height"]))
        assert m["height"] > 200  # the map keeps its room
        page.click("#legend .legend-head")
        assert page.locator("#legend .legend-body").is_visible()
        box = page.locator("#legend").bounding_box()
        m = page.locator(".folium-map").bounding_box()
        assert not _overlap((box["x"], box["y"], box["width"], box["height"]),
                            (m["x"], m["y"], m["width"], m["height"]))
        text = page.locator("#legend").inner_text()
        assert "no elevation in the DEM" in text and "Ground tint" in text
        assert page.errors == []
    finally:
        context.close()


def test_the_legend_is_open_on_a_desktop_and_explains_the_ground(served, chromium):
    origin, _, metric, _ = served
    context, page = _open(chromium, f"{origin}/sites/{metric}#level=10.50")
    try:
        assert page.locator("#legend .legend-body").is_visible()
        relief = page.locator("#legend .legend-relief").inner_text().replace("\u202f", " ")
        # Lowbank's ground: 9.00 (the basin floor) to 12.45 (the east edge).
        assert "from 9.0 to 12.4 m" in relief or "from 9.0 to 12.5 m" in relief
        assert "hillshade" in relief
        assert "nodata" in page.locator("#legend .legend-nodata").inner_text()
    finally:
        context.close()


@pytest.mark.parametrize("width", [390, 1440])
def test_chart_tick_labels_never_touch_the_axis_titles(served, chromium, width):
    origin, _, _, feet = served
    context, page = _open(chromium, f"{origin}/sites/{feet}#level=10.50", width, 900)
    try:
        page.wait_for_function("() => { const c = document.getElementById('stage-chart').sillmarkChart;"
                               " return !!(c && c.boxes); }")
        boxes = page.evaluate("document.getElementById('stage-chart').sillmarkChart.boxes")
        canvas = page.evaluate("(() => { const c = document.getElementById('stage-chart');"
                               " return [c.clientWidth, c.clientHeight]; })()")
        ticks = boxes["leftTicks"] + boxes["rightTicks"] + boxes["xTicks"]
        assert len(boxes["titles"]) == 3 and len(ticks) >= 6
        for t in ticks:
            for title in boxes["titles"]:
                assert not _overlap(t, title), (t, title)
        for b in ticks + boxes["titles"]:
            assert b[0] >= 0 and b[1] >= 0 and b[0] + b[2] <= canvas[0] + 0.5 and b[1] + b[3] <= canvas[1] + 0.5
    finally:
        context.close()


def test_no_light_lines_along_tile_boundaries_on_a_high_density_screen(served, chromium):
    """At a device pixel ratio of 2, zoomed into Lowbank's flooded west strip (one
    depth class over one hillshade shade: the same colour on both sides of each
    tile boundary), the screen rows along each tile boundary must match the rows
    a few pixels away. With Leaflet's plus-lighter tile blending, Chromium drew
    them about 6 levels lighter (measured while writing this test)."""
    import io
    import json

    import numpy as np
    from PIL import Image

    origin, _, metric, _ = served
    context = chromium.new_context(viewport={"width": 1200, "height": 800}, device_scale_factor=2)
    try:
        page = context.new_page()
        page.goto(f"{origin}/sites/{metric}#level=10.50")
        page.wait_for_selector('body[data-water-level="10.50"]', timeout=30_000)
        names = json.loads(page.locator("#site-config").text_content())["names"]
        lon, lat = lonlat(*cell_centre(20, 6))
        page.evaluate("([n, lat, lon]) => window[n].setView([lat, lon], 21, {animate: false})",
                      [names["map"], lat, lon])
        page.wait_for_load_state("networkidle")
        page.wait_for_timeout(500)
        page.evaluate("() => { document.getElementById('legend').style.visibility = 'hidden';"
                      " document.getElementById('map-hint').style.visibility = 'hidden'; }")
        tops = page.evaluate("() => Array.from(document.querySelectorAll('img.leaflet-tile-loaded'))"
                             ".map(t => t.getBoundingClientRect().top)")
        m = page.locator(".folium-map").bounding_box()
        shot = np.asarray(Image.open(io.BytesIO(page.screenshot())).convert("L")).astype(float)
        checked = 0
        for top in sorted(set(tops)):
            row = int(round(top * 2))
            if not (m["y"] * 2 + 8 < row < (m["y"] + m["height"]) * 2 - 8):
                continue
            above, below = shot[row - 5], shot[row + 5]
            flat = np.abs(above - below) < 0.5  # columns of one colour across the boundary
            if flat.sum() < 200:
                continue
            for r in (row - 1, row, row + 1):
                assert np.abs(shot[r][flat] - above[flat]).mean() < 1.0, (top, r)
            checked += 1
        assert checked >= 1
    finally:
        context.close()
