"""The web app applies the significance minimum as ``sillmark analyse`` does.

A small noisy site (tests/io/test_tiled_significance.py's DEM: 20 depressions,
8 significant hierarchy nodes at the default 0.30 m minimum, 6 of them whole
depressions) is uploaded with a stated vertical accuracy of 0.10 m (so the same
0.30 m minimum). The site page names the minimum and how many depressions fell
below it; the depression table lists only the significant ones (as the run's
depressions.csv does); the full inventory download lists all of them, marked.
"""

from __future__ import annotations

import io

import pandas as pd
import pytest

from tests.io.test_tiled_significance import noisy_tif  # noqa: F401  (the fixture)
from tests.web_support import Client, make_app, upload_dem


@pytest.fixture(scope="module")
def noisy_site(tmp_path_factory, noisy_tif):  # noqa: F811
    app = make_app(tmp_path_factory.mktemp("data"))
    client = Client(app)
    r = upload_dem(client, noisy_tif)
    assert r.status_code == 201, r.get_data(as_text=True)
    site_id = r.get_json()["site_id"]
    r = client.post(f"/uploads/sites/{site_id}/settings", data={
        "vertical_unit": "m", "outlet": ["edge"], "connectivity": "8",
        "vertical_accuracy": "0.10"}, content_type="multipart/form-data",
        headers={"Accept": "application/json"})
    assert r.status_code == 202, r.get_data(as_text=True)
    assert client.get(f"/api/sites/{site_id}/status").get_json()["state"] == "ready"
    return client, site_id


def test_site_page_states_the_minimum_and_how_many_fell_below(noisy_site):
    client, site_id = noisy_site
    page = client.get(f"/sites/{site_id}").get_data(as_text=True)
    assert 'id="depressions-minimum"' in page
    assert "the 6 of 20 depressions at least 0.3 m deep" in page
    assert "3 x the stated vertical accuracy of the DEM, 0.1 m" in page
    assert "The other 14 fell below this minimum" in page
    settings = client.get(f"/sites/{site_id}/settings").get_data(as_text=True)
    assert 'name="vertical_accuracy"' in settings and 'value="0.1"' in settings


def test_table_lists_only_significant_and_the_full_inventory_all(noisy_site):
    client, site_id = noisy_site
    res = client.get(f"/api/sites/{site_id}/depressions?per_page=500").get_json()
    assert (res["total"], res["listed"], res["below_minimum"], res["matched"]) == (20, 6, 14, 6)
    assert res["significance"]["counts"]["significant"] == 8
    shown = [d["id"] for d in res["depressions"]]
    assert all(d["max_depth"] >= 0.3 for d in res["depressions"])
    every = client.get(f"/api/sites/{site_id}/depressions?per_page=500&inventory=all").get_json()
    assert every["matched"] == 20 and every["every"] is True
    # The listed ones are those whose pit lies 0.30 m or more below the spill (the
    # definition, with no area or volume threshold), checked on the full table.
    deep = sorted(d["id"] for d in every["depressions"]
                  if d["spill_elevation"] - d["pit_elevation"] >= 0.3)
    assert sorted(shown) == deep

    r = client.get(f"/api/sites/{site_id}/depressions_all.csv")
    assert r.status_code == 200
    table = pd.read_csv(io.BytesIO(r.data))
    assert list(table["id"]) == list(range(1, 21))
    assert sorted(table.loc[table["significant"].astype(bool), "id"]) == deep
    # The map's individual features keep to the listed ones too.
    fc = client.get(f"/api/sites/{site_id}/depressions.geojson?limit=500").get_json()
    assert sorted(f["properties"]["id"] for f in fc["features"]) == deep


def test_a_bad_vertical_accuracy_is_refused(noisy_site):
    client, site_id = noisy_site
    r = client.post(f"/uploads/sites/{site_id}/settings", data={
        "vertical_unit": "m", "outlet": ["edge"], "connectivity": "8",
        "vertical_accuracy": "-1"}, content_type="multipart/form-data",
        headers={"Accept": "application/json"})
    assert r.status_code == 400
    assert "vertical accuracy" in r.get_data(as_text=True)
