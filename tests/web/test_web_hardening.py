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
from tests.web_support import (TRANSFORM, analysed_site, confirm, lowbank_elevation, upload_dem)


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


# --------------------------------------------------------------------------- spreadsheet formulas


FORMULA_NAMES = ["=HYPERLINK(\"http://example.invalid\",\"x\")", "+1+2", "-2+3", "@SUM(A1)",
                 "\tTabbed", "\rReturned"]


def csv_rows_of(text: str) -> list[dict]:
    import csv

    lines = [line for line in text.splitlines(keepends=True) if not line.startswith("#")]
    return list(csv.DictReader(io.StringIO("".join(lines), newline="")))


def formula_assets_csv() -> bytes:
    from tests.web_support import cell_centre

    rows = ["name,kind,x,y"]
    for k, name in enumerate(FORMULA_NAMES):
        x, y = cell_centre(18, 20 + k) if k % 2 == 0 else cell_centre(3 + k, 45)
        quoted = '"' + name.replace('"', '""') + '"'
        rows.append(f"{quoted},=cmd|' /C calc'!A0,{x},{y}")
    return ("\n".join(rows) + "\n").encode()


def test_asset_names_and_kinds_cannot_become_spreadsheet_formulas(fresh, tmp_path):
    from tests.web_support import write_lowbank

    app, client = fresh
    site_id = analysed_site(client, write_lowbank(tmp_path / "lowbank.tif"), assets=False)
    r = client.post(f"/uploads/sites/{site_id}/assets",
                    data={"assets": (io.BytesIO(formula_assets_csv()), "formulas.csv")},
                    content_type="multipart/form-data")
    assert r.status_code == 201, r.get_data(as_text=True)
    got = client.get(f"/api/sites/{site_id}/files/level/11.5/assets_csv")
    assert got.status_code == 200
    rows = csv_rows_of(got.get_data(as_text=True))
    kept = [name.strip() for name in FORMULA_NAMES]  # the asset reader trims blanks round a name
    assert len(rows) == len(kept)
    for row, name in zip(rows, kept):
        assert row["name"][:1] not in ("=", "+", "-", "@", "\t", "\r")  # no cell starts a formula
        assert row["kind"] == "'=cmd|' /C calc'!A0"
        # A reader sees the name behind one quote; a program drops that quote to get it back.
        assert row["name"] == ("'" + name if name[:1] in "=+-@" else name)
    # Numbers stay numbers: freeboard is negative once flooded, and written as a plain number.
    freeboards = [row[c] for row in rows for c in row if c.startswith("freeboard_")]
    negatives = [v for v in freeboards if v.startswith("-")]
    assert negatives, freeboards
    assert all(float(v) < 0 for v in negatives)
    assert not any(v.startswith("'") for v in freeboards)
    # The JSON answer keeps the names as they were given.
    listed = client.get(f"/api/sites/{site_id}/assets?level=11.5").get_json()
    assert sorted(a["name"] for a in listed["assets"]) == sorted(kept)


# --------------------------------------------------------------------------- concurrent exports


def hammer(app, urls: list[str], rounds: int = 1) -> list[tuple[int, bytes]]:
    """Ask for every URL at the same moment from its own thread and client; (status, body) each."""
    import threading

    barrier = threading.Barrier(len(urls))
    answers: list = [None] * len(urls)

    def ask(k: int) -> None:
        client = app.test_client()
        barrier.wait()
        try:
            r = client.get(urls[k])
            answers[k] = (r.status_code, r.get_data())
            r.close()
        except Exception as exc:  # noqa: BLE001 - an error inside the app is what this looks for
            answers[k] = (500, repr(exc).encode())

    threads = [threading.Thread(target=ask, args=(k,)) for k in range(len(urls))]
    for t in threads:
        t.start()
    for t in threads:
        t.join(120)
    return answers


@pytest.mark.parametrize("what", ["zip", "depth", "flood_extent"])
def test_many_viewers_asking_for_the_same_new_level_export_all_get_it(ready, what):
    app, client, site_id = ready
    for level in ("10.37", "11.23", "12.01"):
        url = (f"/api/sites/{site_id}/files/level/{level}.zip" if what == "zip"
               else f"/api/sites/{site_id}/files/level/{level}/{what}")
        if what == "zip":  # the level's files exist; only the ZIP is new
            assert client.get(f"/api/sites/{site_id}/files/level/{level}/depth").status_code == 200
        answers = hammer(app, [url] * 8)
        assert [status for status, _ in answers] == [200] * 8, answers[0][1][:300]
        assert len({body for _, body in answers}) == 1  # every viewer got the same complete file
    levels = app.extensions["sillmark"].data_dir / "sites" / str(site_id)
    assert not [p for p in levels.rglob("*") if p.name.endswith((".tmp", ".partial"))]


# --------------------------------------------------------------------------- forms without a file


def test_a_settings_form_without_a_file_is_taken_as_settings_only(fresh, tmp_path):
    from tests.web_support import write_lowbank

    app, client = fresh
    site_id = upload_dem(client, write_lowbank(tmp_path / "lowbank.tif")).get_json()["site_id"]
    r = client.post(f"/uploads/sites/{site_id}/settings", headers={"Accept": "application/json"},
                    data={"vertical_unit": "m", "outlet": "edge", "connectivity": "4"})  # a plain form
    assert r.status_code == 202, r.get_data(as_text=True)
    site = client.get(f"/api/sites/{site_id}").get_json()
    assert site["connectivity"] == 4 and site["state"] == "ready"
    r = client.post(f"/uploads/sites/{site_id}/settings", headers={"Accept": "application/json"})
    assert r.status_code == 400
    assert "empty" not in r.get_json()["error"]
