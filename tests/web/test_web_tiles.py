"""Map tiles: the water-level map thresholds the onset stage pixel by pixel, the
hillshade lights slopes facing the light, the lookup is cached, bad requests are 4xx.

Reference: every pixel centre of a tile transformed independently here with pyproj
(EPSG:3857 to the DEM's CRS) and classified from the engine's onset stage and the DEM.
"""

from __future__ import annotations

import math

import numpy as np
import pyproj
import pytest

from tests.web_support import read_png
from sillmark.web import render


def site_tiles(ready, z):
    _, client, site_id = ready
    w, s, e, n = client.get(f"/api/sites/{site_id}").get_json()["summary"]["lonlat_bounds"]
    x0, y0 = render.lonlat_to_tile(w, n, z)
    x1, y1 = render.lonlat_to_tile(e, s, z)
    return [(x, y) for x in range(x0, x1 + 1) for y in range(y0, y1 + 1)]


def expected_codes(reference, z, x, y, level):
    """Palette index of every pixel of tile z/x/y at ``level``, computed without webapp."""
    dem, _, result = reference
    size = 2 * math.pi * 6378137.0 / 2**z
    west = -math.pi * 6378137.0 + x * size
    north = math.pi * 6378137.0 - y * size
    centres = (np.arange(256) + 0.5) * size / 256
    mx, my = np.meshgrid(west + centres, north - centres)
    t = pyproj.Transformer.from_crs("EPSG:3857", "EPSG:32633", always_xy=True)
    gx, gy = t.transform(mx.ravel(), my.ravel())
    col = np.floor((np.asarray(gx) - 500_000.0) / 2.0).astype(int)
    row = np.floor((5_000_000.0 - np.asarray(gy)) / 2.0).astype(int)
    inside = (row >= 0) & (row < dem.rows) & (col >= 0) & (col < dem.cols)
    codes = np.zeros(256 * 256, dtype=np.uint8)
    r, c = row[inside], col[inside]
    s = result.onset_stage[r, c]
    zc = result.elevation[r, c]
    h = np.float32(level)
    with np.errstate(invalid="ignore"):
        flooded = s <= h
        shielded = ~flooded & (zc < h)
    depth_class = np.searchsorted(np.float32(render.DEPTH_BOUNDS_M), h - zc, side="right")
    hatch = render.hatch_mask().ravel()[inside]
    sub = np.zeros(inside.sum(), dtype=np.uint8)
    sub[flooded] = render.W_DEPTH0 + depth_class[flooded]
    sub[shielded] = np.where(hatch[shielded], render.W_STRIPE, render.W_WASH)
    codes[inside] = sub
    return codes.reshape(256, 256)


@pytest.mark.parametrize("level", [10.5, 11.0])
def test_water_tile_is_the_onset_stage_thresholded_pixel_by_pixel(ready, reference, level):
    _, client, site_id = ready
    z = 19
    seen = set()
    for x, y in site_tiles(ready, z):
        r = client.get(f"/tiles/{site_id}/{level}/{z}/{x}/{y}.png")
        assert r.status_code == 200 and r.mimetype == "image/png"
        png = read_png(r.get_data())
        assert (png["width"], png["height"], png["colour_type"]) == (256, 256, 3)
        want = expected_codes(reference, z, x, y, level)
        mismatched = np.count_nonzero(png["pixels"] != want)
        # Pixel centres that fall within float rounding of a cell edge may land in
        # the neighbouring cell; allow a handful per tile, no more.
        assert mismatched <= 20, (x, y, mismatched)
        seen |= set(np.unique(png["pixels"]).tolist())
    if level == 10.5:
        assert {render.W_STRIPE, render.W_WASH} <= seen  # the hatched shielded basin
    else:
        assert render.W_STRIPE not in seen  # at the spill elevation the basin floods
        assert render.W_DEPTH0 + 4 in seen  # 2 m deep in the basin: the 1.5–2 m class


def test_water_palette_is_transparent_on_dry_ground(ready):
    _, client, site_id = ready
    x, y = site_tiles(ready, 19)[0]
    png = read_png(client.get(f"/tiles/{site_id}/10.5/19/{x}/{y}.png").get_data())
    assert png["alpha"][render.W_CLEAR] == 0
    assert png["alpha"][render.W_STRIPE] > png["alpha"][render.W_WASH] > 0
    assert tuple(png["palette"][render.W_DEPTH0]) == render.DEPTH_COLOURS[0]


def test_hillshade_tile_is_rgba_and_transparent_off_the_grid(ready):
    _, client, site_id = ready
    for x, y in site_tiles(ready, 18):
        r = client.get(f"/tiles/{site_id}/hillshade/18/{x}/{y}.png")
        assert r.status_code == 200
        png = read_png(r.get_data())
        assert png["colour_type"] == 6
        alpha = png["pixels"][..., 3]
        assert set(np.unique(alpha).tolist()) <= {0, 255}
        assert (alpha == 0).any()  # the small site does not fill a zoom-18 tile


def test_tiles_off_the_site_are_blank(ready):
    _, client, site_id = ready
    r = client.get(f"/tiles/{site_id}/10.5/10/0/0.png")
    assert r.status_code == 200 and r.get_data() == render.BLANK_PNG
    r = client.get(f"/tiles/{site_id}/hillshade/3/7/7.png")
    assert r.get_data() == render.BLANK_PNG


@pytest.mark.parametrize("url,status,fragment", [
    ("/tiles/{site}/nan/19/0/0.png", 400, "finite number"),
    ("/tiles/{site}/NaN/19/0/0.png", 400, "finite number"),
    ("/tiles/{site}/high/19/0/0.png", 400, "finite number"),
    ("/tiles/{site}/inf/19/0/0.png", 400, "finite number"),
    ("/tiles/{site}/10/3/8/0.png", 404, "there is no tile"),
    ("/tiles/{site}/10/23/0/0.png", 404, "there is no tile"),
    ("/tiles/{site}/hillshade/2/0/4.png", 404, "there is no tile"),
    ("/tiles/777/10/1/0/0.png", 404, "there is no site 777"),
])
def test_bad_tile_requests(ready, url, status, fragment):
    _, client, site_id = ready
    r = client.get(url.format(site=site_id))
    assert r.status_code == status
    assert fragment in r.get_json()["error"]


def test_tiles_may_be_kept_only_when_they_name_the_current_run(ready):
    _, client, site_id = ready
    run = client.get(f"/api/sites/{site_id}").get_json()["current_run"]
    x, y = site_tiles(ready, 19)[0]
    kept = client.get(f"/tiles/{site_id}/10.5/19/{x}/{y}.png?run={run}")
    assert kept.headers["Cache-Control"] == "public, max-age=3600"
    assert client.get(f"/tiles/{site_id}/10.5/19/{x}/{y}.png").headers["Cache-Control"] == "no-cache"
    assert client.get(f"/tiles/{site_id}/10.5/19/{x}/{y}.png?run=0").headers["Cache-Control"] == "no-cache"


def test_pixel_lookup_is_computed_once_per_tile(ready):
    app, client, site_id = ready
    cache = app.extensions["sillmark"].tiles
    x, y = site_tiles(ready, 20)[0]
    client.get(f"/tiles/{site_id}/10.0/20/{x}/{y}.png")
    misses = cache.misses
    for level in ("10.1", "10.2", "10.3"):
        client.get(f"/tiles/{site_id}/{level}/20/{x}/{y}.png")
    client.get(f"/tiles/{site_id}/hillshade/20/{x}/{y}.png")
    assert cache.misses == misses


def test_tile_cache_is_bounded():
    cache = render.TileIndexCache(3)
    grid = render.Grid(pyproj.CRS("EPSG:32633").to_wkt(), (2.0, 0.0, 500000.0, 0.0, -2.0, 5000000.0), 40, 50)
    for x in range(6):
        cache.get(grid, 5, x, 0)
    assert len(cache) == 3


# --------------------------------------------------------------------------- drawing pieces


def test_palette_png_round_trip():
    idx = (np.arange(256 * 256) % 7).astype(np.uint8).reshape(256, 256)
    png = read_png(render.encode_palette_png(idx, render.WATER_PLTE, render.WATER_TRNS))
    assert np.array_equal(png["pixels"], idx)
    rgba = np.random.default_rng(1).integers(0, 256, (256, 256, 4), dtype=np.uint8)
    assert np.array_equal(read_png(render.encode_rgba_png(rgba))["pixels"], rgba)


def test_hillshade_of_flat_ground_is_the_sun_altitude_and_slopes_towards_the_light_are_brighter():
    flat = render.hillshade(np.zeros((5, 5), np.float32), dx_m=1.0, dy_m=1.0, z_metres=1.0)
    assert np.all(flat == 1 + round(math.sin(math.radians(45)) * 254))
    # Ground rising to the east faces west; the light is in the north-west.
    east_up = np.tile(np.arange(6, dtype=np.float32), (6, 1))
    west_up = east_up[:, ::-1].copy()
    a = render.hillshade(east_up, dx_m=1.0, dy_m=1.0, z_metres=1.0)
    b = render.hillshade(west_up, dx_m=1.0, dy_m=1.0, z_metres=1.0)
    assert a[3, 3] > flat[3, 3] > b[3, 3]
    z = np.zeros((4, 4), np.float32)
    z[0, 0] = np.nan
    assert render.hillshade(z, dx_m=1.0, dy_m=1.0, z_metres=1.0)[0, 0] == 0  # nodata stays transparent


def test_shade_pyramid_halves_and_keeps_nodata():
    shade = np.full((600, 520), 100, np.uint8)
    shade[:2, :2] = 0
    levels = render.shade_pyramid(shade)
    assert [lv.shape for lv in levels] == [(600, 520), (300, 260), (150, 130)]
    assert levels[1][0, 0] == 0 and levels[1][0, 1] == 100


def test_legend_for_a_site_in_feet_uses_feet_bounds():
    g = render.legend("ft", "ft")
    assert g["depth_classes"][0]["label"] == "0–0.5 ft"
    assert g["depth_classes"][-1]["label"] == "over 15 ft"
    assert len(g["depth_classes"]) == len(render.DEPTH_COLOURS)


def test_depth_ramp_darkens_with_depth():
    lum = [0.2126 * r + 0.7152 * g + 0.0722 * b for r, g, b in render.DEPTH_COLOURS]
    assert all(a > b for a, b in zip(lum, lum[1:]))
