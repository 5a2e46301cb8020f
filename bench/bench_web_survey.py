"""Benchmark of the web app on a survey DEM: upload to first map, answer sizes, level change.

Issue 15's web targets, on an invented survey DEM of 3000 × 3000 cells
(bench/terrain.py: fractal relief with 3 cm of noise on every cell, so tens of
thousands of depressions), measured side by side in one run:

- ``sillmark analyse`` on the DEM from the command line (a subprocess, every
  default output): the reference time;
- upload to first map: the DEM uploaded to the app, confirmed with the edge as
  outlet, analysed by the app's worker process, then the site page opened in
  Chromium until the water-level map, the figures and the first page of the
  depression table are shown. Target: under 3 × the command line's time;
- the largest answer of every GET endpoint under /api/ (downloads of result
  files aside), as the page asks and with the largest pages and limits the
  caps allow. Target: none over 2 MB. An answer sent as an attachment (the
  full inventory as CSV) is a download and is printed apart;
- a level change drawn in the page (water-level tiles, figures and the table
  at the new level), timed with performance.now() in Chromium at eight levels (median and p95).
  Target: under 1 s.

Usage: python bench/bench_web_survey.py [--size 3000] [--keep]
(--size 1000 runs in a few minutes; Chromium from Debian and the playwright
package are needed for the browser figures, which are skipped without them.)
"""

from __future__ import annotations

import argparse
import json
import shutil
import statistics
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
sys.path.insert(0, str(ROOT))

MAX_ANSWER_BYTES = 2 * 2**20
CHROMIUM = "/usr/bin/chromium"
LAUNCH_ARGS = ["--headless", "--no-sandbox", "--disable-gpu", "--no-first-run",
               "--disable-background-networking", "--disable-component-update", "--disable-sync"]


def make_dem(folder: Path, size: int) -> Path:
    from bench.terrain import survey_terrain, write_geotiff

    t = survey_terrain(size, size, seed=15, noise_sd=0.03, relief_m=10.0,
                       bowls=((size / 2, size / 2, size / 8, 1.5),))
    return write_geotiff(folder / f"survey_{size}.tif", t.elevation)


def cli_time(dem: Path, out: Path) -> float:
    t0 = time.perf_counter()
    subprocess.run([str(Path(sys.executable).with_name("sillmark")), "analyse", str(dem), "--out", str(out)],
                   check=True, stdout=subprocess.DEVNULL)
    return time.perf_counter() - t0


def warm_compiled_kernels(folder: Path) -> None:
    """One ``sillmark analyse`` of a small DEM of the same kind first, so that neither
    the timed command line nor the app's worker pays numba's first compilation (both
    read the same on-disk cache): the comparison is of warm runs."""
    cli_time(make_dem(folder, 200), folder / "warm_out")
    shutil.rmtree(folder / "warm_out", ignore_errors=True)


def upload_and_analyse(client, dem: Path) -> tuple[int, float]:
    """Upload and confirm through the app; wait until the worker has analysed it."""
    t0 = time.perf_counter()
    r = client.post("/uploads/dem", data=dem.read_bytes(), headers={
        "Content-Type": "application/octet-stream", "X-File-Name": dem.name, "Accept": "application/json"})
    assert r.status_code == 201, r.get_data(as_text=True)
    site_id = r.get_json()["site_id"]
    r = client.post(f"/uploads/sites/{site_id}/settings", data={
        "vertical_unit": "m", "outlet": ["edge"], "connectivity": "8"},
        content_type="multipart/form-data", headers={"Accept": "application/json"})
    assert r.status_code == 202, r.get_data(as_text=True)
    while True:
        state = client.get(f"/api/sites/{site_id}/status").get_json()
        if state["state"] == "ready":
            return site_id, time.perf_counter() - t0
        if state["run"] and state["run"]["status"] == "failed":
            raise SystemExit(f"the analysis failed: {state['run']['message']}")
        time.sleep(0.5)


def analysed_scenario(client, site_id: int) -> tuple[int, float]:
    """(id, seconds) of a scenario of the site (a culvert near its middle), analysed by
    the worker: the scenario endpoints are crawled like the rest."""
    site = client.get(f"/api/sites/{site_id}").get_json()
    w, s, e, n = site["summary"]["lonlat_bounds"]
    lon, lat = (w + e) / 2, (s + n) / 2
    edits = {"type": "FeatureCollection", "features": [{
        "type": "Feature", "properties": {"kind": "culvert", "invert": 0.0},
        "geometry": {"type": "LineString", "coordinates": [[lon, lat], [lon + 0.0003, lat + 0.0003]]}}]}
    t0 = time.perf_counter()
    r = client.post(f"/api/sites/{site_id}/scenarios", json={"name": "bench", "edits": edits})
    assert r.status_code == 202, r.get_data(as_text=True)
    scenario_id = r.get_json()["id"]
    while True:
        state = client.get(f"/api/sites/{site_id}/scenarios/{scenario_id}").get_json()["state"]
        if state == "done":
            return scenario_id, time.perf_counter() - t0
        if state == "failed":
            raise SystemExit("the scenario's analysis failed")
        time.sleep(0.5)


def crawl(app, client, site_id: int, scenario_id: int) -> tuple[tuple[str, int], tuple[str, int]]:
    """(address, bytes) of the largest answer of every GET endpoint under /api/, and of
    the largest download among them (an answer sent as an attachment, such as the
    full inventory the issue asks to keep on request: a file, not a page's answer)."""
    site = client.get(f"/api/sites/{site_id}").get_json()
    w, s, e, n = site["summary"]["lonlat_bounds"]
    rng = client.get(f"/api/sites/{site_id}/stage_table").get_json()["level"]
    level = rng[len(rng) // 2]
    query = f"?level={level:.3f}&lon={(w + e) / 2}&lat={(s + n) / 2}"
    values = {"site_id": site_id, "depression_id": 1, "run_id": site["current_run"],
              "scenario_id": scenario_id}
    largest, download = ("", 0), ("", 0)
    for rule in app.url_map.iter_rules():
        if not rule.rule.startswith("/api/") or "GET" not in rule.methods or "/files/" in rule.rule:
            continue
        path = rule.rule
        for name in rule.arguments:
            path = path.replace(f"<int:{name}>", str(values[name])).replace(f"<{name}>", str(values[name]))
        extra = ["&q=epsg&limit=25"] if rule.rule == "/api/crs" else ["", "&per_page=500&limit=500"]
        for more in extra:
            r = client.get(path + query + more)
            size = len(r.get_data())
            if r.headers.get("Content-Disposition", "").startswith("attachment"):
                if size > download[1]:
                    download = (path + query + more, size)
            elif size > largest[1]:
                largest = (path + query + more, size)
    return largest, download


def browser_figures(origin: str, site_id: int) -> tuple[float, dict] | None:
    """(seconds to the first map in Chromium, {level: ms of a level change})."""
    try:
        from playwright.sync_api import sync_playwright
    except ImportError:
        print("  (playwright is not installed: no browser figures)")
        return None
    if not Path(CHROMIUM).is_file():
        print(f"  (no Chromium at {CHROMIUM}: no browser figures)")
        return None
    from tests.web.test_web_browser_survey import MEASURE_LEVEL_CHANGE

    with sync_playwright() as p:
        browser = p.chromium.launch(executable_path=CHROMIUM, args=LAUNCH_ARGS)
        page = browser.new_page(viewport={"width": 1440, "height": 900})
        t0 = time.perf_counter()
        page.goto(f"{origin}/sites/{site_id}")
        for part in ("figures-level", "water-level", "depression-table-level"):
            page.wait_for_selector(f"body[data-{part}]", timeout=300_000)
        first = time.perf_counter() - t0
        page.wait_for_load_state("networkidle")
        start = float(json.loads(page.locator("#site-config").text_content())["level"])
        timings = {}
        for step in (-0.15, -0.05, 0.05, 0.1, 0.2, 0.3, 0.45, 0.6):
            text = f"{start + step:.2f}"
            timings[text] = page.evaluate(MEASURE_LEVEL_CHANGE, text)
        browser.close()
    return first, timings


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--size", type=int, default=3000, help="cells a side (default 3000: 9 M cells)")
    ap.add_argument("--keep", action="store_true", help="keep the temporary folder")
    args = ap.parse_args(argv)

    import logging

    import waitress

    logging.getLogger("waitress.queue").setLevel(logging.ERROR)  # its queue-depth notes

    from sillmark.web import create_app

    work = Path(tempfile.mkdtemp(prefix="sillmark-bench-web-"))
    dem = make_dem(work, args.size)
    print(f"survey DEM: {args.size} x {args.size} cells ({args.size ** 2 / 1e6:.1f} M), {dem}")
    print(f"machine load before: {Path('/proc/loadavg').read_text().split()[:3]} (1, 5, 15 min)")
    warm_compiled_kernels(work)

    cli = cli_time(dem, work / "cli_out")
    summary = json.loads((work / "cli_out" / "summary.json").read_text())
    counts = (summary.get("significance") or {}).get("counts") or {}
    print(f"sillmark analyse (command line, every default output): {cli:.1f} s; "
          f"{counts.get('all_depressions')} depressions, {counts.get('significant')} significant")

    app = create_app({"DATA_DIR": str(work / "data"), "JOB_RUNNER": "process", "REGISTER_DEMO": False,
                      "WARM_ZOOMS": 2, "CSRF_ENABLED": False, "MAX_UPLOAD_BYTES": 2**31})
    client = app.test_client()
    server = waitress.create_server(app, host="127.0.0.1", port=0, threads=8)
    threading.Thread(target=server.run, daemon=True).start()
    origin = f"http://127.0.0.1:{server.effective_port}"
    try:
        site_id, analysed = upload_and_analyse(client, dem)
        print(f"upload, confirm and the worker's analysis: {analysed:.1f} s")
        shown = browser_figures(origin, site_id)
        if shown is not None:
            first, timings = shown
            total = analysed + first
            print(f"first map in Chromium: {first:.1f} s; upload to first map {total:.1f} s = "
                  f"{total / cli:.2f} x the command line (target < 3 x: "
                  f"{'met' if total < 3 * cli else 'MISSED'})")
        if shown is not None:
            values = list(timings.values())
            med = statistics.median(values)
            p95 = float(np.percentile(values, 95))
            print("level change drawn in Chromium (ms): " +
                  ", ".join(f"{k}: {v:.0f}" for k, v in timings.items()) +
                  f"; median {med:.0f} ms, p95 {p95:.0f} ms "
                  f"(target < 1000 ms: {'met' if 0 < med < 1000 else 'MISSED'})")
        scenario_id, seconds = analysed_scenario(client, site_id)
        print(f"a scenario (one culvert) analysed for the crawl: {seconds:.1f} s")
        (url, size), (file_url, file_size) = crawl(app, client, site_id, scenario_id)
        print(f"largest API answer: {size / 1024:.0f} KiB ({url.split('?')[0]}); target < 2 MiB: "
              f"{'met' if size < MAX_ANSWER_BYTES else 'MISSED'}")
        print(f"largest download under /api/ (an attachment, outside the target): "
              f"{file_size / 1024:.0f} KiB ({file_url.split('?')[0]})")
        print(f"machine load after: {Path('/proc/loadavg').read_text().split()[:3]} (1, 5, 15 min)")
    finally:
        server.close()
        app.extensions["sillmark"].runner.stop()
        if not args.keep:
            shutil.rmtree(work, ignore_errors=True)
        else:
            print(f"kept: {work}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
