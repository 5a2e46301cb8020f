"""How Sillmark draws its results: depth classes, colours and point symbols, in one place.

The web app's map tiles and legend (:mod:`sillmark.web.render`), its markers
(the ``symbols`` member of the legend, read by the page's scripts) and the OGC
SLD styles written beside every result file (:mod:`sillmark.io.styles`) all read
these values, so a desktop GIS opening a results folder shows what the app
shows. The ramp, the hatching and the marker colours are Sillmark's own.

Colours are ``(red, green, blue)`` with components 0..255; opacities 0..1 unless
the name says otherwise. Depth classes are half-open: a depth ``d`` belongs to
the class with ``lower <= d < upper`` (the way the tiles classify with
:func:`numpy.searchsorted`, ``side="right"``); the deepest class has no upper bound.
"""

from __future__ import annotations

import dataclasses

__all__ = [
    "DEPTH_BOUNDS_M", "DEPTH_BOUNDS_FT", "DEPTH_COLOURS", "DEPTH_ALPHA", "SHIELDED_STRIPE",
    "SHIELDED_WASH", "TINT_STOPS", "DepthClass", "depth_bounds", "depth_classes", "hex_colour",
    "POINT_SYMBOLS", "ASSET_STATE_FILL", "ROUTE_STYLE", "OUTLINE_STYLES", "OUTLET_STYLE", "point_symbols",
]

#: Upper bounds of the depth classes for metre sites (m).
DEPTH_BOUNDS_M = (0.1, 0.25, 0.5, 1.0, 1.5, 2.0, 3.0, 5.0)
#: Upper bounds for feet sites (ft, international or US survey): round numbers
#: in feet rather than converted metre bounds.
DEPTH_BOUNDS_FT = (0.5, 1.0, 2.0, 3.0, 5.0, 7.0, 10.0, 15.0)

#: Sillmark's depth ramp ("tideline"): from a pale sea-glass for a film of
#: water through slate teal to a deep ink violet for the deepest class. Nine
#: colours for the eight bounds above (the last class is open-ended).
DEPTH_COLOURS = (
    (214, 240, 236),
    (170, 222, 222),
    (120, 196, 207),
    (78, 165, 194),
    (58, 130, 178),
    (60, 99, 160),
    (66, 72, 138),
    (64, 48, 112),
    (46, 28, 80),
)
#: Opacity of the depth colours on the map, as an 8-bit alpha (0..255).
DEPTH_ALPHA = 200

#: Shielded low ground: amber stripes on a faint amber wash (RGBA, alpha 0..255).
SHIELDED_STRIPE = (201, 118, 20, 235)
SHIELDED_WASH = (240, 190, 110, 80)

#: Sillmark's relief tint, low to high ground: sage, straw, sand, pale stone.
#: ``(position, colour)``, position 0 at the site's lowest ground, 1 at its highest.
TINT_STOPS = (
    (0.00, (190, 210, 182)),
    (0.30, (220, 222, 188)),
    (0.62, (228, 210, 178)),
    (1.00, (238, 231, 222)),
)


def hex_colour(rgb) -> str:
    """``#rrggbb`` of the first three components of ``rgb``.

    >>> hex_colour((214, 240, 236))
    '#d6f0ec'
    """
    r, g, b = (int(v) for v in tuple(rgb)[:3])
    return f"#{r:02x}{g:02x}{b:02x}"


@dataclasses.dataclass(frozen=True)
class DepthClass:
    """One depth class: ``lower <= depth < upper`` (``upper`` None for the deepest)."""

    lower: float
    upper: float | None
    colour: tuple[int, int, int]

    @property
    def hex(self) -> str:
        return hex_colour(self.colour)

    def label(self, unit_symbol: str) -> str:
        """E.g. ``0.1–0.25 m``, or ``over 5 m`` for the deepest class."""
        if self.upper is None:
            return f"over {self.lower:g} {unit_symbol}"
        return f"{self.lower:g}–{self.upper:g} {unit_symbol}"


def depth_bounds(unit_value: str) -> tuple[float, ...]:
    """Upper bounds of the depth classes for a site in ``unit_value`` (``m``, ``ft``, ``us-ft``)."""
    return DEPTH_BOUNDS_M if unit_value == "m" else DEPTH_BOUNDS_FT


def depth_classes(unit_value: str) -> tuple[DepthClass, ...]:
    """The depth classes of a site in ``unit_value``, shallowest first.

    >>> [c.upper for c in depth_classes("m")][:3], depth_classes("ft")[-1].lower
    ([0.1, 0.25, 0.5], 15.0)
    """
    bounds = depth_bounds(unit_value)
    out = []
    lower = 0.0
    for k, colour in enumerate(DEPTH_COLOURS):
        upper = bounds[k] if k < len(bounds) else None
        out.append(DepthClass(lower=lower, upper=upper, colour=colour))
        if upper is not None:
            lower = upper
    return tuple(out)


#: Point symbols by kind: a shape as well as a colour for each kind of point
#: (spill point: ochre triangle; controlling sill: crimson diamond; assets by
#: state: flooded blue disc, shielded amber square, dry green ring). ``size_px``
#: is the symbol's width in pixels, ``stroke_px`` its outline.
POINT_SYMBOLS = {
    "spill": {"shape": "triangle", "fill": (224, 176, 67), "stroke": (43, 33, 24), "size_px": 16,
              "stroke_px": 1.6},
    "sill": {"shape": "diamond", "fill": (192, 57, 43), "stroke": (255, 255, 255), "size_px": 20,
             "stroke_px": 1.6},
    "asset-flooded": {"shape": "disc", "fill": (47, 111, 163), "stroke": (255, 255, 255),
                      "size_px": 16, "stroke_px": 1.6},
    "asset-shielded": {"shape": "square", "fill": (217, 138, 28), "stroke": (59, 38, 6),
                       "size_px": 15, "stroke_px": 1.6},
    "asset-dry": {"shape": "ring", "fill": (255, 255, 255), "stroke": (79, 122, 58), "size_px": 15,
                  "stroke_px": 3.0},
    "asset-none": {"shape": "ring", "fill": (255, 255, 255), "stroke": (138, 143, 147),
                   "size_px": 13, "stroke_px": 3.0},
    "point": {"shape": "disc", "fill": (255, 255, 255), "stroke": (20, 35, 44), "size_px": 10,
              "stroke_px": 1.6},
}

#: The colour that tells an asset's state, by state (flooded, shielded, dry).
ASSET_STATE_FILL = {"flooded": (47, 111, 163), "shielded": (217, 138, 28), "dry": (79, 122, 58)}

#: The route from the outlets to a place: a dark line (width in pixels).
ROUTE_STYLE = {"stroke": (20, 35, 44), "stroke_px": 3.5, "opacity": 0.9}

#: Depression outlines by the depression's state at the level (stroke colour,
#: width in pixels, dash pattern in pixels or None). ``dry`` also styles the
#: outlines of a results folder, which has no level.
OUTLINE_STYLES = {
    "overtopped": {"stroke": (31, 78, 121), "stroke_px": 1.6, "dash": None},
    "cut off": {"stroke": (168, 93, 12), "stroke_px": 1.8, "dash": (6, 4)},
    "dry": {"stroke": (86, 99, 107), "stroke_px": 1.2, "dash": (2, 4)},
}

#: Outlet cells: outline and a translucent fill of one colour.
OUTLET_STYLE = {"stroke": (11, 93, 138), "stroke_px": 1.5, "fill": (11, 93, 138), "fill_opacity": 0.35}


def point_symbols() -> dict:
    """The point symbols as JSON for the page's scripts (colours as ``#rrggbb``, sizes in px)."""
    return {kind: {"shape": v["shape"], "fill": hex_colour(v["fill"]),
                   "stroke": hex_colour(v["stroke"]), "size": v["size_px"],
                   "width": v["stroke_px"]}
            for kind, v in POINT_SYMBOLS.items()}
