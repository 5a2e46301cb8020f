"""Cloud-Optimized GeoTIFFs and the SLD styles written beside the result files.

The COG layout is checked by reading the TIFF structure directly (TIFF 6.0,
Adobe 1992: an 8-byte header, then image file directories (IFDs) of 12-byte
entries; tag 322/323 tile width/length, 324 TileOffsets), against what the COG
specification asks (GDAL's COG driver documentation, "Cloud Optimized GeoTIFF
layout"): every IFD ahead of the image data, the full-resolution image first
among the IFDs, and the image data of the smaller overviews before that of the
larger ones. The SLD is checked against the structure of OGC 02-070 (SLD
1.0.0); no schema validator is installed offline, so the order of the elements
that the schema fixes is checked by hand here.
"""

from __future__ import annotations

import json
import re
import struct
import xml.etree.ElementTree as ET
from pathlib import Path

import numpy as np
import pytest
import rasterio

from sillmark import SCREENING_CAUTION
from sillmark.grid.dem import dem_from_array, read_dem
from sillmark.io import geotiff, styles
from sillmark.io.stage_files import write_level
from sillmark.io.summary import read_summary
from sillmark.products import map_style
from sillmark.products.assets import STATE_DRY, STATE_FLOODED, STATE_SHIELDED
from sillmark.products.source import ArraySource
from sillmark.run import analyse
from sillmark.web import render
from tests.rasters import grid, write_raster

SLD = "{http://www.opengis.net/sld}"
OGC = "{http://www.opengis.net/ogc}"


# --------------------------------------------------------------------------- TIFF structure


def tiff_directories(path: Path) -> list[dict]:
    """Offset, width and tile offsets of each IFD of a classic little-endian TIFF."""
    data = path.read_bytes()
    assert data[:4] == b"II*\x00", "expected a classic little-endian TIFF"
    sizes = {1: 1, 2: 1, 3: 2, 4: 4, 16: 8}
    formats = {3: "H", 4: "I", 16: "Q"}
    (offset,) = struct.unpack_from("<I", data, 4)
    out = []
    while offset:
        (count,) = struct.unpack_from("<H", data, offset)
        entry = {"ifd": offset}
        for k in range(count):
            tag, kind, n, value = struct.unpack_from("<HHI4s", data, offset + 2 + 12 * k)
            if tag not in (256, 322, 324):
                continue
            fmt = formats[kind]
            if n * sizes[kind] <= 4:
                values = struct.unpack_from(f"<{n}{fmt}", value)
            else:
                (where,) = struct.unpack_from("<I", value)
                values = struct.unpack_from(f"<{n}{fmt}", data, where)
            entry[tag] = values
        out.append(entry)
        (offset,) = struct.unpack_from("<I", data, offset + 2 + 12 * count)
    return out


def assert_cog_layout(path: Path) -> None:
    dirs = tiff_directories(path)
    assert len(dirs) >= 2, "a full-resolution image and at least one overview"
    widths = [d[256][0] for d in dirs]
    assert widths == sorted(widths, reverse=True) and widths[0] > widths[1]  # full resolution first
    assert all(d[322][0] == geotiff.TILE_SIZE for d in dirs)  # tiled, every level
    data_starts = [min(o for o in d[324] if o) for d in dirs]
    data_ends = [max(d[324]) for d in dirs]
    assert max(d["ifd"] for d in dirs) < min(data_starts)  # every directory ahead of the data
    for larger, smaller in zip(range(len(dirs) - 1), range(1, len(dirs))):
        assert data_ends[smaller] < data_starts[larger]  # smaller overviews' data first


# --------------------------------------------------------------------------- COG


@pytest.fixture
def cog_dem():
    """600 × 520 invented terrain on 2 m cells, with a hole of nodata."""
    rows, cols = 600, 520
    z = np.add.outer(np.linspace(10, 30, rows), np.sin(np.linspace(0, 9, cols))).astype(np.float32)
    z[100:140, 200:260] = np.nan
    return dem_from_array(z, transform=grid(2.0))


def test_rasters_are_cloud_optimized_with_values_and_tags_kept(tmp_path, cog_dem):
    z = cog_dem.elevation
    path = geotiff.write_geotiff(
        tmp_path / "band.tif", cog_dem, dtype="float32", nodata=float("nan"),
        block=lambda r0, r1: z[r0:r1], layer="test", description="ground", band_unit="metre")
    with rasterio.open(path) as ds:
        assert ds.profile["tiled"] and ds.block_shapes[0] == (256, 256)
        # Halving 600 × 520 until it fits one 256-cell tile: 300 × 260, then 150 × 130.
        assert ds.overviews(1) == [2, 4]
        assert ds.tags(ns="IMAGE_STRUCTURE")["LAYOUT"] == "COG"  # GDAL's own reading of the layout
        assert ds.tags(ns="IMAGE_STRUCTURE")["PREDICTOR"] == "2"
        assert ds.tags()["SILLMARK_CAUTION"] == SCREENING_CAUTION
        assert ds.descriptions == ("ground",) and ds.units == ("metre",)
        assert ds.crs == cog_dem.crs and ds.transform == cog_dem.transform
        np.testing.assert_array_equal(ds.read(1), z)  # NaN where NaN, every value the same
    assert_cog_layout(path)
    assert not list(tmp_path.glob(".*"))  # no temporary file left behind

    geotiff.tag_vertical_datum([path], "NAVD88")
    with rasterio.open(path) as ds:
        assert ds.tags()["VERTICAL_DATUM"] == "NAVD88"
        assert ds.tags()["SILLMARK_CAUTION"] == SCREENING_CAUTION
        assert ds.tags(ns="IMAGE_STRUCTURE")["LAYOUT"] == "COG"
        np.testing.assert_array_equal(ds.read(1), z)
    assert_cog_layout(path)  # a tag added afterwards keeps the layout


def test_overviews_average_measures_and_keep_codes(tmp_path, cog_dem):
    rows, cols = cog_dem.shape
    stripes = (np.indices((rows, cols))[0] % 2).astype(np.float32)  # 0, 1, 0, 1 ... by row
    codes = (np.indices((rows, cols)).sum(axis=0) % 7 + 2).astype(np.uint8)  # codes 2..8
    f = geotiff.write_geotiff(tmp_path / "f.tif", cog_dem, dtype="float32", nodata=float("nan"),
                              block=lambda r0, r1: stripes[r0:r1], layer="t", description="",
                              band_unit="")
    c = geotiff.write_geotiff(tmp_path / "c.tif", cog_dem, dtype="uint8", nodata=0,
                              block=lambda r0, r1: codes[r0:r1], layer="t", description="",
                              band_unit="")
    with rasterio.open(f, overview_level=0) as ds:
        # The mean of a row at 0 and a row at 1 is 0.5, a value no cell holds.
        np.testing.assert_allclose(ds.read(1), 0.5)
    with rasterio.open(c, overview_level=0) as ds:
        assert set(np.unique(ds.read(1))) <= set(range(2, 9))  # codes, never their mean


# --------------------------------------------------------------------------- SLD structure


#: Children a Rule may hold, in the order SLD 1.0 fixes (symbolizers last).
RULE_ORDER = ["Name", "Title", "Abstract", "LegendGraphic", "Filter", "ElseFilter",
              "MinScaleDenominator", "MaxScaleDenominator"]
SYMBOLIZERS = {"LineSymbolizer", "PolygonSymbolizer", "PointSymbolizer", "TextSymbolizer",
               "RasterSymbolizer"}


def local(tag: str) -> str:
    return tag.split("}", 1)[1]


def check_sld(text: str) -> ET.Element:
    """Parse an SLD 1.0 document and check the structure the schema fixes."""
    assert text.startswith('<?xml version="1.0" encoding="UTF-8"?>')
    root = ET.fromstring(text.encode("utf-8"))
    assert root.tag == f"{SLD}StyledLayerDescriptor" and root.get("version") == "1.0.0"
    (named,) = root
    assert named.tag == f"{SLD}NamedLayer"
    assert [local(c.tag) for c in named] == ["Name", "UserStyle"]
    style = named.find(f"{SLD}UserStyle")
    assert [local(c.tag) for c in style] == ["Name", "Title", "Abstract", "FeatureTypeStyle"]
    assert style.findtext(f"{SLD}Abstract") == SCREENING_CAUTION
    for node in root.iter():
        assert node.tag.startswith((SLD, OGC)), node.tag
    for rule in root.iter(f"{SLD}Rule"):
        kids = [local(c.tag) for c in rule]
        n = next(i for i, k in enumerate(kids) if k in SYMBOLIZERS)
        assert all(k in SYMBOLIZERS for k in kids[n:]) and kids[n:]
        assert [RULE_ORDER.index(k) for k in kids[:n]] == sorted(RULE_ORDER.index(k) for k in kids[:n])
    for entry in root.iter(f"{SLD}ColorMapEntry"):
        assert set(entry.attrib) <= {"color", "opacity", "quantity", "label"}
        assert re.fullmatch(r"#[0-9a-f]{6}", entry.get("color"))
    for cmap in root.iter(f"{SLD}ColorMap"):
        q = [float(e.get("quantity")) for e in cmap]
        assert q == sorted(q)
    for css in root.iter(f"{SLD}CssParameter"):
        assert css.get("name") in {"fill", "fill-opacity", "stroke", "stroke-width",
                                   "stroke-opacity", "stroke-dasharray"}
    return root


def interpolated_colour(root: ET.Element, value: float) -> tuple[int, int, int, float]:
    """The colour an SLD 1.0 reader gives ``value``: linear between neighbouring entries."""
    entries = [(float(e.get("quantity")), e.get("color"), float(e.get("opacity", "1")))
               for e in root.iter(f"{SLD}ColorMapEntry")]

    def rgb(h):
        return np.array([int(h[k:k + 2], 16) for k in (1, 3, 5)], dtype=float)

    qs = [q for q, _, _ in entries]
    k = int(np.searchsorted(qs, value, side="right"))
    if k == 0:
        q, c, a = entries[0]
        return (*rgb(c), a)
    if k == len(entries):
        q, c, a = entries[-1]
        return (*rgb(c), a)
    (q0, c0, a0), (q1, c1, a1) = entries[k - 1], entries[k]
    t = (value - q0) / (q1 - q0)
    return (*((1 - t) * rgb(c0) + t * rgb(c1)), (1 - t) * a0 + t * a1)


@pytest.mark.parametrize("unit", ["m", "ft", "us-ft"])
def test_depth_sld_classes_are_the_apps(unit):
    symbol = {"m": "m", "ft": "ft", "us-ft": "US ft"}[unit]
    root = check_sld(styles.layer_style("depth_47.60m.tif", unit))
    app = render.legend(unit, symbol)["depth_classes"]
    labelled = [e for e in root.iter(f"{SLD}ColorMapEntry") if e.get("label")]
    assert [float(e.get("quantity")) for e in labelled] == [c["from"] for c in app]
    assert [e.get("color") for e in labelled] == [c["colour"] for c in app]
    assert len(labelled) == 9 and len(list(root.iter(f"{SLD}Rule"))) == 1
    # What a reader that interpolates between entries shows equals the class the
    # map tiles give each depth (render.water_tile: searchsorted, side="right").
    bounds = render.depth_bounds(unit)
    for depth in [0.0, 0.05, 0.1, 0.3, 0.5, 0.9, 1.0, 2.5, 4.0, 9.0, 14.0, 15.0, 40.0]:
        expected = map_style.DEPTH_COLOURS[int(np.searchsorted(bounds, depth, side="right"))]
        got = interpolated_colour(root, depth)
        np.testing.assert_allclose(got[:3], expected, atol=1e-6)
        assert got[3] == pytest.approx(map_style.DEPTH_ALPHA / 255)


def test_fill_depth_sld_leaves_ground_outside_depressions_clear():
    root = check_sld(styles.layer_style("fill_depth.tif", "m"))
    assert interpolated_colour(root, 0.0)[3] == 0.0
    np.testing.assert_allclose(interpolated_colour(root, 0.3)[:3], map_style.DEPTH_COLOURS[2])


def test_vector_slds_use_the_apps_symbols():
    app = render.legend("m", "m")
    symbols = app["symbols"]  # what the page's scripts draw the markers with

    def mark_of(node):
        mark = node.find(f".//{SLD}Mark")
        fill = {c.get("name"): c.text for c in mark.find(f"{SLD}Fill")}
        stroke = {c.get("name"): c.text for c in mark.find(f"{SLD}Stroke")}
        graphic = node.find(f".//{SLD}Graphic")
        return (mark.findtext(f"{SLD}WellKnownName"), fill["fill"], stroke["stroke"],
                float(graphic.findtext(f"{SLD}Size")), graphic.findtext(f"{SLD}Rotation"))

    spill = check_sld(styles.layer_style("spill_points.geojson", "m"))
    assert mark_of(spill) == ("triangle", symbols["spill"]["fill"], symbols["spill"]["stroke"],
                              symbols["spill"]["size"], None)

    shielded = check_sld(styles.layer_style("shielded_47.60m.geojson", "m"))
    fill = {c.get("name"): c.text for c in shielded.find(f".//{SLD}Fill")}
    assert fill["fill"] == app["shielded"]["wash"]

    assets = check_sld(styles.layer_style("assets_47.60m.gpkg", "m"))
    rules = list(assets.iter(f"{SLD}Rule"))
    assert len(rules) == 5  # three asset states, the route, the controlling sill
    shapes = {"disc": "circle", "square": "square", "ring": "circle"}
    states = set()
    for rule in rules[:3]:
        literals = [lit.text for lit in rule.iter(f"{OGC}Literal")]
        assert literals[0] == "asset" and rule.find(f".//{OGC}And") is not None
        want = symbols[f"asset-{literals[1]}"]
        assert mark_of(rule) == (shapes[want["shape"]], want["fill"], want["stroke"], want["size"], None)
        states.add(literals[1])
    assert states == {STATE_FLOODED, STATE_SHIELDED, STATE_DRY}  # the values the files hold
    # The controlling sill: the app's diamond, a square turned 45° that keeps its width.
    name, fill, stroke, size, turn = mark_of(rules[4])
    assert (name, fill, stroke, turn) == ("square", symbols["sill"]["fill"],
                                          symbols["sill"]["stroke"], "45")
    assert size * 2 ** 0.5 == pytest.approx(symbols["sill"]["size"], abs=1e-3)  # 6 digits written


def test_files_that_are_no_map_layer_get_no_style():
    for name in ("summary.json", "depressions.csv", "depression_curves.csv", "stage_table.csv",
                 "depressions_at_47.60m.csv", "assets_47.60m.csv"):
        assert styles.layer_kind(name) is None and styles.layer_style(name, "m") is None


# --------------------------------------------------------------------------- a whole run


def test_analyse_and_level_write_a_style_beside_every_layer(tmp_path):
    """An invented 12 × 14 site: a pond at 2 m behind a 4 m bank, the edge at 3 m."""
    z = np.full((12, 14), 5.0, dtype=np.float32)
    z[0, :] = z[-1, :] = z[:, 0] = z[:, -1] = 3.0
    z[3:8, 3:9] = 2.0
    z[5, 9] = 4.0  # the pond's sill
    (tmp_path / "dem").mkdir()
    dem_path = write_raster(tmp_path / "dem" / "site.tif", z, transform=grid(2.0))
    dem = read_dem(dem_path)
    out = tmp_path / "results"
    run = analyse(dem, ["edge"], out)
    names = {p.name for p in out.iterdir()}
    layers = {n for n in names if n.endswith((".tif", ".geojson"))}
    assert layers and {Path(n).stem + ".sld" for n in layers} <= names
    assert {p.name for p in run.files} == names  # every file written is reported
    for name in layers:
        check_sld((out / (Path(name).stem + ".sld")).read_text(encoding="utf-8"))
        if name.endswith(".tif"):
            assert_cog_layout_or_small(out / name)
    # the onset stage's tint spans the stages the raster holds (2 m edge .. 4 m pond)
    onset = ET.parse(out / "onset_stage.sld").getroot()
    q = [float(e.get("quantity")) for e in onset.iter(f"{SLD}ColorMapEntry")]
    assert q[0] == pytest.approx(3.0) and q[-1] == pytest.approx(5.0)

    # summary.json names no absolute path; the DEM is found from the folder itself
    text = (out / "summary.json").read_text(encoding="utf-8")
    summary = json.loads(text)
    assert summary["dem"] == "../dem/site.tif"
    assert str(tmp_path) not in text

    def strings(v):
        if isinstance(v, str):
            yield v
        elif isinstance(v, dict):
            for x in v.values():
                yield from strings(x)
        elif isinstance(v, list):
            for x in v:
                yield from strings(x)

    assert not [s for s in strings(summary) if s.startswith("/")]
    assert Path(read_summary(out).dem_file()).resolve() == dem_path.resolve()

    level = write_level(ArraySource(dem, run.result), 4.5, tmp_path / "level")
    written = {p.name for p in level.paths}
    assert {"depth_4.50m.sld", "water_state_4.50m.sld", "flood_extent_4.50m.sld",
            "shielded_4.50m.sld"} <= written
    assert_cog_layout_or_small(tmp_path / "level" / "depth_4.50m.tif")


def assert_cog_layout_or_small(path: Path) -> None:
    """A raster smaller than one tile has no overviews; it is still a COG."""
    with rasterio.open(path) as ds:
        assert ds.tags(ns="IMAGE_STRUCTURE")["LAYOUT"] == "COG"
