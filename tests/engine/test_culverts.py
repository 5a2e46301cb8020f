"""Culverts and flap valves as extra edges of the flood graph.

Hand-worked DEMs with the working in comments, the textbook minimax Dijkstra
of tests/textbook_flood.py (extended to extra and directed edges) on random
small DEMs, and the tiled pipeline against the in-memory one with culverts
that cross tile edges.
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from sillmark.engine.culverts import CULVERT_CODE, culvert_edges
from sillmark.engine.executors import SerialExecutor
from sillmark.engine.flood import priority_flood
from sillmark.errors import InvalidParameter
from tests.textbook_flood import minimax_stage

# An embankment (column 3, 6 m) between a river and a hollow. The river is
# column 0 (outlets, 1 m); the river side, columns 1-2, lies at 1.5 m; the
# hollow behind the embankment, columns 4-5, at 2 m; a 9 m frame closes the rest.
#
#        col: 0    1    2    3    4    5    6
#   row 0:    9    9    9    9    9    9    9
#   row 1:    1  1.5  1.5    6    2    2    9
#   row 2:    1  1.5  1.5    6    2    2    9
#   row 3:    9    9    9    9    9    9    9
EMBANKMENT = np.array([
    [9, 9, 9, 9, 9, 9, 9],
    [1, 1.5, 1.5, 6, 2, 2, 9],
    [1, 1.5, 1.5, 6, 2, 2, 9],
    [9, 9, 9, 9, 9, 9, 9],
], dtype=np.float32)
RIVER = np.zeros(EMBANKMENT.shape, bool)
RIVER[1:3, 0] = True
HOLLOW = (slice(1, 3), slice(4, 6))


def culverts(*items):
    """``((ra, ca), (rb, cb), invert, one_way)`` items as engine edges on the embankment grid."""
    a = [i[0] for i in items]
    b = [i[1] for i in items]
    return culvert_edges(EMBANKMENT.shape, [r for r, _ in a], [c for _, c in a],
                         [r for r, _ in b], [c for _, c in b], [i[2] for i in items],
                         [i[3] for i in items])


def test_embankment_without_a_culvert_holds_the_hollow_to_its_crest():
    # Water from the river reaches the hollow only over the embankment (6 m):
    # onset 6 m over ground at 2 m, a depression 4 m deep over 4 cells, whose
    # spill point lies on the embankment.
    r = priority_flood(EMBANKMENT, RIVER)
    assert np.all(r.onset_stage[HOLLOW] == 6.0)
    assert np.all(r.onset_stage[1:3, 1:3] == 1.5)
    assert len(r.depressions) == 1
    assert r.depressions.spill_col[0] == 3
    assert r.depressions.volume_m2_vu[0] == pytest.approx(4 * 4.0)


def test_embankment_with_a_culvert_above_the_hollow_floor_fills_it_to_the_invert():
    # Culvert from (1, 2), river side at 1.5 m, to (1, 4), hollow at 2 m, invert
    # 2.5 m. The river side settles at 1.5; the culvert end behind is reached at
    # max(1.5, 2.5, 2) = 2.5, and the rest of the hollow from it at
    # max(2.5, 2) = 2.5. The hollow is a depression 0.5 m deep (volume 4 x 0.5)
    # that drains through the culvert: its spill point is the culvert end.
    r = priority_flood(EMBANKMENT, RIVER, culverts=culverts(((1, 2), (1, 4), 2.5, False)))
    assert np.all(r.onset_stage[HOLLOW] == 2.5)
    assert len(r.depressions) == 1
    t = r.depressions
    assert (t.spill_row[0], t.spill_col[0]) == (1, 4)
    assert t.spill_elevation[0] == 2.5 and t.spills_to[0] == 0
    assert t.volume_m2_vu[0] == pytest.approx(4 * 0.5)
    assert r.flood_tree[1, 4] == CULVERT_CODE
    # The route from the far corner of the hollow runs through the culvert to the river.
    route = r.route(2, 5)
    assert route.reaches_outlet and (1, 2) in set(zip(route.rows.tolist(), route.cols.tolist()))
    assert (route.sill_row, route.sill_col, route.sill_elevation) == (1, 4, 2.5)


def test_a_culvert_below_the_hollow_floor_drains_it_completely():
    # Invert 1 m: the end behind is reached at max(1.5, 1, 2) = 2 m, its own
    # ground, so the hollow is no depression at all.
    r = priority_flood(EMBANKMENT, RIVER, culverts=culverts(((1, 2), (1, 4), 1.0, False)))
    assert np.all(r.onset_stage[HOLLOW] == 2.0)
    assert len(r.depressions) == 0


def test_a_flap_valve_lets_the_pond_drain_but_keeps_the_river_out():
    # A flap valve from the pond (1, 4) to the river side (1, 2), invert 1 m.
    # Inflow (the forward flood): the river may not pass from (1, 2) to (1, 4),
    # so the pond is still reached only over the embankment, at 6 m.
    valve = culverts(((1, 4), (1, 2), 1.0, True))
    inflow = priority_flood(EMBANKMENT, RIVER, culverts=valve)
    assert np.all(inflow.onset_stage[HOLLOW] == 6.0)
    # Drainage (the flood on the reversed graph): water standing in the pond
    # leaves through the valve once it stands above max(1.5, 1, 2) = 2 m, its
    # ground: the pond drains completely.
    drainage = priority_flood(EMBANKMENT, RIVER, culverts=valve.reversed())
    assert np.all(drainage.onset_stage[HOLLOW] == 2.0)
    # The same valve the other way round lets the river in at 2 m.
    inward = priority_flood(EMBANKMENT, RIVER, culverts=culverts(((1, 2), (1, 4), 1.0, True)))
    assert np.all(inward.onset_stage[HOLLOW] == 2.0)


def test_culverts_across_tile_edges_give_the_in_memory_result():
    # A 9 x 11 grid of random heights 0..5 with a walled basin (a ring of 9 m
    # cells, rows 2-6, columns 3-8), and three culverts between tiles of 3 x 3
    # cells (one a flap valve), from the grid edge and between interiors; the
    # first drains the basin under its wall.
    rng = np.random.default_rng(17)
    z = rng.integers(0, 6, (9, 11)).astype(np.float32)
    z[2, 3:9] = z[6, 3:9] = z[2:7, 3] = z[2:7, 8] = 9
    edge = np.zeros(z.shape, bool)
    edge[0, :] = edge[-1, :] = edge[:, 0] = edge[:, -1] = True
    items = [((4, 5), (7, 9), 3.0, False), ((1, 1), (4, 7), 5.0, True),
             ((0, 5), (5, 1), 2.0, False)]
    edges = culvert_edges(z.shape, [a[0] for a, *_ in items], [a[1] for a, *_ in items],
                          [b[0] for _, b, *_ in items], [b[1] for _, b, *_ in items],
                          [i[2] for i in items], [i[3] for i in items])
    whole = priority_flood(z, edge, culverts=edges, tile_size=64)
    tiled = priority_flood(z, edge, culverts=edges, tile_size=3, executor=SerialExecutor())
    assert np.array_equal(whole.onset_stage, tiled.onset_stage, equal_nan=True)
    assert np.array_equal(whole.depression_id, tiled.depression_id)
    for name in ("spill_row", "spill_col", "spill_elevation", "spills_to", "volume_m2_vu"):
        assert np.array_equal(getattr(whole.depressions, name), getattr(tiled.depressions, name))
    expected = minimax_stage(z, edge, 8, items)
    assert np.array_equal(whole.onset_stage, expected, equal_nan=True)
    # The culverts changed something: without them the stage differs.
    assert not np.array_equal(priority_flood(z, edge).onset_stage, expected)


@st.composite
def dems_with_culverts(draw):
    rows = draw(st.integers(2, 8))
    cols = draw(st.integers(2, 8))
    cells = st.tuples(st.integers(0, rows - 1), st.integers(0, cols - 1))
    heights = draw(st.lists(st.integers(0, 8), min_size=rows * cols, max_size=rows * cols))
    z = np.array(heights, dtype=np.float32).reshape(rows, cols)
    holes = draw(st.lists(cells, max_size=3))
    for r, c in holes:
        z[r, c] = np.nan
    outlets = np.zeros((rows, cols), bool)
    for r, c in draw(st.lists(cells, min_size=1, max_size=3)):
        outlets[r, c] = True
    outlets &= ~np.isnan(z)
    items = []
    for a, b, invert, one_way in draw(st.lists(
            st.tuples(cells, cells, st.integers(0, 16), st.booleans()), max_size=4)):
        if a != b and not np.isnan(z[a]) and not np.isnan(z[b]):
            items.append((a, b, invert / 2, one_way))
    return z, outlets, items, draw(st.sampled_from([8, 4])), draw(st.integers(1, 5))


@settings(max_examples=60, deadline=None)
@given(dems_with_culverts())
def test_onset_stage_equals_the_textbook_minimax_with_extra_and_directed_edges(case):
    z, outlets, items, connectivity, tile = case
    if not outlets.any():
        return
    edges = None
    if items:
        edges = culvert_edges(z.shape, [a[0] for a, *_ in items], [a[1] for a, *_ in items],
                              [b[0] for _, b, *_ in items], [b[1] for _, b, *_ in items],
                              [i[2] for i in items], [i[3] for i in items], elevation=z)
    r = priority_flood(z, outlets, connectivity=connectivity, culverts=edges, tile_size=tile,
                       executor=SerialExecutor())
    expected = minimax_stage(z, outlets, connectivity, items)
    assert np.array_equal(r.onset_stage, expected, equal_nan=True)
    # Every depression has a spill point at its spill elevation, on the grid.
    t = r.depressions
    for k in range(len(t)):
        assert 0 <= t.spill_row[k] < z.shape[0] and 0 <= t.spill_col[k] < z.shape[1]
        assert r.onset_stage[t.spill_row[k], t.spill_col[k]] == t.spill_elevation[k]
    # Every reached cell's route ends at an outlet.
    for rr, cc in zip(*np.nonzero(~np.isnan(r.onset_stage))):
        assert r.route(int(rr), int(cc)).reaches_outlet


def test_bad_culverts_are_refused():
    with pytest.raises(InvalidParameter, match="outside the grid"):
        culvert_edges((3, 3), [0], [0], [3], [0], [1.0])
    with pytest.raises(InvalidParameter, match="one cell"):
        culvert_edges((3, 3), [1], [1], [1], [1], [1.0])
    z = np.ones((3, 3), np.float32)
    z[2, 2] = np.nan
    with pytest.raises(InvalidParameter, match="nodata"):
        culvert_edges((3, 3), [0], [0], [2], [2], [1.0], elevation=z)
    with pytest.raises(InvalidParameter, match="finite"):
        culvert_edges((3, 3), [0], [0], [1], [1], [np.inf])
