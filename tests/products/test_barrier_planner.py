"""The barrier planner: a minimum vertex cut, checked by hand and against networkx.

Reference: networkx 3.6.1 ``minimum_node_cut`` (the installed test
dependency) on the graph of cells below the level, with the outlets merged
into one source node and the place into one target node.
"""

from __future__ import annotations

import networkx as nx
import numpy as np
import pytest

from sillmark.engine.flood import priority_flood
from sillmark.products.barrier_planner import plan_barrier
from tests.textbook_flood import EIGHT, FOUR


def networkx_cut_size(z, outlets, place, level, connectivity, culverts=()):
    """Size of a minimum node cut between the outlets and the place (None: none exists).

    The graph joins the cells below ``level``: neighbours both ways, and each
    open culvert (invert below the level) from its first end to its last, and
    back unless it is a flap valve. With culverts it is a DiGraph (networkx 3.6.1
    ``minimum_node_cut`` splits the nodes of a directed graph)."""
    rows, cols = z.shape
    steps = EIGHT if connectivity == 8 else FOUR
    below = ~np.isnan(z) & (z < level)
    g = nx.DiGraph() if culverts else nx.Graph()
    g.add_nodes_from(["S", "T"])

    def node(r, c):
        return "S" if outlets[r, c] else "T" if place[r, c] else (r, c)

    def join(a, b):
        if a != b and a != "T" and b != "S":  # edges out of T or into S carry no water to T
            g.add_edge(a, b)

    for r in range(rows):
        for c in range(cols):
            if not below[r, c]:
                continue
            for dr, dc in steps:
                rr, cc = r + dr, c + dc
                if 0 <= rr < rows and 0 <= cc < cols and below[rr, cc]:
                    join(node(r, c), node(rr, cc))
    for (ar, ac), (br, bc), invert, one_way in culverts:
        if invert < level and below[ar, ac] and below[br, bc]:
            join(node(ar, ac), node(br, bc))
            if not one_way:
                join(node(br, bc), node(ar, ac))
    if g.has_edge("S", "T") or (outlets & place & below).any():
        return None
    if not nx.has_path(g, "S", "T"):
        return 0
    return len(nx.minimum_node_cut(g, "S", "T"))


def test_a_bay_with_two_arms_needs_a_cell_in_each_under_8_connectivity():
    # Ground at 9 (dry) except: the river, columns 0-1 at 0 (outlets in column
    # 0); two 1-cell-wide arms at 0 along rows 2 and 6 from column 2 to 5,
    # joined down column 5, rows 2-6; the place P at (4, 6), at 0.
    #
    #   col:  0 1 2 3 4 5 6 7
    #   row 1: 0 0 9 9 9 9 9 9
    #   row 2: 0 0 0 0 0 0 9 9      <- north arm
    #   row 3: 0 0 9 9 9 0 9 9
    #   row 4: 0 0 9 9 9 0 P 9
    #   row 5: 0 0 9 9 9 0 9 9
    #   row 6: 0 0 0 0 0 0 9 9      <- south arm
    #
    # 8-connectivity: P touches (3, 5), (4, 5) and (5, 5), so closing P's side
    # takes 3 cells; one cell in each arm, e.g. (2, 3) and (6, 3), takes 2
    # (the 9 m ground leaves no way round them): the cut is 2 cells.
    # 4-connectivity: P touches (4, 5) only: the cut is that 1 cell.
    z = np.full((8, 8), 9.0, np.float32)
    z[:, 0:2] = 0.0
    z[2, 2:6] = z[6, 2:6] = 0.0
    z[2:7, 5] = 0.0
    z[4, 6] = 0.0
    outlets = np.zeros(z.shape, bool)
    outlets[:, 0] = True
    place = np.zeros(z.shape, bool)
    place[4, 6] = True
    for connectivity, cells in ((8, 2), (4, 1)):
        plan = plan_barrier(z, outlets, place, 1.0, connectivity=connectivity, cell_size=2.0)
        assert plan.possible and plan.cells == cells and plan.length == 2.0 * cells
        assert networkx_cut_size(z, outlets, place, 1.0, connectivity) == cells
        edited, _ = plan.as_edits(z.shape).apply(z)
        s = priority_flood(edited, outlets, connectivity=connectivity).onset_stage
        assert s[4, 6] >= 1.0
        assert priority_flood(z, outlets, connectivity=connectivity).onset_stage[4, 6] == 0.0


@pytest.mark.parametrize("seed", range(12))
def test_the_cut_has_the_size_networkx_finds_and_keeps_the_place_dry(seed):
    rng = np.random.default_rng(seed)
    rows, cols = rng.integers(5, 10, 2)
    z = rng.integers(0, 6, (rows, cols)).astype(np.float32)
    z[rng.random(z.shape) < 0.08] = np.nan
    outlets = np.zeros(z.shape, bool)
    outlets[:, 0] = True
    outlets &= ~np.isnan(z)
    place = np.zeros(z.shape, bool)
    pr, pc = int(rows // 2), int(cols - 2)
    place[pr, pc] = True
    z[pr, pc] = 0.0
    level = float(rng.integers(2, 6))
    connectivity = int(rng.choice([4, 8]))
    plan = plan_barrier(z, outlets, place, level, connectivity=connectivity)
    expected = networkx_cut_size(z, outlets, place, level, connectivity)
    if expected is None:
        assert not plan.possible and plan.cells == 0
        return
    assert plan.possible and plan.cells == expected
    if not outlets.any():
        return
    edited, _ = plan.as_edits(z.shape).apply(z)
    s = priority_flood(edited, outlets, connectivity=connectivity).onset_stage
    assert np.isnan(s[pr, pc]) or s[pr, pc] >= level


def test_no_barrier_when_an_outlet_touches_the_place_or_none_is_needed():
    z = np.zeros((4, 4), np.float32)
    outlets = np.zeros(z.shape, bool)
    outlets[1, 1] = True
    place = np.zeros(z.shape, bool)
    place[1, 2] = True
    plan = plan_barrier(z, outlets, place, 1.0)
    assert not plan.possible and "touches the place" in plan.reason
    high = plan_barrier(z + 5, outlets, place, 1.0)
    assert high.possible and high.cells == 0 and "no barrier is needed" in high.reason


def test_a_diagonal_barrier_is_measured_along_its_steps_not_by_its_cells():
    # Hand-worked: cells (0, 0), (1, 1), (2, 2) given out of order, plus a lone
    # cell (0, 4). On 2 m cells the diagonal piece runs 2 corner steps of
    # 2·√2 m between centres, plus half a corner step (√2 m) at each end:
    # 6·√2 ≈ 8.485 m; the lone cell spans one cell width, 2 m. Together
    # 6·√2 + 2 m, where cells × cell size would give 8 m.
    from affine import Affine

    from sillmark.grid.dem import dem_from_array
    from sillmark.products.barrier_planner import BarrierPlan, barrier_pieces

    rows, cols = np.array([2, 0, 0, 1]), np.array([2, 4, 0, 1])
    pieces = barrier_pieces(rows, cols)
    assert [(r.tolist(), c.tolist()) for r, c in pieces] == [([0], [4]), ([0, 1, 2], [0, 1, 2])]
    plan = BarrierPlan(level=1.0, possible=True, reason="", rows=rows, cols=cols, cell_size=2.0)
    assert plan.length == pytest.approx(6 * np.sqrt(2) + 2)
    dem = dem_from_array(np.zeros((4, 6), np.float32), transform=Affine(2, 0, 500000, 0, -2, 5000000))
    ground = plan.ground_length(dem)
    assert ground.unit == "m" and ground.value == pytest.approx(6 * np.sqrt(2) + 2)


def test_an_l_shaped_wall_round_a_corner_place_walks_its_side_steps():
    # Hand-worked: flat ground at 0 m on 5 × 5 cells, outlets on the west column
    # and the north row, the place in the south-east corner (4, 4), level 1 m.
    # Under 8-connectivity the place's three neighbours (3, 3), (3, 4), (4, 3)
    # are the only 3-cell cut (any ring further out is longer); as a line it
    # is (3, 4) → (3, 3) → (4, 3): two side steps plus half a step at each
    # end, 3 cells long.
    z = np.zeros((5, 5), np.float32)
    outlets = np.zeros(z.shape, bool)
    outlets[:, 0] = outlets[0, :] = True
    place = np.zeros(z.shape, bool)
    place[4, 4] = True
    plan = plan_barrier(z, outlets, place, 1.0, cell_size=3.0)
    assert plan.cells == 3 == networkx_cut_size(z, outlets, place, 1.0, 8)
    ((r, c),) = plan.pieces
    assert {(int(a), int(b)) for a, b in zip(r, c)} == {(3, 3), (3, 4), (4, 3)}
    assert (int(r[1]), int(c[1])) == (3, 3)  # the corner cell sits in the middle of the line
    assert plan.length == pytest.approx(9.0)


def edges_of(shape, culverts):
    from sillmark.engine.culverts import culvert_edges

    (a, b, invert, one_way) = zip(*culverts)
    return culvert_edges(shape, [p[0] for p in a], [p[1] for p in a], [p[0] for p in b],
                         [p[1] for p in b], invert, one_way)


def levee_with_a_gap():
    # 9 × 11 cells, floodplain at 0 m with the DEM edge as outlet; a levee ring
    # at 9 m on rows 1-7, cols 2-8, round a polder at 0 m (rows 2-6, cols 3-7);
    # the east wall (col 8) has a gap at rows 3-4 (0 m). The place is (4, 5).
    #
    #   col:   0 1 2 3 4 5 6 7 8 9 10
    #   row 1: 0 0 9 9 9 9 9 9 9 0 0
    #   row 2: 0 0 9 0 0 0 0 0 9 0 0
    #   row 3: 0 0 9 0 0 0 0 0 0 0 0    <- gap
    #   row 4: 0 w 9 i 0 P 0 0 0 0 0    <- gap; w, i: the culvert's ends
    #   row 5: 0 0 9 0 0 0 0 0 9 0 0
    #   row 7: 0 0 9 9 9 9 9 9 9 0 0
    #
    # Without culverts the gap's two cells are the cut (a cut inside, col 7,
    # or outside, col 9, needs rows 2-5: 4 cells, under 8-connectivity).
    z = np.zeros((9, 11), np.float32)
    z[1:8, 2:9] = 9.0
    z[2:7, 3:8] = 0.0
    z[3:5, 8] = 0.0
    outlets = np.zeros(z.shape, bool)
    outlets[0, :] = outlets[-1, :] = outlets[:, 0] = outlets[:, -1] = True
    place = np.zeros(z.shape, bool)
    place[4, 5] = True
    return z, outlets, place


@pytest.mark.parametrize("culvert, cells", [
    # A culvert through the west wall, from w (4, 1) to i (4, 3), invert 0.5 m,
    # target 2 m. Both ways: water comes in through it too, so besides the gap
    # one end must be raised (closing the culvert at 2 m): 2 + 1 = 3 cells.
    (((4, 1), (4, 3), 0.5, False), 3),
    # A flap valve letting the river in (first end w, last end i): the same 3.
    (((4, 1), (4, 3), 0.5, True), 3),
    # A flap valve draining the polder (first end i, last end w): water never
    # comes in through it, the gap alone is the cut: 2 cells.
    (((4, 3), (4, 1), 0.5, True), 2),
    # An invert at 3 m, above the target: the culvert stays shut at 2 m: 2 cells.
    (((4, 1), (4, 3), 3.0, False), 2),
])
def test_a_culvert_through_the_levee_is_closed_by_the_wall_unless_it_only_drains(culvert, cells):
    from sillmark.grid.edits import Edits

    z, outlets, place = levee_with_a_gap()
    edges = edges_of(z.shape, [culvert])
    plan = plan_barrier(z, outlets, place, 2.0, culverts=edges)
    assert plan.possible and plan.cells == cells
    assert networkx_cut_size(z, outlets, place, 2.0, 8, [culvert]) == cells
    chosen = set(zip(plan.rows.tolist(), plan.cols.tolist()))
    assert {(3, 8), (4, 8)} <= chosen
    if cells == 3:
        assert chosen - {(3, 8), (4, 8)} <= {(4, 1), (4, 3)}
    # The wall applied as an edit, with the culvert in the flood: onset >= 2 m.
    # Without the wall the place floods at 0 m (the gap; and the culvert crossed
    # at its invert, 0.5 m, when it lets water in).
    wall: Edits = plan.as_edits(z.shape)
    edited, _ = wall.apply(z)
    assert priority_flood(z, outlets, culverts=edges).onset_stage[4, 5] == 0.0
    assert priority_flood(edited, outlets, culverts=edges).onset_stage[4, 5] >= 2.0
    # A wall planned without the culvert (the gap only) leaves the place wet
    # when the culvert lets water in: at the invert, 0.5 m.
    if cells == 3:
        gap_only, _ = plan_barrier(z, outlets, place, 2.0).as_edits(z.shape).apply(z)
        assert priority_flood(gap_only, outlets, culverts=edges).onset_stage[4, 5] == 0.5


def test_a_culvert_from_an_outlet_into_the_place_cannot_be_walled_off():
    z, outlets, place = levee_with_a_gap()
    culvert = ((4, 0), (4, 5), 0.5, False)  # from an edge outlet straight into P
    plan = plan_barrier(z, outlets, place, 2.0, culverts=edges_of(z.shape, [culvert]))
    assert not plan.possible and "culvert" in plan.reason
    assert networkx_cut_size(z, outlets, place, 2.0, 8, [culvert]) is None


@pytest.mark.parametrize("seed", range(10))
def test_with_random_culverts_the_cut_has_the_size_networkx_finds(seed):
    # On these seeds the culverts change the size of the cut in 3 cases of 10
    # (seeds 1, 6 and 9), so a planner ignoring them fails here.
    rng = np.random.default_rng(300 + seed)
    rows, cols = rng.integers(5, 9, 2)
    z = rng.integers(0, 6, (rows, cols)).astype(np.float32)
    outlets = np.zeros(z.shape, bool)
    outlets[:, 0] = True
    place = np.zeros(z.shape, bool)
    pr, pc = int(rows // 2), int(cols - 2)
    place[pr, pc] = True
    z[pr, pc] = 0.0
    culverts = []
    for _ in range(int(rng.integers(2, 5))):
        a = (int(rng.integers(0, rows)), int(rng.integers(0, cols)))
        b = (int(rng.integers(0, rows)), int(rng.integers(0, cols)))
        if a != b:
            culverts.append((a, b, float(rng.integers(0, 4)), bool(rng.random() < 0.5)))
    level = float(rng.integers(3, 6))
    connectivity = int(rng.choice([4, 8]))
    edges = edges_of(z.shape, culverts)
    plan = plan_barrier(z, outlets, place, level, connectivity=connectivity, culverts=edges)
    expected = networkx_cut_size(z, outlets, place, level, connectivity, culverts)
    if expected is None:
        assert not plan.possible and plan.cells == 0
        return
    assert plan.possible and plan.cells == expected
    edited, _ = plan.as_edits(z.shape).apply(z)
    s = priority_flood(edited, outlets, connectivity=connectivity, culverts=edges).onset_stage
    assert s[pr, pc] >= level

