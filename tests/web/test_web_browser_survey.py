"""The site page in Chromium on a site with two thousand depressions (tests/web/survey_site.py).

Checks: the page loads without fetching the inventory (every answer, and all of
them together, under 2 MB; the table shows one page of it); a change of level
is drawn (water-level tiles, figures and the table page all at the new level)
in under 1 s (the median of three changes), timed with performance.now() in the
page; the
table filter and a click on a row work against the server, and zoomed in on a
depression the page draws the few depressions in view one by one.

Needs playwright and Debian's chromium, as tests/web/test_web_browser.py.
"""

from __future__ import annotations

import threading
from pathlib import Path

import numpy as np
import pytest

from tests.web.survey_site import marsh_lane_app, open_results
from tests.web.test_web_browser import CHROMIUM, LAUNCH_ARGS, sync_playwright

pytestmark = [pytest.mark.browser]
if sync_playwright is None or not Path(CHROMIUM).is_file():
    pytestmark.append(pytest.mark.skip(reason="BROWSER TESTS SKIPPED: playwright or Chromium missing"))

MAX_ANSWER_BYTES = 2 * 2**20
#: Issue 15's web target: a level change drawn in under a second.
REDRAW_LIMIT_MS = 1000.0

#: Set the level in the number box, then wait, frame by frame, until every part
#: of the page that depends on the level says it shows the new one; the time is
#: performance.now() in the page, from the change to the first frame after.
MEASURE_LEVEL_CHANGE = """
async (level) => {
  const parts = ["waterLevel", "figuresLevel", "depressionTableLevel"];
  const frame = () => new Promise((r) => requestAnimationFrame(r));
  const t0 = performance.now();
  const box = document.getElementById("level-number");
  box.value = level;
  box.dispatchEvent(new Event("change"));
  while (!parts.every((k) => document.body.dataset[k] === level)) {
    if (performance.now() - t0 > 20000) { return -1; }
    await frame();
  }
  await frame();
  return performance.now() - t0;
}
"""


@pytest.fixture(scope="module")
def served(tmp_path_factory):
    import waitress

    app, _, site_id = marsh_lane_app(tmp_path_factory, WARM_ZOOMS=2)
    srv = waitress.create_server(app, host="127.0.0.1", port=0, threads=8)
    threading.Thread(target=srv.run, daemon=True).start()
    yield f"http://127.0.0.1:{srv.effective_port}", app, site_id
    srv.close()
    app.extensions["sillmark"].runner.stop()


@pytest.fixture(scope="module")
def browser():
    with sync_playwright() as p:
        b = p.chromium.launch(executable_path=CHROMIUM, args=LAUNCH_ARGS)
        yield b
        b.close()


@pytest.fixture
def page(browser):
    context = browser.new_context(viewport={"width": 1440, "height": 900})
    pg = context.new_page()
    errors: list[str] = []
    pg.on("pageerror", lambda e: errors.append(str(e)))
    yield pg
    context.close()
    assert errors == [], f"script errors: {errors}"


def _open(page, origin: str, site_id: int) -> None:
    page.goto(f"{origin}/sites/{site_id}")
    for part in ("figures-level", "water-level", "depression-table-level"):
        page.wait_for_selector(f"body[data-{part}]", timeout=30_000)
    page.wait_for_load_state("networkidle")


def test_the_page_loads_one_page_of_the_depressions_not_the_inventory(page, served):
    origin, app, site_id = served
    count = open_results(app, site_id).depressions.count
    answers: list[tuple[str, int]] = []

    def keep(response):
        if "/api/" in response.url and response.status == 200:
            answers.append((response.url, len(response.body())))

    page.on("response", keep)
    _open(page, origin, site_id)
    assert answers, "the page asked the API nothing"
    assert max(size for _, size in answers) < MAX_ANSWER_BYTES, answers
    assert sum(size for _, size in answers) < MAX_ANSWER_BYTES, answers
    assert page.locator("#depressions-table tbody tr").count() == 25
    assert page.locator("#depressions-count").inner_text() == f"{count} depressions · page 1 of {-(-count // 25)}"
    # The whole site is in view: the page draws one by one only the few depressions
    # big enough to pick at this zoom (20 × 20 pixels), with their spill points.
    shown = int(page.evaluate("document.body.dataset.depressionFeatures"))
    assert 1 <= shown <= 150 and shown < count / 10
    assert page.locator(".symbol-spill.spill-point").count() == shown
    assert page.locator(".depression-tiles img").count() > 0 and page.locator(".spill-tiles img").count() > 0
    page.click("#depressions-next")
    page.wait_for_selector("#depressions-count:has-text('page 2 of')")
    first_id = page.locator("#depressions-table tbody tr").first.get_attribute("data-id")
    assert first_id is not None


def test_a_level_change_is_drawn_in_under_a_second(page, served):
    origin, app, site_id = served
    data = open_results(app, site_id)
    t = data.result.depressions
    k = int(np.argmax(t.area_m2))
    pit, spill = float(t.pit_elevation[k]), float(t.spill_elevation[k])
    # The page takes levels from the lowest outlet to the highest ground.
    lowest = float(np.nanmin(data.result.onset_stage))
    highest = float(np.nanmax(data.result.elevation))
    _open(page, origin, site_id)
    timings = {}
    # Levels the server has not drawn yet: low, between the bowl's pit and spill
    # (or just above the lowest outlet), above its spill.
    middle = max(lowest + 0.07, (pit + spill) / 2)
    for level in (lowest + 0.02, min(middle, highest - 0.1), min(spill + 0.05, highest - 0.02)):
        text = f"{level:.2f}"
        timings[text] = page.evaluate(MEASURE_LEVEL_CHANGE, text)
    print(f"level change drawn in (ms, performance.now() in Chromium): {timings}")
    assert all(ms > 0 for ms in timings.values()), f"a level change was never drawn: {timings}"
    # The median of the three: the test machine is shared, and one change may wait
    # for another process; none may take more than twice the target.
    assert float(np.median(list(timings.values()))) < REDRAW_LIMIT_MS, timings
    assert max(timings.values()) < 2 * REDRAW_LIMIT_MS, timings


def test_filter_select_and_the_depressions_in_view_drawn_one_by_one(page, served):
    origin, app, site_id = served
    data = open_results(app, site_id)
    t = data.result.depressions
    deep = int(np.count_nonzero(t.max_depth >= 0.5))  # the bowl, and no noise pit
    k = int(np.argmax(t.area_m2))
    _open(page, origin, site_id)
    page.fill("#depressions-min-depth", "0.5")
    page.click("#depressions-filter button[type=submit]")
    page.wait_for_selector("#depressions-count:has-text('match')")
    assert page.locator("#depressions-count").inner_text() == f"{deep} of {len(t)} depressions match"
    rows = page.locator("#depressions-table tbody tr")
    assert rows.count() == deep and rows.first.get_attribute("data-id") == str(k + 1)
    rows.first.click()
    assert page.locator("#depression-detail-title").inner_text() == f"Depression {k + 1}"
    # Zoomed to the bowl (zoom 19 at most): the depressions in view big enough to
    # pick there are drawn one by one, each with its spill point.
    page.wait_for_selector("body[data-depression-features-zoom='19']", timeout=20_000)
    shown = int(page.evaluate("document.body.dataset.depressionFeatures"))
    assert 1 <= shown <= 150
    assert page.locator("path.depression-outline").count() == shown
    assert page.locator(".symbol-spill.spill-point").count() == shown
    assert "in view" in page.locator("#depressions-view-note").inner_text()
