"""The site's own area units and ground lengths in the JSON and files of the web app,
on a copy of the invented Lowbank site (tests/web_support.py) with heights in US
survey feet, beside the metric one."""

from __future__ import annotations

import pytest

from sillmark.grid.ground import path_length
from sillmark.units import ACRE_FOOT_M3, ACRE_M2
from tests.web_support import (
    Client,
    analysed_site,
    cell_centre,
    confirm,
    lonlat,
    make_app,
    upload_dem,
)


@pytest.fixture(scope="module")
def two_sites(tmp_path_factory, lowbank_tif):
    """(client, app, metric_site, feet_site)."""
    app = make_app(tmp_path_factory.mktemp("units"))
    client = Client(app)
    metric = analysed_site(client, lowbank_tif, assets=False)
    feet = upload_dem(client, lowbank_tif, name="feet.tif").get_json()["site_id"]
    assert confirm(client, feet, unit="us-ft").status_code == 202
    return client, app, metric, feet


def test_figures_of_a_feet_site_come_in_acres_ft2_and_acre_feet(two_sites):
    client, _, metric, feet = two_sites
    f = client.get(f"/api/sites/{feet}/stage?level=10.5").get_json()
    # The shielded basin: 336 cells of 4 m² = 1344 m² (tests/web_support.py).
    assert f["shielded_area_m2"] == pytest.approx(1344.0)
    assert f["shielded_area_acres"] == pytest.approx(1344.0 / ACRE_M2)
    assert f["shielded_area_ft2"] == pytest.approx(1344.0 / 0.3048**2)
    assert f["shielded_volume_acre_ft"] == pytest.approx(f["shielded_volume_m3"] / ACRE_FOOT_M3)
    assert f["areas"]["large_area"] == "acres" and f["areas"]["volume"] == "acre-ft"
    m = client.get(f"/api/sites/{metric}/stage?level=10.5").get_json()
    assert m["areas"]["large_area"] == "ha" and "shielded_area_acres" not in m


def test_tables_and_files_of_a_feet_site_name_their_units(two_sites):
    client, _, _, feet = two_sites
    rows = client.get(f"/api/sites/{feet}/depressions").get_json()["depressions"]
    assert rows[0]["area_acres"] == pytest.approx(rows[0]["area_m2"] / ACRE_M2)
    chart = client.get(f"/api/sites/{feet}/stage_table").get_json()
    assert len(chart["flooded_area_acres"]) == len(chart["level"])
    curve = client.get(f"/api/sites/{feet}/depressions/1/curve").get_json()
    assert curve["storage_acre_ft"][-1] == pytest.approx(curve["storage_m3"][-1] / ACRE_FOOT_M3)
    for name in ("depressions.csv", "stage_table.csv"):
        r = client.get(f"/api/sites/{feet}/files/results/{name}") if name != "stage_table.csv" \
            else client.get(f"/api/sites/{feet}/files/stage_table.csv")
        assert r.status_code == 200, name
        header = [line for line in r.get_data(as_text=True).splitlines() if not line.startswith("#")][0]
        assert "acres" in header and "ft2" in header and "acre_ft" in header, (name, header)


def test_the_cell_report_gives_the_route_on_the_ground_and_the_position(two_sites):
    client, app, metric, _ = two_sites
    x, y = cell_centre(21, 20)
    lon, lat = lonlat(x, y)
    c = client.get(f"/api/sites/{metric}/cell?lon={lon}&lat={lat}&level=10.5").get_json()
    assert (c["x"], c["y"]) == pytest.approx((x, y))
    assert c["crs"].startswith("EPSG:32633") and c["xy_unit"] == "m"
    svc = app.extensions["sillmark"]
    from sillmark.web import db

    conn = db.connect(svc.db_path)
    try:
        run = db.get_site(conn, metric)["current_run"]
    finally:
        conn.close()
    data = svc.cache.get(metric, run)
    route = data.result.route(21, 20)
    assert c["route_length"] == pytest.approx(path_length(data.dem, route.rows, route.cols).value)
    assert c["route_length_unit"] == "m"
    # Out of the basin through the notch at (17, 14) and on west to the edge
    # (column 0): at least the 14 column steps of 2 m from the notch to the edge.
    assert c["route_length"] >= 2.0 * 14
