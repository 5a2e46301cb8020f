"""OGC SLD 1.0 styles written beside the result files, so a desktop GIS draws them as the app does.

For a result file ``name.ext`` this module writes ``name.sld`` (Styled Layer
Descriptor 1.0.0, OGC 02-070) in the same folder. The classes, colours and
symbols come from :mod:`sillmark.products.map_style`, the module the web app's
tiles, legend and markers read, so the two cannot drift apart.

Rasters get a ``RasterSymbolizer`` with a ``ColorMap``. SLD 1.0 leaves the
colour between two ``ColorMapEntry`` quantities to be interpolated, so each
depth class is written as two entries of the same colour, at its lower bound
and just below its upper bound (:data:`CLASS_EDGE`, a tenth of a millimetre or
a thousandth of an inch below it): any reader that interpolates then shows flat
classes with the app's bounds. Vector layers get point, line and polygon
symbolizers (the amber stripes of shielded low ground have no mark in SLD 1.0;
the file gives its wash and an amber outline). Each style's ``Abstract``
carries the screening caution.
"""

from __future__ import annotations

import os
import re
import xml.etree.ElementTree as ET
from collections.abc import Iterable
from pathlib import Path

import numpy as np
import rasterio

from sillmark import SCREENING_CAUTION
from sillmark.io.atomic import atomic_output
from sillmark.products import map_style as ms
from sillmark.units import VerticalUnit, unit_name

__all__ = ["SLD_NS", "OGC_NS", "CLASS_EDGE", "layer_kind", "layer_style", "write_style",
           "write_styles"]

SLD_NS = "http://www.opengis.net/sld"
OGC_NS = "http://www.opengis.net/ogc"
_XLINK_NS = "http://www.w3.org/1999/xlink"
_XSI_NS = "http://www.w3.org/2001/XMLSchema-instance"
_SCHEMA = "http://www.opengis.net/sld http://schemas.opengis.net/sld/1.0.0/StyledLayerDescriptor.xsd"

#: How far below a class's upper bound its second colour-map entry sits, in the
#: site's vertical unit (0.1 mm on metre sites, about 0.001 in on feet sites).
CLASS_EDGE = 1e-4

#: Result files and the style each gets: a pattern of the file's stem, and the kind.
_KINDS = (
    (re.compile(r"onset_stage$"), "onset_stage"),
    (re.compile(r"fill_depth$"), "fill_depth"),
    (re.compile(r"depression_id$"), "depression_id"),
    (re.compile(r"flood_tree$"), "flood_tree"),
    (re.compile(r"depth_.+"), "depth"),
    (re.compile(r"water_state_.+"), "water_state"),
    (re.compile(r"depressions$"), "depressions"),
    (re.compile(r"spill_points$"), "spill_points"),
    (re.compile(r"flood_extent_.+"), "flood_extent"),
    (re.compile(r"shielded_.+"), "shielded"),
    (re.compile(r"assets_.+"), "assets"),
)
_LAYER_SUFFIXES = {".tif", ".tiff", ".geojson", ".gpkg"}

ET.register_namespace("", SLD_NS)
ET.register_namespace("ogc", OGC_NS)
ET.register_namespace("xlink", _XLINK_NS)
ET.register_namespace("xsi", _XSI_NS)


def layer_kind(name: str) -> str | None:
    """The style kind of a result file name, or None for a file that is no map layer.

    >>> layer_kind("depth_47.60m.tif"), layer_kind("spill_points.geojson"), layer_kind("summary.json")
    ('depth', 'spill_points', None)
    """
    path = Path(name)
    if path.suffix.lower() not in _LAYER_SUFFIXES:
        return None
    for pattern, kind in _KINDS:
        if pattern.fullmatch(path.stem):
            return kind
    return None


# --------------------------------------------------------------------------- XML helpers


def _s(tag: str) -> str:
    return f"{{{SLD_NS}}}{tag}"


def _o(tag: str) -> str:
    return f"{{{OGC_NS}}}{tag}"


def _sub(parent: ET.Element, tag: str, text: str | None = None, **attrib) -> ET.Element:
    node = ET.SubElement(parent, tag, {k: str(v) for k, v in attrib.items()})
    if text is not None:
        node.text = text
    return node


def _css(parent: ET.Element, name: str, value) -> None:
    _sub(parent, _s("CssParameter"), str(value), name=name)


def _fill(parent: ET.Element, rgb, opacity: float = 1.0) -> None:
    fill = _sub(parent, _s("Fill"))
    _css(fill, "fill", ms.hex_colour(rgb))
    _css(fill, "fill-opacity", _num(opacity))


def _stroke(parent: ET.Element, rgb, width: float, *, opacity: float = 1.0, dash=None) -> None:
    stroke = _sub(parent, _s("Stroke"))
    _css(stroke, "stroke", ms.hex_colour(rgb))
    _css(stroke, "stroke-width", _num(width))
    _css(stroke, "stroke-opacity", _num(opacity))
    if dash:
        _css(stroke, "stroke-dasharray", " ".join(_num(d) for d in dash))


def _num(v: float) -> str:
    return f"{float(v):.6g}"


def _rule(parent: ET.Element, name: str, title: str) -> ET.Element:
    rule = _sub(parent, _s("Rule"))
    _sub(rule, _s("Name"), name)
    _sub(rule, _s("Title"), title)
    return rule


def _equal_filter(rule: ET.Element, *pairs: tuple[str, str]) -> None:
    filt = _sub(rule, _o("Filter"))
    parent = _sub(filt, _o("And")) if len(pairs) > 1 else filt
    for prop, value in pairs:
        cmp = _sub(parent, _o("PropertyIsEqualTo"))
        _sub(cmp, _o("PropertyName"), prop)
        _sub(cmp, _o("Literal"), value)


#: SLD 1.0 well-known marks for the app's shapes; a diamond is a square turned 45°.
_MARKS = {"triangle": ("triangle", 0), "diamond": ("square", 45), "disc": ("circle", 0),
          "square": ("square", 0), "ring": ("circle", 0)}


def _mark(rule: ET.Element, symbol: dict) -> None:
    """A PointSymbolizer drawing one of :data:`sillmark.products.map_style.POINT_SYMBOLS`."""
    name, turn = _MARKS[symbol["shape"]]
    point = _sub(rule, _s("PointSymbolizer"))
    graphic = _sub(point, _s("Graphic"))
    mark = _sub(graphic, _s("Mark"))
    _sub(mark, _s("WellKnownName"), name)
    _fill(mark, symbol["fill"])
    _stroke(mark, symbol["stroke"], symbol["stroke_px"])
    # A turned square of side s spans s·√2: the diamond keeps the app's width.
    size = symbol["size_px"] / (2 ** 0.5) if turn else symbol["size_px"]
    _sub(graphic, _s("Size"), _num(size))
    if turn:
        _sub(graphic, _s("Rotation"), _num(turn))


def _document(layer: str, title: str) -> tuple[ET.Element, ET.Element]:
    root = ET.Element(_s("StyledLayerDescriptor"), {
        "version": "1.0.0", f"{{{_XSI_NS}}}schemaLocation": _SCHEMA})
    named = _sub(root, _s("NamedLayer"))
    _sub(named, _s("Name"), layer)
    style = _sub(named, _s("UserStyle"))
    _sub(style, _s("Name"), f"sillmark {layer}")
    _sub(style, _s("Title"), title)
    _sub(style, _s("Abstract"), SCREENING_CAUTION)
    return root, _sub(style, _s("FeatureTypeStyle"))


def _colour_map(rule: ET.Element, entries: list[tuple[float, tuple, float, str | None]]) -> None:
    raster = _sub(rule, _s("RasterSymbolizer"))
    _sub(raster, _s("Opacity"), "1")
    cmap = _sub(raster, _s("ColorMap"))
    for quantity, rgb, opacity, label in entries:
        attrib = {"color": ms.hex_colour(rgb), "opacity": _num(opacity), "quantity": _num(quantity)}
        if label is not None:
            attrib["label"] = label
        _sub(cmap, _s("ColorMapEntry"), **attrib)


# --------------------------------------------------------------------------- the styles


def _depth_entries(unit_value: str, unit_symbol: str, *, zero_clear: bool) -> list:
    """Two entries per depth class (flat colours between the app's bounds)."""
    alpha = ms.DEPTH_ALPHA / 255
    entries = []
    if zero_clear:  # fill depth 0: ground in no depression, left clear as on the map
        entries.append((0.0, ms.DEPTH_COLOURS[0], 0.0, "no water held"))
    for c in ms.depth_classes(unit_value):
        lower = c.lower if not (zero_clear and c.lower == 0.0) else CLASS_EDGE
        entries.append((lower, c.colour, alpha, c.label(unit_symbol)))
        if c.upper is not None:
            entries.append((c.upper - CLASS_EDGE, c.colour, alpha, None))
    return entries


def _raster_range(path: Path | None) -> tuple[float, float] | None:
    """Lowest and highest value of a raster, from its coarsest overview (or the band)."""
    if path is None or not path.is_file():
        return None
    with rasterio.open(path) as ds:
        levels = len(ds.overviews(1))
    with rasterio.open(path, overview_level=levels - 1) if levels else rasterio.open(path) as ds:
        data = ds.read(1, masked=True).astype(np.float64).filled(np.nan)
    finite = data[np.isfinite(data)]
    if not finite.size:
        return None
    return float(finite.min()), float(finite.max())


def layer_style(name: str, unit: VerticalUnit | str, *, path: str | os.PathLike | None = None,
                depression_count: int | None = None) -> str | None:
    """The SLD 1.0 document (text) for the result file ``name``, or None if it is no map layer.

    Parameters
    ----------
    name : str
        File name, e.g. ``depth_47.60m.tif``.
    unit : VerticalUnit or str
        The site's vertical unit (chooses the depth classes).
    path : path, optional
        The file itself, read for the range of the onset stage (its coarsest
        overview) and the depression count of ``depression_id.tif`` (its tag).
    depression_count : int, optional
        Instead of reading it from ``path``.
    """
    kind = layer_kind(name)
    if kind is None:
        return None
    unit = VerticalUnit(unit) if not isinstance(unit, VerticalUnit) else unit
    stem = Path(name).stem
    symbol = unit.symbol
    root, fts = _document(stem, _TITLES[kind].format(unit=unit_name(unit)))
    file_path = None if path is None else Path(path)
    if kind in ("depth", "fill_depth"):
        rule = _rule(fts, "depth classes", f"Depth of water ({symbol})")
        _colour_map(rule, _depth_entries(unit.value, symbol, zero_clear=kind == "fill_depth"))
    elif kind == "onset_stage":
        rng = _raster_range(file_path) or (0.0, 1.0)
        lo, hi = rng
        span = hi - lo if hi > lo else 1.0
        rule = _rule(fts, "relief tint", f"Onset stage ({symbol}), lowest to highest")
        _colour_map(rule, [(lo + pos * span, rgb, 1.0, f"{lo + pos * span:.2f} {symbol}")
                           for pos, rgb in ms.TINT_STOPS])
    elif kind == "depression_id":
        count = depression_count
        if count is None and file_path is not None and file_path.is_file():
            with rasterio.open(file_path) as ds:
                count = int(ds.tags().get("DEPRESSION_COUNT", "0"))
        outline = ms.OUTLINE_STYLES["overtopped"]["stroke"]
        entries = [(0.0, outline, 0.0, "in no depression")]
        if count:
            entries += [(1.0, outline, 0.35, "in a depression"), (float(max(count, 1)), outline, 0.35, None)]
        _colour_map(_rule(fts, "depressions", "Cells in a depression"), entries)
    elif kind == "flood_tree":
        outlet = ms.OUTLET_STYLE
        _colour_map(_rule(fts, "outlets", "Outlet cells (flood-tree code 9)"), [
            (0.0, outlet["fill"], 0.0, None), (8.0, outlet["fill"], 0.0, "reached from a neighbour"),
            (9.0, outlet["fill"], outlet["fill_opacity"], "outlet")])
    elif kind == "water_state":
        flooded = ms.ASSET_STATE_FILL["flooded"]
        _colour_map(_rule(fts, "water state", "Water state at the level"), [
            (1.0, flooded, 0.0, "dry"),
            (2.0, flooded, ms.DEPTH_ALPHA / 255, "flooded"),
            (3.0, ms.SHIELDED_STRIPE, ms.SHIELDED_STRIPE[3] / 255, "shielded low ground")])
    elif kind == "depressions":
        line = ms.OUTLINE_STYLES["dry"]
        poly = _sub(_rule(fts, "outline", "Depression outline"), _s("PolygonSymbolizer"))
        _stroke(poly, line["stroke"], line["stroke_px"], dash=line["dash"])
    elif kind == "spill_points":
        _mark(_rule(fts, "spill point", "Spill point"), ms.POINT_SYMBOLS["spill"])
    elif kind == "flood_extent":
        colour = ms.ASSET_STATE_FILL["flooded"]
        poly = _sub(_rule(fts, "flooded", "Flooded from the outlets"), _s("PolygonSymbolizer"))
        _fill(poly, colour, 0.45)
        _stroke(poly, colour, 1.0)
    elif kind == "shielded":
        poly = _sub(_rule(fts, "shielded", "Shielded low ground (below the level, no surface path yet)"),
                    _s("PolygonSymbolizer"))
        _fill(poly, ms.SHIELDED_WASH, ms.SHIELDED_WASH[3] / 255)
        _stroke(poly, ms.SHIELDED_STRIPE, 1.5, opacity=ms.SHIELDED_STRIPE[3] / 255)
    elif kind == "assets":
        for state in ms.ASSET_STATE_FILL:
            rule = _rule(fts, f"asset {state}", f"Asset, {state}")
            _equal_filter(rule, ("feature_kind", "asset"), ("state", state))
            _mark(rule, ms.POINT_SYMBOLS[f"asset-{state}"])
        route = ms.ROUTE_STYLE
        rule = _rule(fts, "route", "Route from the outlets")
        _equal_filter(rule, ("feature_kind", "route"))
        line = _sub(rule, _s("LineSymbolizer"))
        _stroke(line, route["stroke"], route["stroke_px"], opacity=route["opacity"])
        rule = _rule(fts, "controlling sill", "Controlling sill")
        _equal_filter(rule, ("feature_kind", "controlling_sill"))
        _mark(rule, ms.POINT_SYMBOLS["sill"])
    ET.indent(root)
    body = ET.tostring(root, encoding="unicode")
    return '<?xml version="1.0" encoding="UTF-8"?>\n' + body + "\n"


_TITLES = {
    "onset_stage": "Onset stage ({unit})",
    "fill_depth": "Fill depth ({unit})",
    "depression_id": "Depressions",
    "flood_tree": "Flood tree: outlet cells",
    "depth": "Depth of water at the level ({unit})",
    "water_state": "Water state at the level",
    "depressions": "Depression outlines",
    "spill_points": "Spill points",
    "flood_extent": "Flood extent at the level",
    "shielded": "Shielded low ground at the level",
    "assets": "Assets at the level, their routes and controlling sills",
}


def style_path(path: str | os.PathLike) -> Path:
    """Where the style of a result file goes: beside it, ``.sld`` in place of its suffix."""
    p = Path(path)
    return p.with_suffix(".sld")


def write_style(path: str | os.PathLike, unit: VerticalUnit | str) -> Path | None:
    """Write the SLD of the result file at ``path`` beside it (atomically); None if it has none."""
    p = Path(path)
    text = layer_style(p.name, unit, path=p)
    if text is None:
        return None
    target = style_path(p)
    with atomic_output(target) as tmp:
        tmp.write_text(text, encoding="utf-8")
    return target


def write_styles(paths: Iterable[str | os.PathLike], unit: VerticalUnit | str) -> list[Path]:
    """:func:`write_style` for each of ``paths``; the styles written, one per style name."""
    written: dict[Path, None] = {}
    for path in paths:
        target = write_style(path, unit)
        if target is not None:
            written[target] = None
    return list(written)
