"""Tests for sillmark.grid.dem: reading, value handling, vertical units, areas, coordinates."""

from __future__ import annotations

import math
import os
import pickle
import time

import numpy as np
import pyproj
import pytest
import rasterio
from affine import Affine
from hypothesis import given, settings
from hypothesis import strategies as st

from sillmark.grid.dem import DEFAULT_MAX_CELLS, DEM, dem_from_array, read_dem
from sillmark.errors import InvalidDEM, InvalidParameter, LocationOutsideDEM
from sillmark.units import VerticalUnit
from tests.rasters import NORTH, UTM33, WEST, grid

# A compound CRS whose vertical axis is in international feet, written by hand
# (an invented site datum on top of UTM zone 33N).
UTM33_PLUS_FEET_WKT = """COMPOUNDCRS["UTM 33N + site datum height (ft)",
 PROJCRS["WGS 84 / UTM zone 33N",
  BASEGEOGCRS["WGS 84",DATUM["World Geodetic System 1984",
   ELLIPSOID["WGS 84",6378137,298.257223563,LENGTHUNIT["metre",1]]],
   PRIMEM["Greenwich",0,ANGLEUNIT["degree",0.0174532925199433]]],
  CONVERSION["UTM zone 33N",METHOD["Transverse Mercator",ID["EPSG",9807]],
   PARAMETER["Latitude of natural origin",0,ANGLEUNIT["degree",0.0174532925199433]],
   PARAMETER["Longitude of natural origin",15,ANGLEUNIT["degree",0.0174532925199433]],
   PARAMETER["Scale factor at natural origin",0.9996,SCALEUNIT["unity",1]],
   PARAMETER["False easting",500000,LENGTHUNIT["metre",1]],
   PARAMETER["False northing",0,LENGTHUNIT["metre",1]]],
  CS[Cartesian,2],AXIS["easting (E)",east,LENGTHUNIT["metre",1]],
  AXIS["northing (N)",north,LENGTHUNIT["metre",1]]],
 VERTCRS["Site datum height (ft)",VDATUM["Site datum"],CS[vertical,1],
  AXIS["gravity-related height (H)",up,LENGTHUNIT["foot",0.3048]]]]"""


def assert_clean_error(excinfo: pytest.ExceptionInfo) -> None:
    """The error carries no chained rasterio/GDAL exception to print."""
    exc = excinfo.value
    assert exc.__cause__ is None
    assert exc.__suppress_context__ or exc.__context__ is None
    assert "Traceback" not in str(exc)


# ---------------------------------------------------------------------------
# reading a good file


def test_read_keeps_georeferencing_and_nodata(site_tif):
    dem = read_dem(site_tif)
    assert isinstance(dem, DEM)
    assert dem.shape == (5, 6) and (dem.rows, dem.cols) == (5, 6)
    assert dem.transform == grid()
    assert dem.crs == rasterio.crs.CRS.from_epsg(32633)
    assert dem.nodata == -9999.0
    assert dem.source_dtype == "float32"
    assert dem.path == str(site_tif)
    assert dem.elevation.dtype == np.float32 and dem.elevation.flags.c_contiguous
    assert np.isnan(dem.elevation[4, 5]) and not dem.valid[4, 5]
    assert dem.valid.sum() == 29
    assert dem.elevation[1, 2] == pytest.approx(8 / 4.0)
    assert dem.cell_size == (1.0, 1.0)
    assert dem.bounds == (WEST, NORTH - 5, WEST + 6, NORTH)
    assert not dem.is_geographic


def test_elevation_and_masks_are_read_only(site_tif):
    dem = read_dem(site_tif)
    for arr in (dem.elevation, dem.valid, dem.row_areas):
        with pytest.raises(ValueError):
            arr[0] = 1


@pytest.mark.parametrize(
    ("dtype", "values"),
    [
        ("uint8", [0, 1, 254, 255]),
        ("int8", [-128, -1, 0, 127]),
        ("int16", [-32768, -1, 0, 32767]),
        ("uint16", [0, 1, 40000, 65535]),
        ("int32", [-(2**24), -16777215, 0, 2**24]),
        ("uint32", [0, 1, 16777215, 2**24]),
        ("int64", [-(2**24), 12345678, 0, 2**24]),
        ("uint64", [0, 7, 9999999, 2**24]),
    ],
)
def test_integer_dem_keeps_every_value_exactly(write_tif, dtype, values):
    z = np.array([values, values[::-1]], dtype=dtype)
    dem = read_dem(write_tif(f"{dtype}.tif", z))
    assert dem.source_dtype == dtype
    assert dem.elevation.dtype == np.float32
    # Exact: no tolerance. Every integer of magnitude <= 2**24 is a float32.
    np.testing.assert_array_equal(dem.elevation.astype(np.int64), z.astype(np.int64))


def test_integer_nodata_becomes_nan(write_tif):
    z = np.array([[-32768, 5, 6], [7, -32768, 9]], dtype=np.int16)
    dem = read_dem(write_tif("nd.tif", z, nodata=-32768))
    assert np.isnan(dem.elevation[0, 0]) and np.isnan(dem.elevation[1, 1])
    assert dem.elevation[0, 1] == 5.0 and dem.valid.sum() == 4


def test_integers_beyond_float32_precision_are_refused(write_tif):
    z = np.array([[1, 2**24 + 1]], dtype=np.int32)
    with pytest.raises(InvalidDEM, match=r"float32 cannot represent exactly.*16777217") as e:
        read_dem(write_tif("big.tif", z))
    assert_clean_error(e)


def test_large_integer_nodata_is_not_a_precision_problem(write_tif):
    nd = -(2**31)
    z = np.array([[nd, 12, 13]], dtype=np.int32)
    dem = read_dem(write_tif("nd32.tif", z, nodata=nd))
    assert np.isnan(dem.elevation[0, 0])
    assert dem.elevation[0, 2] == 13.0


def test_nan_inf_and_negative_zero(write_tif):
    z = np.array([[np.nan, np.inf, -np.inf], [-0.0, 1.5, -9999.0]], dtype=np.float32)
    dem = read_dem(write_tif("f.tif", z, nodata=-9999.0))
    assert dem.valid.tolist() == [[False, False, False], [True, True, False]]
    assert dem.elevation[1, 0] == 0.0 and not np.signbit(dem.elevation[1, 0])


def test_float64_dem_with_huge_nodata_converts_without_overflow(write_tif):
    nd = -1.7976931348623157e308
    z = np.array([[nd, 100.25], [3.5, nd]], dtype=np.float64)
    dem = read_dem(write_tif("f64.tif", z, nodata=nd))  # warnings are errors here
    assert dem.valid.tolist() == [[False, True], [True, False]]
    assert dem.elevation[0, 1] == np.float32(100.25)


def test_float64_values_beyond_float32_range_are_refused(write_tif):
    z = np.array([[1e300, 2.0]], dtype=np.float64)
    with pytest.raises(InvalidDEM, match="beyond the float32 range"):
        read_dem(write_tif("huge.tif", z))


def test_float32_nodata_written_as_rounded_text_still_matches(write_tif):
    # GDAL stores nodata as text; "-3.4028235e+38" parses to just past the float32 limit.
    lowest = np.finfo(np.float32).min
    z = np.array([[lowest, 4.0]], dtype=np.float32)
    path = write_tif("lowest.tif", z)
    with rasterio.open(path, "r+") as dst:
        dst.nodata = float(lowest)
    dem = read_dem(path)
    assert dem.valid.tolist() == [[False, True]]
    from sillmark.grid.elevations import nodata_mask

    assert nodata_mask(z, -3.4028235e38).tolist() == [[True, False]]


def test_band_scale_and_offset_are_applied(write_tif):
    z = np.array([[1234, -100]], dtype=np.int16)
    dem = read_dem(write_tif("scaled.tif", z, scale=0.01, offset=100.0))
    np.testing.assert_allclose(dem.elevation, [[112.34, 99.0]], rtol=1e-7)


def test_internal_mask_hides_cells(tmp_path):
    path = tmp_path / "masked.tif"
    z = np.arange(6, dtype=np.float32).reshape(2, 3)
    with rasterio.Env(GDAL_TIFF_INTERNAL_MASK=True):
        with rasterio.open(
            path, "w", driver="GTiff", width=3, height=2, count=1, dtype="float32",
            crs=UTM33, transform=grid(),
        ) as dst:
            dst.write(z, 1)
            dst.write_mask(np.array([[255, 0, 255], [255, 255, 0]], dtype=np.uint8))
    dem = read_dem(path)
    assert dem.valid.tolist() == [[True, False, True], [True, True, False]]


def test_band_argument_picks_one_band(write_tif):
    z = np.stack([np.full((2, 2), k, dtype=np.float32) for k in (1, 2, 3)])
    path = write_tif("three.tif", z)
    assert np.all(read_dem(path, band=2).elevation == 2.0)
    assert np.all(read_dem(path, band=3).elevation == 3.0)
    with pytest.raises(InvalidParameter, match="band=4 but 'three.tif' has 3 bands"):
        read_dem(path, band=4)
    with pytest.raises(InvalidParameter, match="band"):
        read_dem(path, band=0)


# ---------------------------------------------------------------------------
# vertical unit


@pytest.mark.parametrize(
    ("crs", "unit"),
    [
        ("EPSG:32633+5773", VerticalUnit.METRE),  # UTM 33N + EGM96 height (m)
        ("EPSG:2263+6360", VerticalUnit.US_SURVEY_FOOT),  # NY Long Island ftUS + NAVD88 ftUS
    ],
)
def test_vertical_unit_from_compound_crs_in_file(write_tif, crs, unit):
    dem = read_dem(write_tif("c.tif", np.ones((2, 2), np.float32), crs=crs))
    assert dem.vertical_unit is unit
    assert dem.vertical_unit_source == "crs"


def test_vertical_unit_from_wkt_with_vertical_axis_in_feet(write_tif):
    path = write_tif("nocrs.tif", np.ones((2, 2), np.float32), crs=None)
    dem = read_dem(path, crs=UTM33_PLUS_FEET_WKT)
    assert dem.vertical_unit is VerticalUnit.FOOT and dem.vertical_unit_source == "crs"
    arr = dem_from_array(np.ones((2, 2)), crs=UTM33_PLUS_FEET_WKT, vertical_unit=None)
    assert arr.vertical_unit is VerticalUnit.FOOT


def test_vertical_unit_from_3d_geographic_crs():
    # EPSG:4979 is WGS 84 with an ellipsoidal height axis in metres.
    dem = dem_from_array(np.ones((2, 2)), crs="EPSG:4979", transform=grid(0.001, west=10, north=50),
                         vertical_unit=None)
    assert dem.vertical_unit is VerticalUnit.METRE and dem.vertical_unit_source == "crs"


def test_vertical_unit_argument_contradicting_crs_names_both(write_tif):
    path = write_tif("c.tif", np.ones((2, 2), np.float32), crs="EPSG:32633+5773")
    with pytest.raises(InvalidParameter, match=r"'ft' contradicts .*metre \('m'\)"):
        read_dem(path, vertical_unit="ft")
    assert read_dem(path, vertical_unit="m").vertical_unit is VerticalUnit.METRE


def test_vertical_unit_from_argument_when_crs_is_silent(write_tif):
    dem = read_dem(write_tif("h.tif", np.ones((2, 2), np.float32)), vertical_unit="us-ft")
    assert dem.vertical_unit is VerticalUnit.US_SURVEY_FOOT
    assert dem.vertical_unit_source == "argument"
    with pytest.raises(InvalidParameter, match="unknown vertical unit"):
        read_dem(write_tif("h2.tif", np.ones((2, 2), np.float32)), vertical_unit="furlong")


def test_vertical_unit_from_band_label(write_tif):
    path = write_tif("b.tif", np.ones((2, 2), np.float32), units="ft")
    dem = read_dem(path)
    assert dem.vertical_unit is VerticalUnit.FOOT and dem.vertical_unit_source == "band-unit"
    assert read_dem(path, vertical_unit="m").vertical_unit is VerticalUnit.METRE
    # A free-text label that names no unit is ignored.
    other = read_dem(write_tif("b2.tif", np.ones((2, 2), np.float32), units="height"))
    assert other.vertical_unit_source == "horizontal-unit"


def test_crs_argument_may_add_the_vertical_part(site_tif):
    dem = read_dem(site_tif, crs="EPSG:32633+5773")
    assert dem.vertical_unit_source == "crs"
    assert dem.horizontal_crs.equals(pyproj.CRS("EPSG:32633"))


@pytest.mark.parametrize(
    ("crs", "transform", "unit", "source"),
    [
        (UTM33, grid(), VerticalUnit.METRE, "horizontal-unit"),
        ("EPSG:2263", grid(10.0, west=1_000_000, north=200_000), VerticalUnit.US_SURVEY_FOOT, "horizontal-unit"),
        ("EPSG:4326", grid(0.001, west=15, north=45), VerticalUnit.METRE, "geographic-default"),
    ],
)
def test_vertical_unit_defaults(write_tif, crs, transform, unit, source):
    dem = read_dem(write_tif("d.tif", np.ones((2, 2), np.float32), crs=crs, transform=transform))
    assert dem.vertical_unit is unit and dem.vertical_unit_source == source


def test_vertical_unit_cannot_default_from_an_unusual_horizontal_unit():
    chains = "+proj=utm +zone=33 +datum=WGS84 +units=ch +type=crs"  # 1 chain = 66 ft
    # 500 000 m E, 5 000 000 m N in chains (20.1168 m): a grid the CRS can place on the Earth.
    near = Affine(1.0, 0.0, 24_855.0, 0.0, -1.0, 248_548.0)
    with pytest.raises(InvalidDEM, match="pass vertical_unit"):
        dem_from_array(np.ones((2, 2)), crs=chains, vertical_unit=None, transform=near)
    assert dem_from_array(np.ones((2, 2)), crs=chains, vertical_unit="m",
                          transform=near).vertical_unit is VerticalUnit.METRE


def test_depth_axis_is_refused():
    with pytest.raises(InvalidDEM, match="depth"):
        dem_from_array(np.ones((2, 2)), crs="EPSG:32633+5715", vertical_unit=None)  # + MSL depth


# ---------------------------------------------------------------------------
# CRS


def test_crs_argument_used_when_file_has_none(write_tif):
    path = write_tif("nocrs.tif", np.ones((2, 2), np.float32), crs=None)
    with pytest.raises(InvalidDEM, match="has no CRS; pass its EPSG code") as e:
        read_dem(path)
    assert_clean_error(e)
    for given_crs in (32633, "32633", "EPSG:32633"):
        assert read_dem(path, crs=given_crs).crs.to_epsg() == 32633


def test_crs_argument_must_agree_with_the_file(site_tif):
    assert read_dem(site_tif, crs=32633).crs.to_epsg() == 32633
    with pytest.raises(InvalidParameter, match=r"EPSG:32634.*EPSG:32633"):
        read_dem(site_tif, crs="EPSG:32634")
    with pytest.raises(InvalidParameter, match="not a CRS"):
        read_dem(site_tif, crs="EPSG:99999999")


# ---------------------------------------------------------------------------
# bad files


def test_text_file_renamed_tif_is_refused(tmp_path):
    path = tmp_path / "notes.tif"
    path.write_text("survey notes, not a raster\n")
    with pytest.raises(InvalidDEM, match="'notes.tif' is not a raster Sillmark can read") as e:
        read_dem(path)
    assert_clean_error(e)
    assert str(tmp_path) not in str(e.value)  # no server paths in messages


def test_empty_file_is_refused(tmp_path):
    path = tmp_path / "empty.tif"
    path.write_bytes(b"")
    with pytest.raises(InvalidDEM, match=r"'empty.tif' is empty \(0 bytes\)"):
        read_dem(path)


def test_missing_file_and_folder_are_refused(tmp_path):
    with pytest.raises(InvalidDEM, match="does not exist"):
        read_dem(tmp_path / "nowhere.tif")
    with pytest.raises(InvalidDEM, match="not a regular file"):
        read_dem(tmp_path)


@pytest.mark.parametrize(
    "path",
    [
        "/vsimem/dem.tif",
        "/vsicurl/https://example.invalid/dem.tif",
        "https://example.invalid/dem.tif",
        "s3://bucket/dem.tif",
        "zip:///tmp/site.zip!dem.tif",
    ],
)
def test_virtual_and_remote_paths_are_refused(path):
    with pytest.raises(InvalidDEM, match="virtual or remote path"):
        read_dem(path)


def test_vrt_is_refused_by_extension_and_by_content(site_tif, tmp_path):
    xml = (
        '<VRTDataset rasterXSize="6" rasterYSize="5"><VRTRasterBand dataType="Float32" band="1">'
        f"<SimpleSource><SourceFilename>{site_tif}</SourceFilename></SimpleSource>"
        "</VRTRasterBand></VRTDataset>"
    )
    (tmp_path / "site.vrt").write_text(xml)
    (tmp_path / "disguised.tif").write_text(xml)
    with pytest.raises(InvalidDEM, match="virtual raster"):
        read_dem(tmp_path / "site.vrt")
    with pytest.raises(InvalidDEM, match="virtual raster"):
        read_dem(tmp_path / "disguised.tif")


def test_several_bands_need_band_argument(write_tif):
    path = write_tif("rgb.tif", np.zeros((3, 2, 2), np.uint8))
    with pytest.raises(InvalidDEM, match=r"has 3 bands.*band=N \(1 to 3\)"):
        read_dem(path)


def test_complex_band_is_refused(write_tif):
    with pytest.raises(InvalidDEM, match="complex64 values, not elevations"):
        read_dem(write_tif("c.tif", np.ones((2, 2), np.complex64)))


@pytest.mark.parametrize(
    ("transform", "message"),
    [
        (Affine(1.0, 0.5, WEST, 0.5, -1.0, NORTH), "rotated or sheared"),
        (Affine(1.0, 0.3, WEST, 0.0, -1.0, NORTH), "rotated or sheared"),
        (Affine(1.0, 0.0, WEST, 0.0, 1.0, NORTH), "not north-up"),
    ],
)
def test_rotated_sheared_or_flipped_grid_is_refused(write_tif, transform, message):
    with pytest.raises(InvalidDEM, match=message):
        read_dem(write_tif("rot.tif", np.ones((2, 2), np.float32), transform=transform))


def test_file_without_geotransform_is_refused(write_tif):
    path = write_tif("plain.tif", np.ones((2, 2), np.float32), crs=None, transform=False)
    with pytest.raises(InvalidDEM, match="no geotransform"):
        read_dem(path, crs=32633)


@pytest.mark.parametrize("nodata", [-9999.0, None])
def test_all_nodata_is_refused(write_tif, nodata):
    z = np.full((3, 3), np.nan if nodata is None else nodata, dtype=np.float32)
    with pytest.raises(InvalidDEM, match="every cell of 'blank.tif' is nodata"):
        read_dem(write_tif("blank.tif", z, nodata=nodata))


def test_more_cells_than_max_cells_is_refused(write_tif):
    path = write_tif("ten.tif", np.ones((10, 10), np.float32))
    assert read_dem(path, max_cells=100).shape == (10, 10)
    with pytest.raises(InvalidDEM, match=r"10 × 10 = 100 cells, more than the limit of 99"):
        read_dem(path, max_cells=99)
    with pytest.raises(InvalidParameter, match="max_cells"):
        read_dem(path, max_cells=0)
    assert DEFAULT_MAX_CELLS == 400_000_000


def test_decompression_bomb_is_refused_before_reading(tmp_path):
    # 10^10 declared cells (40 GB as float32) in a sparse file of a few kB:
    # only the header is read, so this fails fast and allocates nothing.
    path = tmp_path / "bomb.tif"
    with rasterio.open(
        path, "w", driver="GTiff", width=100_000, height=100_000, count=1, dtype="float32",
        crs=UTM33, transform=grid(), tiled=True, compress="deflate", SPARSE_OK=True,
    ):
        pass
    assert os.path.getsize(path) < 5_000_000
    start = time.perf_counter()
    with pytest.raises(InvalidDEM, match="more than the limit of 400,000,000"):
        read_dem(path)
    assert time.perf_counter() - start < 5.0


def test_truncated_geotiff_opens_but_pixels_fail(tmp_path):
    path = tmp_path / "cut.tif"
    rng = np.random.default_rng(7)
    z = (rng.random((256, 256)) * 100).astype(np.float32)  # noise: does not compress away
    with rasterio.open(
        path, "w", driver="GTiff", width=256, height=256, count=1, dtype="float32",
        crs=UTM33, transform=grid(), tiled=True, blockxsize=64, blockysize=64, compress="deflate",
    ) as dst:
        dst.write(z, 1)
    data = path.read_bytes()
    path.write_bytes(data[: len(data) * 6 // 10])
    with rasterio.open(path) as src:  # the header is intact
        assert src.width == 256
    with pytest.raises(InvalidDEM, match="opens but its pixels cannot be read.*truncated") as e:
        read_dem(path)
    assert_clean_error(e)


def test_zero_width_raster_is_refused(tmp_path):
    # GDAL will not create a 0-cell GeoTIFF; an ASCII grid can declare one.
    path = tmp_path / "zero.asc"
    path.write_text("ncols 0\nnrows 3\nxllcorner 0\nyllcorner 0\ncellsize 1\n")
    with pytest.raises(InvalidDEM, match="zero.asc"):
        read_dem(path, crs=32633)
    with pytest.raises(InvalidDEM, match="zero width or height"):
        dem_from_array(np.zeros((0, 3)))


# ---------------------------------------------------------------------------
# dem_from_array


def test_dem_from_array_defaults_and_does_not_modify_input():
    z = np.array([[1.0, -0.0], [np.inf, -9999.0]])
    before = z.copy()
    dem = dem_from_array(z, nodata=-9999)
    np.testing.assert_array_equal(z, before)
    assert np.signbit(z[0, 1])
    assert dem.transform == Affine(1, 0, 500_000, 0, -1, 5_000_000)
    assert dem.crs.to_epsg() == 32633
    assert dem.vertical_unit is VerticalUnit.METRE
    assert dem.valid.tolist() == [[True, True], [False, False]]
    assert not np.signbit(dem.elevation[0, 1])
    assert dem.source_dtype == "float64" and dem.path is None


@pytest.mark.parametrize("shape", [(4,), (2, 2, 2), ()])
def test_dem_from_array_needs_2d(shape):
    with pytest.raises(InvalidDEM, match="give a 2-D array"):
        dem_from_array(np.zeros(shape))


def test_dem_from_array_rejects_bad_arguments():
    with pytest.raises(InvalidDEM, match="holds bool values"):
        dem_from_array(np.ones((2, 2), bool))
    with pytest.raises(InvalidParameter, match="affine.Affine"):
        dem_from_array(np.ones((2, 2)), transform=(1, 0, 0, 0, -1, 0))
    with pytest.raises(InvalidDEM, match="not north-up"):
        dem_from_array(np.ones((2, 2)), transform=Affine(1, 0, 0, 0, 1, 0))
    with pytest.raises(InvalidDEM, match="needs a CRS"):
        dem_from_array(np.ones((2, 2)), crs=None)
    with pytest.raises(InvalidParameter, match="not a CRS"):
        dem_from_array(np.ones((2, 2)), crs="not a crs")
    with pytest.raises(InvalidDEM, match="beyond the poles"):
        dem_from_array(np.ones((4, 2)), crs="EPSG:4326", transform=grid(1.0, west=0, north=92))
    with pytest.raises(InvalidDEM, match="geocentric"):
        dem_from_array(np.ones((2, 2)), crs="EPSG:4978")


def test_dem_survives_pickling_read_only():
    dem = dem_from_array(np.ones((3, 3)), crs="EPSG:32633+5773")
    dem.row_areas  # cached before pickling
    again = pickle.loads(pickle.dumps(dem))
    assert again.crs == dem.crs and again.vertical_unit is VerticalUnit.METRE
    np.testing.assert_array_equal(again.elevation, dem.elevation)
    assert not again.elevation.flags.writeable and not again.row_areas.flags.writeable


# ---------------------------------------------------------------------------
# cell areas


def test_projected_cell_area_metres():
    # 2 m wide × 3 m high cells: 2 × 3 = 6 m² in every row.
    dem = dem_from_array(np.ones((4, 3)), transform=grid(2.0, 3.0))
    assert dem.row_areas.dtype == np.float64 and dem.row_areas.shape == (4,)
    np.testing.assert_array_equal(dem.row_areas, 6.0)


def test_projected_cell_area_us_survey_feet():
    # EPSG:2263 (NAD83 / New York Long Island) is in US survey feet,
    # 1 US ft = 1200/3937 m exactly (NIST Handbook 44, Appendix C).
    # 10 ft × 10 ft = 100 ft² = 100 × (1200/3937)² m² = 100 × 0.0929034116... = 9.29034116... m².
    dem = dem_from_array(np.ones((2, 2)), crs="EPSG:2263", transform=grid(10.0, west=1_000_000, north=200_000))
    expected = 10 * 10 * (1200 / 3937) ** 2
    assert expected == pytest.approx(9.290341161327487, rel=1e-15)
    np.testing.assert_allclose(dem.row_areas, expected, rtol=1e-14)


def zone_area(a: float, b: float, lat1: float, lat2: float, dlon: float) -> float:
    """Area (m²) on an ellipsoid between two parallels over a longitude span (degrees).

    A = Δλ · b²/2 · [q(φ2) − q(φ1)],
    q(φ) = sinφ / (1 − e² sin²φ) + 1/(2e) · ln((1 + e sinφ) / (1 − e sinφ)).

    Source: Snyder (1987), "Map Projections—A Working Manual", USGS Professional
    Paper 1395, the authalic-latitude q function, eq. 3-12 (equation number
    recalled from memory; Snyder's q carries an extra factor (1 − e²), so there
    A = Δλ · a²/2 · Δq). It is also the integral of the ellipsoid's area element
    M·N·cosφ dφ dλ, which we checked by hand.
    """
    e2 = 1.0 - (b / a) ** 2
    e = math.sqrt(e2)

    def q(phi_deg: float) -> float:
        s = math.sin(math.radians(phi_deg))
        return s / (1 - e2 * s * s) + (1 / (2 * e)) * math.log((1 + e * s) / (1 - e * s))

    return math.radians(dlon) * b * b / 2 * (q(lat2) - q(lat1))


WGS84_A, WGS84_B = 6378137.0, 6378137.0 * (1 - 1 / 298.257223563)  # EPSG:7030
CLARKE1866_A, CLARKE1866_B = 6378206.4, 6356583.8  # EPSG:7008, used by NAD27 (EPSG:4267)


def test_zone_area_reference_gives_the_whole_ellipsoid():
    # Sanity check of the reference itself: the whole WGS 84 ellipsoid equals a
    # sphere of the authalic radius 6 371 007.1809 m (value recalled from memory;
    # given to 11 digits, so agreement to 1e-9 is what it can show).
    whole = zone_area(WGS84_A, WGS84_B, -90.0, 90.0, 360.0)
    assert whole == pytest.approx(4 * math.pi * 6_371_007.1809**2, rel=1e-9)


# Tolerance for geographic areas: relative 1e-9. The reference loses about five
# digits to cancellation in q(φ2) − q(φ1) for arc-second cells (~1e-11), pyproj's
# geodesic area sums terms far larger than one cell (~1e-11 here, worse only near
# the poles), and the densified parallel edges add < 1e-10. 1e-9 leaves margin
# yet is 10 000 times tighter than the change from using the wrong ellipsoid.
GEO_RTOL = 1e-9


@pytest.mark.parametrize(
    ("north", "cell_deg", "rows"),
    [
        (52.0, 3 / 3600, 5),  # 3 arc-second cells in the northern mid-latitudes
        (-33.0, 30 / 3600, 4),  # 30 arc-second cells, southern hemisphere
        (1.0, 0.25, 8),  # quarter-degree cells across the equator
        (70.0, 1.0, 3),  # one-degree cells at high latitude (densified edges)
    ],
)
def test_geographic_row_areas_match_ellipsoidal_zone(north, cell_deg, rows):
    dem = dem_from_array(np.ones((rows, 3)), crs="EPSG:4326", transform=grid(cell_deg, west=10.0, north=north))
    assert dem.is_geographic
    for r in range(rows):
        top = north - r * cell_deg
        expected = zone_area(WGS84_A, WGS84_B, top - cell_deg, top, cell_deg)
        assert dem.row_areas[r] == pytest.approx(expected, rel=GEO_RTOL)


def test_cells_reaching_half_a_cell_past_the_pole_are_clipped_at_it():
    # A grid registered on cell centres: its top row spans 90.25° to 89.75° N.
    dem = dem_from_array(np.ones((2, 4)), crs="EPSG:4326", transform=grid(0.5, west=-180.25, north=90.25))
    expected = zone_area(WGS84_A, WGS84_B, 89.75, 90.0, 0.5)
    assert dem.row_areas[0] == pytest.approx(expected, rel=GEO_RTOL)


def test_geographic_row_areas_use_the_crs_ellipsoid():
    transform = grid(30 / 3600, west=-90.0, north=40.0)
    nad27 = dem_from_array(np.ones((3, 2)), crs="EPSG:4267", transform=transform)
    for r in range(3):
        top = 40.0 - r * 30 / 3600
        clarke = zone_area(CLARKE1866_A, CLARKE1866_B, top - 30 / 3600, top, 30 / 3600)
        wgs84 = zone_area(WGS84_A, WGS84_B, top - 30 / 3600, top, 30 / 3600)
        assert nad27.row_areas[r] == pytest.approx(clarke, rel=GEO_RTOL)
        assert abs(clarke - wgs84) / wgs84 > 1e3 * GEO_RTOL  # the test can tell them apart


def test_row_areas_are_cached():
    dem = dem_from_array(np.ones((3, 3)), crs="EPSG:4326", transform=grid(0.01, west=5, north=45))
    assert dem.row_areas is dem.row_areas
    assert "row_areas" in vars(dem)


# ---------------------------------------------------------------------------
# coordinates


def test_xy_gives_cell_centres_for_scalars_and_arrays():
    dem = dem_from_array(np.zeros((4, 5)), transform=grid(2.0, 3.0))
    assert dem.xy(0, 0) == (WEST + 1.0, NORTH - 1.5)
    x, y = dem.xy(np.array([0, 3]), np.array([4, 1]))
    np.testing.assert_array_equal(x, [WEST + 9.0, WEST + 3.0])
    np.testing.assert_array_equal(y, [NORTH - 1.5, NORTH - 10.5])
    with pytest.raises(LocationOutsideDEM):
        dem.xy(4, 0)
    with pytest.raises(LocationOutsideDEM):
        dem.xy(np.array([0, -1]), np.array([0, 0]))
    with pytest.raises(InvalidParameter, match="integer cell index"):
        dem.xy(0.5, 1)
    assert dem.xy(1.0, 2.0) == dem.xy(1, 2)


def test_rowcol_floors_and_refuses_points_outside():
    dem = dem_from_array(np.zeros((4, 5)), transform=grid(2.0, 3.0))
    assert dem.rowcol(WEST, NORTH) == (0, 0)  # the north-west corner is in cell (0, 0)
    assert dem.rowcol(WEST + 1.999, NORTH - 2.999) == (0, 0)
    assert dem.rowcol(WEST + 2.0, NORTH - 3.0) == (1, 1)  # boundaries belong east and south
    rows, cols = dem.rowcol(np.array([WEST + 0.1, WEST + 9.9]), np.array([NORTH - 0.1, NORTH - 11.9]))
    assert rows.tolist() == [0, 3] and cols.tolist() == [0, 4]
    for x, y in [(WEST + 10.0, NORTH - 1), (WEST - 0.001, NORTH - 1), (WEST + 1, NORTH - 12.0),
                 (WEST + 1, NORTH + 0.5), (math.nan, NORTH - 1)]:
        with pytest.raises(LocationOutsideDEM, match="outside the DEM"):
            dem.rowcol(x, y)


@settings(max_examples=60, deadline=None)
@given(
    row=st.integers(0, 299),
    col=st.integers(0, 199),
    dx=st.sampled_from([0.5, 1.0, 2.5, 30.0, 1 / 3600]),
)
def test_rowcol_inverts_xy(row, col, dx):
    dem = dem_from_array(np.zeros((300, 200), np.float32), transform=grid(dx, dx * 1.5))
    assert dem.rowcol(*dem.xy(row, col)) == (row, col)


def test_horizontal_crs_drops_the_vertical_part():
    dem = dem_from_array(np.ones((2, 2)), crs="EPSG:32633+5773")
    assert dem.horizontal_crs.equals(pyproj.CRS("EPSG:32633"))


@pytest.mark.parametrize("dtype, nodata, masked", [
    ("float32", None, False), ("float32", -9999.0, False), ("float32", -3.4028235e+38, False),
    ("float32", None, True), ("float64", -9999.0, False), ("int16", -32768, False),
])
def test_dem_windows_hold_the_cells_of_the_whole_dem_read(tmp_path, dtype, nodata, masked):
    # DEMGrid.read_window (one compiled pass for a plain float32 band, whole-array
    # steps otherwise) against read_dem of the whole file: missing cells NaN
    # (non-finite, the declared nodata, or masked off), -0.0 made +0.0, and the
    # parts of a window outside the grid NaN.
    from sillmark.grid.dem_grid import read_dem_grid
    from tests.rasters import write_raster

    rng = np.random.default_rng(3)
    z = np.round(rng.normal(100, 5, (23, 31)), 1).astype(dtype)
    if z.dtype.kind == "f":
        z[1, 1], z[2, 2], z[3, 3] = np.nan, np.inf, -0.0
    if nodata is not None:
        z[4:6, 7:9] = nodata
    path = tmp_path / "dem.tif"
    write_raster(path, z, nodata=nodata, dtype=dtype)
    if masked:
        with rasterio.open(path, "r+") as ds:
            mask = np.full(z.shape, 255, np.uint8)
            mask[10:12, 0:5] = 0
            ds.write_mask(mask)
    whole = read_dem(path).elevation
    assert np.isnan(whole).sum() >= (0 if z.dtype.kind in "iu" and nodata is None else 2)
    g = read_dem_grid(path)
    for window in [(0, 23, 0, 31), (2, 14, 3, 20), (-3, 5, -2, 4), (20, 26, 28, 35)]:
        r0, r1, c0, c1 = window
        got = g.read_window(r0, r1, c0, c1)
        want = np.full((r1 - r0, c1 - c0), np.nan, np.float32)
        a0, a1, b0, b1 = max(r0, 0), min(r1, 23), max(c0, 0), min(c1, 31)
        want[a0 - r0:a1 - r0, b0 - c0:b1 - c0] = whole[a0:a1, b0:b1]
        assert got.dtype == np.float32
        assert np.array_equal(got, want, equal_nan=True), window
        assert not np.signbit(got[got == 0.0]).any()
