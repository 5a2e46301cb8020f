"""The river profile and the cut-off ground in a real browser (headless Chromium
through Playwright), on the two hand-worked sites of tests/web/test_web_reach.py.

- Village: at level 5 the page draws cut-off tiles for that level, explains them
  in the legend, and shows the village's island window 3.00 to 8.00 m (worked by
  hand in test_web_reach.py) in its table and in the asset's popup.
- Channel: offset mode swaps the level tiles for offset tiles at the slider's
  offset, and the profile chart shows the two stations' levels raised by it.
"""

from __future__ import annotations

import threading
from pathlib import Path

import pytest

from tests.web.test_web_browser import CHROMIUM, LAUNCH_ARGS, sync_playwright
from tests.web.test_web_reach import channel_site, village_site
from tests.web_support import Client, make_app

pytestmark = [pytest.mark.browser]
if sync_playwright is None or not Path(CHROMIUM).is_file():
    pytestmark.append(pytest.mark.skip(reason="BROWSER TESTS SKIPPED: playwright or Chromium missing"))


@pytest.fixture(scope="module")
def served(tmp_path_factory):
    """(origin, village site id, channel site id) served by waitress."""
    import waitress

    folder = tmp_path_factory.mktemp("reach-browser")
    app = make_app(folder / "data")
    client = Client(app)
    village, _ = village_site(client, folder)
    channel, _ = channel_site(client, folder)
    srv = waitress.create_server(app, host="127.0.0.1", port=0, threads=6)
    threading.Thread(target=srv.run, daemon=True).start()
    yield f"http://127.0.0.1:{srv.effective_port}", village, channel
    srv.close()
    app.extensions["sillmark"].runner.stop()


@pytest.fixture
def page(served):
    with sync_playwright() as p:
        browser = p.chromium.launch(executable_path=CHROMIUM, args=LAUNCH_ARGS)
        pg = browser.new_page(viewport={"width": 1440, "height": 900})
        errors: list[str] = []
        pg.on("pageerror", lambda e: errors.append(str(e)))
        yield pg
        browser.close()
        assert errors == [], f"script errors: {errors}"


def test_cut_off_ground_and_island_window_on_the_page(page, served):
    origin, village, _ = served
    tiles: list[tuple[str, int]] = []
    page.on("response", lambda r: tiles.append((r.url, r.status)) if "/cutoff/" in r.url else None)
    page.goto(f"{origin}/sites/{village}#level=5.00")
    page.wait_for_selector('body[data-cutoff-level="5.000"]')
    assert tiles and all(s == 200 for _, s in tiles)
    assert all("/cutoff/5.000/" in u for u, _ in tiles)
    assert "every route to a refuge is under water" in page.locator("#legend-cutoff").inner_text()
    row = page.locator("#reach-assets tbody tr").first
    row.wait_for()
    assert "3.00 to 8.00 m" in row.inner_text() and "island" in row.inner_text()
    page.locator(".asset-marker").first.click()
    popup = page.locator(".reach-popup")
    popup.wait_for()
    assert "3.00 to 8.00 m" in popup.inner_text()


def test_offset_mode_moves_the_profile(page, served):
    origin, _, channel = served
    seen: list[str] = []
    page.on("response", lambda r: seen.append(r.url) if "/offset/" in r.url else None)
    page.goto(f"{origin}/sites/{channel}")
    page.wait_for_selector("#profile-stations")
    page.locator("#offset-mode").check()
    slider = page.locator("#offset-slider")
    slider.focus()
    for _ in range(15):  # 15 steps of 0.05 up: +0.75
        page.keyboard.press("ArrowRight")
    page.wait_for_selector('body[data-offset="0.750"]')
    assert any("/offset/0.750/" in u for u in seen)
    assert page.locator("#offset-echo").inner_text() == "+0.75 m"
    # The stations (10 and 5 m, hand-set in test_web_reach.py) raised by the offset.
    text = page.locator("#profile-stations").inner_text()
    assert "upper gauge" in text and "10.75 m" in text and "5.75 m" in text
    assert page.locator("body").get_attribute("data-level-mode") == "offset"
