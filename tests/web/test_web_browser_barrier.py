"""The barrier planner on the site page in a real browser (Playwright driving Debian's
Chromium, as in tests/web/test_web_browser.py).

The site is the Gapford polder of tests/web/test_web_barrier.py: a levee at
13.00 m round a polder at 9.00 m with a 3-cell gap at 11.00 m in its east wall.
Choosing the "Polder barn" in the asset table and asking to keep it dry up to
12.00 m must draw the gap's three cells as a barrier line labelled with its
ground length, 6.0 m (worked in that module's docstring), and offer the edits
file for download.
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from tests.web.test_web_barrier import polder_site
from tests.web.test_web_browser import ARTIFACTS, CHROMIUM, LAUNCH_ARGS, sync_playwright
from tests.web_support import served_app

pytestmark = [pytest.mark.browser]
if sync_playwright is None or not Path(CHROMIUM).is_file():
    pytestmark.append(pytest.mark.skip(reason="BROWSER TESTS SKIPPED: playwright or Chromium missing"))


@pytest.fixture(scope="module")
def served(tmp_path_factory):
    """(origin, site_id): waitress serving the analysed polder site."""
    app, _, site_id, _ = polder_site(tmp_path_factory.mktemp("barrier-browser"))
    with served_app(app) as origin:
        yield origin, site_id


def test_the_planned_barrier_is_drawn_with_its_length_and_exported(served):
    origin, site_id = served
    with sync_playwright() as p:
        browser = p.chromium.launch(executable_path=CHROMIUM, args=LAUNCH_ARGS)
        try:
            context = browser.new_context(viewport={"width": 1440, "height": 900}, accept_downloads=True)
            page = context.new_page()
            errors: list[str] = []
            page.on("pageerror", lambda e: errors.append(str(e)))
            page.goto(f"{origin}/sites/{site_id}")
            page.wait_for_selector("body[data-figures-level]", timeout=30_000)
            page.click("button[data-tab=tab-assets]")
            page.locator("#assets-table tbody tr", has_text="Polder barn").click()
            assert "Polder barn" in page.locator("#barrier-place").inner_text()
            page.fill("#barrier-level", "12.00")
            page.click("#barrier-submit")
            page.wait_for_selector('body[data-barrier-state="planned"]', timeout=60_000)
            assert float(page.evaluate("document.body.dataset.barrierLength")) == pytest.approx(6.0)
            assert page.evaluate("document.body.dataset.barrierCells") == "3"
            assert page.locator(".barrier-line").count() == 1
            label = page.locator(".barrier-label").inner_text().replace("\u202f", " ")
            assert "6.0 m" in label and "3 cells" in label
            ARTIFACTS.mkdir(exist_ok=True)
            page.screenshot(path=str(ARTIFACTS / "browser_barrier_planned.png"))
            with page.expect_download() as got:
                page.click("#barrier-export")
            edits = json.loads(Path(got.value.path()).read_text())
            (feature,) = edits["features"]
            assert feature["properties"]["kind"] == "barrier" and feature["properties"]["crest"] == 12.0
            assert errors == []
            context.close()
        finally:
            browser.close()


def test_an_outlined_place_gets_its_barrier(served):
    # The outline of rows 3-8, cols 3-9 (the polder and the gap) clicked corner by
    # corner: tests/web/test_web_barrier.py works out its barrier, the 5 floodplain
    # cells east of the gap.
    from tests.web.test_web_barrier import CELL, centre
    from tests.web_support import lonlat

    origin, site_id = served
    corners = [centre(3, 3), centre(3, 9), centre(8, 9), centre(8, 3)]
    ring = [lonlat(x + dx * CELL / 4, y + dy * CELL / 4) for (x, y), (dx, dy) in
            zip(corners, [(-1, 1), (1, 1), (1, -1), (-1, -1)])]
    with sync_playwright() as p:
        browser = p.chromium.launch(executable_path=CHROMIUM, args=LAUNCH_ARGS)
        try:
            page = browser.new_page(viewport={"width": 1440, "height": 900})
            errors: list[str] = []
            page.on("pageerror", lambda e: errors.append(str(e)))
            page.goto(f"{origin}/sites/{site_id}")
            page.wait_for_selector("body[data-figures-level]", timeout=30_000)
            page.click("button[data-tab=tab-assets]")
            page.click("#barrier-outline")
            for lon, lat in ring:  # the corner's position on the page, from the map itself
                xy = page.evaluate(
                    "([lat, lon]) => { var c = JSON.parse(document.getElementById('site-config')"
                    ".textContent); var m = window[c.names.map]; var box = m.getContainer()"
                    ".getBoundingClientRect(); var pt = m.latLngToContainerPoint([lat, lon]);"
                    " return [box.left + pt.x, box.top + pt.y]; }", [lat, lon])
                page.mouse.click(xy[0], xy[1])
            assert page.evaluate("document.body.dataset.outlineCorners") == "4"
            page.click("#barrier-outline")
            assert "4 corners" in page.locator("#barrier-place").inner_text()
            page.fill("#barrier-level", "12.00")
            page.click("#barrier-submit")
            page.wait_for_selector('body[data-barrier-state="planned"]', timeout=60_000)
            assert page.evaluate("document.body.dataset.barrierCells") == "5"
            assert float(page.evaluate("document.body.dataset.barrierLength")) == pytest.approx(10.0)
            assert page.locator(".barrier-place-outline").count() == 1
            assert errors == []
        finally:
            browser.close()
