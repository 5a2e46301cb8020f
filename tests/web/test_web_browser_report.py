"""The printed report and the method page in a real browser (Playwright driving
Debian's Chromium, as in tests/web/test_web_browser.py), printed to PDF and read
back with poppler-utils' pdftotext and pdfinfo.

The site is Lowbank (tests/web_support.py, invented) with its four assets and the
vertical datum "EVRF2007"; see tests/web/test_web_report.py for the asset figures
worked by hand. At 11.00 m the basin floods through its notch: the Basin school
stands 2.00 m deep and the West pump 0.90 m; the Hill farm is dry.
"""

from __future__ import annotations

import io
import json
import shutil
import subprocess
import threading
from pathlib import Path

import pytest

from sillmark import SCREENING_CAUTION
from tests.web.test_web_browser import ARTIFACTS, CHROMIUM, LAUNCH_ARGS, sync_playwright
from tests.web_support import ASSETS_CSV, Client, make_app, upload_dem, write_lowbank

pytestmark = [pytest.mark.browser]
if sync_playwright is None or not Path(CHROMIUM).is_file():
    pytestmark.append(pytest.mark.skip(reason="BROWSER TESTS SKIPPED: playwright or Chromium missing"))
elif not (shutil.which("pdftotext") and shutil.which("pdfinfo")):
    pytestmark.append(pytest.mark.skip(
        reason="BROWSER TESTS SKIPPED: pdftotext/pdfinfo missing (apt-get install -y poppler-utils)"))

DATUM = "EVRF2007"


@pytest.fixture(scope="module")
def served(tmp_path_factory):
    """(origin, site_id): waitress serving Lowbank, analysed, with assets and a datum."""
    import waitress

    folder = tmp_path_factory.mktemp("report-data")
    app = make_app(folder / "data")
    client = Client(app)
    site_id = upload_dem(client, write_lowbank(folder / "lowbank.tif")).get_json()["site_id"]
    r = client.post(f"/uploads/sites/{site_id}/settings", content_type="multipart/form-data",
                    headers={"Accept": "application/json"},
                    data={"vertical_unit": "m", "vertical_datum": DATUM, "outlet": ["edge"], "connectivity": "8"})
    assert r.status_code == 202, r.get_data(as_text=True)
    r = client.post(f"/uploads/sites/{site_id}/assets", content_type="multipart/form-data",
                    data={"assets": (io.BytesIO(ASSETS_CSV.encode()), "assets.csv")})
    assert r.status_code == 201, r.get_data(as_text=True)
    srv = waitress.create_server(app, host="127.0.0.1", port=0, threads=4)
    threading.Thread(target=srv.run, daemon=True).start()
    yield f"http://127.0.0.1:{srv.effective_port}", site_id
    srv.close()
    app.extensions["sillmark"].runner.stop()


@pytest.fixture(scope="module")
def browser():
    with sync_playwright() as p:
        b = p.chromium.launch(executable_path=CHROMIUM, args=LAUNCH_ARGS)
        yield b
        b.close()


@pytest.fixture
def page(browser, served):
    context = browser.new_context(viewport={"width": 1400, "height": 950})
    pg = context.new_page()
    errors: list[str] = []
    pg.on("pageerror", lambda e: errors.append(str(e)))
    yield pg
    context.close()
    assert errors == [], f"script errors: {errors}"


def open_report(page, origin: str, site_id: int, level: str):
    page.goto(f"{origin}/sites/{site_id}/print?level={level}")
    page.wait_for_selector("body[data-print-ready]", timeout=30_000)
    page.wait_for_load_state("networkidle")


def pdf_text(path: Path, *, first: int | None = None, last: int | None = None) -> str:
    args = ["pdftotext", "-raw", "-enc", "UTF-8"]  # content order: a block is not cut by the map's labels
    if first:
        args += ["-f", str(first)]
    if last:
        args += ["-l", str(last)]
    out = subprocess.run(args + [str(path), "-"], check=True, capture_output=True, text=True).stdout
    return " ".join(out.split())


def pdf_info(path: Path) -> dict[str, str]:
    out = subprocess.run(["pdfinfo", str(path)], check=True, capture_output=True, text=True).stdout
    return {k.strip(): v.strip() for k, v in (line.split(":", 1) for line in out.splitlines() if ":" in line)}


def test_printed_report_pdf_has_two_pages_with_assets_datum_chart_and_caution(page, served, tmp_path):
    origin, site_id = served
    open_report(page, origin, site_id, "11.0")
    pdf = tmp_path / "report.pdf"
    page.pdf(path=str(pdf), prefer_css_page_size=True, print_background=True)
    ARTIFACTS.mkdir(exist_ok=True)
    shutil.copy(pdf, ARTIFACTS / "browser_report.pdf")
    info = pdf_info(pdf)
    # Page one the map, page two the report: four assets fit on one page.
    assert info["Pages"] == "2"
    # A4 landscape is 297 × 210 mm = 841.89 × 595.28 pt (ISO 216; 1 pt = 1/72 in).
    width, height = (float(v) for v in info["Page size"].split(" pts")[0].split(" x "))
    assert width == pytest.approx(841.89, abs=1.0) and height == pytest.approx(595.28, abs=1.0)

    first, second = pdf_text(pdf, first=1, last=1), pdf_text(pdf, first=2, last=2)
    assert f"Outlet water level 11.00 m above {DATUM}" in first
    for name in ("Basin school", "Hill farm", "West pump"):  # labels on the map
        assert name in first
    assert "Legend" in first and "Spill point" in first
    assert SCREENING_CAUTION in first
    assert f"at 11.00 m above {DATUM}" in second
    for name in ("Basin school", "Hill farm", "West pump", "Far away"):  # the asset table
        assert name in second
    assert "2.00 m" in second and "0.90 m" in second and "1.25 m to spare" in second
    assert f"Ground (m above {DATUM})" in second
    assert "Site stage chart" in second and "Method and its limits" in second
    assert "lowbank.tif" in second and "Connectivity 8 neighbours (D8)" in second
    assert SCREENING_CAUTION in second


def test_printed_map_is_fitted_to_the_sheet_and_draws_what_the_legend_lists(page, served):
    origin, site_id = served
    open_report(page, origin, site_id, "10.5")
    page.emulate_media(media="print")
    page.wait_for_timeout(300)
    config = json.loads(page.locator("#site-config").text_content())
    west, south, east, north = config["bounds"]
    corners = page.evaluate(
        "([n, s, w, e, name]) => { const m = window[name]; const sz = m.getSize();"
        " const a = m.latLngToContainerPoint([n, w]), b = m.latLngToContainerPoint([s, e]);"
        " return [a.x, a.y, b.x, b.y, sz.x, sz.y]; }",
        [north, south, west, east, config["names"]["map"]])
    x0, y0, x1, y1, w, h = corners
    frame = page.locator(".sheet-map").bounding_box()
    assert w == pytest.approx(frame["width"], abs=3) and h == pytest.approx(frame["height"], abs=3)
    # The whole site is inside the frame, centred on it, and fills it in one direction
    # (zoom steps of 0.1 leave at most 1 - 2**-0.1 = 6.7 % of it, plus the 6 px padding).
    assert x0 >= -1 and y0 >= -1 and x1 <= w + 1 and y1 <= h + 1
    assert (x0 + x1) / 2 == pytest.approx(w / 2, abs=2) and (y0 + y1) / 2 == pytest.approx(h / 2, abs=2)
    assert max((x1 - x0) / w, (y1 - y0) / h) > 0.88
    # What the legend lists is on the map: water tiles, outlets, routes, the notch
    # as the school's controlling sill, the basin's spill point, three named assets.
    assert page.locator(".water-tiles img.leaflet-tile-loaded").count() >= 1
    assert page.locator("path.outlet-cells").count() >= 1
    assert page.locator("path.route-line").count() == 3  # Far away is off the DEM: no route
    assert page.locator("path.sill-marker").count() == 1  # the farm and the pump are their own sills
    assert page.locator("path.spill-point").count() == 1
    assert page.locator("path.asset-marker").count() == 3
    labels = sorted(page.locator(".asset-label").all_inner_texts())
    assert labels == ["Basin school", "Hill farm", "West pump"]
    page.screenshot(path=str(ARTIFACTS / "browser_report_print_media.png"), full_page=True)


def test_method_page_is_reached_from_the_map_and_the_report(page, served):
    origin, site_id = served
    page.goto(f"{origin}/sites/{site_id}")
    page.wait_for_selector("body[data-figures-level]")
    page.click(".site-links a:has-text('Method and limitations')")
    page.wait_for_url("**/method")
    assert page.locator("h1").inner_text() == "Method and limitations"
    assert page.locator(".method-part h2").count() == 7
    assert "Priority-Flood" in page.locator("#what-the-onset-stage-is").inner_text()
    open_report(page, origin, site_id, "10.5")
    page.click(".print-toolbar a:has-text('Method and limitations')")
    page.wait_for_url("**/method")
    page.click(".method-contents a:has-text('Shielded low ground')")
    assert page.url.endswith("#shielded-low-ground")
    assert "seepage" in page.locator("#shielded-low-ground").inner_text()
