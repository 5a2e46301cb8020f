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


def networkx_cut_size(z, outlets, place, level, connectivity):
    """Size of a minimum node cut between the outlets and the place (None: none exists)."""
    rows, cols = z.shape
    steps = EIGHT if connectivity == 8 else FOUR
    below = ~np.isnan(z) & (z < level)
    g = nx.Graph()
    g.add_nodes_from(["S", "T"])

    def node(r, c):
        return "S" if outlets[r, c] else "T" if place[r, c] else (r, c)

    for r in range(rows):
        for c in range(cols):
            if not below[r, c]:
                continue
            for dr, dc in steps:
                rr, cc = r + dr, c + dc
                if 0 <= rr < rows and 0 <= cc < cols and below[rr, cc]:
                    a, b = node(r, c), node(rr, cc)
                    if a != b:
                        g.add_edge(a, b)
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
