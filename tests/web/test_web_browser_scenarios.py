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

import threading
from pathlib import Path

import pytest

from sillmark import SCREENING_CAUTION
from tests.web.test_web_barrier import polder_site
from tests.web.test_web_browser import ARTIFACTS, CHROMIUM, LAUNCH_ARGS, sync_playwright

pytestmark = [pytest.mark.browser]
if sync_playwright is None or not Path(CHROMIUM).is_file():
    pytestmark.append(pytest.mark.skip(reason="BROWSER TESTS SKIPPED: playwright or Chromium missing"))


@pytest.fixture(scope="module")
def served(tmp_path_factory):
    """(origin, site_id): waitress serving the analysed polder site."""
    import waitress

    app, _, site_id, _ = polder_site(tmp_path_factory.mktemp("scenario-browser"))
    srv = waitress.create_server(app, host="127.0.0.1", port=0, threads=4)
    threading.Thread(target=srv.run, daemon=True).start()
    yield f"http://127.0.0.1:{srv.effective_port}", site_id
    srv.close()
    app.extensions["sillmark"].runner.stop()


def test_a_planned_barrier_saved_as_scenario_shows_the_protected_ground(served):
    origin, site_id = served
    with sync_playwright() as p:
        browser = p.chromium.launch(executable_path=CHROMIUM, args=LAUNCH_ARGS)
        try:
            page = browser.new_page(viewport={"width": 1440, "height": 900})
            errors: list[str] = []
            page.on("pageerror", lambda e: errors.append(str(e)))
            page.goto(f"{origin}/sites/{site_id}")
            page.wait_for_selector("body[data-figures-level]", timeout=30_000)
            page.fill("#level-number", "11.50")
            page.press("#level-number", "Enter")
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
