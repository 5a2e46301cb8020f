"""Map tiles of a site: ``/tiles/<site>/hillshade/<z>/<x>/<y>.png`` and
``/tiles/<site>/<level>/<z>/<x>/<y>.png`` (the water-level map at ``level``,
in the site's vertical unit), ``/tiles/<site>/depressions/<z>/<x>/<y>.png`` and
``/tiles/<site>/spill_points/<z>/<x>/<y>.png``. Drawing is in :mod:`sillmark.web.render`.

Add ``?run=<id>`` (the page does) to let browsers keep a tile: the run id
changes whenever the site's results do. Every tile carries an ``ETag`` made
from the run, the layer, the level and the tile address (no drawing needed),
so a browser that asks again with ``If-None-Match`` gets ``304 Not Modified``
at once; drawn tiles are kept encoded per open site run
(:class:`sillmark.web.render.ImageCache`), so a tile many viewers ask for is drawn once.
"""

from __future__ import annotations

import math

from flask import Blueprint, Response, abort, current_app, request

from sillmark.web import render, services
from sillmark.web.access import open_site
from sillmark.web.site_data import parse_level

bp = Blueprint("tiles", __name__, url_prefix="/tiles")


def _headers(response: Response, run_id: int, etag: str) -> Response:
    asked = request.args.get("run")
    if asked is not None and asked == str(run_id):
        response.headers["Cache-Control"] = f"public, max-age={int(current_app.config['TILE_MAX_AGE'])}"
    else:
        response.headers["Cache-Control"] = "no-cache"
    response.set_etag(etag)
    return response


def _tile(data, key: tuple, draw) -> Response:
    """The tile ``key`` of the open site ``data``: 304 if the browser has it, else from the
    image cache, else drawn by ``draw()`` and kept."""
    etag = "-".join(str(part) for part in (render.STYLE_REVISION, data.site_id, data.run_id) + key)
    if request.if_none_match.contains(etag):
        return _headers(Response(status=304), data.run_id, etag)
    body = data.images.get(key)
    if body is None:
        body = draw()
        data.images.put(key, body)
    return _headers(Response(body, mimetype="image/png"), data.run_id, etag)


def _check_tile(z: int, x: int, y: int) -> None:
    if not render.valid_tile(z, x, y):
        abort(404, f"there is no tile {z}/{x}/{y}: zoom runs 0..{render.MAX_ZOOM} and x, y "
                   "0..2^zoom - 1")


@bp.get("/<int:site_id>/hillshade/<int:z>/<int:x>/<int:y>.png")
def hillshade(site_id: int, z: int, x: int, y: int):
    _check_tile(z, x, y)
    _, data = open_site(site_id)

    def draw() -> bytes:
        index = services().tiles.get(data.grid, z, x, y)
        if index is None:
            return render.BLANK_PNG
        bounds = data.summary.get("lonlat_bounds") or [0, 0, 0, 0]
        lat = 0.5 * (bounds[1] + bounds[3])
        level = render.shade_level_for(z, lat, float(data.summary.get("cell_metres") or 1.0),
                                       len(data.pyramid))
        return render.shade_tile(index, data.pyramid, data.tints, level, data.dem.cols)

    return _tile(data, ("hillshade", z, x, y), draw)


@bp.get("/<int:site_id>/<level>/<int:z>/<int:x>/<int:y>.png")
def water(site_id: int, level: str, z: int, x: int, y: int):
    _check_tile(z, x, y)
    h = parse_level(level)
    _, data = open_site(site_id)

    def draw() -> bytes:
        index = services().tiles.get(data.grid, z, x, y)
        if index is None:
            return render.BLANK_PNG
        return render.water_tile(index, data.onset_flat, data.elevation_flat, h, data.depth_bounds)

    # The level as the float32 the tile is drawn at: "47.5" and "47.50" are one tile.
    return _tile(data, (repr(float(h)), z, x, y), draw)


@bp.get("/<int:site_id>/depressions/<int:z>/<int:x>/<int:y>.png")
def depressions(site_id: int, z: int, x: int, y: int):
    """Depressions tinted and edged (sillmark.web.depression_tiles); the same at every level."""
    _check_tile(z, x, y)
    _, data = open_site(site_id)

    def draw() -> bytes:
        index = services().tiles.get(data.grid, z, x, y)
        if index is None:
            return render.BLANK_PNG
        return data.depression_tiles.depression_tile(index, z, y)

    return _tile(data, ("depressions", z, x, y), draw)


@bp.get("/<int:site_id>/spill_points/<int:z>/<int:x>/<int:y>.png")
def spill_points(site_id: int, z: int, x: int, y: int):
    """Spill points as diamonds; the same at every level."""
    _check_tile(z, x, y)
    _, data = open_site(site_id)

    def draw() -> bytes:
        if services().tiles.get(data.grid, z, x, y) is None:
            return render.BLANK_PNG
        return data.depression_tiles.spill_tile(z, x, y)

    return _tile(data, ("spill_points", z, x, y), draw)


def warm(data, cache, zooms: int) -> int:
    """Fill the tile lookup cache for the site's fitting zoom and ``zooms`` above it.

    Run in a background thread when a site is first opened, so the first map
    view is as fast as every later one. Returns the number of tiles prepared.
    """
    bounds = data.summary.get("lonlat_bounds")
    if not bounds:
        return 0
    z0 = fit_zoom(bounds)
    count = 0
    for z in range(z0, min(render.MAX_ZOOM, z0 + zooms) + 1):
        x0, y0 = render.lonlat_to_tile(bounds[0], bounds[3], z)
        x1, y1 = render.lonlat_to_tile(bounds[2], bounds[1], z)
        if (x1 - x0 + 1) * (y1 - y0 + 1) > cache.capacity // 2:
            break
        for x in range(x0, x1 + 1):
            for y in range(y0, y1 + 1):
                cache.get(data.grid, z, x, y)
                count += 1
    return count


def fit_zoom(bounds, width_px: int = 1100, height_px: int = 760) -> int:
    """The deepest zoom at which ``bounds`` (lon/lat) fits a map of the given size."""
    w, s, e, n = bounds
    for z in range(render.MAX_ZOOM, -1, -1):
        scale = render.TILE * (1 << z)
        x0 = (w + 180) / 360 * scale
        x1 = (e + 180) / 360 * scale
        y0 = (1 - math.asinh(math.tan(math.radians(n))) / math.pi) / 2 * scale
        y1 = (1 - math.asinh(math.tan(math.radians(s))) / math.pi) / 2 * scale
        if x1 - x0 <= width_px and y1 - y0 <= height_px:
            return z
    return 0
