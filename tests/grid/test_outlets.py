"""Tests for sillmark.grid.outlets: edge, nodata, GeoJSON and mask outlets, and combinations."""

from __future__ import annotations

import json
import math
from collections import deque

import numpy as np
import pyproj
import pytest
import shapely
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays

from sillmark.errors import InvalidOutlets, InvalidParameter
from sillmark.grid.dem import dem_from_array
from sillmark.grid.outlets import Outlets, build_outlets, edge_outlets, nodata_outlets, outlets_from_geojson, outlets_from_raster
from tests.rasters import NORTH, WEST, grid

UTM33_MEMBER = {"type": "name", "properties": {"name": "EPSG:32633"}}


def in_utm(geometry: dict) -> dict:
    """A bare GeoJSON geometry with a legacy crs member naming UTM zone 33N."""
    return {**geometry, "crs": UTM33_MEMBER}


def cells(mask: np.ndarray) -> set[tuple[int, int]]:
    return {(int(r), int(c)) for r, c in zip(*np.nonzero(mask))}


def ring(x0: float, y0: float, x1: float, y1: float) -> list[list[float]]:
    """Closed rectangle ring in grid units (cells) from the north-west corner."""
    pts = [(x0, y0), (x1, y0), (x1, y1), (x0, y1), (x0, y0)]
    return [[WEST + x, NORTH - y] for x, y in pts]


@pytest.fixture
def flat10():
    """10 × 10 flat DEM, 1 m cells, nothing missing."""
    return dem_from_array(np.zeros((10, 10), np.float32))


# ---------------------------------------------------------------------------
# edge and nodata


def test_edge_outlets_are_the_valid_perimeter():
    dem = dem_from_array(np.zeros((4, 5)))
    mask = edge_outlets(dem)
    assert mask.dtype == bool and mask.sum() == 2 * 5 + 2 * 4 - 4
    assert not mask[1:-1, 1:-1].any()
    z = np.zeros((4, 5))
    z[0, 2] = np.nan
    z[2, 0] = np.nan
    mask = edge_outlets(dem_from_array(z))
    assert not mask[0, 2] and not mask[2, 0] and mask.sum() == 12


def test_edge_outlets_of_island_are_empty(island_dem):
    assert not edge_outlets(island_dem).any()


def test_nodata_neighbours_depend_on_connectivity():
    z = np.zeros((5, 5))
    z[2, 2] = np.nan
    eight = nodata_outlets(dem_from_array(z), connectivity=8)
    four = nodata_outlets(dem_from_array(z), connectivity=4)
    assert cells(eight) == {(r, c) for r in (1, 2, 3) for c in (1, 2, 3)} - {(2, 2)}
    assert cells(four) == {(1, 2), (2, 1), (2, 3), (3, 2)}


def test_diagonal_only_nodata_neighbour_counts_for_8_not_4():
    z = np.zeros((3, 3))
    z[0, 0] = np.nan
    dem = dem_from_array(z)
    # (1, 1) touches the nodata cell only at a corner.
    assert nodata_outlets(dem, connectivity=8)[1, 1]
    assert not nodata_outlets(dem, connectivity=4)[1, 1]


def test_nodata_outlets_island(island_dem):
    mask = nodata_outlets(island_dem)
    assert not (mask & ~island_dem.valid).any()
    # The ring of island cells next to the sea: the 4 × 6 island's own perimeter.
    inner = np.zeros((6, 8), bool)
    inner[1:5, 1:7] = True
    inner[2:4, 2:6] = False
    assert np.array_equal(mask, inner)


def test_no_nodata_gives_no_nodata_outlets(flat10):
    assert not nodata_outlets(flat10).any()


@pytest.mark.parametrize("connectivity", [6, 0, True, "8", None])
def test_connectivity_must_be_4_or_8(flat10, connectivity):
    with pytest.raises(InvalidParameter, match="connectivity must be 8"):
        nodata_outlets(flat10, connectivity=connectivity)
    with pytest.raises(InvalidParameter):
        build_outlets(flat10, ["edge"], connectivity=connectivity)


def brute_force_nodata_outlets(valid: np.ndarray, connectivity: int) -> np.ndarray:
    rows, cols = valid.shape
    out = np.zeros_like(valid)
    for r in range(rows):
        for c in range(cols):
            if not valid[r, c]:
                continue
            for dr in (-1, 0, 1):
                for dc in (-1, 0, 1):
                    if (dr, dc) == (0, 0) or (connectivity == 4 and dr and dc):
                        continue
                    rr, cc = r + dr, c + dc
                    if 0 <= rr < rows and 0 <= cc < cols and not valid[rr, cc]:
                        out[r, c] = True
    return out


@settings(max_examples=40, deadline=None)
@given(
    valid=arrays(bool, st.tuples(st.integers(1, 7), st.integers(1, 7))).filter(lambda v: v.any()),
    connectivity=st.sampled_from([4, 8]),
)
def test_nodata_outlets_match_a_cell_by_cell_check(valid, connectivity):
    z = np.where(valid, 1.0, np.nan)
    got = nodata_outlets(dem_from_array(z), connectivity=connectivity)
    np.testing.assert_array_equal(got, brute_force_nodata_outlets(valid, connectivity))


# ---------------------------------------------------------------------------
# GeoJSON


def test_point_in_dem_crs_marks_its_cell(flat10):
    point = in_utm({"type": "Point", "coordinates": [WEST + 3.5, NORTH - 6.2]})
    assert cells(outlets_from_geojson(flat10, point)) == {(6, 3)}


def test_feature_featurecollection_text_and_files_agree(flat10, tmp_path):
    geom = {"type": "MultiPoint", "coordinates": [[WEST + 1.5, NORTH - 1.5], [WEST + 8.5, NORTH - 2.5]]}
    feature = {"type": "Feature", "properties": {"name": "culverts"}, "geometry": geom}
    collection = {
        "type": "FeatureCollection",
        "crs": UTM33_MEMBER,
        "features": [feature, {"type": "Feature", "properties": {}, "geometry": None}],
    }
    expected = {(1, 1), (2, 8)}
    assert cells(outlets_from_geojson(flat10, collection)) == expected
    assert cells(outlets_from_geojson(flat10, {**feature, "crs": UTM33_MEMBER})) == expected
    assert cells(outlets_from_geojson(flat10, json.dumps(collection))) == expected
    for name in ("culverts.geojson", "culverts.json"):
        path = tmp_path / name
        path.write_text(json.dumps(collection), encoding="utf-8")
        assert cells(outlets_from_geojson(flat10, path)) == expected
        assert cells(outlets_from_geojson(flat10, str(path))) == expected


def test_legacy_urn_crs_name_is_honoured(flat10):
    point = {
        "type": "Point",
        "coordinates": [WEST + 0.5, NORTH - 0.5],
        "crs": {"type": "name", "properties": {"name": "urn:ogc:def:crs:EPSG::32633"}},
    }
    assert cells(outlets_from_geojson(flat10, point)) == {(0, 0)}


def test_wgs84_line_is_reprojected_onto_the_utm_grid():
    # 60 × 60 cells of 10 m in UTM zone 33N; a line given in WGS 84 lon/lat
    # (RFC 7946 default, no crs member). Invented vertices near 15.00° E, 45.15° N.
    dem = dem_from_array(np.zeros((60, 60), np.float32), transform=grid(10.0))
    lonlat = [(15.0008, 45.1530), (15.0041, 45.1512), (15.0069, 45.1497)]
    line = {"type": "LineString", "coordinates": [list(p) for p in lonlat]}
    mask = outlets_from_geojson(dem, line)

    # Independent expectation: project the vertices with pyproj (not through the
    # code under test) and find their cells by arithmetic on the grid.
    to_utm = pyproj.Transformer.from_crs("EPSG:4326", "EPSG:32633", always_xy=True)
    xs, ys = to_utm.transform([p[0] for p in lonlat], [p[1] for p in lonlat])
    vertex_cells = {(math.floor((NORTH - y) / 10.0), math.floor((x - WEST) / 10.0)) for x, y in zip(xs, ys)}
    assert all(0 <= r < 60 and 0 <= c < 60 for r, c in vertex_cells)
    assert vertex_cells <= cells(mask)

    # Every marked cell touches the projected line: its centre is within half a
    # cell diagonal (7.07 m) of it, plus 1 cm for the line's curvature in UTM.
    projected = shapely.LineString(list(zip(xs, ys)))
    for r, c in cells(mask):
        centre = shapely.Point(WEST + 10.0 * c + 5.0, NORTH - 10.0 * r - 5.0)
        assert projected.distance(centre) <= 5.0 * math.sqrt(2) + 0.01
    # And the marked cells form one 8-connected chain from end to end.
    assert connected_8(cells(mask))


def test_lonlat_point_on_a_geographic_grid_needs_no_reprojection():
    dem = dem_from_array(np.zeros((4, 4)), crs="EPSG:4326", transform=grid(0.001, west=15.0, north=45.0))
    point = {"type": "Point", "coordinates": [15.0025, 44.9995]}  # lon, lat (RFC 7946 order)
    assert cells(outlets_from_geojson(dem, point)) == {(0, 2)}


def connected_8(marked: set[tuple[int, int]]) -> bool:
    start = next(iter(marked))
    seen = {start}
    todo = deque([start])
    while todo:
        r, c = todo.popleft()
        for dr in (-1, 0, 1):
            for dc in (-1, 0, 1):
                n = (r + dr, c + dc)
                if n in marked and n not in seen:
                    seen.add(n)
                    todo.append(n)
    return seen == marked


def test_polygon_marks_cells_whose_centre_is_inside(flat10):
    # Edges at 1.75 and 4.25 cells: centres 2.5 and 3.5 are inside, 1.5 and 4.5
    # are not (though those cells are touched).
    polygon = in_utm({"type": "Polygon", "coordinates": [ring(1.75, 1.75, 4.25, 4.25)]})
    assert cells(outlets_from_geojson(flat10, polygon)) == {(r, c) for r in (2, 3) for c in (2, 3)}


def test_polygon_narrower_than_a_cell_still_marks_a_channel(flat10):
    # A channel 0.3 cells wide between rows 2.1 and 2.4: no cell centre (at 2.5)
    # is inside, yet the channel must give a continuous line of outlets.
    channel = in_utm({"type": "Polygon", "coordinates": [ring(0.0, 2.1, 10.0, 2.4)]})
    assert cells(outlets_from_geojson(flat10, channel)) == {(2, c) for c in range(10)}


def test_lake_with_thin_outflow_channel(flat10):
    # A 4 × 4-cell lake (rows and columns 1..4 fully inside) and a 0.2-cell-wide
    # channel running east from it along row 3. The lake is not widened; the
    # channel marks every cell it crosses.
    lake = shapely.box(WEST + 1.0, NORTH - 5.0, WEST + 5.0, NORTH - 1.0)
    channel = shapely.box(WEST + 4.9, NORTH - 3.6, WEST + 10.0, NORTH - 3.4)
    shape = shapely.union(lake, channel)
    polygon = in_utm(json.loads(shapely.to_geojson(shape)))
    expected = {(r, c) for r in range(1, 5) for c in range(1, 5)} | {(3, c) for c in range(4, 10)}
    assert cells(outlets_from_geojson(flat10, polygon)) == expected


def test_self_intersecting_polygon_is_repaired(flat10):
    # A bow-tie ring crossing itself at (5, 5): both triangles count.
    bowtie = [[WEST + x, NORTH - y] for x, y in [(1, 1), (9, 9), (9, 1), (1, 9), (1, 1)]]
    mask = outlets_from_geojson(flat10, in_utm({"type": "Polygon", "coordinates": [bowtie]}))
    assert mask[4, 1] and mask[4, 8]  # left and right triangles
    assert not mask[1, 4] and not mask[8, 4]  # the gaps above and below the crossing


def test_geojson_outlets_skip_nodata_cells():
    z = np.zeros((4, 4))
    z[1, 1] = np.nan
    dem = dem_from_array(z)
    polygon = in_utm({"type": "Polygon", "coordinates": [ring(0.0, 0.0, 3.0, 3.0)]})
    mask = outlets_from_geojson(dem, polygon)
    assert not mask[1, 1] and mask.sum() == 8


def test_geometry_outside_the_grid_says_it_misses(flat10):
    far = in_utm({"type": "Point", "coordinates": [WEST + 500.0, NORTH + 500.0]})
    with pytest.raises(InvalidOutlets, match="no outlet cells: the GeoJSON object misses the grid.*--outlet edge"):
        outlets_from_geojson(flat10, far)
    # Lon/lat on the far side of the globe from the UTM grid.
    antipode = {"type": "LineString", "coordinates": [[-165.0, -45.0], [-164.0, -44.0]]}
    with pytest.raises(InvalidOutlets, match="misses the grid"):
        outlets_from_geojson(flat10, antipode)


def test_geometry_only_on_nodata_says_so(island_dem):
    sea = in_utm({"type": "Point", "coordinates": [WEST + 0.5, NORTH - 0.5]})
    with pytest.raises(InvalidOutlets, match="covers only nodata cells"):
        outlets_from_geojson(island_dem, sea)


def test_not_json(flat10, tmp_path):
    path = tmp_path / "river.geojson"
    path.write_text("river: the Sill Brook\n")
    with pytest.raises(InvalidOutlets, match=r"the GeoJSON 'river.geojson' is not valid JSON \(.*line 1"):
        outlets_from_geojson(flat10, path)
    with pytest.raises(InvalidOutlets, match="not valid JSON"):
        outlets_from_geojson(flat10, "{not json")
    path.write_bytes(b"\xff\xfe\x00bad")
    with pytest.raises(InvalidOutlets, match="not UTF-8"):
        outlets_from_geojson(flat10, path)


@pytest.mark.parametrize(
    ("obj", "message"),
    [
        ({"type": "FeatureCollection", "features": []}, "has no geometries"),
        ({"type": "FeatureCollection", "features": [{"type": "Feature", "geometry": None}]}, "has no geometries"),
        ({"type": "LineString", "coordinates": []}, "has no geometries"),
        ({"type": "Circle", "coordinates": [0, 0], "radius": 5}, "unsupported type 'Circle'"),
        ({"type": "Feature", "geometry": {"type": "Curve", "coordinates": []}}, "unsupported geometry type 'Curve'"),
        ({"type": "Point", "coordinates": "here"}, "malformed coordinates"),
        ({"type": "FeatureCollection"}, "without a 'features' list"),
        ({"type": "FeatureCollection", "features": [{"type": "Point"}]}, "is not a GeoJSON Feature"),
        ({"coordinates": [1, 2]}, "no 'type' member"),
        ([1, 2, 3], "not a GeoJSON object"),
        ({"type": "Point", "coordinates": [0, 0], "crs": {"type": "link", "properties": {}}}, "'crs' member"),
        ({"type": "Point", "coordinates": [0, 0], "crs": {"type": "name", "properties": {"name": "EPSG:0"}}},
         "unknown CRS"),
    ],
)
def test_unusable_geojson_is_refused(flat10, obj, message):
    source = obj if isinstance(obj, dict) else json.dumps(obj)
    with pytest.raises(InvalidOutlets, match=message):
        outlets_from_geojson(flat10, source)


def test_geojson_paths_must_be_local_files(flat10, tmp_path):
    with pytest.raises(InvalidOutlets, match="virtual or remote"):
        outlets_from_geojson(flat10, "https://example.invalid/river.geojson")
    with pytest.raises(InvalidOutlets, match="does not exist"):
        outlets_from_geojson(flat10, tmp_path / "missing.geojson")


# ---------------------------------------------------------------------------
# mask rasters


def test_mask_raster_marks_nonzero_valid_cells(write_tif):
    z = np.zeros((3, 4), np.float32)
    z[2, 3] = np.nan
    dem = dem_from_array(z)
    mask = np.array([[0, 1, 0, 0], [0, 0, 255, 0], [7, 0, 0, 9]], dtype=np.uint8)
    mask[0, 0] = 200  # declared nodata in the mask: not an outlet
    path = write_tif("lake.tif", mask, nodata=200)
    assert cells(outlets_from_raster(dem, path)) == {(0, 1), (1, 2), (2, 0)}  # (2, 3) is DEM nodata


def test_float_mask_ignores_nan(write_tif):
    dem = dem_from_array(np.zeros((2, 2)))
    path = write_tif("m.tif", np.array([[np.nan, 0.5], [0.0, -1.0]], np.float32))
    assert cells(outlets_from_raster(dem, path)) == {(0, 1), (1, 1)}


def test_mask_without_crs_is_accepted_on_the_same_grid(write_tif):
    dem = dem_from_array(np.zeros((2, 2)))
    path = write_tif("m.tif", np.array([[1, 0], [0, 0]], np.uint8), crs=None)
    assert cells(outlets_from_raster(dem, path)) == {(0, 0)}


@pytest.mark.parametrize(
    ("options", "message"),
    [
        ({"data": np.ones((3, 2), np.uint8)}, r"is 3 × 2 cells but the DEM is 2 × 2"),
        ({"transform": grid(2.0)}, r"not on the DEM's grid \(cell size 2 × 2 vs the DEM's 1 × 1"),
        ({"transform": grid(west=WEST + 1.0)}, r"north-west corner \(500001, 5000000\)"),
        ({"crs": "EPSG:32634"}, r"is in 'WGS 84 / UTM zone 34N' but the DEM is in 'WGS 84 / UTM zone 33N'"),
        ({"data": np.ones((2, 2, 2), np.uint8)}, "has 2 bands"),
    ],
)
def test_mask_on_a_different_grid_says_what_differs(write_tif, options, message):
    dem = dem_from_array(np.zeros((2, 2)))
    data = options.pop("data", np.ones((2, 2), np.uint8))
    path = write_tif("m.tif", data, **options)
    with pytest.raises(InvalidOutlets, match=message):
        outlets_from_raster(dem, path)


def test_mask_marking_nothing_is_refused(write_tif, island_dem):
    dem = dem_from_array(np.zeros((2, 2)))
    with pytest.raises(InvalidOutlets, match="marks no cell"):
        outlets_from_raster(dem, write_tif("zero.tif", np.zeros((2, 2), np.uint8)))
    sea = np.zeros((6, 8), np.uint8)
    sea[0, :] = 1
    with pytest.raises(InvalidOutlets, match="marks only nodata cells"):
        outlets_from_raster(island_dem, write_tif("sea.tif", sea))


def test_mask_that_is_not_a_raster(tmp_path):
    dem = dem_from_array(np.zeros((2, 2)))
    path = tmp_path / "lake.tif"
    path.write_text("not a raster")
    with pytest.raises(InvalidOutlets, match="is not a raster Sillmark can read"):
        outlets_from_raster(dem, path)


# ---------------------------------------------------------------------------
# combinations


def test_build_outlets_default_is_edge(bowl_dem):
    out = build_outlets(bowl_dem)
    assert isinstance(out, Outlets)
    assert out.sources == ("edge",)
    np.testing.assert_array_equal(out.mask, edge_outlets(bowl_dem))
    assert out.count == 24
    with pytest.raises(ValueError):
        out.mask[0, 0] = False


def test_build_outlets_combines_sources(write_tif, tmp_path):
    z = np.zeros((6, 6))
    z[3, 3] = np.nan
    dem = dem_from_array(z)
    river = tmp_path / "river.geojson"
    river.write_text(json.dumps(in_utm({"type": "LineString", "coordinates": [[WEST + 1.5, NORTH - 1.5], [WEST + 1.5, NORTH - 2.5]]})))
    mask = np.zeros((6, 6), np.uint8)
    mask[4, 1] = 1
    lake = write_tif("lake.tif", mask)
    out = build_outlets(dem, ["edge", "nodata", river, str(lake)], connectivity=4)
    assert out.sources == ("edge", "nodata", "river.geojson", "lake.tif")
    expected = cells(edge_outlets(dem)) | {(2, 3), (3, 2), (3, 4), (4, 3)} | {(1, 1), (2, 1)} | {(4, 1)}
    assert cells(out.mask) == expected
    assert out.count == len(expected)


def test_build_outlets_accepts_a_single_spec_and_dicts(flat10):
    assert build_outlets(flat10, "edge").sources == ("edge",)
    point = in_utm({"type": "Point", "coordinates": [WEST + 4.5, NORTH - 4.5]})
    out = build_outlets(flat10, point)
    assert out.sources == ("GeoJSON object",) and cells(out.mask) == {(4, 4)}
    out = build_outlets(flat10, [json.dumps(point)])
    assert out.sources == ("GeoJSON text",) and out.count == 1


def test_outlets_are_always_valid_cells(island_dem, write_tif):
    everything = np.ones((6, 8), np.uint8)
    out = build_outlets(island_dem, ["edge", "nodata", write_tif("all.tif", everything)])
    assert not (out.mask & ~island_dem.valid).any()
    assert np.array_equal(out.mask, island_dem.valid)


@pytest.mark.parametrize(
    ("spec", "message"),
    [
        ("coast", "unknown outlet source 'coast'"),
        ("lake.shp", r"unknown outlet source 'lake.shp'.*\.geojson"),
        ("lake.vrt", "virtual raster"),
        (42, "unknown outlet source 42"),
    ],
)
def test_unknown_outlet_specs_are_refused(flat10, spec, message):
    with pytest.raises(InvalidOutlets, match=message):
        build_outlets(flat10, [spec])


def test_no_sources_is_refused(flat10):
    with pytest.raises(InvalidOutlets, match="no outlet sources given"):
        build_outlets(flat10, [])


def test_empty_outlet_set_names_the_sources_and_what_to_try(island_dem, flat10):
    with pytest.raises(InvalidOutlets, match=r"no outlet cells from 'edge' \(every cell on the DEM edge is nodata\); use --outlet nodata"):
        build_outlets(island_dem, ["edge"])
    with pytest.raises(InvalidOutlets, match=r"from 'nodata' \(the DEM has no nodata\); use --outlet edge"):
        build_outlets(flat10, ["nodata"])


def test_geojson_missing_the_grid_fails_even_in_a_combination(flat10):
    far = in_utm({"type": "Point", "coordinates": [WEST - 100.0, NORTH - 5.0]})
    with pytest.raises(InvalidOutlets, match="misses the grid"):
        build_outlets(flat10, ["edge", far])
