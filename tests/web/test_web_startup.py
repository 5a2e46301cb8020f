"""The first requests after a start: every module a request needs is loaded when the app is built.

Modules imported lazily inside request handlers were once imported by several
request threads at once right after `sillmark serve` started; an import left
half-done answered 500 until a restart. Two checks hold the fix in place:

- in a fresh interpreter, no module of Sillmark is imported for the first time
  while requests are served, after :func:`sillmark.web.create_app` returned;
- a freshly started server process answers a burst of simultaneous first
  requests to every data endpoint of an analysed site with 200, on every try.
"""

from __future__ import annotations

import json
import math
import os
import subprocess
import sys
import textwrap
import threading
import urllib.request
from pathlib import Path

import pytest

from tests.servers import serving
from tests.web_support import Client, analysed_site, cell_centre, lonlat, make_app

ROOT = Path(__file__).resolve().parents[2]

#: What the site page asks for as soon as it opens, plus the other data endpoints.
FIRST_REQUESTS = (
    "/api/sites/{id}",
    "/api/sites/{id}/status",
    "/api/sites/{id}/stage?level=11.0",
    "/api/sites/{id}/stage_table",
    "/api/sites/{id}/legend",
    "/api/sites/{id}/depressions",
    "/api/sites/{id}/depressions/1/curve",
    "/api/sites/{id}/depressions.geojson",
    "/api/sites/{id}/spill_points.geojson",
    "/api/sites/{id}/outlets.geojson",
    "/api/sites/{id}/cell?lon={lon}&lat={lat}&level=11.0",
    "/api/sites/{id}/assets?level=11.0",
    "/api/sites/{id}/files/stage_table.csv",
    "/api/sites/{id}/files/level/11.0/depth",
    "/sites/{id}",
    "/sites/{id}/print?level=11.0",
    "/tiles/{id}/hillshade/{tile}.png",
    "/tiles/{id}/11.0/{tile}.png",
)


def web_mercator_tile(lon: float, lat: float, zoom: int) -> str:
    """The z/x/y address of the map tile holding (lon, lat) (the usual XYZ scheme)."""
    n = 2**zoom
    x = int((lon + 180.0) / 360.0 * n)
    y = int((1.0 - math.asinh(math.tan(math.radians(lat))) / math.pi) / 2.0 * n)
    return f"{zoom}/{x}/{y}"


def first_request_urls(site_id: int) -> list[str]:
    lon, lat = lonlat(*cell_centre(18, 25))
    tile = web_mercator_tile(lon, lat, 17)
    return [u.format(id=site_id, lon=lon, lat=lat, tile=tile) for u in FIRST_REQUESTS]


def test_serving_requests_imports_no_module_of_sillmark(tmp_path, lowbank_tif):
    """A wrong program (an import inside a handler) shows up as a module loaded after start-up."""
    data = tmp_path / "data"
    client = Client(make_app(data))
    site_id = analysed_site(client, lowbank_tif)
    urls = first_request_urls(site_id)
    script = textwrap.dedent(f"""
        import json, sys
        from tests.web_support import Client, make_app
        app = make_app({str(data)!r})
        before = set(sys.modules)
        client = Client(app)
        statuses = [client.get(u).status_code for u in {urls!r}]
        late = sorted(m for m in set(sys.modules) - before
                      if m.split(".")[0] == "sillmark")
        print(json.dumps({{"statuses": statuses, "late": late}}))
    """)
    out = subprocess.run([sys.executable, "-c", script], cwd=ROOT, capture_output=True, text=True,
                         timeout=300, check=True)
    found = json.loads(out.stdout.strip().splitlines()[-1])
    assert found["late"] == [], f"imported while serving: {found['late']}"
    assert all(s == 200 for s in found["statuses"]), dict(zip(urls, found["statuses"]))


def _burst(base: str, urls: list[str]) -> dict[str, int]:
    """Every URL at the same instant, one thread each; their statuses."""
    gate = threading.Barrier(len(urls))
    statuses: dict[str, int] = {}

    def fetch(url: str) -> None:
        gate.wait()
        try:
            with urllib.request.urlopen(base + url, timeout=120) as r:
                r.read()
                statuses[url] = r.status
        except urllib.error.HTTPError as e:
            statuses[url] = e.code

    threads = [threading.Thread(target=fetch, args=(u,)) for u in urls]
    for t in threads:
        t.start()
    for t in threads:
        t.join(180)
    return statuses


@pytest.mark.slow
def test_a_fresh_server_answers_simultaneous_first_requests(tmp_path, lowbank_tif):
    data = tmp_path / "data"
    client = Client(make_app(data))
    site_id = analysed_site(client, lowbank_tif)
    (data / "config.py").write_text("REGISTER_DEMO = False\n")
    urls = first_request_urls(site_id)
    env = {**os.environ, "PYTHONDONTWRITEBYTECODE": "1"}
    for attempt in range(3):  # the race showed on about half of the restarts
        with serving(data, env=env) as base:
            statuses = _burst(base, urls)
            assert statuses == {u: 200 for u in urls}, (attempt, statuses)
            again = _burst(base, urls[:6])
            assert set(again.values()) == {200}, (attempt, again)
