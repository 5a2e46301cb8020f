"""Ground lengths of routes (sillmark.grid.ground) and the site's area units (sillmark.units).

Every expected value is worked by hand in the comments beside it.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from affine import Affine

from sillmark.errors import InvalidParameter
from sillmark.grid.dem import dem_from_array
from sillmark.grid.ground import ground_unit, ground_unit_suffix, path_length
from sillmark.units import ACRE_FOOT_M3, ACRE_M2, area_units, own_unit_columns

# WGS 84 semi-major axis, metres (the ellipsoid's defining constant, EPSG:7030).
WGS84_A = 6378137.0


def _grid(cell: float, crs="EPSG:32633", shape=(4, 5)):
    return dem_from_array(np.zeros(shape, np.float32), crs=crs,
                          transform=Affine(cell, 0, 500000, 0, -cell, 5000000))


def test_three_steps_with_one_diagonal_on_a_2_m_grid():
    # (0,0) -> (0,1): east, 2 m; (0,1) -> (1,2): south-east, 2·√2 m;
    # (1,2) -> (1,3): east, 2 m. Total 4 + 2√2 = 6.8284... m.
    length = path_length(_grid(2.0), [0, 0, 1, 1], [0, 1, 2, 3])
    assert length.value == pytest.approx(4 + 2 * math.sqrt(2), rel=1e-12)
    assert length.unit == "m" and length.metres == pytest.approx(length.value)
    assert length.text() == "6.8 m"


def test_a_cell_count_is_not_a_length():
    # Four cells in a straight line south on a 2 m grid: 3 steps of 2 m = 6 m (not 4 cells).
    assert path_length(_grid(2.0), [0, 1, 2, 3], [2, 2, 2, 2]).value == pytest.approx(6.0)
    # One cell: no length at all.
    assert path_length(_grid(2.0), [1], [1]).value == 0.0


def test_rectangular_cells_weigh_each_direction_by_its_own_size():
    # Cells 3 wide and 4 high: one east step (3), one south step (4), one
    # diagonal (√(3² + 4²) = 5): 12 in all.
    dem = dem_from_array(np.zeros((3, 3), np.float32), transform=Affine(3, 0, 500000, 0, -4, 5000000))
    assert path_length(dem, [0, 0, 1, 2], [0, 1, 1, 2]).value == pytest.approx(12.0)


def test_feet_grids_measure_in_their_own_foot():
    # EPSG:2227 (California zone III) is in US survey feet: 2 steps of 10 US ft
    # = 20 US ft = 20 · 1200/3937 m = 6.0960 m.
    dem = dem_from_array(np.zeros((3, 3), np.float32), crs="EPSG:2227",
                         transform=Affine(10, 0, 6_000_000, 0, -10, 2_000_000))
    length = path_length(dem, [0, 0, 0], [0, 1, 2])
    assert (length.unit, ground_unit_suffix(dem)) == ("US ft", "us_ft")
    assert length.value == pytest.approx(20.0)
    assert length.metres == pytest.approx(20 * 1200 / 3937, rel=1e-12)


def test_lon_lat_grids_measure_true_metres_on_the_ellipsoid():
    # Cells of 0.001°, row 0 centred on the equator. Along the equator the
    # geodesic is the equator itself, so two east steps are a·Δλ =
    # 6378137 · 0.002 · π/180 = 222.639 m. A step north from the equator is a
    # meridian arc: a(1 - e²)·Δφ near the equator, with e² = 0.00669438 for
    # WGS 84: 6335439.3 · 0.001 · π/180 = 110.574 m (to 1e-4 relative over the step).
    dem = dem_from_array(np.zeros((3, 4), np.float32), crs="EPSG:4326",
                         transform=Affine(0.001, 0, 10.0, 0, -0.001, 0.0005))
    assert ground_unit(dem) == ("m", 1.0)
    east = path_length(dem, [0, 0, 0], [0, 1, 2])
    assert east.value == pytest.approx(WGS84_A * math.radians(0.002), rel=1e-9)
    south = path_length(dem, [0, 1], [0, 0])
    assert south.value == pytest.approx(WGS84_A * (1 - 0.00669438) * math.radians(0.001), rel=1e-4)


def test_a_path_must_step_between_neighbours():
    with pytest.raises(InvalidParameter, match="neighbours"):
        path_length(_grid(2.0), [0, 2], [0, 0])
    with pytest.raises(InvalidParameter):
        path_length(_grid(2.0), [0, 1], [0])


def test_area_units_follow_the_vertical_unit():
    metric, feet, survey = area_units("m"), area_units("ft"), area_units("us-ft")
    assert (metric.small_area, metric.large_area, metric.volume) == ("m²", "ha", "m³")
    assert (feet.small_area, feet.large_area, feet.volume) == ("ft²", "acres", "acre-ft")
    assert survey == feet
    # One acre is 43 560 ft² (NIST Handbook 44, Appendix C): 4046.8564224 m²
    # is 1 acre and 43 560 ft²; one hectare is 10 000 m².
    assert feet.large(ACRE_M2) == pytest.approx(1.0)
    assert feet.small(ACRE_M2) == pytest.approx(43560.0)
    assert metric.large(25_000.0) == pytest.approx(2.5)
    # One acre-foot: 43 560 ft³ = 1233.48 m³.
    assert feet.vol(1233.48183754752) == pytest.approx(1.0)
    assert metric.vol(5.0) == 5.0


def test_own_unit_columns_name_their_units():
    assert own_unit_columns("m", area_m2=[1.0], volume_m3=[1.0]) == {}
    cols = own_unit_columns("us-ft", area_m2=np.array([2 * ACRE_M2]), volume_m3=np.array([3 * ACRE_FOOT_M3]),
                            area_name="flooded_area", volume_name="flooded_volume")
    assert list(cols) == ["flooded_area_ft2", "flooded_area_acres", "flooded_volume_acre_ft"]
    assert cols["flooded_area_acres"][0] == pytest.approx(2.0)
    assert cols["flooded_area_ft2"][0] == pytest.approx(2 * 43560.0)
    assert cols["flooded_volume_acre_ft"][0] == pytest.approx(3.0)
