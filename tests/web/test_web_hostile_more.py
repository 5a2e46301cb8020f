"""More hostile cases: each gets a clear 4xx, no traceback and no server path in
the answer, the server keeps answering, and the stored site is unchanged.

Uses the shared analysed Lowbank site of tests/web/test_web_hostile.py (invented).
"""

from __future__ import annotations

import io
import json

import numpy as np
import pytest
from affine import Affine

from tests.web.test_web_hostile import (baseline, check_refusal, leftovers, stored_state,  # noqa: F401
                                    still_serving, tif_bytes, world)
from tests.web.test_web_hardening import LOCAL_GRID


def raw_upload(client, body: bytes, name: str):
    return client.post("/uploads/dem", data=body, headers={
        "Content-Type": "application/octet-stream", "X-File-Name": name, "Accept": "application/json"})


def form(client, url: str, data: dict):
    return client.post(url, data=data, content_type="multipart/form-data", headers={"Accept": "application/json"})


def cases(site_id: int, folder) -> dict:
    """id -> (callable(client) -> response, fragment)."""
    s = f"/api/sites/{site_id}"
    ones = np.ones((10, 12), np.float32)
    geo = {"type": "Point", "coordinates": [15.0, 45.15]}
    return {
        "dem-cells-of-1e7-m": (lambda c: raw_upload(c, tif_bytes(folder, ones, transform=Affine(
            1e7, 0, 500_000, 0, -1e7, 5e6)), "huge_cells.tif"), "circumference"),
        "dem-origin-at-1e15": (lambda c: raw_upload(c, tif_bytes(folder, ones, transform=Affine(
            2, 0, 1e15, 0, -2, 1e15)), "far.tif"), "cannot be placed on the Earth"),
        "dem-local-engineering-grid": (lambda c: raw_upload(c, tif_bytes(folder, ones, crs=LOCAL_GRID),
                                                            "works.tif"), "no geodetic datum"),
        "dem-json-body": (lambda c: c.post("/uploads/dem", json={"dem": "x"},
                                           headers={"Accept": "application/json"}), "is not a raster"),
        "dem-html-renamed": (lambda c: raw_upload(c, b"<html><body>levels</body></html>" * 20, "page.tif"),
                             "is not a raster"),
        "dem-zip-renamed": (lambda c: raw_upload(c, b"PK\x03\x04" + b"\0" * 200, "site.tif"), "is not a raster"),
        "settings-unit-with-newline": (lambda c: form(c, f"/uploads/sites/{site_id}/settings", {
            "vertical_unit": "m\r\nX: y", "outlet": "edge"}), "unknown vertical unit"),
        "settings-connectivity-6": (lambda c: form(c, f"/uploads/sites/{site_id}/settings", {
            "vertical_unit": "m", "outlet": "edge", "connectivity": "6"}), "connectivity must be 8"),
        "settings-file-outlet-without-file": (lambda c: form(c, f"/uploads/sites/{site_id}/settings", {
            "vertical_unit": "m", "outlet": "file"}), "water"),
        "water-body-a-point-far-away": (lambda c: form(c, f"/uploads/sites/{site_id}/settings", {
            "vertical_unit": "m", "outlet": "file",
            "water": (io.BytesIO(json.dumps({"type": "Point", "coordinates": [-120.0, 10.0]}).encode()),
                      "far.geojson")}), "far.geojson"),
        "water-body-empty-file": (lambda c: form(c, f"/uploads/sites/{site_id}/settings", {
            "vertical_unit": "m", "outlet": "file", "water": (io.BytesIO(b""), "none.geojson")}), "empty"),
        "assets-formula-only-header": (lambda c: form(c, f"/uploads/sites/{site_id}/assets", {
            "assets": (io.BytesIO(b"=name,=x,=y\n"), "f.csv")}), "no 'name' column"),
        "assets-empty-file": (lambda c: form(c, f"/uploads/sites/{site_id}/assets", {
            "assets": (io.BytesIO(b""), "a.csv")}), "empty"),
        "assets-point-geojson-no-name": (lambda c: form(c, f"/uploads/sites/{site_id}/assets", {
            "assets": (io.BytesIO(json.dumps({"type": "Feature", "properties": {}, "geometry": geo}).encode()),
                       "p.geojson")}), "lies on the DEM"),
        "level-with-comma-decimal": (lambda c: c.get(f"{s}/stage?level=10,5"), "finite number"),
        "level-with-unit-suffix": (lambda c: c.get(f"{s}/stage?level=10.5m"), "finite number"),
        "level-file-kind-traversal": (lambda c: c.get(f"{s}/files/level/10.5/..%2Fsummary"), "not found"),
        "tile-negative-y": (lambda c: c.get(f"/tiles/{site_id}/hillshade/3/1/-1.png"), "not found"),
        "tile-unknown-layer": (lambda c: c.get(f"/tiles/{site_id}/passwd/3/1/1.png"), "level"),
        "curve-of-depression-0": (lambda c: c.get(f"{s}/depressions/0/curve"), "no depression 0"),
        "barrier-body-not-json": (lambda c: c.post(f"{s}/barrier", data="level=11",
                                                   headers={"Accept": "application/json"}),
                                  "give the target level"),
        "barrier-level-as-list": (lambda c: c.post(f"{s}/barrier", json={"asset": 0, "level": [1]},
                                                   headers={"Accept": "application/json"}), "number"),
        "cell-lat-beyond-pole": (lambda c: c.get(f"{s}/cell?lon=15&lat=91&level=10.5"), "lat in [-90, 90]"),
    }


@pytest.mark.parametrize("case", list(cases(1, None)))
def test_further_hostile_requests_are_refused_and_change_nothing(world, baseline, case):
    app, client, site_id, folder = world
    ask, fragment = cases(site_id, folder)[case]
    before = stored_state(app)
    r = ask(client)
    check_refusal(r, fragment, app)
    assert stored_state(app) == before and leftovers(app) == []
    still_serving(client, site_id, baseline)


def test_uploads_at_once_beside_a_hostile_one_keep_their_own_results(world, baseline):
    """A bad DEM and good requests at the same time: the bad one is refused, the others answer."""
    import threading

    app, client, site_id, folder = world
    body = tif_bytes(folder, np.ones((10, 12), np.float32), transform=Affine(2, 0, 1e15, 0, -2, 1e15))
    before = stored_state(app)
    answers = {}

    def bad():
        answers["bad"] = raw_upload(client, body, "far.tif")

    def good(k):
        answers[k] = app.test_client().get(f"/api/sites/{site_id}/stage?level=10.5")

    threads = [threading.Thread(target=bad)] + [threading.Thread(target=good, args=(k,)) for k in range(4)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(60)
    check_refusal(answers["bad"], "cannot be placed on the Earth", app)
    assert all(answers[k].status_code == 200 and answers[k].get_json() == baseline for k in range(4))
    assert stored_state(app) == before
