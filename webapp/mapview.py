"""The site map as a folium (Leaflet) map, with every resource served by this server.

folium points its maps at CDN copies of Leaflet, jQuery, Bootstrap and icon
fonts by default. Each map built here replaces those lists (``default_js`` and
``default_css`` on the instance, so folium's module-level lists stay as they
are) with the copy of Leaflet vendored in ``static/vendor/leaflet/`` and
nothing else: no map element used here needs the others. Base tiles are the
site's own hillshade; there are no third-party tiles.

The map's layers that change with the water level or with clicks (the
water-level tiles, depressions, spill points, assets, routes) are folium
feature groups that ``static/js/site.js`` fills; :class:`MapParts` names them.
"""

from __future__ import annotations

import dataclasses

import folium
from flask import url_for

LEAFLET_VERSION = "1.9.4"


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
    water = folium.FeatureGroup(name="Water level map", overlay=True, control=True)
    water.add_to(m)
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
    m.fit_bounds([[south, west], [north, east]])
    root = m.get_root()
    root.render()
    names = {
        "map": m.get_name(),
        "hillshade": hill.get_name(),
        "water": water.get_name(),
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
