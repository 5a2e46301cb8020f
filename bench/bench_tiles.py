"""Benchmark of the map tile endpoint on the demo site: how long a whole map view takes.

A browser window of about 1280 × 1024 pixels shows 5 × 4 = 20 tiles. This
registers and analyses the demo site (demo_dem/riverbend.tif, outlets: the edge
and the river, D8) in a temporary data folder, then times, for a 20-tile view
at zoom 16 (the whole site) and one at zoom 17 (the town):

- the first view (each tile's pixel-to-cell lookup computed with pyproj);
- a change of water level (the same 20 tiles at another level: the redraw the
  stage slider causes; the lookup comes from the cache);
- the hillshade of the same view.

Each is measured twice: in-process through the Flask test client (tiles one after
another: the server's own cost), and over HTTP against waitress on a local port
with 6 tiles in flight at once, as a browser fetches them (wall-clock time to the
last tile). The target: a level change redraws the whole view in under 200 ms.

Usage: python bench/bench_tiles.py [--repeat 5] [--threads 6]
"""

from __future__ import annotations

import argparse
import concurrent.futures
import shutil
import statistics
import sys
import tempfile
import threading
import time
import urllib.request
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))

TARGET_MS = 200.0


def view(bounds, z: int, cols: int = 5, rows: int = 4):
    """The 20 tiles of a cols × rows window centred on the site at zoom z."""
    from sillmark.web import render

    w, s, e, n = bounds
    cx, cy = render.lonlat_to_tile((w + e) / 2, (s + n) / 2, z)
    x0, y0 = cx - cols // 2, cy - rows // 2
    return [(z, x, y) for y in range(y0, y0 + rows) for x in range(x0, x0 + cols)]


def timed(fn, repeat: int) -> float:
    times = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return min(times) * 1000.0


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeat", type=int, default=5)
    ap.add_argument("--threads", type=int, default=6, help="tiles in flight over HTTP (default 6)")
    args = ap.parse_args(argv)

    import waitress

    from sillmark.web import create_app

    data = Path(tempfile.mkdtemp(prefix="sillmark-bench-"))
    t0 = time.perf_counter()
    app = create_app({"DATA_DIR": str(data), "JOB_RUNNER": "inline", "REGISTER_DEMO": True,
                      "WARM_ZOOMS": -1, "CSRF_ENABLED": False})
    print(f"demo site registered and analysed in {time.perf_counter() - t0:.2f} s (data: {data})")
    client = app.test_client()
    summary = client.get("/api/sites/1").get_json()["summary"]
    run = client.get("/api/sites/1").get_json()["current_run"]
    bounds = summary["lonlat_bounds"]
    cache = app.extensions["sillmark"].tiles

    levels = iter(f"{47.0 + 0.01 * k:.2f}" for k in range(100000))

    def fetch_all(tiles, layer):
        for z, x, y in tiles:
            r = client.get(f"/tiles/1/{layer}/{z}/{x}/{y}.png?run={run}")
            assert r.status_code == 200, r.status_code

    # One tile first, so that numpy, pyproj and zlib are warm.
    fetch_all(view(bounds, 15)[:1], "47.00")

    print("\nin-process (Flask test client, tiles one after another), best of", args.repeat)
    results = {}
    for z in (16, 17):
        tiles = view(bounds, z)
        t0 = time.perf_counter()
        fetch_all(tiles, next(levels))
        first = (time.perf_counter() - t0) * 1000.0
        redraw = timed(lambda: fetch_all(tiles, next(levels)), args.repeat)
        shade = timed(lambda: fetch_all(tiles, "hillshade"), args.repeat)
        results[z] = redraw
        print(f"  zoom {z}: first view {first:7.1f} ms | level change {redraw:6.1f} ms "
              f"({redraw / len(tiles):.2f} ms/tile) | hillshade {shade:6.1f} ms  [{len(tiles)} tiles]")
    print(f"  lookup cache: {len(cache)} tiles held, {cache.hits} hits, {cache.misses} misses")

    # Over HTTP, as a browser: waitress in a thread, `threads` requests in flight.
    server = waitress.create_server(app, host="127.0.0.1", port=0, threads=8)
    port = server.effective_port
    thread = threading.Thread(target=server.run, daemon=True)
    thread.start()
    base = f"http://127.0.0.1:{port}"

    def get(url):
        with urllib.request.urlopen(base + url, timeout=30) as resp:
            body = resp.read()
            assert resp.status == 200 and body[:4] == b"\x89PNG"
        return len(body)

    pool = concurrent.futures.ThreadPoolExecutor(args.threads)

    def fetch_http(tiles, layer):
        urls = [f"/tiles/1/{layer}/{z}/{x}/{y}.png?run={run}" for z, x, y in tiles]
        return sum(pool.map(get, urls))

    print(f"\nover HTTP (waitress, {args.threads} tiles in flight), best of {args.repeat}")
    http = {}
    for z in (16, 17):
        tiles = view(bounds, z)
        redraw = timed(lambda: fetch_http(tiles, next(levels)), args.repeat)
        size = fetch_http(tiles, next(levels))
        spread = [timed(lambda: fetch_http(tiles, next(levels)), 1) for _ in range(args.repeat)]
        http[z] = redraw
        print(f"  zoom {z}: level change {redraw:6.1f} ms for {len(tiles)} tiles "
              f"(median {statistics.median(spread):.1f} ms, {size / 1024:.0f} KiB)")
    pool.shutdown()
    server.close()
    app.extensions["sillmark"].runner.stop()
    shutil.rmtree(data, ignore_errors=True)

    worst = max(max(results.values()), max(http.values()))
    verdict = "meets" if worst < TARGET_MS else "MISSES"
    print(f"\nwhole-view redraw after a level change: worst {worst:.1f} ms; {verdict} the "
          f"{TARGET_MS:.0f} ms target")
    return 0 if worst < TARGET_MS else 1


if __name__ == "__main__":
    sys.exit(main())
