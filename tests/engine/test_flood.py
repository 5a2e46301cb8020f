"""Tests of the spill engine (sillmark.engine.flood).

Outside references used here, each named beside its check:
- hand-worked DEMs (the working is in the comments);
- a separate textbook minimax Dijkstra (tests/textbook_flood.py);
- scikit-image ``morphology.reconstruction(method="erosion")``, the morphological
  reconstruction by erosion that fills depressions (Soille 2003, "Morphological
  Image Analysis", 2nd ed., sec. 6.3.4 — section number recalled from memory);
- pysheds 0.5 ``Grid.fill_depressions``;
- the Jacksboro fault DEM that matplotlib ships as sample data.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from sillmark.errors import InvalidDEM, InvalidOutlets, InvalidParameter, LocationOutsideDEM
from sillmark.engine.flood import OUTLET_CODE, DIRECTION_COL, DIRECTION_ROW, priority_flood
from tests.textbook_flood import canonical_spills, components, minimax_stage

N = math.nan


def edge_mask(shape) -> np.ndarray:
    m = np.zeros(shape, bool)
    m[0, :] = m[-1, :] = m[:, 0] = m[:, -1] = True
    return m


def grid(rows) -> np.ndarray:
    return np.array(rows, dtype=np.float32)


# --------------------------------------------------------------------------
# Hand-worked DEMs
# --------------------------------------------------------------------------


def test_single_bowl_fills_to_its_notch():
    # Rim at 9 except a notch at 7 in the top edge (row 0, col 2); edge cells are
    # outlets. Every inner cell is below 7, so all nine fill to 7:
    #   depths 7-5=2 (four corners), 7-4=3 (four sides), 7-1=6 (centre)
    #   volume = 4*2 + 4*3 + 6 = 26 cell-units; max depth 6; 9 cells.
    z = grid(
        [
            [9, 9, 7, 9, 9],
            [9, 5, 4, 5, 9],
            [9, 4, 1, 4, 9],
            [9, 5, 4, 5, 9],
            [9, 9, 9, 9, 9],
        ]
    )
    r = priority_flood(z, edge_mask(z.shape))
    inner = np.s_[1:4, 1:4]
    assert np.all(r.onset_stage[inner] == 7)
    assert np.all(r.depression_id[inner] == 1)
    assert np.array_equal(r.onset_stage[edge_mask(z.shape)], z[edge_mask(z.shape)])
    assert len(r.depressions) == 1
    row = r.depressions.row(1)
    assert (row["pit_row"], row["pit_col"], row["pit_elevation"]) == (2, 2, 1.0)
    assert (row["spill_row"], row["spill_col"], row["spill_elevation"]) == (0, 2, 7.0)
    assert row["spills_to"] == 0
    assert row["max_depth"] == 6.0
    assert row["cell_count"] == 9
    assert row["volume_m2_vu"] == 26.0
    route = r.route(2, 2)
    assert (route.sill_row, route.sill_col, route.sill_elevation) == (0, 2, 7.0)
    assert r.flood_tree[route.rows[-1], route.cols[-1]] == OUTLET_CODE


# Two 3x3 bowls (pits 1 and 2) between rims at 9, joined by a saddle cell at
# (2, 4); the right bowl drains over an edge notch at (2, 8) = 8.
TWIN_BOWLS = [
    [9, 9, 9, 9, 9, 9, 9, 9, 9],
    [9, 3, 3, 3, 9, 4, 4, 4, 9],
    [9, 3, 1, 3, 0, 4, 2, 4, 8],
    [9, 3, 3, 3, 9, 4, 4, 4, 9],
    [9, 9, 9, 9, 9, 9, 9, 9, 9],
]


def test_saddle_below_the_outer_sill_makes_one_depression():
    # Saddle at 6 < notch 8: as the right bowl fills to 8 the saddle is drowned,
    # so both bowls and the saddle form one depression at 8 (19 cells):
    #   left  9 cells: 9*8 - (8*3 + 1) = 72 - 25 = 47
    #   saddle:        8 - 6           = 2
    #   right 9 cells: 9*8 - (8*4 + 2) = 72 - 34 = 38      total 87
    z = grid(TWIN_BOWLS)
    z[2, 4] = 6
    r = priority_flood(z, edge_mask(z.shape))
    assert len(r.depressions) == 1
    row = r.depressions.row(1)
    assert row["cell_count"] == 19
    assert row["volume_m2_vu"] == 87.0
    assert row["spill_elevation"] == 8.0
    assert (row["spill_row"], row["spill_col"]) == (2, 8)
    assert (row["pit_row"], row["pit_col"]) == (2, 2)
    assert r.route(2, 2).sill_col == 8


def test_saddle_above_the_outer_sill_makes_two_depressions():
    # Saddle at 8.5 > notch 8: the right bowl fills to 8 and spills to the edge;
    # the left bowl fills to the saddle, 8.5, and spills into the right bowl.
    #   left volume  = 9*8.5 - 25 = 51.5;  right volume = 72 - 34 = 38.
    # Ids follow raster order: the left bowl's first cell (1, 1) comes first.
    z = grid(TWIN_BOWLS)
    z[2, 4] = 8.5
    r = priority_flood(z, edge_mask(z.shape))
    t = r.depressions
    assert len(t) == 2
    left, right = t.row(1), t.row(2)
    assert (left["pit_row"], left["pit_col"]) == (2, 2)
    assert left["spill_elevation"] == 8.5 and (left["spill_row"], left["spill_col"]) == (2, 4)
    assert left["spills_to"] == 2
    assert left["volume_m2_vu"] == 51.5
    assert right["spill_elevation"] == 8.0 and right["spills_to"] == 0
    assert right["volume_m2_vu"] == 38.0
    assert r.depression_id[2, 4] == 0  # the saddle itself stays dry at its own level
    # The left pit's route crosses the right bowl, so its sill is the saddle at 8.5.
    route = r.route(2, 2)
    assert (route.sill_row, route.sill_col, route.sill_elevation) == (2, 4, 8.5)
    assert route.sill_elevation == r.onset_stage[2, 2]


def test_flat_plateau_has_no_depression_and_routes_downhill():
    # A plateau at 5 in the middle, slopes down to 1 at the edge: every cell
    # already drains, so s == z everywhere and there is no depression.
    z = grid(
        [
            [1, 1, 1, 1, 1, 1],
            [1, 3, 3, 3, 3, 1],
            [1, 3, 5, 5, 3, 1],
            [1, 3, 5, 5, 3, 1],
            [1, 3, 3, 3, 3, 1],
            [1, 1, 1, 1, 1, 1],
        ]
    )
    r = priority_flood(z, edge_mask(z.shape))
    assert np.array_equal(r.onset_stage, z)
    assert np.all(r.depression_id == 0) and len(r.depressions) == 0
    route = r.route(2, 2)
    assert list(z[route.rows, route.cols]) == [5, 3, 1]
    assert (route.sill_row, route.sill_col) == (2, 2)


def test_flat_everywhere_is_its_own_onset_stage():
    z = np.full((7, 9), 4.25, np.float32)
    r = priority_flood(z, edge_mask(z.shape))
    assert np.array_equal(r.onset_stage, z) and len(r.depressions) == 0


def test_nodata_hole_acts_as_outlet_only_when_asked():
    # A ring of cells at 4 around a nodata hole, inside a rim at 9.
    z = grid(
        [
            [9, 9, 9, 9, 9],
            [9, 4, 4, 4, 9],
            [9, 4, N, 4, 9],
            [9, 4, 4, 4, 9],
            [9, 9, 9, 9, 9],
        ]
    )
    edge = edge_mask(z.shape)
    # Edge outlets only: nodata is a wall, the ring fills to the rim, 9.
    r = priority_flood(z, edge)
    ring = np.zeros(z.shape, bool)
    ring[1:4, 1:4] = True
    ring[2, 2] = False
    assert np.all(r.onset_stage[ring] == 9) and np.all(r.depression_id[ring] == 1)
    assert math.isnan(r.onset_stage[2, 2]) and r.flood_tree[2, 2] == 0
    # With the cells next to nodata as outlets (the hole is open water), the ring
    # drains into it: s == z on every valid cell, no depression.
    r2 = priority_flood(z, edge | ring)
    assert np.array_equal(r2.onset_stage[ring], z[ring]) and len(r2.depressions) == 0


def test_ridge_shields_low_ground_behind_it():
    # River (edge cells at 1, left) | ridge at 6 (col 3) | low ground at 2-3.
    # The low ground is below the ridge crest, so its onset stage is the crest, 6:
    # at any stage between 3 and 6 it lies below the water level yet stays dry.
    z = grid(
        [
            [9, 9, 9, 9, 9, 9, 9],
            [1, 1, 1, 6, 3, 3, 9],
            [1, 1, 1, 6, 2, 3, 9],
            [1, 1, 1, 6, 3, 3, 9],
            [9, 9, 9, 9, 9, 9, 9],
        ]
    )
    r = priority_flood(z, edge_mask(z.shape))
    assert np.all(r.onset_stage[1:4, 4:6] == 6)
    assert np.all(r.onset_stage[1:4, 0:3] == 1)
    (row,) = [r.depressions.row(1)]
    assert row["spill_col"] == 3 and row["spill_elevation"] == 6
    assert row["volume_m2_vu"] == (6 - 3) * 5 + (6 - 2)  # 19
    # Route from the lowest shielded cell crosses the ridge to the river.
    route = r.route(2, 4)
    assert route.sill_col == 3 and route.sill_elevation == 6
    assert z[route.rows[-1], route.cols[-1]] in (1.0, 9.0)


# Cell (1, 1) touches (2, 2) only at a corner, and (2, 2) touches the low edge
# outlet (3, 3) only at a corner.
DIAGONAL = [
    [5, 5, 5, 5],
    [5, 1, 5, 5],
    [5, 5, 2, 5],
    [5, 5, 5, 0],
]


def test_diagonal_leak_drains_with_eight_neighbours():
    # D8: (1,1) -> (2,2) -> (3,3) is a path with highest cell 2, so (2,2) keeps
    # its own level 2 and (1,1) fills to 2, spilling over (2,2).
    z = grid(DIAGONAL)
    r = priority_flood(z, edge_mask(z.shape), connectivity=8)
    assert r.onset_stage[2, 2] == 2 and r.onset_stage[1, 1] == 2
    assert len(r.depressions) == 1
    row = r.depressions.row(1)
    assert (row["spill_row"], row["spill_col"], row["spill_elevation"]) == (2, 2, 2.0)


def test_diagonal_leak_is_closed_with_four_neighbours():
    # 4-neighbour: corners do not connect; both cells are walled by 5s and fill
    # to 5 as two separate depressions (not 4-adjacent to each other).
    z = grid(DIAGONAL)
    r = priority_flood(z, edge_mask(z.shape), connectivity=4)
    assert r.onset_stage[2, 2] == 5 and r.onset_stage[1, 1] == 5
    assert len(r.depressions) == 2
    assert r.depression_id[1, 1] == 1 and r.depression_id[2, 2] == 2


def test_cells_walled_in_by_nodata_are_unreached():
    z = grid(
        [
            [1, 1, 1, 1, 1],
            [1, N, N, N, 1],
            [1, N, 3, N, 1],
            [1, N, N, N, 1],
            [1, 1, 1, 1, 1],
        ]
    )
    r = priority_flood(z, edge_mask(z.shape))
    assert r.unreached_cells == 1
    assert math.isnan(r.onset_stage[2, 2]) and r.flood_tree[2, 2] == 0
    with pytest.raises(LocationOutsideDEM, match="not reached"):
        r.route(2, 2)


def test_depression_with_an_island_at_the_spill_level():
    # A lake at level 5 (notch at (0, 3)) with an island cell (2, 3) exactly at 5:
    # the island is not part of the depression (s == z), but the lake around it
    # is one 8-connected depression, and its spill point is the notch.
    z = grid(
        [
            [9, 9, 9, 5, 9, 9, 9],
            [9, 2, 2, 2, 2, 2, 9],
            [9, 2, 2, 5, 2, 1, 9],
            [9, 2, 2, 2, 2, 2, 9],
            [9, 9, 9, 9, 9, 9, 9],
        ]
    )
    r = priority_flood(z, edge_mask(z.shape))
    assert r.depression_id[2, 3] == 0
    assert len(r.depressions) == 1
    row = r.depressions.row(1)
    assert (row["spill_row"], row["spill_col"]) == (0, 3)
    assert (row["pit_row"], row["pit_col"]) == (2, 5)
    assert row["cell_count"] == 14


def test_equal_notches_spill_through_the_first_in_raster_order():
    # Two notches at 3 on the edge, (0, 2) and (2, 5); the basin inside (0 to 1)
    # fills to 3. Both notches are outlets, so both are ways out at hop distance
    # 0 and the basin is at distance 1; the rule picks the rim cell first in
    # raster order: (0, 2) (flat index 2) before (2, 5) (index 17). Whatever the
    # tile size, and so whatever order the flood meets the two notches in.
    z = grid(
        [
            [9, 9, 3, 9, 9, 9],
            [9, 1, 1, 1, 1, 9],
            [9, 1, 0, 1, 1, 3],
            [9, 9, 9, 9, 9, 9],
        ]
    )
    for tile in (1, 2, 3, 4, 5, 512):
        for conn in (4, 8):
            r = priority_flood(z, edge_mask(z.shape), connectivity=conn, tile_size=tile)
            row = r.depressions.row(1)
            assert (row["spill_row"], row["spill_col"], row["spills_to"]) == (0, 2, 0)
            assert row["spill_elevation"] == 3
            route = r.route(2, 2)
            assert (route.sill_row, route.sill_col) == (0, 2)


# Left basin L (z 0-1) behind a flat saddle of nine cells at 5; right basin R
# (z 1-2) drains over the edge notch (3, 8) at 4. Working: R fills to 4; every
# saddle cell has z = 5 > 4, so s = 5 there (a dry area at 5); L is walled by 9
# and the saddle, so it fills to 5. The saddle touches R (s = 4 < 5), so it is
# a way out (distance 0) and L is at distance 1. L's rim cells are (1, 2),
# (2, 2), (3, 2): the first in raster order is (1, 2). The saddle's exit (first
# cell with a lower neighbour) is (1, 4) with 8 neighbours (its SE neighbour
# (2, 5) is in R), (2, 4) with 4 neighbours; either way its lowest neighbour is
# (2, 5), in R, so L spills to R; R spills at (3, 8) to the outlets (0).
FLAT_SADDLE = [
    [9, 9, 9, 9, 9, 9, 9, 9, 9],
    [9, 1, 5, 5, 5, 9, 9, 9, 9],
    [9, 1, 5, 5, 5, 2, 2, 2, 9],
    [9, 0, 5, 5, 5, 2, 1, 2, 4],
    [9, 9, 9, 9, 9, 2, 2, 2, 9],
    [9, 9, 9, 9, 9, 9, 9, 9, 9],
]


@pytest.mark.parametrize("conn", [4, 8])
def test_flat_saddle_spills_at_its_first_rim_cell_whatever_the_tiles(conn):
    z = grid(FLAT_SADDLE)
    for tile in (1, 2, 3, 4, 7, 512):
        r = priority_flood(z, edge_mask(z.shape), connectivity=conn, tile_size=tile)
        left, right = int(r.depression_id[3, 1]), int(r.depression_id[3, 6])
        assert left > 0 and right > 0 and left != right
        L, R = r.depressions.row(left), r.depressions.row(right)
        assert L["spill_elevation"] == 5 and R["spill_elevation"] == 4
        assert (L["spill_row"], L["spill_col"], L["spills_to"]) == (1, 2, right)
        assert (R["spill_row"], R["spill_col"], R["spills_to"]) == (3, 8, 0)
        route = r.route(3, 1)
        assert (route.sill_row, route.sill_col) == (1, 2)
        on_route = set(zip(route.rows.tolist(), route.cols.tolist()))
        assert (1, 2) in on_route and route.reaches_outlet
        assert z[route.rows, route.cols].max() == 5


# --------------------------------------------------------------------------
# Bad input
# --------------------------------------------------------------------------


def test_bad_inputs_get_clear_errors():
    z = np.zeros((3, 3), np.float32)
    with pytest.raises(InvalidOutlets, match="no outlet"):
        priority_flood(z, np.zeros((3, 3), bool))
    with pytest.raises(InvalidOutlets, match="same grid"):
        priority_flood(z, np.ones((2, 3), bool))
    with pytest.raises(InvalidOutlets, match="boolean"):
        priority_flood(z, np.ones((3, 3), np.uint8))
    with pytest.raises(InvalidParameter, match="4 or 8"):
        priority_flood(z, edge_mask((3, 3)), connectivity=6)
    with pytest.raises(InvalidDEM, match="2-D"):
        priority_flood(np.zeros(5, np.float32), np.ones(5, bool))
    with pytest.raises(InvalidDEM, match="float32"):
        priority_flood(np.full((2, 2), 2**25 + 1, np.int64), np.ones((2, 2), bool))
    with pytest.raises(InvalidParameter, match="row_areas"):
        priority_flood(z, edge_mask((3, 3)), row_areas=[1.0, -1.0, 1.0])
    allnan = np.full((3, 3), np.nan, np.float32)
    with pytest.raises(InvalidOutlets, match="no outlet"):
        priority_flood(allnan, edge_mask((3, 3)))
    r = priority_flood(z, edge_mask((3, 3)))
    with pytest.raises(LocationOutsideDEM, match="outside"):
        r.route(3, 0)


def test_input_is_not_modified_and_integers_are_exact():
    z = np.array([[3, 3, 3], [3, -32767, 3], [3, 3, 3]], dtype=np.int16)
    before = z.copy()
    r = priority_flood(z, edge_mask(z.shape))
    assert np.array_equal(z, before)
    assert r.onset_stage.dtype == np.float32 and r.onset_stage[1, 1] == 3
    assert r.depressions.row(1)["max_depth"] == 32770


# --------------------------------------------------------------------------
# Property tests against the textbook minimax Dijkstra, and invariants
# --------------------------------------------------------------------------


@st.composite
def small_dems(draw):
    rows = draw(st.integers(1, 9))
    cols = draw(st.integers(1, 9))
    # Few distinct levels make plateaus and ties common.
    values = draw(
        st.lists(st.integers(0, 4), min_size=rows * cols, max_size=rows * cols)
    )
    z = np.array(values, dtype=np.float32).reshape(rows, cols)
    holes = draw(st.lists(st.booleans(), min_size=rows * cols, max_size=rows * cols))
    z[np.array(holes).reshape(rows, cols) & (draw(st.integers(0, 3)) == 0)] = np.nan
    extra = draw(st.lists(st.booleans(), min_size=rows * cols, max_size=rows * cols))
    outlets = edge_mask(z.shape) if draw(st.booleans()) else np.zeros(z.shape, bool)
    outlets |= np.array(extra).reshape(rows, cols) & (draw(st.integers(0, 4)) == 0)
    outlets &= ~np.isnan(z)
    if not outlets.any():
        valid = np.argwhere(~np.isnan(z))
        if len(valid) == 0:
            z[0, 0] = 1.0
            valid = np.array([[0, 0]])
        outlets[tuple(valid[draw(st.integers(0, len(valid) - 1))])] = True
    connectivity = draw(st.sampled_from([4, 8]))
    tile = draw(st.sampled_from([1, 2, 3, 4, 7, 512]))
    return z, outlets, connectivity, tile


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(small_dems())
def test_onset_stage_equals_textbook_minimax_dijkstra(case):
    z, outlets, conn, tile = case
    r = priority_flood(z, outlets, connectivity=conn, tile_size=tile)
    expected = minimax_stage(z, outlets, conn)
    assert np.array_equal(r.onset_stage, expected, equal_nan=True)


@pytest.mark.slow
@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(small_dems())
def test_invariants_of_the_flood(case):
    z, outlets, conn, tile = case
    r = priority_flood(z, outlets, connectivity=conn, tile_size=tile)
    s = r.onset_stage
    reached = ~np.isnan(s)
    # s >= z everywhere it is defined.
    assert np.all(s[reached] >= z[reached])
    # Idempotence: flooding the filled surface changes nothing.
    again = priority_flood(np.where(reached, s, np.nan), outlets & reached, connectivity=conn)
    assert np.array_equal(again.onset_stage, s, equal_nan=True)
    assert len(again.depressions) == 0
    # No inland pit: every reached non-outlet cell's parent is a neighbour whose
    # onset stage is not higher, and s(c) = max(z(c), s(parent)).
    rows, cols = z.shape
    for rr, cc in np.argwhere(reached):
        code = r.flood_tree[rr, cc]
        if code == OUTLET_CODE:
            assert outlets[rr, cc]
            continue
        assert 1 <= code <= 8
        pr, pc = rr + DIRECTION_ROW[code - 1], cc + DIRECTION_COL[code - 1]
        if conn == 4:
            assert abs(pr - rr) + abs(pc - cc) == 1
        assert s[pr, pc] <= s[rr, cc]
        assert s[rr, cc] == max(z[rr, cc], s[pr, pc])
    # Depressions are exactly the connected components of s > z.
    wet = reached & (s > z)
    parts = components(wet, conn)
    assert len(parts) == len(r.depressions)
    assert np.array_equal(r.depression_id > 0, wet)
    t = r.depressions
    for k in range(len(t)):
        dep = t.id[k]
        cells = r.depression_id == dep
        # Every depression's spill elevation equals s on all its cells.
        assert np.all(s[cells] == t.spill_elevation[k])
        assert t.cell_count[k] == cells.sum()
        assert t.volume_m2_vu[k] == pytest.approx(float(np.sum(s[cells] - z[cells])))
        assert t.pit_elevation[k] == z[cells].min()
        # The spill cell is a dry rim cell at the spill elevation, next to the depression.
        sr, sc = t.spill_row[k], t.spill_col[k]
        assert r.depression_id[sr, sc] == 0 and z[sr, sc] == t.spill_elevation[k]
        near = r.depression_id[max(sr - 1, 0) : sr + 2, max(sc - 1, 0) : sc + 2] == dep
        assert near.any()
        # The pit's route leaves through that spill cell.
        route = r.route(int(t.pit_row[k]), int(t.pit_col[k]))
        assert (route.sill_row, route.sill_col) == (sr, sc)
        target = t.spills_to[k]
        if target:
            assert t.spill_elevation[target - 1] <= t.spill_elevation[k]
    # Every route's controlling sill sits at the onset stage of its start.
    for rr, cc in np.argwhere(reached)[:20]:
        route = r.route(int(rr), int(cc))
        assert route.reaches_outlet
        assert route.sill_elevation == s[rr, cc]
        assert route.sill_elevation == z[route.rows, route.cols].max()


@settings(max_examples=200, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(small_dems())
def test_tiling_changes_nothing_but_the_tied_flood_tree(case):
    # The tiled flood (Barnes 2016) must give the same onset stage, depression
    # ids, whole depression table and route sills whatever the tile size; only
    # the flood tree (and route cells below the sill) may differ where routes tie.
    z, outlets, conn, tile = case
    whole = priority_flood(z, outlets, connectivity=conn, tile_size=10_000)
    tiled = priority_flood(z, outlets, connectivity=conn, tile_size=tile)
    assert np.array_equal(whole.onset_stage, tiled.onset_stage, equal_nan=True)
    assert np.array_equal(whole.depression_id, tiled.depression_id)
    for name in whole.depressions.columns:
        assert np.array_equal(getattr(whole.depressions, name), getattr(tiled.depressions, name),
                              equal_nan=True), name
    assert whole.unreached_cells == tiled.unreached_cells
    # Every route's controlling sill is tile-independent too.
    for rr, cc in np.argwhere(whole.flood_tree > 0):
        a, b = whole.route(int(rr), int(cc)), tiled.route(int(rr), int(cc))
        assert (a.sill_row, a.sill_col) == (b.sill_row, b.sill_col)
        assert b.reaches_outlet and b.sill_elevation == whole.onset_stage[rr, cc]
        assert z[b.rows, b.cols].max() == b.sill_elevation
        assert (b.sill_row, b.sill_col) in set(zip(b.rows.tolist(), b.cols.tolist()))


@settings(max_examples=200, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(small_dems())
def test_spill_points_follow_the_rule_read_literally(case):
    # tests/textbook_flood.canonical_spills reads the spill rule of the
    # sillmark.engine.flood docstring literally, with Python sets and BFS.
    z, outlets, conn, tile = case
    r = priority_flood(z, outlets, connectivity=conn, tile_size=tile)
    want = canonical_spills(z, r.onset_stage, r.depression_id, outlets, conn)
    t = r.depressions
    got = {int(t.id[k]): ((int(t.spill_row[k]), int(t.spill_col[k])), int(t.spills_to[k]))
           for k in range(len(t))}
    assert got == want


@pytest.mark.parametrize("tile", [16, 37, 64])
def test_tiled_terrain_equals_scikit_image(tile):
    # Tiles that do not divide the grid, on rolling terrain with many depressions
    # that span tiles; scikit-image 0.26 reconstruction as the reference.
    z = synthetic_terrain(150, 170, 7)
    r = priority_flood(z, edge_mask(z.shape), tile_size=tile)
    assert np.array_equal(r.onset_stage, skimage_fill(z))
    whole = priority_flood(z, edge_mask(z.shape))
    assert np.array_equal(r.depression_id, whole.depression_id)
    assert len(r.depressions) == len(whole.depressions) > 10


# --------------------------------------------------------------------------
# Outside references: scikit-image, pysheds, matplotlib's sample DEM
# --------------------------------------------------------------------------


def skimage_fill(z: np.ndarray, connectivity: int = 8) -> np.ndarray:
    """Depression filling by reconstruction by erosion (scikit-image).

    Seed = the DEM on the border and its maximum inside; reconstruction by
    erosion under the DEM gives the filled surface (Soille 2003; scikit-image's
    own "Filling holes and finding peaks" gallery example uses this set-up).
    """
    from skimage.morphology import reconstruction

    seed = z.copy()
    seed[1:-1, 1:-1] = z.max()
    footprint = np.ones((3, 3), bool) if connectivity == 8 else np.array(
        [[0, 1, 0], [1, 1, 1], [0, 1, 0]], bool
    )
    return reconstruction(seed, z, method="erosion", footprint=footprint).astype(np.float32)


def pysheds_fill(z: np.ndarray) -> np.ndarray:
    """pysheds 0.5 Grid.fill_depressions on an in-memory raster."""
    from affine import Affine
    from pysheds.grid import Grid
    from pysheds.sview import Raster, ViewFinder

    view = ViewFinder(
        affine=Affine(1.0, 0, 0, 0, -1.0, float(z.shape[0])),
        shape=z.shape,
        nodata=np.float32(-9999.0),
        crs="EPSG:32633",
    )
    grid = Grid(viewfinder=view)
    # Hand pysheds a copy: it is not documented to leave its input untouched.
    raster = Raster(z.copy(), viewfinder=view)
    return np.asarray(grid.fill_depressions(raster), dtype=np.float32)


def synthetic_terrain(rows, cols, seed, smooth=3.0):
    from scipy.ndimage import gaussian_filter

    rng = np.random.default_rng(seed)
    noise = gaussian_filter(rng.standard_normal((rows, cols)), smooth)
    ramp = np.linspace(0, 1, cols)[None, :] * rng.uniform(0, 2)
    return ((noise * 40 + ramp) * 10).astype(np.float32)


@pytest.mark.parametrize("seed", range(4))
@pytest.mark.parametrize("connectivity", [8, 4])
def test_equals_scikit_image_reconstruction(seed, connectivity):
    # scikit-image 0.26 morphology.reconstruction(method="erosion").
    z = synthetic_terrain(120, 150, seed)
    r = priority_flood(z, edge_mask(z.shape), connectivity=connectivity)
    assert np.array_equal(r.onset_stage, skimage_fill(z, connectivity))


@pytest.mark.slow
@pytest.mark.parametrize("seed", range(3))
def test_equals_pysheds_fill_depressions(seed):
    # pysheds 0.5 Grid.fill_depressions (D8 neighbourhood, raster edge as outlet).
    z = synthetic_terrain(100, 130, seed + 10, smooth=2.0)
    r = priority_flood(z, edge_mask(z.shape))
    assert np.array_equal(r.onset_stage, pysheds_fill(z))


@pytest.fixture(scope="module")
def jacksboro():
    """The Jacksboro fault DEM that matplotlib ships as sample data.

    A 344 x 403 int16 grid of elevations in metres at 3 arc-seconds (0.000833°)
    near the Jacksboro fault in north-east Tennessee, USA; matplotlib's sample
    data README credits the USGS National Elevation Dataset (recalled from
    memory; the file carries only the grid and its lon/lat bounds).
    """
    from matplotlib import cbook

    data = cbook.get_sample_data("jacksboro_fault_dem.npz")
    z = np.asarray(data["elevation"])
    assert z.shape == (344, 403) and z.dtype == np.int16
    return z


def test_jacksboro_equals_pysheds_and_scikit_image(jacksboro):
    z32 = jacksboro.astype(np.float32)
    r = priority_flood(jacksboro, edge_mask(jacksboro.shape))
    assert np.array_equal(r.onset_stage, skimage_fill(z32))  # scikit-image 0.26
    assert np.array_equal(r.onset_stage, pysheds_fill(z32))  # pysheds 0.5
    # A real landscape at 1 m vertical resolution has depressions with ties.
    assert len(r.depressions) > 0
    assert np.array_equal(r.depression_id > 0, r.onset_stage > z32)
