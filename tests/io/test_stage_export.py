"""Tests for sillmark.io.stage_files: water-level rasters, outlines and stage tables as files."""

from __future__ import annotations

import json
import math
import re
from pathlib import Path

import numpy as np
import pyproj
import pytest
import rasterio
import shapely
import shapely.geometry
from affine import Affine
from hypothesis import given, settings
from hypothesis import strategies as st
from rasterio.enums import Compression

from sillmark import SCREENING_CAUTION
from sillmark.products import inventory
from sillmark.io import geojson as geojson_files
from sillmark.io import stage_files as se
from sillmark.products.source import ArraySource
from sillmark.grid.dem import dem_from_array
from sillmark.errors import InvalidParameter
from sillmark.products.stage import (
    CLASS_NAMES,
    DRY,
    FLOODED,
    NODATA,
    SHIELDED,
    depression_states,
    stage_levels,
    stage_table,
    water_level_map,
)
from sillmark.units import ACRE_FOOT_M3
from sillmark import __version__
from tests.io.test_export import UTM33, polygons_of, read_csv, run, signed_area, site_elevation

#: Levels on the invented site of tests/io/test_export.py (edge at 15 m, plateau 20 m,
#: a 12 m bowl round a 25 m island, a pair of 10 m corner cells, an 18 m pit):
#: 14 m floods nothing (below the edge) but two depressions hold shielded ground;
#: 18.5 m floods the edge ring and leaves all three depressions cut off;
#: 20 m overtops every depression.
LEVELS = (14.0, 18.5, 20.0)


@pytest.fixture(scope="module")
def site():
    return run(site_elevation())


@pytest.fixture(scope="module")
def written(site, tmp_path_factory):
    dem, _, result = site
    out = tmp_path_factory.mktemp("stage")
    calls = []
    files = se.write_stage_results(ArraySource(dem, result), out, levels=LEVELS, table_levels=stage_levels(ArraySource(dem, result), step=0.5),
        progress=lambda *a: calls.append(a),
    )
    return out, files, calls


def a_map(site, level):
    dem, _, result = site
    return water_level_map(result, level, row_areas=dem.row_areas, unit=dem.vertical_unit)


# --------------------------------------------------------------------------- file names


def test_level_labels_are_readable_and_carry_the_unit():
    assert se.level_label(47.6, "m") == "47.60m"
    assert se.level_label(-1.25, "m") == "-1.25m"
    assert se.level_label(-0.0, "m") == "0.00m"  # no "-0.00": one name for zero
    assert se.level_label(47.605, "m") == "47.605m"  # more decimals when the level has them
    assert se.level_label(152.5, "ft") == "152.50ft"
    assert se.level_label(152.5, "us-ft") == "152.50us_ft"
    assert list(se.level_file_names(47.6, "m")) == [
        "depth_47.60m.tif", "water_state_47.60m.tif", "flood_extent_47.60m.geojson",
        "shielded_47.60m.geojson", "depressions_at_47.60m.csv",
    ]


@settings(max_examples=300, deadline=None)
@given(st.floats(width=32, allow_nan=False, allow_infinity=False),
       st.floats(width=32, allow_nan=False, allow_infinity=False))
def test_level_labels_are_unambiguous_and_safe_in_file_names(a, b):
    la, lb = se.level_label(a, "m"), se.level_label(b, "m")
    # Distinct float32 levels, distinct names (0.0 and -0.0 are one level).
    assert (la == lb) == (np.float32(a) == np.float32(b))
    # The label reads back as the level.
    assert np.float32(la[:-1]) == np.float32(a)
    # Digits, one point, a sign, the unit: nothing a file system treats specially.
    assert re.fullmatch(r"-?\d+\.\d+m", la)


@pytest.mark.parametrize("bad", [float("nan"), float("inf"), "high", 1e39])
def test_labels_refuse_what_is_not_a_water_level(bad):
    with pytest.raises(InvalidParameter):
        se.level_label(bad, "m")


# --------------------------------------------------------------------------- rasters


@pytest.mark.parametrize("level", LEVELS)
@pytest.mark.parametrize("kind", ["depth", "water_state"])
def test_geotiff_round_trip_equals_the_water_level_map(site, written, level, kind):
    dem, _, result = site
    out, _, _ = written
    names = se.level_file_names(level, "m")
    path = out / (names.depth if kind == "depth" else names.water_state)
    m = a_map(site, level)
    with rasterio.open(path) as ds:
        assert ds.driver == "GTiff"
        assert ds.crs == dem.crs and ds.transform == dem.transform
        assert ds.profile["tiled"] is True and ds.block_shapes == [(256, 256)]
        assert ds.compression == Compression.deflate
        tags = ds.tags()
        assert tags["SILLMARK_CAUTION"] == SCREENING_CAUTION
        assert tags["SILLMARK_VERSION"] == __version__
        assert tags["SILLMARK_LAYER"] == kind
        assert tags["VERTICAL_UNIT"] == "m"
        assert tags["WATER_LEVEL"] == se.level_text(level)
        assert np.float32(tags["WATER_LEVEL"]) == np.float32(level)
        assert tags["WATER_LEVEL_UNIT"] == "m"
        assert tags["CONNECTIVITY"] == "8"
        assert ds.descriptions[0]
        data = ds.read(1)
        if kind == "depth":
            assert ds.dtypes == ("float32",) and math.isnan(ds.nodata)
            assert ds.tags(ns="IMAGE_STRUCTURE")["PREDICTOR"] == "2"
            assert ds.units == ("metre",)
            np.testing.assert_array_equal(data, m.depth)  # NaN where NaN, equal elsewhere
        else:
            assert ds.dtypes == ("uint8",) and ds.nodata == 0
            assert ds.tags(ns="IMAGE_STRUCTURE")["PREDICTOR"] == "2"
            np.testing.assert_array_equal(data, m.state)


def test_water_state_tags_name_the_classes_of_analysis_stage(written):
    out, _, _ = written
    with rasterio.open(out / se.level_file_names(18.5, "m").water_state) as ds:
        tags = ds.tags()
    assert (NODATA, DRY, FLOODED, SHIELDED) == (0, 1, 2, 3)
    for code, name in CLASS_NAMES.items():
        assert tags[f"CLASS_{code}"] == name
        assert f"{code} = {name}" in tags["WATER_STATE_CLASSES"]
    assert "shielded" in tags["WATER_STATE_MEANING"]


def test_depth_is_level_minus_ground_on_flooded_cells_only(site, written):
    # Straight from the definitions, on the raw arrays: flooded where s <= h.
    dem, _, result = site
    out, _, _ = written
    h = np.float32(18.5)
    with rasterio.open(out / se.level_file_names(h, "m").depth) as ds:
        depth = ds.read(1)
    flooded = result.onset_stage <= h
    np.testing.assert_array_equal(depth[flooded], h - result.elevation[flooded])
    assert np.isnan(depth[~flooded]).all()
    assert (depth[flooded] >= 0).all()
    with rasterio.open(out / se.level_file_names(h, "m").water_state) as ds:
        state = ds.read(1)
    shielded = (result.elevation < h) & (result.onset_stage > h)
    assert np.array_equal(state == SHIELDED, shielded)
    assert np.array_equal(state == NODATA, np.isnan(result.onset_stage))


# --------------------------------------------------------------------------- GeoJSON


def geojson(out: Path, name: str) -> dict:
    return json.loads((out / name).read_text(encoding="utf-8"))


@pytest.mark.parametrize("level", LEVELS)
@pytest.mark.parametrize("kind", ["flood_extent", "shielded"])
def test_outlines_follow_rfc_7946(written, level, kind):
    out, _, _ = written
    names = se.level_file_names(level, "m")
    doc = geojson(out, names.flood_extent if kind == "flood_extent" else names.shielded)
    assert doc["type"] == "FeatureCollection"
    assert "crs" not in doc  # RFC 7946, section 4: no crs member
    assert doc["name"] == kind and doc["caution"] == SCREENING_CAUTION
    assert len(doc["features"]) <= 1  # dissolved: one feature per class
    for feature in doc["features"]:
        assert feature["type"] == "Feature"
        assert feature["geometry"]["type"] in ("Polygon", "MultiPolygon")
        for polygon in polygons_of(feature["geometry"]):
            for k, ring in enumerate(polygon):
                assert len(ring) >= 4 and ring[0] == ring[-1]  # section 3.1.6
                for lon, lat in ring:  # sections 3.1.1 and 4: lon, lat in WGS84 degrees
                    assert 14.9 < lon < 15.1 and 45.0 < lat < 45.2
                    # Rounded as depressions.geojson is (section 11.2).
                    assert lon == round(lon, geojson_files.COORDINATE_DECIMALS)
                    assert lat == round(lat, geojson_files.COORDINATE_DECIMALS)
                # Section 3.1.6: exterior counterclockwise, holes clockwise.
                assert (signed_area(ring) > 0) == (k == 0)
        assert shapely.geometry.shape(feature["geometry"]).is_valid


def test_outline_properties_carry_level_unit_class_totals_and_caution(site, written):
    out, _, _ = written
    m = a_map(site, 18.5)
    names = se.level_file_names(18.5, "m")
    for name, cls, area, volume in (
        (names.flood_extent, "flooded", m.flooded_area_m2, m.flooded_volume_m3),
        (names.shielded, "shielded", m.shielded_area_m2, m.shielded_volume_m3),
    ):
        doc = geojson(out, name)
        (feature,) = doc["features"]
        p = feature["properties"]
        assert p == {
            "level": 18.5, "unit": "m", "class": cls, "area_m2": area, "area_ha": area / 1e4,
            "volume_m3": volume, "connectivity": 8, "caution": SCREENING_CAUTION,
        }
        assert feature["id"] == cls
        assert {k: doc[k] for k in ("level", "unit", "class", "area_m2", "volume_m3")} == {
            k: p[k] for k in ("level", "unit", "class", "area_m2", "volume_m3")
        }
    # Hand count at 18.5 m: the 15 m edge ring (56 cells of 100 m²) floods 3.5 m
    # deep; the bowl (24 cells at 12 m), the 18 m pit and the two 10 m cells are
    # shielded: 27 cells.
    assert m.flooded_area_m2 == 5600.0 and m.flooded_volume_m3 == 5600.0 * 3.5
    assert m.shielded_area_m2 == 2700.0


def test_outline_areas_on_the_ellipsoid_match_the_map(site, written):
    """Geodesic area of each outline against the map's (grid) area.

    The same reasoning as tests/io/test_export.py,
    ``test_polygon_areas_on_the_ellipsoid_match_the_table``: on this UTM site,
    near the central meridian, ellipsoidal area = grid area / k0² (Transverse
    Mercator is conformal, area scale = k²; Snyder 1987, USGS Professional Paper
    1395, ch. 8, recalled from memory; k0 = 0.9996 from the EPSG dataset via
    PROJ), and rounding lon/lat to ``COORDINATE_DECIMALS`` places changes an
    area by at most about ``delta × perimeter``.
    """
    params = {p.name: p.value for p in pyproj.CRS(UTM33).coordinate_operation.params}
    k0 = params["Scale factor at natural origin"]
    geod = pyproj.Geod(ellps="WGS84")  # pyproj Geod, Karney (2013) algorithms
    half_step = 0.5 * 10.0 ** -geojson_files.COORDINATE_DECIMALS
    _, _, delta = geod.inv(15.0, 45.1, 15.0, 45.1 + half_step)
    out, _, _ = written
    checked = 0
    for level in LEVELS:
        m = a_map(site, level)
        names = se.level_file_names(level, "m")
        for name, map_area in ((names.flood_extent, m.flooded_area_m2),
                               (names.shielded, m.shielded_area_m2)):
            features = geojson(out, name)["features"]
            if map_area == 0:
                assert features == []
                continue
            area, perimeter = geod.geometry_area_perimeter(shapely.geometry.shape(features[0]["geometry"]))
            assert area == pytest.approx(map_area / k0**2, abs=delta * perimeter)
            checked += 1
    assert checked == 4  # 14 m: shielded only; 18.5 m: both; 20 m: flooded only


def test_outline_areas_match_the_map_on_a_geographic_dem(tmp_path):
    """Lon/lat DEM: the map's cell areas and the outline areas are both on the
    WGS84 ellipsoid; as in tests/io/test_export.py they agree to 1e-6."""
    transform = Affine(1e-4, 0.0, 15.0, 0.0, -1e-4, 45.0)
    dem, _, result = run(site_elevation(), transform=transform, crs="EPSG:4326")
    m = water_level_map(result, 18.5, row_areas=dem.row_areas)
    files = se.write_level(ArraySource(dem, result), 18.5, tmp_path)
    names = se.level_file_names(18.5, dem.vertical_unit)
    assert files.flooded_area_m2 == m.flooded_area_m2 and files.shielded_area_m2 == m.shielded_area_m2
    geod = pyproj.Geod(ellps="WGS84")
    for name, expected in ((names.flood_extent, m.flooded_area_m2), (names.shielded, m.shielded_area_m2)):
        (feature,) = geojson(tmp_path, name)["features"]
        area, _ = geod.geometry_area_perimeter(shapely.geometry.shape(feature["geometry"]))
        assert area == pytest.approx(expected, rel=1e-6)


def test_corner_pieces_and_island_hole_survive_the_dissolve(site, written):
    out, _, _ = written
    # At 14 m the two 10 m cells that meet at a corner are shielded, and so is the
    # bowl round its island: three pieces, one with a hole.
    (feature,) = geojson(out, se.level_file_names(14.0, "m").shielded)["features"]
    geometry = feature["geometry"]
    assert geometry["type"] == "MultiPolygon"
    rings = sorted(len(p) for p in geometry["coordinates"])
    assert rings == [1, 1, 2]


def test_nothing_of_a_class_writes_an_empty_collection_with_totals(written):
    out, _, _ = written
    doc = geojson(out, se.level_file_names(14.0, "m").flood_extent)
    assert doc["features"] == []
    assert doc["area_m2"] == 0 and doc["volume_m3"] == 0 and doc["class"] == "flooded"
    assert doc["caution"] == SCREENING_CAUTION


# --------------------------------------------------------------------------- tables


def test_stage_table_csv_equals_stage_table(site, written):
    dem, _, result = site
    out, files, _ = written
    comments, header, rows = read_csv(out / "stage_table.csv")
    assert comments == []  # the header is the first line; the caution is in README.txt
    assert header == [
        "level_m", "flooded_area_m2", "flooded_area_ha", "flooded_volume_m3",
        "shielded_area_m2", "shielded_area_ha", "shielded_volume_m3",
    ]
    levels = stage_levels(ArraySource(dem, result), step=0.5)
    t = stage_table(ArraySource(dem, result), levels)
    assert len(rows) == len(t) == len(files.table)
    for k, row in enumerate(rows):
        # Written as the shortest text that reads back exactly.
        assert np.float32(row["level_m"]) == t.level[k]
        assert float(row["flooded_area_m2"]) == t.flooded_area_m2[k]
        assert float(row["flooded_area_ha"]) == t.flooded_area_m2[k] / 1e4
        assert float(row["flooded_volume_m3"]) == t.flooded_volume_m3[k]
        assert float(row["shielded_area_m2"]) == t.shielded_area_m2[k]
        assert float(row["shielded_area_ha"]) == t.shielded_area_m2[k] / 1e4
        assert float(row["shielded_volume_m3"]) == t.shielded_volume_m3[k]


def test_stage_table_rows_agree_with_the_maps_of_the_same_levels(site, written):
    out, _, _ = written
    _, _, rows = read_csv(out / "stage_table.csv")
    by_level = {np.float32(r["level_m"]): r for r in rows}
    for level in (18.5, 20.0):  # levels on the 0.5 m grid from 15 m
        m = a_map(site, level)
        row = by_level[np.float32(level)]
        assert float(row["flooded_area_m2"]) == pytest.approx(m.flooded_area_m2, abs=1e-9)
        assert float(row["flooded_volume_m3"]) == pytest.approx(m.flooded_volume_m3, abs=1e-9)
        assert float(row["shielded_area_m2"]) == pytest.approx(m.shielded_area_m2, abs=1e-9)
        assert float(row["shielded_volume_m3"]) == pytest.approx(m.shielded_volume_m3, abs=1e-9)


def test_stage_table_in_feet_adds_acre_feet(tmp_path):
    dem, _, result = run(site_elevation(), unit="ft")
    t = stage_table(ArraySource(dem, result), [18.5, 20.0])
    se.write_stage_table_csv(ArraySource(dem, result), t, tmp_path / "t.csv")
    comments, header, rows = read_csv(tmp_path / "t.csv")
    assert comments == []
    assert header[0] == "level_ft"
    assert "flooded_volume_acre_ft" in header and "shielded_volume_acre_ft" in header
    # 56 cells of 100 m², 3.5 ft deep; 1 ft = 0.3048 m and 1 acre-ft = 43 560 ft³
    # (NIST Handbook 44, Appendix C).
    assert float(rows[0]["flooded_volume_m3"]) == pytest.approx(5600 * 3.5 * 0.3048, rel=1e-12)
    assert float(rows[0]["flooded_volume_acre_ft"]) == pytest.approx(
        5600 * 3.5 * 0.3048 / (43560 * 0.3048**3), rel=1e-12
    )
    assert float(rows[1]["shielded_volume_acre_ft"]) == 0


def test_stage_table_of_another_unit_is_refused(site, tmp_path):
    dem, _, result = site
    feet = dem_from_array(dem.elevation, transform=dem.transform, crs=dem.crs, vertical_unit="ft")
    t = stage_table(ArraySource(feet, result), [18.5])
    with pytest.raises(InvalidParameter, match="vertical unit"):
        se.write_stage_table_csv(ArraySource(dem, result), t, tmp_path / "t.csv")
    assert list(tmp_path.iterdir()) == []


@pytest.mark.parametrize("level", LEVELS)
def test_depressions_at_a_level(site, written, level):
    dem, _, result = site
    out, _, _ = written
    comments, header, rows = read_csv(out / se.level_file_names(level, "m").depressions)
    assert comments == []
    assert header[:3] == ["id", "state", "freeboard_m"]
    for column in ("pit_elevation_m", "spill_elevation_m", "area_m2", "area_ha", "volume_m3"):
        assert column in header
    states, freeboard = depression_states(result.depressions, level)
    t = result.depressions
    table = inventory.depression_columns(result, dem)
    assert len(rows) == len(t) == 3
    for k, row in enumerate(rows):
        assert int(row["id"]) == t.id[k]
        assert row["state"] == states[k]
        assert np.float32(row["freeboard_m"]) == freeboard[k]
        assert np.float32(row["spill_elevation_m"]) == t.spill_elevation[k]
        assert np.float32(row["pit_elevation_m"]) == t.pit_elevation[k]
        assert float(row["area_m2"]) == t.area_m2[k]
        assert float(row["volume_m3"]) == table["volume_m3"][k]
    expected = {14.0: {"below level, cut off", "dry"}, 18.5: {"below level, cut off"},
                20.0: {"overtopped"}}[level]
    assert {r["state"] for r in rows} == expected


def test_depressions_at_a_level_on_a_site_without_depressions(tmp_path):
    dem, _, result = run(np.arange(48, dtype=np.float32).reshape(6, 8))  # a plane
    se.write_depressions_at_csv(ArraySource(dem, result), 3.0, tmp_path / "d.csv")
    _, header, rows = read_csv(tmp_path / "d.csv")
    assert rows == [] and header[:2] == ["id", "state"]


# --------------------------------------------------------------------------- the set


def test_write_stage_results_writes_each_level_once_in_order(site, tmp_path):
    dem, _, result = site
    files = se.write_stage_results(ArraySource(dem, result), tmp_path, levels=[20, 18.5, 18.50, 20.0])
    assert [lf.level for lf in files.levels] == [18.5, 20.0]
    assert files.table is None and files.table_path is None
    assert sorted(p.name for p in tmp_path.iterdir()) == sorted(p.name for p in files.paths)
    assert len(files.paths) == 10
    overtopped = files.levels[1]
    assert (overtopped.depressions_overtopped, overtopped.depressions_cut_off,
            overtopped.depressions_dry) == (3, 0, 0)


def test_written_set_has_no_temporaries_and_reports_progress(written):
    out, files, calls = written
    assert sorted(p.name for p in out.iterdir()) == sorted(p.name for p in files.paths)
    assert len(files.paths) == 5 * len(LEVELS) + 1
    assert {c[0] for c in calls} == {p.name for p in files.paths}
    assert all(done <= total for _, done, total in calls)


def test_same_site_and_levels_give_byte_identical_files(site, written, tmp_path):
    dem, _, result = site
    out, files, _ = written
    se.write_stage_results(ArraySource(dem, result), tmp_path, levels=LEVELS, table_levels=stage_levels(ArraySource(dem, result), step=0.5))
    for path in files.paths:
        assert (tmp_path / path.name).read_bytes() == path.read_bytes(), path.name


def test_a_failed_write_keeps_the_previous_file(site, tmp_path, monkeypatch):
    dem, _, result = site
    se.write_level(ArraySource(dem, result), 18.5, tmp_path)
    names = se.level_file_names(18.5, "m")
    before = (tmp_path / names.flood_extent).read_bytes()

    def broken(*args, **kwargs):
        raise RuntimeError("disk full, say")

    monkeypatch.setattr(se, "label_outlines", broken)
    with pytest.raises(RuntimeError):
        se.write_level(ArraySource(dem, result), 18.5, tmp_path)
    assert (tmp_path / names.flood_extent).read_bytes() == before
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".")]


def test_feet_site_names_files_in_feet_and_reports_acre_feet(tmp_path):
    dem, _, result = run(site_elevation(), unit="us-ft")
    files = se.write_level(ArraySource(dem, result), 18.5, tmp_path)
    assert [p.name for p in files.paths][0] == "depth_18.50us_ft.tif"
    with rasterio.open(files.paths[0]) as ds:
        assert ds.units == ("US survey foot",) and ds.tags()["WATER_LEVEL_UNIT"] == "us-ft"
    p = geojson(tmp_path, files.paths[2].name)["features"][0]["properties"]
    assert p["unit"] == "us-ft"
    # 1 US survey foot = 1200/3937 m exactly (NIST Handbook 44, Appendix C).
    assert p["volume_m3"] == pytest.approx(5600 * 3.5 * 1200 / 3937, rel=1e-12)
    assert p["volume_acre_ft"] == pytest.approx(p["volume_m3"] / ACRE_FOOT_M3, rel=1e-12)


def test_a_result_of_another_grid_is_refused(site, tmp_path):
    dem, _, result = site
    other = dem_from_array(np.zeros((3, 3), dtype=np.float32))
    with pytest.raises(InvalidParameter, match="computed on this DEM"):
        se.write_level(ArraySource(other, result), 18.5, tmp_path)
    assert list(tmp_path.iterdir()) == []


def test_bad_requests_are_refused_before_writing(site, tmp_path):
    dem, _, result = site
    with pytest.raises(InvalidParameter, match="at least one water level"):
        se.write_stage_results(ArraySource(dem, result), tmp_path / "a")
    with pytest.raises(InvalidParameter):
        se.write_stage_results(ArraySource(dem, result), tmp_path / "b", levels=[18.5, float("nan")])
    (tmp_path / "taken").write_text("someone's file\n")
    with pytest.raises(InvalidParameter, match="is a file"):
        se.write_stage_results(ArraySource(dem, result), tmp_path / "taken", levels=[18.5])
    assert sorted(p.name for p in tmp_path.iterdir()) == ["taken"]
