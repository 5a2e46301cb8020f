"""A scenario saved from the barrier planner and compared with the site, in a real browser
(Playwright driving Debian's Chromium, as in tests/web/test_web_browser.py).

The site is the Gapford polder of tests/web/test_web_barrier.py: a levee at 13.00 m
round a polder at 9.00 m (6 × 6 cells of 2 m) with a 3-cell gap at 11.00 m in its
east wall. The barn's shortest barrier at 12.00 m raises the gap to 12.00 m.

Working, by hand: at the level 11.50 m the base floods the polder through the gap
(onset stage 11.00 m) and the gap cells themselves (ground 11.00 m); with the
barrier the gap stands at 12.00 m and the polder's onset stage becomes 12.00 m, so
both are dry. Newly protected: 36 + 3 = 39 cells of 4 m² = 156 m²; newly flooded: none.
Planned again on the scenario's ground at 12.00 m, the barn needs no barrier (its
onset stage there is 12.00 m).
"""

from __future__ import annotations

from pathlib import Path

import pytest

from sillmark import SCREENING_CAUTION
from tests.web.test_web_barrier import polder_site
from tests.web.test_web_browser import ARTIFACTS, CHROMIUM, LAUNCH_ARGS, sync_playwright
from tests.web_support import served_app

pytestmark = [pytest.mark.browser]
if sync_playwright is None or not Path(CHROMIUM).is_file():
    pytestmark.append(pytest.mark.skip(reason="BROWSER TESTS SKIPPED: playwright or Chromium missing"))


@pytest.fixture(scope="module")
def served(tmp_path_factory):
    """(origin, site_id): waitress serving the analysed polder site."""
    app, _, site_id, _ = polder_site(tmp_path_factory.mktemp("scenario-browser"))
    with served_app(app) as origin:
        yield origin, site_id


def site_page(browser, origin: str, site_id: int, level: str):
    """(page, page errors): the site's page at ``level``, its figures drawn."""
    page = browser.new_page(viewport={"width": 1440, "height": 900})
    errors: list[str] = []
    page.on("pageerror", lambda e: errors.append(str(e)))
    page.goto(f"{origin}/sites/{site_id}")
    page.wait_for_selector("body[data-figures-level]", timeout=30_000)
    page.fill("#level-number", level)
    page.press("#level-number", "Enter")
    return page, errors


def test_a_planned_barrier_saved_as_scenario_shows_the_protected_ground(served):
    origin, site_id = served
    with sync_playwright() as p:
        browser = p.chromium.launch(executable_path=CHROMIUM, args=LAUNCH_ARGS)
        try:
            page, errors = site_page(browser, origin, site_id, "11.50")
            page.click("button[data-tab=tab-assets]")
            page.locator("#assets-table tbody tr", has_text="Polder barn").click()
            page.fill("#barrier-level", "12.00")
            page.click("#barrier-submit")
            page.wait_for_selector('body[data-barrier-state="planned"]', timeout=60_000)
            page.fill("#barrier-scenario-name", "Gap wall")
            page.click("#barrier-save-scenario")
            # The scenarios tab opens and lists it once its run is done.
            button = page.locator('#scenario-list li[data-state="done"] [data-action="compare"]')
            button.wait_for(timeout=60_000)
            assert "Gap wall" in page.locator("#scenario-list").inner_text()
            button.click()
            page.wait_for_selector("body[data-scenario-compared]", timeout=30_000)
            protected = page.locator("#scenario-newly-protected").inner_text().replace("\u202f", " ")
            assert protected == "156 m²"  # 39 cells of 4 m², worked in the docstring
            assert page.locator("#scenario-newly-flooded").inner_text().replace("\u202f", " ") == "0 m²"
            legend = page.locator("#legend-scenario").inner_text()
            assert "newly protected" in legend and "newly flooded" in legend
            assert SCREENING_CAUTION[:40] in legend
            assert "11.50 m, datum not stated" in page.locator("#scenario-level-text").inner_text()
            ARTIFACTS.mkdir(exist_ok=True)
            page.screenshot(path=str(ARTIFACTS / "browser_scenario_compare.png"))
            # Planned again on the scenario's ground, the wall in place: the barn's onset
            # stage is 12.00 there, so at 12.00 no further barrier is needed.
            page.click("button[data-tab=tab-assets]")
            page.select_option("#barrier-ground", label="scenario Gap wall")
            page.click("#barrier-submit")
            page.wait_for_selector('body[data-barrier-state="not-needed"]', timeout=60_000)
            assert "12.00 m" in page.locator("#barrier-result").inner_text()
            assert errors == []
        finally:
            browser.close()


def test_edits_drawn_on_the_map_become_a_scenario_compared_with_the_site(served):
    """A culvert and a barrier drawn by clicking the map, added as a scenario and compared.

    Drawn on the Gapford polder (cells of 2 m, so 4 m² each; rows and columns as in
    tests/web/test_web_barrier.py): a culvert both ways with invert 10.20 m from the
    polder cell (6, 6) to the floodplain cell (6, 11), and a barrier with crest 12.00 m
    from the centre of the gap cell (4, 9) to that of (6, 9).

    Working, by hand:
    - Base: the polder (36 cells at 9.00) and the gap (3 cells at 11.00) have onset
      stage 11.00 (the gap is the lowest way in); the floodplain 10.00.
    - Scenario: the barrier raises the three gap cells to 12.00, so their onset stage
      is 12.00. The culvert joins the polder to the floodplain (onset 10.00), crossed
      at the higher of its invert and that level: max(10.20, 10.00) = 10.20, so the
      polder's onset stage is 10.20. The Polder barn (5, 5): 11.00 -> 10.20, -0.80.
    - At 10.50: the polder is dry in the base (11.00 > 10.50) and wet with the edits
      (10.20 <= 10.50); the gap is dry in both. Newly flooded 36 × 4 = 144 m²,
      newly protected 0 m².
    - At 11.50: the polder is wet in both; the gap is wet in the base (11.00) and dry
      with the edits (12.00). Newly flooded 0 m², newly protected 3 × 4 = 12 m².
    A culvert lost, made one way from the polder out, or a barrier lost would each
    change one of these figures.
    """
    from tests.web.test_web_barrier import centre
    from tests.web_support import lonlat

    origin, site_id = served

    def click_cell(page, row, col):
        lon, lat = lonlat(*centre(row, col))
        xy = page.evaluate(  # the cell centre's position on the page, from the map itself
            "([lat, lon]) => { var c = JSON.parse(document.getElementById('site-config')"
            ".textContent); var m = window[c.names.map]; var box = m.getContainer()"
            ".getBoundingClientRect(); var pt = m.latLngToContainerPoint([lat, lon]);"
            " return [box.left + pt.x, box.top + pt.y]; }", [lat, lon])
        page.mouse.click(xy[0], xy[1])

    def figure(page, which):
        return page.locator(f"#scenario-newly-{which}").inner_text().replace("\u202f", " ")

    with sync_playwright() as p:
        browser = p.chromium.launch(executable_path=CHROMIUM, args=LAUNCH_ARGS)
        try:
            page, errors = site_page(browser, origin, site_id, "10.50")
            page.click("#scenarios-tab")
            assert page.locator("#edit-invert").input_value() == "10.50"  # prefilled: the level
            assert "Levels in metres, datum not stated" in page.locator("#edit-draw").inner_text()
            # The culvert: two clicks, the first end in the polder, the last outside.
            page.fill("#edit-invert", "10.20")
            page.fill("#edit-name", "Polder pipe")
            page.click("#edit-start")
            click_cell(page, 6, 6)
            assert page.evaluate("document.body.dataset.editVertices") == "1"
            click_cell(page, 6, 11)
            assert page.evaluate("document.body.dataset.drawnEdits") == "1"
            # A barrier begun and dropped with Escape leaves nothing behind.
            page.check("input[name=edit-kind][value=barrier]")
            page.fill("#edit-crest", "12.00")
            page.click("#edit-start")
            click_cell(page, 2, 12)
            page.keyboard.press("Escape")
            assert page.evaluate("document.body.dataset.editVertices") == "0"
            assert page.locator("#edit-start").inner_text() == "Start drawing"
            # The barrier across the gap: two vertices, then finish.
            page.click("#edit-start")
            click_cell(page, 4, 9)
            click_cell(page, 6, 9)
            page.click("#edit-finish")
            # A culvert with both ends in one cell, which the server refuses.
            page.check("input[name=edit-kind][value=culvert]")
            page.click("#edit-start")
            click_cell(page, 1, 1)
            click_cell(page, 1, 1)
            assert page.evaluate("document.body.dataset.drawnEdits") == "3"
            assert page.locator(".drawn-culvert").count() == 2
            assert page.locator(".drawn-barrier").count() == 1
            items = page.locator("#edit-list li")
            listed = [items.nth(i).inner_text().replace("\u202f", " ") for i in range(3)]
            assert "culvert “Polder pipe”: invert 10.20 m, datum not stated, both ways" in listed[0]
            assert "barrier: crest 12.00 m, datum not stated, 2 vertices" in listed[1]
            ARTIFACTS.mkdir(exist_ok=True)
            page.locator("#edit-draw").scroll_into_view_if_needed()
            page.screenshot(path=str(ARTIFACTS / "browser_drawn_edits.png"))
            page.fill("#edit-scenario-name", "Drawn pipe and wall")
            page.click("#edit-scenario-submit")
            page.wait_for_selector("#edit-error:not([hidden])", timeout=10_000)
            assert "both ends in one cell" in page.locator("#edit-error").inner_text()
            assert page.evaluate("document.body.dataset.drawnEdits") == "3"  # nothing lost
            items.nth(2).locator("button", has_text="Remove").click()
            assert page.evaluate("document.body.dataset.drawnEdits") == "2"
            page.click("#edit-scenario-submit")
            page.wait_for_selector('body[data-drawn-edits="0"]', timeout=10_000)
            mine = page.locator('#scenario-list li[data-state="done"]', has_text="Drawn pipe and wall")
            mine.wait_for(timeout=60_000)
            assert "2 edits, drawn on the map" in mine.inner_text()
            mine.locator('[data-action="compare"]').click()
            page.locator("#scenario-compare-title", has_text="Drawn pipe and wall").wait_for(timeout=30_000)
            assert figure(page, "flooded") == "144 m²"  # 36 polder cells, worked above
            assert figure(page, "protected") == "0 m²"
            barn = page.locator("#scenario-assets tbody tr", has_text="Polder barn").inner_text()
            assert barn.split("\t")[1:] == ["11.00", "10.20", "−0.80"]
            page.fill("#level-number", "11.50")
            page.press("#level-number", "Enter")
            page.locator("#scenario-level-text", has_text="11.50").wait_for(timeout=30_000)
            assert figure(page, "flooded") == "0 m²"
            assert figure(page, "protected") == "12 m²"  # the 3 gap cells
            page.screenshot(path=str(ARTIFACTS / "browser_drawn_edits_compare.png"))
            assert errors == []
        finally:
            browser.close()
