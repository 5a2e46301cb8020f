"""Fuzzing the HTTP API and the upload parser with hypothesis: no answer is a 5xx.

Every route of the app's URL map is exercised (so a route added later is fuzzed
too): its integer parts with ids that exist, that do not, and that no database
row can have (2**80); its text parts with levels, file names and kinds, junk
and Unicode; its query string with the parameters the views read and others,
holding numbers, non-numbers, NaN, infinities and noise. The upload endpoints
get random bytes, GeoTIFFs with bytes overwritten, cut short or inserted,
asset tables and GeoJSON with their text mutated or made up, and settings forms
with random values. Each answer must be below 500; an error answer of a JSON
route must carry its message as ``{"error": ...}``; no upload leaves a partial
file behind.

Bounded: ``max_examples`` per test keeps the module well under a minute. In CI
(``CI`` set) the examples are derandomized so a run is repeatable; elsewhere
each run explores new inputs (and hypothesis keeps failures in .hypothesis/).
"""

from __future__ import annotations

import contextlib
import io
import json
import os
import re
import warnings
from pathlib import Path
from urllib.parse import quote, urlencode

import pytest
from hypothesis import HealthCheck, event, given, settings
from hypothesis import strategies as st

from tests.web_support import ASSETS_CSV, Client, analysed_site, make_app, upload_dem, write_lowbank
from sillmark.web import layout

pytestmark = pytest.mark.slow

FUZZ = dict(deadline=None, derandomize=bool(os.environ.get("CI")),
            suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])

#: Small limits, so that mutated headers declaring huge rasters and big bodies stay cheap
#: and the limits themselves are exercised.
MAX_UPLOAD = 64 * 1024
MAX_CELLS = 200_000


@pytest.fixture(scope="module")
def target(tmp_path_factory):
    """(app, client, ids): an analysed site with assets, a draft site, and the Lowbank bytes."""
    work = tmp_path_factory.mktemp("fuzz")
    tif = write_lowbank(work / "lowbank.tif")
    app = make_app(work / "data", MAX_UPLOAD_BYTES=MAX_UPLOAD, MAX_SIDE_FILE_BYTES=MAX_UPLOAD,
                   MAX_DEM_CELLS=MAX_CELLS)
    client = Client(app)
    ready = analysed_site(client, tif)
    draft = upload_dem(client, tif, name="draft.tif").get_json()["site_id"]
    w, s, e, n = client.get(f"/api/sites/{ready}").get_json()["summary"]["lonlat_bounds"]
    from sillmark.web import render

    tile = (19, *render.lonlat_to_tile((w + e) / 2, (s + n) / 2, 19))
    return app, client, {"ready": ready, "draft": draft, "tif": tif.read_bytes(), "tile": tile,
                         "bounds": (w, s, e, n)}


@contextlib.contextmanager
def production_warnings():
    """Warnings as the server treats them (not raised), not as pytest's 'error' filter."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        yield


JSON_PREFIXES = ("/api/", "/tiles/", "/uploads/")


def check(response, path: str) -> None:
    """No 5xx; a JSON route's error comes as {"error": message}."""
    body = response.get_data()
    event(f"{path.split('/')[1] if path.count('/') > 1 else path} {response.status_code}")
    assert response.status_code < 500, (path, response.status_code, body[:300])
    if response.status_code >= 400 and path.startswith(JSON_PREFIXES):
        message = json.loads(body)["error"]
        assert isinstance(message, str) and message.strip(), (path, body[:300])


def keep_token(client: Client) -> None:
    """Give the client a session with a form token again if a fuzzed request ended it
    (a sign-out route, say), so the next change is judged on its content, not refused."""
    with client.raw.session_transaction() as session:
        token = session.get("csrf")
    if token is None:
        client.raw.get("/")
        with client.raw.session_transaction() as session:
            token = session["csrf"]
    client.token = token


def leftovers(app) -> list[str]:
    """Files left in the uploads folder; a DEM waiting for its CRS or band is kept on
    purpose in ``pending/`` (for a day), so that folder is not a leftover."""
    return sorted(p.name for p in layout.uploads_dir(app.extensions["sillmark"].data_dir).iterdir()
                  if p.name != "pending")


# --------------------------------------------------------------------------- values

NUMBERS_AS_TEXT = st.one_of(
    st.floats(allow_nan=True, allow_infinity=True).map(repr),
    st.floats(min_value=-100, max_value=200).map(lambda v: f"{v:.3f}"),
    st.integers(min_value=-(2**90), max_value=2**90).map(str),
)
TRICKY = st.sampled_from([
    "", " ", "10.5", "10.50", "11", "nan", "NaN", "-inf", "inf", "1e30", "-1e30", "1e400", "3.4e38",
    "0x10", "1_000", "١٠", "10,5", "..", "../../etc/passwd", "%00", "\x00", "null", "[]", "{}",
    "hillshade", "depth", "water_state", "flood_extent", "shielded", "depressions", "assets_csv",
    "assets_geojson", "onset_stage.tif", "summary.json", "depressions.geojson", "/vsicurl/http://x",
    "<script>", "' OR 1=1 --", "é", "🌊",
])
JUNK = st.one_of(TRICKY, NUMBERS_AS_TEXT, st.text(max_size=40))
QUERY_KEYS = st.one_of(st.sampled_from(["level", "lon", "lat", "run", "name", "asset", "height", "zoom"]),
                       st.text(min_size=1, max_size=8))
QUERY = st.dictionaries(QUERY_KEYS, JUNK, max_size=5)


def int_part(ids: dict):
    """Ids and tile numbers: mostly ones that exist (the sites, and the zoom and x, y of a
    tile on the analysed site), some that do not, some no database row can have."""
    real = [ids["ready"]] * 4 + [ids["draft"]] + list(ids["tile"]) * 2
    return st.one_of(st.sampled_from(real), st.sampled_from(real),
                     st.sampled_from([0, 1, 2, 3, 999, 2**31, 2**63]),
                     st.integers(min_value=0, max_value=2**80))


SEGMENT = st.one_of(TRICKY, NUMBERS_AS_TEXT, st.text(min_size=1, max_size=30)).filter(bool)
PARTS = re.compile(r"<(?:(\w+)(?:\([^)]*\))?:)?(\w+)>")


def rules_for(app, method: str) -> list:
    """Every rule of the app's URL map that takes ``method`` (routes added later included)."""
    rules = [r for r in app.url_map.iter_rules() if method in r.methods]
    assert rules
    return rules


def rule_paths(rule, ids: dict):
    """A strategy of concrete paths for one rule of the URL map."""
    pieces = PARTS.split(rule.rule)
    # split() gives: text, converter, name, text, converter, name, ..., text
    strategies = []
    for k, piece in enumerate(pieces):
        if k % 3 == 0:
            strategies.append(st.just(piece))
        elif k % 3 == 1:
            conv = piece or "default"
            if conv == "int":
                strategies.append(int_part(ids).map(str))
            elif conv == "path":
                strategies.append(st.one_of(st.sampled_from(["css/sillmark.css", "js/site.js", "../README.md",
                                                             "..%2f..%2fsillmark.sqlite3"]),
                                            SEGMENT).map(lambda v: quote(v, safe="/")))
            else:
                strategies.append(SEGMENT.map(lambda v: quote(v, safe="")))
    return st.tuples(*strategies).map("".join)


# --------------------------------------------------------------------------- the API

#: Examples per route of the URL map (about 30 GET routes).
PER_GET_ROUTE = 50
PER_POST_ROUTE = 80


def test_every_get_route_takes_junk_without_a_server_error(target):
    """Each GET rule of the URL map in turn, so that none is left out by chance."""
    app, _, ids = target
    client = Client(app)  # its own session: a fuzzed GET may end it (a sign-out route)
    answered: dict[str, set[int]] = {}
    for rule in rules_for(app, "GET"):
        seen = answered.setdefault(rule.rule, set())

        @settings(max_examples=PER_GET_ROUTE, **FUZZ)
        @given(path=rule_paths(rule, ids), query=QUERY, raw=st.one_of(st.none(), st.binary(max_size=40)))
        def fuzz(path, query, raw):
            qs = raw.decode("latin-1") if raw is not None else urlencode(query)
            with production_warnings():
                r = client.get(path, query_string=qs, headers={"Accept": "application/json"})
            check(r, path)
            seen.add(r.status_code)

        fuzz()
    assert all(answered.values()), [rule for rule, codes in answered.items() if not codes]
    # The fuzzing reached past the URL parsing: most routes answered 200 at least once.
    reached = [rule for rule, codes in answered.items() if 200 in codes]
    assert len(reached) >= len(answered) // 2, answered


LEVELS = st.one_of(st.floats(min_value=5, max_value=15).map(lambda v: f"{v:.2f}"), NUMBERS_AS_TEXT, TRICKY)


def test_tiles_around_the_site_at_any_zoom_and_level(target):
    app, client, ids = target
    z0, x0, y0 = ids["tile"]

    @settings(max_examples=400, **FUZZ)
    @given(z=st.integers(-1, 24), dx=st.integers(-3, 3), dy=st.integers(-3, 3),
           layer=st.one_of(st.just("hillshade"), LEVELS), run=st.one_of(st.none(), JUNK))
    def fuzz(z, dx, dy, layer, run):
        shift = z - z0
        x = (x0 >> -shift if shift < 0 else x0 << shift) + dx
        y = (y0 >> -shift if shift < 0 else y0 << shift) + dy
        path = f"/tiles/{ids['ready']}/{quote(layer, safe='')}/{z}/{x}/{y}.png"
        with production_warnings():
            r = client.get(path, query_string={} if run is None else {"run": run})
        check(r, path)
        valid = 0 <= z <= 22 and 0 <= x < 2**z and 0 <= y < 2**z
        if r.status_code == 200:
            assert valid and r.get_data()[:8] == b"\x89PNG\r\n\x1a\n" and r.headers["ETag"]

    fuzz()


def test_cell_reports_anywhere_near_the_site(target):
    app, client, ids = target
    w, s, e, n = ids["bounds"]
    margin = 0.3 * max(e - w, n - s)

    @settings(max_examples=300, **FUZZ)
    @given(lon=st.floats(w - margin, e + margin), lat=st.floats(s - margin, n + margin), level=LEVELS)
    def fuzz(lon, lat, level):
        path = f"/api/sites/{ids['ready']}/cell"
        with production_warnings():
            r = client.get(path, query_string={"lon": repr(lon), "lat": repr(lat), "level": level})
        check(r, path)
        if r.status_code == 200:
            report = r.get_json()
            assert report["state"] in ("flooded", "shielded", "dry")
            assert report["route"]["type"] == "LineString"

    fuzz()


BODIES = st.one_of(
    st.dictionaries(st.sampled_from(["asset", "height", "name", "x"]), st.one_of(JUNK, st.integers(),
                    st.floats(allow_nan=False), st.none(), st.lists(st.integers(), max_size=3)),
                    max_size=4).map(lambda d: ("json", d)),
    st.dictionaries(QUERY_KEYS, JUNK, max_size=4).map(lambda d: ("form", d)),
    st.binary(max_size=200).map(lambda b: ("raw", b)),
)


def test_every_post_route_takes_junk_bodies_without_a_server_error(target):
    app, client, ids = target
    for rule in rules_for(app, "POST"):
        fuzz_post_route(app, client, rule_paths(rule, ids))


def fuzz_post_route(app, client, paths) -> None:
    @settings(max_examples=PER_POST_ROUTE, **FUZZ)
    @given(path=paths, body=BODIES, name=st.one_of(st.none(), JUNK))
    def fuzz(path, body, name):
        keep_token(client)
        kind, value = body
        headers = {"Accept": "application/json"}
        if name is not None:
            headers["X-File-Name"] = quote(name, safe="")
        with production_warnings():
            if kind == "json":
                r = client.post(path, json=value, headers=headers)
            elif kind == "form":
                r = client.post(path, data=value, headers=headers)
            else:
                r = client.post(path, data=value, headers={**headers, "Content-Type": "application/octet-stream"})
        check(r, path)
        assert leftovers(app) == []

    fuzz()


# --------------------------------------------------------------------------- the upload parser


def mutate_bytes(data: bytes, edits, cut: int | None, insert: tuple[int, bytes] | None) -> bytes:
    out = bytearray(data)
    for pos, value in edits:
        out[pos % len(out)] = value
    if insert is not None:
        pos, extra = insert
        out[pos % len(out):pos % len(out)] = extra
    if cut is not None:
        out = out[:cut % (len(out) + 1)]
    return bytes(out)


EDITS = st.lists(st.tuples(st.integers(min_value=0, max_value=2**20), st.integers(0, 255)), max_size=12)
#: Most of a GeoTIFF's structure is in its first few hundred bytes (header, IFD, tags).
HEADER_EDITS = st.lists(st.tuples(st.integers(min_value=0, max_value=400), st.integers(0, 255)),
                        min_size=1, max_size=6)


def post_dem(client, body: bytes, name: str):
    with production_warnings():
        return client.post("/uploads/dem", data=body, headers={
            "Content-Type": "application/octet-stream", "X-File-Name": quote(name, safe=""),
            "Accept": "application/json"})


FILE_NAMES = st.one_of(st.sampled_from(["site.tif", "site.tiff", "x.asc", "x.img", "../../x.tif", "",
                                         "C:\\temp\\dem.tif", "..", "dem.tif\x00.txt", "🌊.tif"]),
                       st.text(max_size=60))


def test_random_bytes_as_a_dem_are_refused_cleanly(target):
    app, client, _ = target

    @settings(max_examples=300, **FUZZ)
    @given(body=st.binary(min_size=0, max_size=3000), name=FILE_NAMES)
    def fuzz(body, name):
        keep_token(client)
        r = post_dem(client, body, name)
        check(r, "/uploads/dem")
        assert r.status_code in (201, 400, 413), r.status_code
        assert leftovers(app) == []

    fuzz()


def test_mutated_geotiffs_are_read_or_refused_cleanly(target):
    app, client, ids = target
    original = ids["tif"]

    @settings(max_examples=500, **FUZZ)
    @given(header=HEADER_EDITS, edits=EDITS, cut=st.one_of(st.none(), st.integers(0, 2**20)),
           insert=st.one_of(st.none(), st.tuples(st.integers(0, 2**16), st.binary(min_size=1, max_size=64))),
           name=FILE_NAMES)
    def fuzz(header, edits, cut, insert, name):
        keep_token(client)
        body = mutate_bytes(original, header + edits, cut, insert)
        r = post_dem(client, body, name)
        check(r, "/uploads/dem")
        assert leftovers(app) == []
        if r.status_code == 201:
            # What was kept is a DEM the app can describe again.
            site = client.get(f"/api/sites/{r.get_json()['site_id']}").get_json()
            assert site["state"] == "draft" and site["dem"]["rows"] * site["dem"]["cols"] <= MAX_CELLS

    fuzz()


def mutate_text(text: str, edits, cut: int | None) -> str:
    chars = list(text)
    for pos, ch in edits:
        if chars:
            chars[pos % len(chars)] = ch
    out = "".join(chars)
    return out if cut is None else out[:cut % (len(out) + 1)]


TEXT_EDITS = st.lists(st.tuples(st.integers(min_value=0, max_value=4000),
                                st.one_of(st.sampled_from(list(",;\t\n\"'{}[]:.-e0159 ")), st.characters())),
                      max_size=10)
JSON_VALUES = st.recursive(
    st.one_of(st.none(), st.booleans(), st.floats(allow_nan=False), st.integers(), st.text(max_size=10)),
    lambda inner: st.one_of(st.lists(inner, max_size=4), st.dictionaries(st.text(max_size=8), inner, max_size=4)),
    max_leaves=20,
)


def feature_collections():
    """GeoJSON-shaped documents with made-up members, types and coordinates."""
    coords = st.lists(st.one_of(st.floats(allow_nan=False, allow_infinity=False), st.integers(), st.text(max_size=4)),
                      max_size=4)
    geometry = st.fixed_dictionaries({
        "type": st.sampled_from(["Point", "MultiPoint", "LineString", "Polygon", "GeometryCollection", "Nope"]),
        "coordinates": st.one_of(coords, st.lists(coords, max_size=5), st.lists(st.lists(coords, max_size=5), max_size=2)),
    })
    feature = st.fixed_dictionaries({
        "type": st.sampled_from(["Feature", "feature", "Thing"]),
        "geometry": st.one_of(st.none(), geometry),
        "properties": st.one_of(st.none(), st.dictionaries(st.sampled_from(["name", "kind", "x"]), JSON_VALUES, max_size=3)),
    })
    doc = st.fixed_dictionaries({
        "type": st.sampled_from(["FeatureCollection", "Feature", "Point"]),
        "features": st.lists(feature, max_size=4),
    }, optional={"crs": JSON_VALUES})
    return st.one_of(doc, JSON_VALUES).map(json.dumps)


SIDE_FILES = st.one_of(
    st.tuples(TEXT_EDITS, st.one_of(st.none(), st.integers(0, 4000))).map(lambda a: mutate_text(ASSETS_CSV, *a)),
    feature_collections(),
    st.text(max_size=300),
)
SIDE_NAMES = st.one_of(st.sampled_from(["assets.csv", "assets.geojson", "a.json", "a.tsv", "a.txt", "a", "../a.csv",
                                        "a.tif"]), st.text(max_size=30))


def test_mutated_asset_tables_are_read_or_refused_cleanly(target):
    app, client, ids = target
    site = ids["ready"]

    @settings(max_examples=300, **FUZZ)
    @given(text=SIDE_FILES, name=SIDE_NAMES)
    def fuzz(text, name):
        keep_token(client)
        with production_warnings():
            r = client.post(f"/uploads/sites/{site}/assets", headers={"Accept": "application/json"},
                            data={"assets": (io.BytesIO(text.encode("utf-8", "surrogatepass")), name or "x")},
                            content_type="multipart/form-data")
        check(r, "/uploads/assets")
        assert leftovers(app) == []
        if r.status_code == 201:
            listed = client.get(f"/api/sites/{site}/assets?level=10.5")
            check(listed, "/api/assets")
            assert len(listed.get_json()["assets"]) == r.get_json()["count"]

    fuzz()


def test_random_settings_and_water_bodies_are_stored_or_refused_cleanly(target):
    app, client, ids = target
    site = ids["draft"]

    valid = st.sampled_from

    @settings(max_examples=150, **FUZZ)
    @given(unit=st.one_of(valid(["m", "ft", "us-ft"]), valid(["m", "ft", "metre", "M", ""]), JUNK),
           outlets=st.one_of(st.lists(valid(["edge", "nodata"]), min_size=1, max_size=2),
                             st.lists(st.one_of(valid(["edge", "nodata", "file"]), JUNK), max_size=3)),
           connectivity=st.one_of(valid(["4", "8"]), valid(["4", "8"]), JUNK),
           name=st.one_of(st.none(), JUNK),
           water=st.one_of(st.none(), st.tuples(feature_collections(), SIDE_NAMES)))
    def fuzz(unit, outlets, connectivity, name, water):
        keep_token(client)
        form = {"vertical_unit": unit, "outlet": outlets, "connectivity": connectivity}
        if name is not None:
            form["name"] = name
        if water is not None:
            form["water"] = (io.BytesIO(water[0].encode("utf-8", "surrogatepass")), water[1] or "w")
        with production_warnings():
            r = client.post(f"/uploads/sites/{site}/settings", data=form, content_type="multipart/form-data",
                            headers={"Accept": "application/json"})
        check(r, "/uploads/settings")
        assert leftovers(app) == []
        status = client.get(f"/api/sites/{site}/status")
        check(status, "/api/status")
        if r.status_code == 202:
            assert status.get_json()["run"]["status"] in ("done", "failed")

    fuzz()


def test_the_fuzzed_app_still_serves_its_site(target):
    """After everything above, the analysed site answers as before (nothing was corrupted)."""
    app, client, ids = target
    r = client.get(f"/api/sites/{ids['ready']}/stage?level=10.5")
    assert r.status_code == 200 and r.get_json()["flooded_area_m2"] > 0
    assert Path(app.extensions["sillmark"].db_path).is_file()
