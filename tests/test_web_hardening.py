"""Hardening of the browser app: non-finite nodata, unplaceable georeferencing,
concurrent exports, sessions, CSV formulas, caching, sign-in pacing, disk use.

Each test builds its own small invented site (tests/web_support.py) and talks to
a real app through the Flask test client; nothing of the app is mocked.
"""

from __future__ import annotations

import io
import json
import zipfile
from pathlib import Path

import numpy as np
import pytest
from affine import Affine

from tests.rasters import write_raster
from tests.web_support import (TRANSFORM, Client, analysed_site, confirm, lowbank_elevation, make_app,
                               upload_dem)


def strict_json(text: str):
    """Parse JSON refusing NaN and ±Infinity, which RFC 8259 does not allow."""
    def refuse(token: str):
        raise AssertionError(f"non-finite number {token} in JSON")

    return json.loads(text, parse_constant=refuse)


# --------------------------------------------------------------------------- non-finite nodata


def lowbank_with_nodata(path: Path, nodata: float) -> Path:
    """The Lowbank DEM with its lake declared by a non-finite nodata value."""
    z = lowbank_elevation()
    z[z == -9999.0] = nodata
    return write_raster(path, z, transform=TRANSFORM, nodata=nodata)


@pytest.mark.parametrize("nodata", [np.nan, -np.inf, np.inf], ids=["nan", "-inf", "+inf"])
def test_a_float_dem_with_non_finite_nodata_uploads_analyses_and_exports(fresh, tmp_path, nodata):
    app, client = fresh
    path = lowbank_with_nodata(tmp_path / "float_nodata.tif", nodata)
    r = upload_dem(client, path)
    assert r.status_code == 201, r.get_data(as_text=True)
    body = strict_json(r.get_data(as_text=True))
    assert body["dem"]["nodata_share"] == pytest.approx(30 / 2000)
    assert body["dem"]["nodata_value"] == {"nan": "NaN", "-inf": "-Infinity", "inf": "Infinity"}[
        str(float(nodata))]
    site_id = body["site_id"]
    assert confirm(client, site_id).status_code == 202
    status = strict_json(client.get(f"/api/sites/{site_id}/status").get_data(as_text=True))
    assert status["state"] == "ready", status
    for url in (f"/api/sites/{site_id}", f"/api/sites/{site_id}/stage?level=10.5",
                f"/api/sites/{site_id}/depressions", f"/api/sites/{site_id}/outlets.geojson"):
        got = client.get(url)
        assert got.status_code == 200, (url, got.get_data(as_text=True)[:200])
        strict_json(got.get_data(as_text=True))
    z = client.get(f"/api/sites/{site_id}/files/level/10.5.zip")
    assert z.status_code == 200
    with zipfile.ZipFile(io.BytesIO(z.get_data())) as zf:
        for name in zf.namelist():
            if name.endswith((".json", ".geojson")):
                strict_json(zf.read(name).decode())
    summary = client.get(f"/api/sites/{site_id}/files/results/summary.json")
    assert summary.status_code == 200
    strict_json(summary.get_data(as_text=True))


# --------------------------------------------------------------------------- unplaceable georeferencing


LOCAL_GRID = ('LOCAL_CS["Works grid",LOCAL_DATUM["Arbitrary",0],UNIT["metre",1],'
              'AXIS["Easting",EAST],AXIS["Northing",NORTH]]')
UNPLACEABLE = {
    "cells-of-1e7-m": (dict(transform=Affine(1e7, 0, 500_000, 0, -1e7, 5e6)), "more than the Earth's circumference"),
    "origin-at-1e15-m": (dict(transform=Affine(2, 0, 1e15, 0, -2, 1e15)), "cannot be placed on the Earth"),
    "local-grid-without-datum": (dict(crs=LOCAL_GRID, transform=Affine(2, 0, 1000, 0, -2, 2000)),
                                 "has no geodetic datum"),
}


@pytest.mark.parametrize("case", list(UNPLACEABLE))
def test_an_unplaceable_dem_is_refused_at_upload_with_a_clear_message(fresh, tmp_path, case):
    app, client = fresh
    options, fragment = UNPLACEABLE[case]
    path = write_raster(tmp_path / "odd.tif", lowbank_elevation(), nodata=-9999.0, **options)
    r = upload_dem(client, path)
    assert r.status_code == 400, r.get_data(as_text=True)[:300]
    message = r.get_json()["error"]
    assert fragment in message and "Traceback" not in message
    assert str(app.extensions["sillmark"].data_dir) not in message
    assert client.get("/api/sites").get_json()["sites"] == []
