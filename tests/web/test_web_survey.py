"""The web app on a survey-like site with thousands of depressions (tests/web/survey_site.py).

Checks: no API answer exceeds 2 MB (every GET endpoint crawled, also with the
largest pages and limits allowed), and the depression lists say what they leave
out; the depression table's
paging, sorting and filtering give exactly what a direct computation on the
engine's depression table gives; a map-extent query returns only depressions
meeting the box, at most the limit, and counts the rest; the depression and
spill-point map tiles draw the depressions and spill points big enough to see.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pyproj
import pytest

from sillmark import SCREENING_CAUTION
from sillmark.products.stage import (
    DEPRESSION_CUT_OFF,
    DEPRESSION_DRY,
    DEPRESSION_OVERTOPPED,
    depression_states,
)
from sillmark.web import depression_tiles, render
from tests.web.survey_site import marsh_lane_app, open_results
from tests.web_support import read_png

#: The bound every JSON answer keeps to (issue 15's web target).
MAX_ANSWER_BYTES = 2 * 2**20


@pytest.fixture(scope="module")
def marsh(tmp_path_factory):
    app, client, site_id = marsh_lane_app(tmp_path_factory)
    return app, client, site_id, open_results(app, site_id)


def _get(client, url):
    r = client.get(url)
    assert r.status_code == 200, (url, r.get_data(as_text=True)[:300])
    return r


# --------------------------------------------------------------------------- every answer bounded


def _scenario(client, site_id: int, lon: float, lat: float) -> int:
    """A scenario of the site (a culvert near its middle), analysed: its compare
    answers must be bounded like the rest."""
    edits = {"type": "FeatureCollection", "features": [{
        "type": "Feature", "properties": {"kind": "culvert", "invert": 0.0},
        "geometry": {"type": "LineString",
                     "coordinates": [[lon, lat], [lon + 0.0002, lat + 0.0002]]}}]}
    listed = client.get(f"/api/sites/{site_id}/scenarios").get_json()["scenarios"]
    if listed:
        return listed[0]["id"]
    r = client.post(f"/api/sites/{site_id}/scenarios", json={"name": "crawl", "edits": edits})
    assert r.status_code == 202, r.get_data(as_text=True)
    return r.get_json()["id"]


def _crawl_urls(app, client, site_id: int, data) -> list[str]:
    """One address for every GET rule under /api/ (downloads of result files aside)."""
    t = data.result.depressions
    biggest = int(t.id[np.argmax(t.area_m2)])
    level = float(t.spill_elevation[biggest - 1]) - 0.01
    w, s, e, n = data.summary["lonlat_bounds"]
    lon, lat = (w + e) / 2, (s + n) / 2
    values = {"site_id": site_id, "depression_id": biggest, "run_id": data.run_id,
              "scenario_id": _scenario(client, site_id, lon, lat)}
    query = f"?level={level:.3f}&lon={lon}&lat={lat}"
    urls = []
    for rule in app.url_map.iter_rules():
        if not rule.rule.startswith("/api/") or "GET" not in rule.methods:
            continue
        if "/files/" in rule.rule:  # downloads: the result files and the level exports
            continue
        missing = set(rule.arguments) - set(values)
        assert not missing, f"the crawl does not know how to fill {missing} in {rule.rule}"
        path = rule.rule
        for name in rule.arguments:
            path = path.replace(f"<int:{name}>", str(values[name])).replace(f"<{name}>", str(values[name]))
        urls.append(path + (query + "&q=epsg" if rule.rule == "/api/crs" else query))
    return urls


def test_no_api_answer_exceeds_2_mb_on_a_site_with_thousands_of_depressions(marsh):
    app, client, site_id, data = marsh
    index = data.depressions
    assert index.count > 1500, "the site must have thousands of depressions for this test to mean anything"
    urls = _crawl_urls(app, client, site_id, data)
    for expected in ("/depressions?", "/depressions.geojson?", "/spill_points.geojson?", "/cell?", "/assets?"):
        assert any(expected in u for u in urls), expected
    # Each address as the page asks it, and with the most every cap allows.
    def most(url: str) -> str:  # the CRS search has its own cap (sillmark.grid.crs.SEARCH_MAX)
        return url + ("&limit=25" if url.startswith("/api/crs?") else "&per_page=500&limit=500")

    sizes, capped = {}, set()
    for url in urls + [most(u) for u in urls]:
        r = client.get(url)
        assert r.status_code == 200, (url, r.get_data(as_text=True)[:300])
        sizes[url] = len(r.get_data())
        if r.mimetype.endswith("json"):
            body = json.loads(r.get_data())
            if isinstance(body, dict) and (body.get("not_shown") or body.get("more_not_shown")):
                capped.add(url.split("?")[0].rsplit("/", 1)[-1])
    too_big = {u: s for u, s in sizes.items() if s >= MAX_ANSWER_BYTES}
    assert not too_big, too_big
    # The caps acted: every depression list left some of the 2000-odd out, and said so.
    assert {"depressions", "depressions.geojson", "spill_points.geojson"} <= capped, capped


def test_the_layer_answers_say_how_many_they_leave_out(marsh):
    _, client, site_id, data = marsh
    fc = _get(client, f"/api/sites/{site_id}/depressions.geojson?limit=7").get_json()
    assert fc["type"] == "FeatureCollection" and fc["caution"] == SCREENING_CAUTION
    assert fc["in_view"] == data.depressions.count and fc["shown"] == 7 == len(fc["features"])
    assert fc["more_not_shown"] == fc["in_view"] - 7
    # Largest first: the bowl (the largest depression by area) leads.
    areas = [f["properties"]["area_m2"] for f in fc["features"]]
    assert areas == sorted(areas, reverse=True)
    assert areas[0] == pytest.approx(float(data.result.depressions.area_m2.max()))
    whole = _get(client, f"/api/sites/{site_id}/depressions.geojson?whole=1&limit=7").get_json()
    assert whole["features"] == [] and whole["more_not_shown"] == whole["in_view"]
    spills = _get(client, f"/api/sites/{site_id}/spill_points.geojson?limit=11").get_json()
    assert len(spills["features"]) == 11 and spills["more_not_shown"] == data.depressions.count - 11
    assert client.get(f"/api/sites/{site_id}/depressions.geojson?limit=501").status_code == 400
    assert client.get(f"/api/sites/{site_id}/depressions?per_page=501").status_code == 400


# --------------------------------------------------------------------------- the table


def _all_pages(client, url: str) -> tuple[list[dict], dict]:
    rows, page, first = [], 1, None
    while True:
        body = _get(client, f"{url}&per_page=500&page={page}").get_json()
        first = first or body
        rows += body["depressions"]
        if page >= body["pages"]:
            return rows, first
        page += 1


def _expected_order(t, key_of, keep, descending: bool) -> list[int]:
    """Depression ids kept by ``keep(k)``, ordered by ``key_of(k)`` (ties: id ascending),
    by Python's own sort: a computation independent of the server's numpy one."""
    ks = [k for k in range(len(t)) if keep(k)]
    sign = -1 if descending else 1
    return [int(t.id[k]) for k in sorted(ks, key=lambda k: (sign * key_of(k), int(t.id[k])))]


@pytest.mark.parametrize("sort, order, filters", [
    ("max_depth", "desc", ""),
    ("area_ha", "asc", "&min_depth=0.02"),
    ("volume_m3", "desc", "&min_area_m2=5"),
    ("spill_elevation", "asc", "&state=cut_off"),
    ("state", "desc", "&min_volume_m3=0.05"),
])
def test_paging_sorting_and_filtering_match_a_direct_computation(marsh, sort, order, filters):
    _, client, site_id, data = marsh
    t = data.result.depressions
    level = float(np.float32(100.02))
    states, _ = depression_states(t, np.float32(level))
    rank = {DEPRESSION_OVERTOPPED: 2, DEPRESSION_CUT_OFF: 1}
    metres = data.unit.metres
    columns = {
        "max_depth": lambda k: float(t.max_depth[k]),
        "area_ha": lambda k: float(t.area_m2[k]),
        "volume_m3": lambda k: float(t.volume_m2_vu[k]) * metres,
        "spill_elevation": lambda k: float(t.spill_elevation[k]),
        "state": lambda k: rank.get(str(states[k]), 0),
    }
    tests = {
        "": lambda k: True,
        "&min_depth=0.02": lambda k: float(t.max_depth[k]) >= 0.02,
        "&min_area_m2=5": lambda k: float(t.area_m2[k]) >= 5,
        "&state=cut_off": lambda k: str(states[k]) == DEPRESSION_CUT_OFF,
        "&min_volume_m3=0.05": lambda k: float(t.volume_m2_vu[k]) * metres >= 0.05,
    }
    expected = _expected_order(t, columns[sort], tests[filters], order == "desc")
    assert 20 < len(expected) and (len(expected) < len(t) or not filters), \
        "each filter must keep some depressions and drop others"
    rows, first = _all_pages(client, f"/api/sites/{site_id}/depressions?sort={sort}&order={order}"
                                     f"&level={level}{filters}")
    assert [r["id"] for r in rows] == expected
    assert first["total"] == len(t) and first["matched"] == len(expected)
    assert first["pages"] == math.ceil(len(expected) / 500)
    names = {DEPRESSION_OVERTOPPED: "overtopped", DEPRESSION_CUT_OFF: "cut off"}
    assert all(r["state"] == names.get(str(states[r["id"] - 1]), "dry") for r in rows)


def test_one_page_and_the_search_by_id(marsh):
    _, client, site_id, data = marsh
    t = data.result.depressions
    body = _get(client, f"/api/sites/{site_id}/depressions?sort=id&per_page=25&page=3").get_json()
    assert [r["id"] for r in body["depressions"]] == list(range(51, 76))
    assert body["not_shown"] == len(t) - 25 and body["pages"] == math.ceil(len(t) / 25)
    # A page past the end gives the last page, and says which.
    last = _get(client, f"/api/sites/{site_id}/depressions?per_page=25&page=99999").get_json()
    assert last["page"] == last["pages"] and last["depressions"][-1]["id"] == len(t)
    one = _get(client, f"/api/sites/{site_id}/depressions?q=%23{len(t) // 2}").get_json()
    assert [r["id"] for r in one["depressions"]] == [len(t) // 2] and one["matched"] == 1
    row = one["depressions"][0]
    k = row["id"] - 1
    assert row["spill_elevation"] == pytest.approx(float(t.spill_elevation[k]))
    assert row["cell_count"] == int(t.cell_count[k])
    for bad in ("sort=colour", "order=sideways", "q=abc", "min_depth=deep", "state=wet&level=100",
                "state=dry", "page=0"):
        r = client.get(f"/api/sites/{site_id}/depressions?{bad}")
        assert r.status_code == 400 and r.get_json()["error"], bad


# --------------------------------------------------------------------------- by map extent


def test_a_map_extent_query_returns_only_depressions_meeting_the_box(marsh):
    _, client, site_id, data = marsh
    ids = np.asarray(data.result.depression_id)
    t = data.result.depressions
    tr = data.dem.transform
    # Extents of every depression from its cells, by a route of our own (np.minimum.at).
    rows, cols = np.nonzero(ids > 0)
    lab = ids[rows, cols]
    n = len(t)
    r0 = np.full(n + 1, 10**9)
    r1 = np.full(n + 1, -1)
    c0 = np.full(n + 1, 10**9)
    c1 = np.full(n + 1, -1)
    np.minimum.at(r0, lab, rows)
    np.maximum.at(r1, lab, rows + 1)
    np.minimum.at(c0, lab, cols)
    np.maximum.at(c1, lab, cols + 1)
    to_lonlat = pyproj.Transformer.from_crs(data.dem.horizontal_crs, "OGC:CRS84", always_xy=True)
    # A box round the south-west quarter of the site, in lon/lat.
    x0, x1 = tr.c + 20 * tr.a, tr.c + 100 * tr.a
    y0, y1 = tr.f + 220 * tr.e, tr.f + 140 * tr.e
    (w, e), (s, nn) = to_lonlat.transform([x0, x1], [y0, y1])
    bbox = f"{w},{s},{e},{nn}"
    # Depression d meets the box where the lon/lat of its extent's corners do.
    expected = set()
    for d in range(1, n + 1):
        xs = [tr.c + c0[d] * tr.a, tr.c + c1[d] * tr.a] * 2
        ys = [tr.f + r0[d] * tr.e] * 2 + [tr.f + r1[d] * tr.e] * 2
        lon, lat = to_lonlat.transform(xs, ys)
        if max(lon) >= w and min(lon) <= e and max(lat) >= s and min(lat) <= nn:
            expected.add(d)
    assert 30 < len(expected) < n // 2
    fc = _get(client, f"/api/sites/{site_id}/depressions.geojson?bbox={bbox}&limit=500").get_json()
    assert fc["in_view"] == len(expected)
    got = [f["properties"]["id"] for f in fc["features"]]
    assert set(got) <= expected and len(got) == fc["shown"]
    assert fc["more_not_shown"] == len(expected) - len(got)
    few = _get(client, f"/api/sites/{site_id}/depressions.geojson?bbox={bbox}&limit=10").get_json()
    assert few["shown"] == 10 and few["more_not_shown"] == len(expected) - 10
    # An outline covers its depression's cells: on the 1 m grid, its area on the
    # ellipsoid (pyproj.Geod, WGS 84) is the cell count in m², to within the
    # simplification of a quarter cell along the edge and the UTM scale factor.
    geod = pyproj.Geod(ellps="WGS84")
    for f in few["features"][:3]:
        polys = [f["geometry"]["coordinates"]] if f["geometry"]["type"] == "Polygon" else f["geometry"]["coordinates"]
        area = 0.0
        for poly in polys:
            for i, ring in enumerate(poly):
                lon, lat = zip(*ring)
                a, _ = geod.polygon_area_perimeter(lon, lat)
                area += abs(a) * (1 if i == 0 else -1)
        cells = f["properties"]["cell_count"]
        assert area == pytest.approx(cells, rel=0.25, abs=1.0)
    r = client.get(f"/api/sites/{site_id}/depressions.geojson?bbox=1,2,3")
    assert r.status_code == 400 and "west,south,east,north" in r.get_json()["error"]


# --------------------------------------------------------------------------- map tiles


def _tile_with(data, lon: float, lat: float, z: int) -> tuple[int, int, int]:
    x, y = render.lonlat_to_tile(lon, lat, z)
    return z, x, y


def _depression_under(app, data, z, x, y) -> np.ndarray:
    """Depression id of the cell under each pixel of tile z/x/y (0: none or off the grid)."""
    index = app.extensions["sillmark"].tiles.get(data.grid, z, x, y)
    ids = np.asarray(data.result.depression_id).reshape(-1)
    return np.where(index >= 0, ids[np.maximum(index, 0)], 0).reshape(256, 256)


def test_depression_tiles_tint_each_depression_and_edge_it(marsh):
    app, client, site_id, data = marsh
    t = data.result.depressions
    k = int(np.argmax(t.area_m2))  # the bowl
    lon, lat = data.depressions.pit_lon[k], data.depressions.pit_lat[k]
    z, x, y = _tile_with(data, lon, lat, 19)
    under = _depression_under(app, data, z, x, y)
    bowl = under == k + 1
    assert bowl.sum() > 1000
    px = read_png(_get(client, f"/tiles/{site_id}/depressions/{z}/{x}/{y}.png").get_data())["pixels"]
    # Inside the bowl, away from its edge: the tint; where the id changes: the edge.
    inner = bowl.copy()
    inner[1:, :] &= bowl[:-1, :]
    inner[:-1, :] &= bowl[1:, :]
    inner[:, 1:] &= bowl[:, :-1]
    inner[:, :-1] &= bowl[:, 1:]
    assert np.all(px[inner] == depression_tiles.TINT)
    assert np.all(px[bowl & ~inner] == depression_tiles.EDGE)
    assert np.all(px[under == 0] == 0)  # over no depression: clear
    # At zoom 14 a pixel is about 6.7 m across (Web Mercator, latitude 45°), so a
    # depression needs about 4 × 45 m² to show: the few-cell pits of the noise do not.
    z, x, y = _tile_with(data, lon, lat, 14)
    under = _depression_under(app, data, z, x, y)
    px = read_png(_get(client, f"/tiles/{site_id}/depressions/{z}/{x}/{y}.png").get_data())["pixels"]
    small = (under > 0) & (np.asarray(t.area_m2)[np.maximum(under - 1, 0)] < 100)
    assert small.any() and np.all(px[small] == 0)
    assert np.any(px[under == k + 1] > 0)


def test_spill_point_tiles_mark_the_spill_points_that_show_at_the_zoom(marsh):
    app, client, site_id, data = marsh
    t = data.result.depressions
    k = int(np.argmax(t.area_m2))
    lon, lat = data.depressions.spill_lon[k], data.depressions.spill_lat[k]
    z, x, y = _tile_with(data, lon, lat, 18)
    png = read_png(_get(client, f"/tiles/{site_id}/spill_points/{z}/{x}/{y}.png").get_data())
    # The pixel under the bowl's spill point holds the diamond's fill (palette index 1).
    merc = pyproj.Transformer.from_crs("OGC:CRS84", "EPSG:3857", always_xy=True)
    mx, my = merc.transform(lon, lat)
    west, _, east, north = render.tile_bounds_mercator(z, x, y)
    res = (east - west) / 256
    col, row = int((mx - west) // res), int((north - my) // res)
    assert png["pixels"][row, col] == 1
    # Every diamond drawn belongs to a depression big enough to show at this zoom.
    drawn, _, _ = data.depression_tiles.spill_points_in(z, x, y)
    assert k in set(drawn.tolist())
    assert np.all(t.area_m2[drawn] >= depression_tiles.VISIBLE_PIXELS * depression_tiles.pixel_metres(z, y) ** 2)
    # Far from the site: a blank tile.
    blank = _get(client, f"/tiles/{site_id}/spill_points/{z}/{x + 40}/{y}.png").get_data()
    assert blank == render.BLANK_PNG


@pytest.fixture(scope="module")
def marsh_minimum(tmp_path_factory, marsh):
    """Marsh Lane again, in the same app, with a stated accuracy of 5 cm: a minimum depth
    of 3 × 5 cm = 15 cm (sillmark.products.significance.DEPTH_PER_ACCURACY), which the
    1 m bowl reaches and the 3 cm noise pits almost never do."""
    from tests.web.survey_site import write_marsh_lane
    from tests.web_support import analysed_site

    app, client, _, _ = marsh
    dem = write_marsh_lane(tmp_path_factory.mktemp("marsh-minimum") / "marsh_lane.tif")
    site_id = analysed_site(client, dem, assets=False, vertical_accuracy="0.05")
    return app, client, site_id, open_results(app, site_id)


def test_the_tiles_draw_the_listed_depressions_only_as_the_table_lists_them(marsh_minimum):
    app, client, site_id, data = marsh_minimum
    t = data.result.depressions
    listed = np.asarray(data.depressions.listed)
    # The table's rows (every page) are the listed depressions.
    table = _get(client, f"/api/sites/{site_id}/depressions?per_page=500").get_json()
    rows = {d["id"] for d in table["depressions"]}
    assert table["matched"] == len(rows) == int(listed.sum())
    assert rows == set((np.flatnonzero(listed) + 1).tolist())
    assert 1 <= len(rows) < len(t) / 20
    bowl = int(np.argmax(t.area_m2))
    assert listed[bowl]
    # The largest depression below the minimum, at zoom 19 (pixels of about 0.2 m, so
    # every depression of one 1 m cell covers the 4 pixels it needs to show).
    area = np.where(listed, -1.0, np.asarray(t.area_m2))
    small = int(np.argmax(area))
    assert not listed[small] and area[small] >= 2
    ix = data.depressions
    z, x, y = _tile_with(data, ix.pit_lon[small], ix.pit_lat[small], 19)
    under = _depression_under(app, data, z, x, y)
    assert (under == small + 1).sum() > 20
    px = read_png(_get(client, f"/tiles/{site_id}/depressions/{z}/{x}/{y}.png").get_data())["pixels"]
    unlisted = (under > 0) & ~listed[np.maximum(under - 1, 0)]
    assert np.all(px[unlisted] == 0)
    # Its spill point draws no diamond; every diamond drawn on the tile is of a listed one.
    drawn, _, _ = data.depression_tiles.spill_points_in(z, x, y)
    assert small not in set(drawn.tolist()) and np.all(listed[drawn])
    # The bowl is tinted as before.
    z, x, y = _tile_with(data, ix.pit_lon[bowl], ix.pit_lat[bowl], 19)
    under = _depression_under(app, data, z, x, y)
    px = read_png(_get(client, f"/tiles/{site_id}/depressions/{z}/{x}/{y}.png").get_data())["pixels"]
    assert np.all(px[under == bowl + 1] > 0)
    drawn, _, _ = data.depression_tiles.spill_points_in(*_tile_with(data, ix.spill_lon[bowl],
                                                                    ix.spill_lat[bowl], 19))
    assert bowl in set(drawn.tolist())


def test_a_map_extent_query_gives_the_listed_depressions_only(marsh_minimum):
    _, client, site_id, data = marsh_minimum
    listed = np.asarray(data.depressions.listed)
    w, s, e, n = data.summary["lonlat_bounds"]
    fc = _get(client, f"/api/sites/{site_id}/depressions.geojson?bbox={w},{s},{e},{n}&limit=500").get_json()
    assert fc["in_view"] == int(listed.sum())
    assert all(listed[f["properties"]["id"] - 1] for f in fc["features"])
    pts = _get(client, f"/api/sites/{site_id}/spill_points.geojson?bbox={w},{s},{e},{n}").get_json()
    assert pts["in_view"] == int(listed.sum())


def test_state_codes_match_the_products_depression_states_at_pits_and_spills(marsh):
    _, _, _, data = marsh
    t = data.result.depressions
    ix = data.depressions
    code = {DEPRESSION_OVERTOPPED: 2, DEPRESSION_CUT_OFF: 1, DEPRESSION_DRY: 0}
    bowl = int(np.argmax(t.area_m2))
    # Exactly at the bowl's spill and pit elevations (the bounds of each state), and between.
    spill, pit = float(t.spill_elevation[bowl]), float(t.pit_elevation[bowl])
    for level in (pit, np.nextafter(np.float32(pit), np.float32(np.inf)), (pit + spill) / 2,
                  np.nextafter(np.float32(spill), np.float32(-np.inf)), spill):
        names, _ = depression_states(t, np.float32(level))
        expected = np.array([code[str(v)] for v in names], dtype=np.uint8)
        got = ix.states(float(np.float32(level)))
        assert np.array_equal(got, expected), level
    assert ix.states(spill)[bowl] == 2 and ix.states(pit)[bowl] == 0
    assert ix.states((pit + spill) / 2)[bowl] == 1


def test_the_figures_count_the_listed_depressions_as_the_table_does(marsh_minimum):
    _, client, site_id, data = marsh_minimum
    t = data.result.depressions
    listed = np.asarray(data.depressions.listed)
    bowl = int(np.argmax(t.area_m2))
    for level in (float(t.pit_elevation[bowl]) + 0.05, float(t.spill_elevation[bowl]) + 0.01):
        f = _get(client, f"/api/sites/{site_id}/stage?level={level:.3f}").get_json()["depressions"]
        names, _ = depression_states(t, np.float32(f"{level:.3f}"))
        names = names[listed]
        assert f["total"] == int(listed.sum()) and f["below_minimum"] == len(t) - int(listed.sum())
        assert f["overtopped"] == int(np.count_nonzero(names == DEPRESSION_OVERTOPPED))
        assert f["cut_off"] == int(np.count_nonzero(names == DEPRESSION_CUT_OFF))
        # The table filtered by state at the same level gives the same counts.
        for state, n in (("overtopped", f["overtopped"]), ("cut_off", f["cut_off"])):
            page = _get(client, f"/api/sites/{site_id}/depressions?level={level:.3f}&state={state}").get_json()
            assert page["matched"] == n
    assert f["overtopped"] >= 1


def test_a_scenario_lists_the_depressions_under_the_base_runs_minimum(marsh_minimum, tmp_path):
    app, client, site_id, data = marsh_minimum
    from sillmark.web import db, layout

    w, s, e, n = data.summary["lonlat_bounds"]
    sid = _scenario(client, site_id, (w + e) / 2, (s + n) / 2)
    svc = app.extensions["sillmark"]
    conn = db.connect(svc.db_path)
    try:
        run_id = conn.execute("SELECT run_id FROM scenarios WHERE id = ?", (sid,)).fetchone()[0]
    finally:
        conn.close()
    results = layout.run_dir(svc.data_dir, site_id, run_id) / "results"
    summary = json.loads((results / "summary.json").read_text())
    base = json.loads((data.folder / "results" / "summary.json").read_text())
    # The same minimum as the base run (5 cm stated: 0.15 m), so the same few listed.
    assert summary["significance"]["min_depth"] == base["significance"]["min_depth"]
    assert summary["significance"]["min_depth"]["value"] == pytest.approx(0.15)
    counts = summary["significance"]["counts"]
    assert counts["all_depressions"] > 1000 and counts["significant"] < 10
    # Its depression table holds the listed rows only, as the base's does (the culvert
    # joins two cells of the bowl, so the same ones), not a row per noise pit.
    with open(results / "depressions.csv", encoding="utf-8") as f:
        rows = sum(1 for _ in f) - 1
    assert rows == int(np.count_nonzero(data.depressions.listed)) < 10


def test_the_scenario_comparison_pages_the_listed_depressions(marsh_minimum):
    _, client, site_id, data = marsh_minimum
    w, s, e, n = data.summary["lonlat_bounds"]
    sid = _scenario(client, site_id, (w + e) / 2, (s + n) / 2)
    t = data.result.depressions
    listed = np.flatnonzero(data.depressions.listed) + 1
    level = float(t.spill_elevation[int(np.argmax(t.area_m2))]) - 0.01
    c = _get(client, f"/api/sites/{site_id}/scenarios/{sid}/compare?level={level:.3f}&per_page=100").get_json()
    d = c["depressions"]
    assert d["total"] == listed.size < len(t) / 20
    assert [r["id"] for r in d["rows"]] == listed.tolist()


def test_the_printed_map_gives_the_spill_points_of_the_listed_depressions(marsh_minimum):
    import re

    _, client, site_id, data = marsh_minimum
    t = data.result.depressions
    listed = np.flatnonzero(data.depressions.listed)
    page = _get(client, f"/sites/{site_id}/print?level={float(t.spill_elevation[listed[0]]):.2f}")
    config = json.loads(re.search(r'<script id="site-config" type="application/json">(.*?)</script>',
                                  page.get_data(as_text=True), flags=re.S).group(1))
    spills = config["draw"]["spills"]
    assert len(spills) == listed.size < 10
    # Each at its listed depression's spill point (WGS 84).
    expected = sorted(zip(np.round(data.depressions.spill_lon[listed], 7),
                          np.round(data.depressions.spill_lat[listed], 7)))
    assert sorted((round(p["lon"], 7), round(p["lat"], 7)) for p in spills) == expected
    assert config["draw"]["spills_not_drawn"] == 0


def test_the_scenario_zip_tables_the_listed_depressions(marsh_minimum):
    import csv
    import io
    import zipfile

    _, client, site_id, data = marsh_minimum
    w, s, e, n = data.summary["lonlat_bounds"]
    sid = _scenario(client, site_id, (w + e) / 2, (s + n) / 2)
    listed = np.flatnonzero(data.depressions.listed)
    t = data.result.depressions
    level = float(t.spill_elevation[listed[0]]) - 0.01
    r = _get(client, f"/sites/{site_id}/files/scenario/{sid}/{level:.3f}.zip")
    with zipfile.ZipFile(io.BytesIO(r.data)) as zf:
        rows = list(csv.DictReader(io.StringIO(zf.read("scenario_depressions.csv").decode())))
    assert [int(row["depression_id"]) for row in rows] == (listed + 1).tolist()
    # The pit of each, in the DEM's CRS (cell centre).
    x, y = data.dem.xy(int(t.pit_row[listed[0]]), int(t.pit_col[listed[0]]))
    assert float(rows[0]["pit_x"]) == pytest.approx(float(x)) and float(rows[0]["pit_y"]) == pytest.approx(float(y))


def test_the_worker_stores_the_site_stage_table_the_chart_reads(marsh):
    from sillmark.products.source import ArraySource
    from sillmark.products.stage import stage_table
    from sillmark.web.site_data import STAGE_TABLE_FILE, SiteData

    _, client, site_id, data = marsh
    path = data.folder / STAGE_TABLE_FILE
    assert path.is_file(), "the worker did not store the stage table"
    levels = data.chart_levels()
    direct = stage_table(ArraySource(data.dem, data.result), levels)
    chart = _get(client, f"/api/sites/{site_id}/stage_table").get_json()
    assert chart["level"] == [float(v) for v in levels]
    assert chart["flooded_area_m2"] == [float(v) for v in direct.flooded_area_m2]
    assert chart["shielded_volume_m3"] == [float(v) for v in direct.shielded_volume_m3]
    # A stored table for other levels (e.g. from an older rule) is not used: it is computed.
    fresh = SiteData(data.site_id, data.run_id, data.folder)
    with np.load(path) as f:
        stored = {k: f[k] for k in f.files}
    try:
        np.savez(path, **{**stored, "level": stored["level"] + np.float32(0.5),
                          "flooded_area_m2": np.zeros_like(stored["flooded_area_m2"])})
        again = fresh.stage_table
        assert np.array_equal(again.level, levels)
        assert np.array_equal(again.flooded_area_m2, direct.flooded_area_m2)
    finally:
        np.savez(path, **stored)
