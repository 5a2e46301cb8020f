"""The Files tab, renaming and deleting a site, and the sign-in notice in a real browser
(Playwright driving Debian's Chromium, as in tests/web/test_web_browser.py)."""

from __future__ import annotations

import threading
from pathlib import Path

import pytest

from sillmark.web import layout
from tests.web.test_web_browser import CHROMIUM, LAUNCH_ARGS, sync_playwright
from tests.web_support import Client, analysed_site, make_app, upload_dem, write_lowbank

pytestmark = [pytest.mark.browser]
if sync_playwright is None or not Path(CHROMIUM).is_file():
    pytestmark.append(pytest.mark.skip(reason="BROWSER TESTS SKIPPED: playwright or Chromium missing"))


@pytest.fixture(scope="module")
def served(tmp_path_factory):
    """(origin, data folder, analysed site id, draft site id) of a waitress-served app."""
    import waitress

    folder = tmp_path_factory.mktemp("admin-browser")
    data = folder / "data"
    app = make_app(data)
    client = Client(app)
    dem = write_lowbank(folder / "lowbank.tif")
    site_id = analysed_site(client, dem, assets=False)
    other = upload_dem(client, dem, name="Wharf Street.tif").get_json()["site_id"]
    srv = waitress.create_server(app, host="127.0.0.1", port=0, threads=4)
    threading.Thread(target=srv.run, daemon=True).start()
    yield f"http://127.0.0.1:{srv.effective_port}", data, site_id, other
    srv.close()
    app.extensions["sillmark"].runner.stop()


@pytest.fixture(scope="module")
def browser():
    with sync_playwright() as p:
        b = p.chromium.launch(executable_path=CHROMIUM, args=LAUNCH_ARGS)
        yield b
        b.close()


def test_files_tab_lists_every_file_of_the_run(browser, served):
    origin, data, site_id, _ = served
    page = browser.new_page(viewport={"width": 1280, "height": 860})
    try:
        page.goto(f"{origin}/sites/{site_id}")
        page.click("button[data-tab='tab-files']")
        page.wait_for_selector("#run-files", state="visible")
        shown = page.locator("#run-files a").all_inner_texts()
        run_id = int(page.evaluate("JSON.parse(document.getElementById('site-config').textContent).run_id"))
        folder = layout.results_dir(data, site_id, run_id)
        on_disk = sorted(p.name for p in folder.iterdir() if not p.name.startswith("."))
        assert sorted(shown) == sorted(on_disk + ["stage_table.csv"])
        assert {"depression_hierarchy.csv", "depression_curves.csv", "onset_stage.sld"} <= set(shown)
        with page.expect_download() as got:
            page.click("#run-files a:text-is('depression_curves.csv')")
        assert Path(got.value.path()).read_bytes() == (folder / "depression_curves.csv").read_bytes()
    finally:
        page.close()


def test_rename_flags_a_duplicate_and_delete_asks_for_the_name(browser, served):
    origin, data, site_id, other = served
    page = browser.new_page(viewport={"width": 1280, "height": 860})
    try:
        page.goto(f"{origin}/sites/{site_id}")
        page.click("button[data-tab='tab-files']")
        page.click("#manage-link")
        page.wait_for_selector("#rename-form")
        page.fill("#rename-name", "wharf street")  # the other site's name, in other case
        page.click("#rename-submit")
        page.wait_for_selector("#manage-error")
        assert "already called" in page.inner_text("#manage-error")
        page.fill("#rename-name", "Lowbank east")
        page.click("#rename-submit")
        page.wait_for_selector("#manage-done")
        assert page.inner_text("#current-name") == "Lowbank east"

        page.fill("#delete-confirm", "Lowbank")  # not the whole name
        page.click("#delete-submit")
        page.wait_for_selector("#manage-error")
        assert "nothing was deleted" in page.inner_text("#manage-error")
        assert layout.site_dir(data, site_id).is_dir()

        page.fill("#delete-confirm", "Lowbank east")
        page.click("#delete-submit")
        page.wait_for_url(f"{origin}/")
        assert "Lowbank east" not in page.inner_text("main")
        assert "Wharf Street" in page.inner_text("main")
        assert not layout.site_dir(data, site_id).exists()

        page.goto(f"{origin}/signin")
        assert "No sign-in is needed here" in page.inner_text("main")
        assert page.locator("input[type=password]").count() == 0
    finally:
        page.close()
