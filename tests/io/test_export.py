"""Tests for sillmark.io.export: GeoTIFF, CSV, GeoJSON and summary files of a site run."""

from __future__ import annotations

import csv
import datetime
import json
import math
from pathlib import Path

import numpy as np
import pyproj
import pytest
import rasterio
import shapely
import shapely.geometry
from affine import Affine
from rasterio.enums import Compression

from sillmark.products.source import ArraySource
from sillmark import SCREENING_CAUTION
from sillmark.io import atomic
from sillmark.io import csv_tables
from sillmark.io import export
from sillmark.io import geojson as geojson_files
from sillmark.io import geotiff
from sillmark.io import summary
from sillmark.grid.dem import dem_from_array
from sillmark.errors import InvalidParameter
from sillmark.engine.flood import analyse_site
from sillmark.grid.outlets import build_outlets
from sillmark.units import ACRE_FOOT_M3, VerticalUnit
from sillmark import __version__


#: 10 m cells whose north-west corner sits on the central meridian of UTM zone
#: 33N (500 000 E), near 45.1° N. Invented site.
CELL = 10.0
SITE = Affine(CELL, 0.0, 500_000.0, 0.0, -CELL, 5_000_000.0)
UTM33 = "EPSG:32633"


def site_elevation() -> np.ndarray:
    """14 × 16 invented site with three depressions, nodata and walled-in ground.

    - a 5 × 5 bowl at 12 m in a 20 m plateau, with a 25 m island in its middle
      (the island is in no depression, so the outline has a hole);
    - two 10 m cells that touch only at a corner (one depression with
      8-neighbour connectivity, two pieces on the map);
    - a single 18 m pit;
    - a ring of nodata around one valid cell that no outlet reaches;
    - the grid edge at 15 m (the outlets).
    """
    z = np.full((14, 16), 20.0, dtype=np.float32)
    z[0, :] = z[-1, :] = z[:, 0] = z[:, -1] = 15.0
    z[2:7, 2:7] = 12.0
    z[4, 4] = 25.0
    z[9, 10] = 10.0
    z[10, 11] = 10.0
    z[3, 12] = 18.0
    z[8:11, 1:4] = np.nan
    z[9, 2] = 17.0  # walled in by nodata on all eight sides
    return z


def run(z: np.ndarray, *, transform: Affine = SITE, crs: str = UTM33, unit: str = "m",
        connectivity: int = 8):
    dem = dem_from_array(z, transform=transform, crs=crs, vertical_unit=unit)
    outlets = build_outlets(dem, ("edge",), connectivity=connectivity)
    return dem, outlets, analyse_site(dem, outlets, connectivity=connectivity)


@pytest.fixture(scope="module")
def site():
    return run(site_elevation())


@pytest.fixture(scope="module")
def written(site, tmp_path_factory):
    dem, outlets, result = site
    out = tmp_path_factory.mktemp("results")
    calls = []
    paths = export.write_results(result, dem, outlets, out, progress=lambda *a: calls.append(a))
    return out, paths, calls


#: Every file of a run, in the order written: README.txt comes just before the summary.
WRITTEN = [*summary.FILE_NAMES[:-1], "README.txt", summary.FILE_NAMES[-1]]


def read_csv(path: Path) -> tuple[list[str], list[str], list[dict[str, str]]]:
    lines = path.read_text(encoding="utf-8").splitlines()
    comments = [line for line in lines if line.startswith("#")]
    body = [line for line in lines if not line.startswith("#")]
    rows = list(csv.DictReader(body))
    return comments, body[0].split(","), rows


def signed_area(ring: list) -> float:
    """Shoelace area of a closed lon/lat ring: positive when counterclockwise."""
    xy = np.asarray(ring, dtype=np.float64)
    x, y = xy[:, 0], xy[:, 1]
    return 0.5 * float(np.sum(x[:-1] * y[1:] - x[1:] * y[:-1]))


def polygons_of(geometry: dict) -> list:
    if geometry["type"] == "Polygon":
        return [geometry["coordinates"]]
    assert geometry["type"] == "MultiPolygon"
    return geometry["coordinates"]


# --------------------------------------------------------------------------- the site itself


def test_the_invented_site_has_the_depressions_it_was_built_with(site):
    _, _, result = site
    t = result.depressions
    assert len(t) == 3
    assert result.unreached_cells == 1
    assert result.depression_id[9, 10] == result.depression_id[10, 11] > 0
    assert result.depression_id[4, 4] == 0


# --------------------------------------------------------------------------- rasters

RASTERS = {
    # file: (dtype, nodata, TIFF predictor: 2 horizontal differencing, for every type)
    "onset_stage.tif": ("float32", "nan", "2"),
    "fill_depth.tif": ("float32", "nan", "2"),
    "depression_id.tif": ("int32", -1, "2"),
    "flood_tree.tif": ("uint8", 0, "2"),
}


def expected_raster(name: str, result) -> np.ndarray:
    if name == "onset_stage.tif":
        return result.onset_stage
    if name == "fill_depth.tif":
        return result.fill_depth
    if name == "depression_id.tif":
        ids = result.depression_id.copy()
        ids[np.isnan(result.onset_stage)] = -1
        return ids
    return result.flood_tree


@pytest.mark.parametrize("name", sorted(RASTERS))
def test_geotiff_round_trip(name, site, written):
    dem, _, result = site
    out, _, _ = written
    dtype, nodata, predictor = RASTERS[name]
    with rasterio.open(out / name) as ds:
        assert ds.driver == "GTiff"
        assert ds.crs == dem.crs
        assert ds.transform == dem.transform
        assert ds.dtypes == (dtype,)
        assert ds.profile["tiled"] is True
        assert ds.block_shapes == [(256, 256)]
        assert ds.compression == Compression.deflate
        assert ds.tags(ns="IMAGE_STRUCTURE")["PREDICTOR"] == predictor
        if nodata == "nan":
            assert math.isnan(ds.nodata)
        else:
            assert ds.nodata == nodata
        tags = ds.tags()
        assert tags["SILLMARK_CAUTION"] == SCREENING_CAUTION
        assert tags["VERTICAL_UNIT"] == "m"
        assert tags["SILLMARK_VERSION"] == __version__
        assert tags["CONNECTIVITY"] == "8"
        assert ds.descriptions[0]
        data = ds.read(1)
    expected = expected_raster(name, result)
    assert data.dtype == np.dtype(dtype)
    np.testing.assert_array_equal(data, expected)  # NaN where NaN, exactly equal elsewhere


def test_float_rasters_carry_the_vertical_unit_on_the_band(written):
    out, _, _ = written
    for name in ("onset_stage.tif", "fill_depth.tif"):
        with rasterio.open(out / name) as ds:
            assert ds.units == ("metre",)
    with rasterio.open(out / "flood_tree.tif") as ds:
        assert "9 = outlet" in ds.tags()["FLOOD_TREE_CODES"]


def test_depression_ids_mark_nodata_and_unreached_cells_minus_one(site, written):
    _, _, result = site
    out, _, _ = written
    with rasterio.open(out / "depression_id.tif") as ds:
        ids = ds.read(1)
    assert ids[8, 1] == -1  # nodata
    assert ids[9, 2] == -1  # valid, but walled in by nodata
    assert ids[4, 4] == 0  # island: valid, in no depression
    assert set(np.unique(ids)) == {-1, 0, 1, 2, 3}
    assert np.isnan(result.onset_stage[9, 2])


def test_tall_raster_is_written_in_blocks_that_join_exactly(tmp_path):
    # 600 rows = blocks of 256 + 256 + 88 rows.
    rng = np.random.default_rng(7)
    z = (rng.random((600, 9)) * 5.0).astype(np.float32)
    dem, _, result = run(z)
    calls = []
    geotiff.write_onset_stage(result, dem, tmp_path / "s.tif", progress=lambda *a: calls.append(a))
    assert calls == [("s.tif", 1, 3), ("s.tif", 2, 3), ("s.tif", 3, 3)]
    with rasterio.open(tmp_path / "s.tif") as ds:
        np.testing.assert_array_equal(ds.read(1), result.onset_stage)
        assert ds.block_shapes == [(256, 256)]


# --------------------------------------------------------------------------- CSV


def test_csv_starts_with_its_header_and_the_readme_carries_caution_unit_and_crs(written):
    out, _, _ = written
    comments, header, _ = read_csv(out / "depressions.csv")
    assert comments == []
    first = (out / "depressions.csv").read_text(encoding="utf-8").splitlines()[0]
    assert first.split(",") == header and header[0] == "id"
    readme = " ".join((out / "README.txt").read_text(encoding="utf-8").split())
    assert " ".join(SCREENING_CAUTION.split()) in readme
    assert "are in metre (m), measured from: datum not stated" in readme
    assert "EPSG:32633" in readme


def test_csv_columns_carry_units_and_numbers_match_the_table(site, written):
    dem, _, result = site
    out, _, _ = written
    _, header, rows = read_csv(out / "depressions.csv")
    assert header == [
        "id", "pit_row", "pit_col", "pit_elevation_m", "spill_row", "spill_col",
        "spill_x_m", "spill_y_m", "spill_lon_deg", "spill_lat_deg", "spill_elevation_m",
        "spills_to", "max_depth_m", "cell_count", "area_m2", "area_ha", "volume_m3",
    ]
    t = result.depressions
    assert len(rows) == len(t)
    for k, row in enumerate(rows):
        assert int(row["id"]) == t.id[k]
        assert (int(row["pit_row"]), int(row["pit_col"])) == (t.pit_row[k], t.pit_col[k])
        assert (int(row["spill_row"]), int(row["spill_col"])) == (t.spill_row[k], t.spill_col[k])
        assert int(row["spills_to"]) == t.spills_to[k]
        assert int(row["cell_count"]) == t.cell_count[k]
        # float32 columns are written as the shortest text that reads back exactly.
        assert np.float32(row["pit_elevation_m"]) == t.pit_elevation[k]
        assert np.float32(row["spill_elevation_m"]) == t.spill_elevation[k]
        assert np.float32(row["max_depth_m"]) == t.max_depth[k]
        assert float(row["spill_x_m"]) == t.spill_x[k]
        assert float(row["spill_y_m"]) == t.spill_y[k]
        assert float(row["area_m2"]) == t.area_m2[k]
        assert float(row["area_ha"]) == pytest.approx(t.area_m2[k] / 1e4, rel=1e-15)
        assert float(row["volume_m3"]) == pytest.approx(t.volume_m2_vu[k], rel=1e-15)
    # The bowl: 24 cells of 100 m² (25 minus the island), 8 m deep to its 20 m rim.
    bowl = next(r for r in rows if int(r["cell_count"]) == 24)
    assert float(bowl["area_m2"]) == 2400.0
    assert float(bowl["volume_m3"]) == 24 * 100.0 * 8.0
    assert float(bowl["spill_elevation_m"]) == 20.0


def test_csv_in_feet_converts_volume_and_adds_acre_feet(tmp_path):
    dem, _, result = run(site_elevation(), unit="ft")
    csv_tables.write_depressions_csv(result, dem, tmp_path / "d.csv")
    comments, header, rows = read_csv(tmp_path / "d.csv")
    assert comments == []
    assert "pit_elevation_ft" in header and "max_depth_ft" in header
    assert header[-2:] == ["volume_m3", "volume_acre_ft"]
    bowl = next(r for r in rows if int(r["cell_count"]) == 24)
    # 2400 m² × 8 ft; 1 ft = 0.3048 m exactly (NIST Handbook 44, Appendix C).
    assert float(bowl["volume_m3"]) == pytest.approx(2400.0 * 8.0 * 0.3048, rel=1e-12)
    # 1 acre-ft = 43 560 ft³ (NIST Handbook 44, Appendix C) = 1233.48183754752 m³.
    assert ACRE_FOOT_M3 == pytest.approx(1233.48183754752, rel=1e-14)
    assert float(bowl["volume_acre_ft"]) == pytest.approx(
        2400.0 * 8.0 * 0.3048 / 1233.48183754752, rel=1e-12
    )


def test_csv_spill_point_in_lon_lat_matches_pyproj(site, written):
    dem, _, result = site
    out, _, _ = written
    _, _, rows = read_csv(out / "depressions.csv")
    # Reference: pyproj (PROJ) transformation UTM 33N -> WGS84, lon/lat order.
    to_wgs84 = pyproj.Transformer.from_crs(UTM33, "EPSG:4326", always_xy=True)
    for k, row in enumerate(rows):
        lon, lat = to_wgs84.transform(result.depressions.spill_x[k], result.depressions.spill_y[k])
        assert float(row["spill_lon_deg"]) == pytest.approx(lon, abs=1e-12)
        assert float(row["spill_lat_deg"]) == pytest.approx(lat, abs=1e-12)
        assert 14.9 < lon < 15.1 and 45.0 < lat < 45.2


# --------------------------------------------------------------------------- GeoJSON


def test_depressions_geojson_follows_rfc_7946(site, written):
    _, _, result = site
    out, _, _ = written
    doc = json.loads((out / "depressions.geojson").read_text(encoding="utf-8"))
    assert doc["type"] == "FeatureCollection"
    assert "crs" not in doc  # RFC 7946, section 4: no crs member
    assert len(doc["features"]) == len(result.depressions)
    for feature in doc["features"]:
        assert feature["type"] == "Feature"
        assert feature["geometry"]["type"] in ("Polygon", "MultiPolygon")
        for polygon in polygons_of(feature["geometry"]):
            for k, ring in enumerate(polygon):
                # RFC 7946, section 3.1.6: a linear ring is closed, >= 4 positions.
                assert len(ring) >= 4
                assert ring[0] == ring[-1]
                # Section 3.1.1 (positions lon, lat) and 4 (WGS84 degrees).
                for lon, lat in ring:
                    assert -180.0 <= lon <= 180.0 and -90.0 <= lat <= 90.0
                    assert 14.9 < lon < 15.1 and 45.0 < lat < 45.2  # it is lon first
                # Section 3.1.6: exterior counterclockwise, holes clockwise.
                if k == 0:
                    assert signed_area(ring) > 0
                else:
                    assert signed_area(ring) < 0
            assert shapely.geometry.shape(feature["geometry"]).is_valid


def test_depression_outlines_have_the_island_hole_and_the_corner_pieces(site, written):
    _, _, result = site
    out, _, _ = written
    doc = json.loads((out / "depressions.geojson").read_text(encoding="utf-8"))
    by_id = {f["id"]: f for f in doc["features"]}
    bowl = by_id[int(result.depression_id[2, 2])]["geometry"]
    assert bowl["type"] == "Polygon" and len(bowl["coordinates"]) == 2  # shell + island
    corners = by_id[int(result.depression_id[9, 10])]["geometry"]
    assert corners["type"] == "MultiPolygon" and len(corners["coordinates"]) == 2


def test_polygon_areas_on_the_ellipsoid_match_the_table(site, written):
    """Geodesic area of each outline against the table's grid area.

    For a projected DEM the table holds grid area (cell width × height). A
    Transverse Mercator projection is conformal, so its area scale factor is the
    square of its point scale factor k (Snyder 1987, USGS Professional Paper
    1395, ch. 8; recalled from memory). On the central meridian k equals the
    scale factor at natural origin, read here from the CRS definition (EPSG
    dataset via PROJ); the site spans 160 m east of it, where k differs from k0
    by under 1e-9. So ellipsoidal area = grid area / k0², an 8e-4 effect.

    Tolerance: the only other error is the rounding of lon/lat to
    ``COORDINATE_DECIMALS`` places, which moves each vertex by at most
    ``delta`` metres (half a unit of the last place, measured along a meridian
    with pyproj's geodesic, the longer of the two directions), and so changes
    the area by at most about ``delta × perimeter``: 0.05 m² on the 200 m²
    depression, against the 0.16 m² effect being checked (and 0.022 m² against
    0.08 m² on the one-cell depression). Without rounding the
    two agree to 1e-8 (checked while writing this test).
    """
    _, _, result = site
    out, _, _ = written
    params = {p.name: p.value for p in pyproj.CRS(UTM33).coordinate_operation.params}
    k0 = params["Scale factor at natural origin"]
    assert k0 == 0.9996
    geod = pyproj.Geod(ellps="WGS84")  # pyproj Geod, Karney (2013) algorithms
    half_step = 0.5 * 10.0 ** -geojson_files.COORDINATE_DECIMALS
    _, _, delta = geod.inv(15.0, 45.1, 15.0, 45.1 + half_step)
    doc = json.loads((out / "depressions.geojson").read_text(encoding="utf-8"))
    for feature in doc["features"]:
        area, perimeter = geod.geometry_area_perimeter(shapely.geometry.shape(feature["geometry"]))
        assert area > 0  # pyproj reports counterclockwise outlines as positive
        table_area = result.depressions.area_m2[feature["id"] - 1]
        assert feature["properties"]["area_m2"] == table_area
        assert area == pytest.approx(table_area / k0**2, abs=delta * perimeter)
        assert abs(area - table_area) > 1.5 * delta * perimeter  # the k0 effect is resolved


def test_polygon_areas_match_the_table_on_a_geographic_dem(tmp_path):
    """Lon/lat DEM: the table's cell areas and the outline areas are both on the
    WGS84 ellipsoid, so they agree closely. Cells are 1e-4 degree on a grid
    starting at 15 E, 45 N, so rounding to 8 decimals moves no vertex beyond
    floating-point noise; what remains is the outlines' parallel edges being
    geodesics, which for edges a few 1e-4 degree long bow by far less than the
    1e-6 tolerance (the table's cell areas follow the parallels, see
    sillmark.grid.dem)."""
    z = site_elevation()
    transform = Affine(1e-4, 0.0, 15.0, 0.0, -1e-4, 45.0)
    dem, _, result = run(z, transform=transform, crs="EPSG:4326")
    path = geojson_files.write_depressions_geojson(ArraySource(dem, result), tmp_path / "d.geojson")
    doc = json.loads(path.read_text(encoding="utf-8"))
    geod = pyproj.Geod(ellps="WGS84")
    assert len(doc["features"]) == len(result.depressions) == 3
    for feature in doc["features"]:
        area, _ = geod.geometry_area_perimeter(shapely.geometry.shape(feature["geometry"]))
        assert area == pytest.approx(result.depressions.area_m2[feature["id"] - 1], rel=1e-6)


def test_depression_properties_carry_units_and_caution(written):
    out, _, _ = written
    doc = json.loads((out / "depressions.geojson").read_text(encoding="utf-8"))
    assert doc["caution"] == SCREENING_CAUTION
    for feature in doc["features"]:
        p = feature["properties"]
        assert p["caution"] == SCREENING_CAUTION
        assert p["vertical_unit"] == "m"
        assert {"spill_elevation_m", "max_depth_m", "area_m2", "area_ha", "volume_m3"} <= set(p)
        assert p["id"] == feature["id"]


def test_spill_points_geojson(site, written):
    _, _, result = site
    out, _, _ = written
    doc = json.loads((out / "spill_points.geojson").read_text(encoding="utf-8"))
    assert doc["type"] == "FeatureCollection" and "crs" not in doc  # RFC 7946, section 4
    t = result.depressions
    assert len(doc["features"]) == len(t)
    # Reference: pyproj (PROJ) transformation UTM 33N -> WGS84, lon/lat order.
    to_wgs84 = pyproj.Transformer.from_crs(UTM33, "EPSG:4326", always_xy=True)
    for k, feature in enumerate(doc["features"]):
        assert feature["geometry"]["type"] == "Point"
        lon, lat = feature["geometry"]["coordinates"]
        # The spill cell centre, from the DEM's own transform.
        x = SITE.c + (t.spill_col[k] + 0.5) * CELL
        y = SITE.f - (t.spill_row[k] + 0.5) * CELL
        ref_lon, ref_lat = to_wgs84.transform(x, y)
        assert lon == pytest.approx(ref_lon, abs=1e-8) and lat == pytest.approx(ref_lat, abs=1e-8)
        assert feature["properties"] == {
            "id": int(t.id[k]),
            "spill_elevation": float(t.spill_elevation[k]),
            "unit": "m",
            "spills_to": int(t.spills_to[k]),
            "caution": SCREENING_CAUTION,
        }


# --------------------------------------------------------------------------- summary and the set


def test_summary_json(site, written):
    dem, outlets, result = site
    out, _, _ = written
    s = json.loads((out / "summary.json").read_text(encoding="utf-8"))
    assert s["caution"] == SCREENING_CAUTION
    assert s["sillmark_version"] == __version__
    created = datetime.datetime.fromisoformat(s["created_utc"])
    assert created.utcoffset() == datetime.timedelta(0)
    assert s["grid"]["rows"] == 14 and s["grid"]["cols"] == 16
    assert s["grid"]["cell_size"] == {"x": CELL, "y": CELL, "unit": "metre"}
    assert s["grid"]["crs"]["epsg"] == 32633
    assert pyproj.CRS(s["grid"]["crs"]["wkt"]).to_epsg() == 32633
    assert s["grid"]["vertical_unit"] == "m"
    assert s["outlets"] == {"sources": ["edge"], "cell_count": outlets.count}
    assert s["connectivity"] == 8
    assert s["unreached_cells"] == 1
    d = s["depressions"]
    t = result.depressions
    assert d["count"] == 3
    assert d["total_area_m2"] == pytest.approx(float(t.area_m2.sum()))
    assert d["total_area_ha"] == pytest.approx(float(t.area_m2.sum()) / 1e4)
    assert d["total_volume_m3"] == pytest.approx(float(t.volume_m2_vu.sum()))
    assert "total_volume_acre_ft" not in d
    assert d["highest_spill_elevation"]["value"] == float(t.spill_elevation.max()) == 20.0
    assert d["highest_spill_elevation"]["unit"] == "m"
    assert s["files"] == WRITTEN


def test_write_results_writes_every_file_atomically(written):
    out, paths, calls = written
    assert [p.name for p in paths] == WRITTEN
    assert sorted(p.name for p in out.iterdir()) == sorted(WRITTEN)  # no temp files left
    assert all(p.stat().st_size > 0 for p in paths)
    assert {c[0] for c in calls} == set(WRITTEN)
    assert all(done <= total for _, done, total in calls)


def test_failed_write_keeps_the_previous_file_and_leaves_no_temporary(tmp_path):
    target = tmp_path / "depressions.csv"
    target.write_text("previous complete result\n")
    with pytest.raises(RuntimeError):
        with atomic.atomic_output(target) as tmp:
            tmp.write_text("half a res")
            raise RuntimeError("disk full, say")
    assert target.read_text() == "previous complete result\n"
    assert [p.name for p in tmp_path.iterdir()] == ["depressions.csv"]


def test_a_site_without_depressions_writes_empty_tables(tmp_path):
    z = np.arange(48, dtype=np.float32).reshape(6, 8)  # a plane: nothing holds water
    dem, outlets, result = run(z)
    export.write_results(result, dem, outlets, tmp_path)
    _, header, rows = read_csv(tmp_path / "depressions.csv")
    assert rows == [] and header[0] == "id"
    for name in ("depressions.geojson", "spill_points.geojson"):
        assert json.loads((tmp_path / name).read_text())["features"] == []
    s = json.loads((tmp_path / "summary.json").read_text())
    assert s["depressions"]["count"] == 0 and s["depressions"]["highest_spill_elevation"] is None


def test_feet_site_summary_has_acre_feet(tmp_path):
    dem, outlets, result = run(site_elevation(), unit="us-ft")
    export.write_results(result, dem, outlets, tmp_path)
    s = json.loads((tmp_path / "summary.json").read_text())
    d = s["depressions"]
    # 1 US survey foot = 1200/3937 m exactly (NIST Handbook 44, Appendix C).
    us_ft = 1200.0 / 3937.0
    assert d["total_volume_m3"] == pytest.approx(float(result.depressions.volume_m2_vu.sum()) * us_ft)
    assert d["total_volume_acre_ft"] == pytest.approx(d["total_volume_m3"] / ACRE_FOOT_M3)
    with rasterio.open(tmp_path / "onset_stage.tif") as ds:
        assert ds.tags()["VERTICAL_UNIT"] == VerticalUnit.US_SURVEY_FOOT.value
        assert ds.units == ("US survey foot",)
    _, header, _ = read_csv(tmp_path / "depressions.csv")
    assert "spill_elevation_us_ft" in header


def test_output_path_that_is_a_file_is_refused(site, tmp_path):
    dem, outlets, result = site
    (tmp_path / "taken").write_text("x")
    with pytest.raises(InvalidParameter, match="is a file"):
        export.write_results(result, dem, outlets, tmp_path / "taken")


def test_result_of_another_grid_is_refused(site, tmp_path):
    _, outlets, result = site
    other = dem_from_array(np.zeros((3, 3), dtype=np.float32), transform=SITE)
    with pytest.raises(InvalidParameter, match="export a result computed on this DEM"):
        geotiff.write_onset_stage(result, other, tmp_path / "x.tif")
    assert list(tmp_path.iterdir()) == []


def test_compound_crs_keeps_its_vertical_part_and_maps_in_lon_lat(tmp_path):
    # EPSG:32633+5773: UTM zone 33N with EGM96 heights in metres (EPSG dataset via PROJ).
    dem, outlets, result = run(site_elevation(), crs="EPSG:32633+5773")
    export.write_results(result, dem, outlets, tmp_path)
    s = json.loads((tmp_path / "summary.json").read_text())
    assert pyproj.CRS(s["grid"]["crs"]["wkt"]).is_compound
    assert s["grid"]["horizontal_crs_epsg"] == 32633
    doc = json.loads((tmp_path / "spill_points.geojson").read_text())
    for feature in doc["features"]:
        lon, lat = feature["geometry"]["coordinates"]
        assert 14.9 < lon < 15.1 and 45.0 < lat < 45.2
    readme = " ".join((tmp_path / "README.txt").read_text().split())
    assert "EGM96" in readme


def _positional_reference(value) -> str:
    """numpy's per-value shortest positional text (Dragon4, unique mode), trimmed; '' for inf/NaN."""
    if not np.isfinite(value):
        return ""
    return np.format_float_positional(value, unique=True, trim="-")


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_table_number_texts_equal_the_per_value_shortest_positional_text(dtype):
    """The fast column formatter of the CSV writers against numpy's per-value
    formatter: random bit patterns (subnormals, NaN payloads, extremes), powers of
    two and their neighbours (where the round-trip interval is lopsided), decimal
    grids as DEMs store them, and the special values."""
    rng = np.random.default_rng(20261202)
    ints = np.uint32 if dtype == np.float32 else np.uint64
    bits = rng.integers(0, np.iinfo(ints).max, 50_000, dtype=np.uint64, endpoint=True).astype(ints)
    powers = (2.0 ** np.arange(-149 if dtype == np.float32 else -1074, 128 if dtype == np.float32 else 1024)).astype(dtype)
    values = np.concatenate([
        bits.view(dtype),
        powers, np.nextafter(powers, dtype(0)), np.nextafter(powers, dtype(np.inf)),
        (np.round(rng.uniform(-50, 3000, 20_000), 2)).astype(dtype),
        np.array([0.0, -0.0, np.inf, -np.inf, np.nan, 1e30, 47.6, 1.0, 100.0, 0.1, 123456789.0], dtype=dtype),
    ])
    with np.errstate(over="ignore", invalid="ignore"):
        fast = csv_tables.float_texts(values)
    expected = [_positional_reference(v) for v in values]
    wrong = [(repr(v), f, e) for v, f, e in zip(values, fast, expected) if f != e]
    assert wrong == []
    assert csv_tables.float_texts(np.array([47.6, 3e-7, 2.5e20], dtype=np.float32)) == \
        ["47.6", "0.0000003", "250000000000000000000"]
