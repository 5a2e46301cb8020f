"""Tests of water-level maps and the site stage table (sillmark.products.stage)."""

from __future__ import annotations

import numpy as np
import pytest
from affine import Affine
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from sillmark.errors import InvalidParameter
from sillmark.engine.flood import priority_flood
from sillmark.products.stage import (
    DEPRESSION_CUT_OFF,
    DEPRESSION_DRY,
    DEPRESSION_OVERTOPPED,
    DRY,
    FLOODED,
    NODATA,
    SHIELDED,
    depression_states,
    stage_levels,
    stage_table,
    water_level_map,
)
from sillmark.grid.dem import dem_from_array
from sillmark.products.source import ArraySource
from sillmark.units import VerticalUnit
from tests.engine.test_flood import edge_mask, grid

#: A lon/lat grid of 0.001 degree cells near 50 N: true cell areas, which differ row by row.
LONLAT = Affine(0.001, 0.0, 10.0, 0.0, -0.001, 50.0)


def lonlat_source(result) -> ArraySource:
    """The result on a real lon/lat DEM of its elevations (row areas from the ellipsoid)."""
    return ArraySource(dem_from_array(result.elevation, transform=LONLAT, crs="EPSG:4326"), result)

# River (edge cells at 1, left) | ridge at 6 (col 3) | low ground at 2-3, as in
# tests/engine/test_flood.py.
RIDGE = [
    [9, 9, 9, 9, 9, 9, 9],
    [1, 1, 1, 6, 3, 3, 9],
    [1, 1, 1, 6, 2, 3, 9],
    [1, 1, 1, 6, 3, 3, 9],
    [9, 9, 9, 9, 9, 9, 9],
]


@pytest.fixture
def ridge():
    z = grid(RIDGE)
    return priority_flood(z, edge_mask(z.shape))


def test_ridge_at_stage_four_floods_the_river_side_and_shields_the_back(ridge):
    # At h = 4: the nine river-side cells (z = 1, s = 1) are flooded 3 deep:
    #   area 9 cells, volume 9 * 3 = 27 cell-units.
    # Behind the ridge s = 6 > 4 but z in {2, 3} < 4: six shielded cells,
    #   volume below the level 5 * (4 - 3) + (4 - 2) = 7.
    # The ridge (6) and the rim (9) stay dry.
    m = water_level_map(ridge, 4.0)
    assert np.all(m.state[1:4, 0:3] == FLOODED)
    assert np.all(m.depth[1:4, 0:3] == 3)
    assert np.all(m.state[1:4, 4:6] == SHIELDED)
    assert np.all(np.isnan(m.depth[1:4, 4:6]))
    assert np.all(m.state[1:4, 3] == DRY)
    assert (m.flooded_area_m2, m.flooded_volume_m3) == (9.0, 27.0)
    assert (m.shielded_area_m2, m.shielded_volume_m3) == (6.0, 7.0)


def test_ridge_overtopped_at_its_crest(ridge):
    # At h = 6 the ridge cells (s = z = 6) are flooded with depth 0 and the low
    # ground behind them is reached: nothing is shielded any more.
    m = water_level_map(ridge, 6.0)
    assert np.all(m.state[1:4, 0:6] == FLOODED)
    assert m.shielded_area_m2 == 0
    assert m.depth[2, 4] == 4


def test_volumes_use_the_vertical_unit_and_cell_areas(ridge):
    # Same map with 2 m² cells on a site in international feet:
    #   flooded volume 27 cell-ft * 2 m²/cell * 0.3048 m/ft = 16.4592 m³.
    areas = np.full(5, 2.0)
    m = water_level_map(ridge, 4.0, row_areas=areas, unit="ft")
    assert m.flooded_area_m2 == 18.0
    assert m.flooded_volume_m3 == pytest.approx(27 * 2 * 0.3048, rel=1e-12)
    assert m.unit is VerticalUnit.FOOT


def test_nodata_is_its_own_class():
    z = grid([[1, 1, 1], [1, np.nan, 1], [1, 1, 1]])
    r = priority_flood(z, edge_mask(z.shape))
    m = water_level_map(r, 5)
    assert m.state[1, 1] == NODATA and np.isnan(m.depth[1, 1])


def test_out_arrays_are_reused(ridge):
    state = np.empty((5, 7), np.uint8)
    depth = np.empty((5, 7), np.float32)
    m = water_level_map(ridge, 4.0, out=(state, depth))
    assert m.state is state and m.depth is depth
    with pytest.raises(InvalidParameter):
        water_level_map(ridge, 4.0, out=(state, depth.astype(np.float64)))


@pytest.mark.parametrize("bad", [float("nan"), float("inf"), "high", None, 1e39])
def test_absurd_levels_are_refused(ridge, bad):
    with pytest.raises(InvalidParameter):
        water_level_map(ridge, bad)


def test_stage_table_levels_and_errors(ridge):
    levels = stage_levels(lonlat_source(ridge), step=0.5)
    # Lowest onset stage 1 (the river) to the highest spill elevation 6.
    assert levels[0] == 1 and levels[-1] == 6 and len(levels) == 11
    with pytest.raises(InvalidParameter):
        stage_levels(lonlat_source(ridge), step=0)
    with pytest.raises(InvalidParameter):
        stage_table(lonlat_source(ridge), [3, 2])
    with pytest.raises(InvalidParameter):
        stage_table(lonlat_source(ridge), [])


def test_depression_states_and_freeboard(ridge):
    # The one depression (behind the ridge): pit 2, spill 6.
    assert depression_states(ridge.depressions, 2)[0][0] == DEPRESSION_DRY
    states, freeboard = depression_states(ridge.depressions, 4)
    assert states[0] == DEPRESSION_CUT_OFF and freeboard[0] == 2
    states, freeboard = depression_states(ridge.depressions, 6.5)
    assert states[0] == DEPRESSION_OVERTOPPED and freeboard[0] == -0.5


@st.composite
def dem_and_levels(draw):
    rows = draw(st.integers(1, 10))
    cols = draw(st.integers(1, 10))
    values = draw(st.lists(st.integers(0, 6), min_size=rows * cols, max_size=rows * cols))
    z = np.array(values, np.float32).reshape(rows, cols) * np.float32(0.5)
    holes = draw(st.lists(st.booleans(), min_size=rows * cols, max_size=rows * cols))
    if draw(st.booleans()):
        z[np.array(holes).reshape(rows, cols) & (z > 2)] = np.nan
    if np.isnan(z).all():
        z[0, 0] = 0
    # Levels on and between the elevations, so ties with cells are exercised.
    picks = sorted(set(draw(st.lists(st.integers(-1, 14), min_size=1, max_size=12))))
    levels = np.array(picks, np.float32) * np.float32(0.25)
    return z, levels, draw(st.sampled_from([4, 8]))


@pytest.mark.slow
@settings(max_examples=200, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(dem_and_levels())
def test_stage_table_equals_one_map_per_level(case):
    z, levels, conn = case
    outlets = edge_mask(z.shape) & ~np.isnan(z)
    if not outlets.any():
        outlets = ~np.isnan(z)
    r = priority_flood(z, outlets, connectivity=conn)
    source = lonlat_source(r)
    areas = source.grid.row_areas
    assert len(set(areas.tolist())) == len(areas)  # every row its own cell area
    t = stage_table(source, levels)
    previous = -1.0
    for k, h in enumerate(levels):
        m = water_level_map(r, h, row_areas=areas)
        assert t.flooded_area_m2[k] == pytest.approx(m.flooded_area_m2, abs=1e-9)
        assert t.flooded_volume_m3[k] == pytest.approx(m.flooded_volume_m3, abs=1e-9)
        assert t.shielded_area_m2[k] == pytest.approx(m.shielded_area_m2, abs=1e-9)
        assert t.shielded_volume_m3[k] == pytest.approx(m.shielded_volume_m3, abs=1e-9)
        # Brute force straight from the definitions, on the raw arrays.
        s = r.onset_stage
        a = np.broadcast_to(areas[:, None], z.shape)
        flooded = s <= h
        shielded = (z < h) & (s > h)
        assert m.flooded_area_m2 == pytest.approx(a[flooded].sum(), abs=1e-9)
        assert m.shielded_area_m2 == pytest.approx(a[shielded].sum(), abs=1e-9)
        # Flooded area never shrinks as the stage rises.
        assert t.flooded_area_m2[k] >= previous
        previous = t.flooded_area_m2[k]
