"""The site map as a folium (Leaflet) map, with every resource served by this server.

folium points its maps at CDN copies of Leaflet, jQuery, Bootstrap and icon
fonts by default. Each map built here replaces those lists (``default_js`` and
``default_css`` on the instance, so folium's module-level lists stay as they
are) with the copy of Leaflet vendored in ``static/vendor/leaflet/`` and
nothing else: no map element used here needs the others. Base tiles are the
site's own hillshade. An operator may add one online base layer
(:func:`online_base_layer`); without one there are no third-party tiles.

The map's layers that change with the water level or with clicks (the
water-level tiles, depressions, spill points, assets, routes) are folium
feature groups that ``static/js/site.js`` fills; :class:`MapParts` names them.
"""

from __future__ import annotations

import dataclasses
import os
import re
from urllib.parse import urlsplit

import folium
from flask import current_app, url_for

from sillmark.errors import InvalidParameter

LEAFLET_VERSION = "1.9.4"
BASE_LAYER_ENV = "SILLMARK_BASE_LAYER_URL"
BASE_LAYER_ATTRIBUTION_ENV = "SILLMARK_BASE_LAYER_ATTRIBUTION"


@dataclasses.dataclass(frozen=True)
class OnlineBaseLayer:
    url: str  # XYZ template with {z}, {x}, {y} (and optionally {s})
    attribution: str
    name: str
    origin: str  # scheme://host[:port], allowed for images by the page policy


def online_base_layer(config) -> OnlineBaseLayer | None:
    """The operator's online base layer, or None (the default: the app stays offline).

    Read from ``BASE_LAYER_URL`` / ``BASE_LAYER_ATTRIBUTION`` in the app
    configuration, else from ``$SILLMARK_BASE_LAYER_URL`` /
    ``$SILLMARK_BASE_LAYER_ATTRIBUTION``. The URL must be http(s) with a host
    and the ``{z}``, ``{x}``, ``{y}`` placeholders; tile providers require
    credit, so an attribution is required too.
    """
    url = config.get("BASE_LAYER_URL") or os.environ.get(BASE_LAYER_ENV) or None
    if not url:
        return None
    url = str(url).strip()
    attribution = (config.get("BASE_LAYER_ATTRIBUTION") or os.environ.get(BASE_LAYER_ATTRIBUTION_ENV) or "").strip()
    parts = urlsplit(url.replace("{", "%7B").replace("}", "%7D"))
    missing = [p for p in ("{z}", "{x}", "{y}") if p not in url]
    if parts.scheme not in ("http", "https") or not parts.hostname or missing or re.search(r"[\s\"'<>]", url):
        raise InvalidParameter(
            f"the online base layer URL {url[:120]!r} is not a tile URL Sillmark can use; give an "
            "http(s) address with {z}, {x} and {y}, e.g. https://tiles.example.org/{z}/{x}/{y}.png"
        )
    if not attribution:
        raise InvalidParameter("give the online base layer's attribution (BASE_LAYER_ATTRIBUTION): "
                               "tile providers require credit on the map")
    port = f":{parts.port}" if parts.port else ""
    host = re.sub("%7bs%7d", "*", parts.hostname, flags=re.IGNORECASE)  # {s}.host: any subdomain
    origin = f"{parts.scheme}://{host}{port}"
    return OnlineBaseLayer(url=url, attribution=attribution,
                           name=str(config.get("BASE_LAYER_NAME") or "Online base map"), origin=origin)


@dataclasses.dataclass(frozen=True)
class MapParts:
    header: str  # goes in <head>: the Leaflet links and the map's style
    html: str  # the map's <div>
    script: str  # the script that builds the map
    names: dict  # JavaScript variable names of the map and its groups


def _local_resources(m: folium.Map) -> None:
    m.default_js = [("leaflet", url_for("static", filename="vendor/leaflet/leaflet.js"))]
    m.default_css = [("leaflet_css", url_for("static", filename="vendor/leaflet/leaflet.css"))]


def site_map(data, *, site_id: int, level: float, for_print: bool = False) -> MapParts:
    """The folium map of an analysed site (see the module docstring)."""
    bounds = data.summary.get("lonlat_bounds") or [-1, -1, 1, 1]
    west, south, east, north = bounds
    m = folium.Map(
        location=[(south + north) / 2, (west + east) / 2],
        zoom_start=15,
        tiles=None,
        control_scale=True,
        max_zoom=21,
        zoom_control=not for_print,
        attribution_control=True,
        prefer_canvas=False,
        zoom_snap=1,
    )
    _local_resources(m)
    run = data.run_id
    hill = folium.TileLayer(
        tiles=url_for("tiles.hillshade", site_id=site_id, z=0, x=0, y=0).replace("/0/0/0.png", "/{z}/{x}/{y}.png")
        + f"?run={run}",
        attr="Hillshade of the site DEM (Sillmark)",
        name="Hillshade of the site DEM",
        max_zoom=21,
        max_native_zoom=21,
        overlay=False,
        control=True,
    )
    hill.add_to(m)
    online = online_base_layer(current_app.config)
    if online is not None:
        folium.TileLayer(
            tiles=online.url, attr=online.attribution, name=online.name, max_zoom=21,
            max_native_zoom=19, overlay=False, control=True, show=False,
        ).add_to(m)
    water = folium.FeatureGroup(name="Water level map", overlay=True, control=True)
    water.add_to(m)
    outlets = folium.FeatureGroup(name="Outlets", overlay=True, control=True)
    outlets.add_to(m)
    depressions = folium.FeatureGroup(name="Depressions", overlay=True, control=True)
    depressions.add_to(m)
    spills = folium.FeatureGroup(name="Spill points", overlay=True, control=True)
    spills.add_to(m)
    assets = folium.FeatureGroup(name="Assets", overlay=True, control=True)
    assets.add_to(m)
    route = folium.FeatureGroup(name="Route and controlling sill", overlay=True, control=True)
    route.add_to(m)
    if not for_print:
        folium.LayerControl(position="topright", collapsed=True).add_to(m)
    if not for_print:
        # The printed map fits itself to its sheet at a fractional zoom (static/js/print.js);
        # a whole-zoom fit here would still be animating then, and end at its own zoom.
        m.fit_bounds([[south, west], [north, east]])
    root = m.get_root()
    root.render()
    names = {
        "map": m.get_name(),
        "hillshade": hill.get_name(),
        "water": water.get_name(),
        "outlets": outlets.get_name(),
        "depressions": depressions.get_name(),
        "spills": spills.get_name(),
        "assets": assets.get_name(),
        "route": route.get_name(),
    }
    return MapParts(
        header=root.header.render(),
        html=root.html.render(),
        script=root.script.render(),
        names=names,
    )
