"""Significant depressions: hand-worked nests, a brute force, and noisy survey terrain."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from bench.terrain import carve_bowl, survey_terrain
from sillmark.engine.flood import priority_flood
from sillmark.errors import InvalidParameter, SillmarkError
from sillmark.products.hierarchy_sweep import depression_hierarchy
from sillmark.products.significance import (
    DEFAULT_VERTICAL_ACCURACY_M,
    DEPTH_PER_ACCURACY,
    significance,
    site_minimum,
)


def _edge(shape) -> np.ndarray:
    m = np.zeros(shape, bool)
    m[0, :] = m[-1, :] = m[:, 0] = m[:, -1] = True
    return m


@pytest.fixture(scope="module")
def nested_trench():
    """A walled trench (row 1 of a 3 x 9 grid) with three pits, spilling at 8.

    Row 1, by column: 20 | A 1 | 3 | B 2 | 6 | C 4 | 8 | outlet 0 | 20; rows 0
    and 2 are walls at 20, so water moves along the row only.

    Worked by hand, 1 m² cells:
    - A (pit 1) and B (pit 2) meet over the saddle at 3: node AB.
      A: depth 3 - 1 = 2, area 1, volume 2.  B: depth 1, area 1, volume 1.
    - AB and C (pit 4) meet over the saddle at 6: the top, which spills at 8.
      AB: depth 6 - 1 = 5, cells 1, 3, 2 -> area 3, volume 5 + 3 + 4 = 12.
      C: depth 6 - 4 = 2, area 1, volume 2.
      top: depth 8 - 1 = 7, area 5, volume 7 + 5 + 6 + 2 + 4 = 24.
    Post-order ids, children lowest pit first: A 1, B 2, AB 3, C 4, top 5.
    """
    z = np.full((3, 9), 20, np.float32)
    z[1] = [20, 1, 3, 2, 6, 4, 8, 0, 20]
    outlet = np.zeros(z.shape, bool)
    outlet[1, 7] = True
    h = depression_hierarchy(priority_flood(z, outlet))
    # The hand working above, held against the hierarchy first.
    assert h.nodes.parent.tolist() == [3, 3, 5, 5, 0]
    assert h.nodes.max_depth.tolist() == [2, 1, 5, 2, 7]
    assert h.nodes.area_m2.tolist() == [1, 1, 3, 1, 5]
    assert h.nodes.volume_m3.tolist() == [2, 1, 12, 2, 24]
    return h


@pytest.mark.parametrize(
    ("minimum", "significant", "owner"),
    [
        # Everything reaches 0.5: every node is a depression of its own.
        (dict(min_depth=0.5), [1, 2, 3, 4, 5], [1, 2, 3, 4, 5]),
        # 1.5: B (1) falls short. A reaches it, but AB joins A with B only, so A
        # is AB a little lower down (a chain): listed once, as AB. AB and C
        # both reach it and meet in the top: both listed, and the top too.
        (dict(min_depth=1.5), [3, 4, 5], [3, 3, 3, 4, 5]),
        # 2 exactly: A and C (depth 2) reach it (the bound counts): as for 1.5.
        (dict(min_depth=2.0), [3, 4, 5], [3, 3, 3, 4, 5]),
        # 2.5: only AB (5) and the top (7) reach it; AB meets nothing that
        # does, so the whole trench is one depression.
        (dict(min_depth=2.5), [5], [5, 5, 5, 5, 5]),
        # Volume 10: AB (12) and the top (24) only, as for 2.5.
        (dict(min_depth=0.0, min_volume_m3=10.0), [5], [5, 5, 5, 5, 5]),
        # Area 3: AB (3) and the top (5) only.
        (dict(min_depth=0.0, min_area_m2=3.0), [5], [5, 5, 5, 5, 5]),
        # Deeper than the whole trench: nothing is listed.
        (dict(min_depth=7.5), [], [0, 0, 0, 0, 0]),
    ],
)
def test_nested_trench_by_hand(nested_trench, minimum, significant, owner):
    s = significance(nested_trench, site_minimum(**minimum))
    assert s.table.id.tolist() == significant
    assert np.flatnonzero(s.significant).tolist() == [v - 1 for v in significant]
    assert s.node_to_significant.tolist() == [0] + owner
    assert s.depression_to_significant.tolist() == [0, owner[4]]


def test_nested_trench_table_at_one_and_a_half(nested_trench):
    s = significance(nested_trench, site_minimum(min_depth=1.5))
    t = s.table
    assert t.parent.tolist() == [5, 5, 0]
    assert t.depth.tolist() == [5, 2, 7]
    assert t.pit_elevation.tolist() == [1, 4, 1]
    assert t.spill_elevation.tolist() == [6, 6, 8]
    assert t.area_m2.tolist() == [3, 1, 5]
    assert t.volume_m3.tolist() == [12, 2, 24]
    assert t.absorbed.tolist() == [2, 0, 0]  # A and B are listed as part of AB
    assert (t.pit_row.tolist(), t.pit_col.tolist()) == ([1, 1, 1], [1, 5, 1])
    assert t.row(2)["spill_x"] is None  # no transform given
    # Cells: A, the 3 saddle and B belong to AB; C to C; the 6 saddle only to the top.
    ids = s.cell_ids(nested_trench)
    assert ids[1].tolist() == [0, 3, 3, 3, 5, 4, 0, 0, 0]
    assert not ids[[0, 2]].any()


def test_two_depressions_one_significant():
    """Row 1: 20 | P 1 | 5 | outlet 0 | 5 | Q 4.9 | 20: P is 4 deep, Q 0.1 (float32)."""
    z = np.full((3, 7), 20, np.float32)
    z[1] = [20, 1, 5, 0, 5, 4.9, 20]
    outlet = np.zeros(z.shape, bool)
    outlet[1, 3] = True
    r = priority_flood(z, outlet)
    h = depression_hierarchy(r)
    s = significance(h, site_minimum(min_depth=1.0))
    dep_p, dep_q = int(r.depression_id[1, 1]), int(r.depression_id[1, 5])
    top_p = h.top_node(dep_p)
    assert s.depression_to_significant[dep_p] == top_p
    assert s.depression_to_significant[dep_q] == 0
    grid = s.depression_to_significant[r.depression_id]
    assert grid[1].tolist() == [0, top_p, 0, 0, 0, 0, 0]
    assert np.array_equal(grid, s.cell_ids(h))


def test_default_minimum_follows_the_vertical_accuracy():
    assert site_minimum().min_depth == pytest.approx(DEPTH_PER_ACCURACY * DEFAULT_VERTICAL_ACCURACY_M)
    assert site_minimum(vertical_accuracy=0.2).min_depth == pytest.approx(0.6)
    feet = site_minimum(unit="ft")
    assert feet.min_depth * 0.3048 == pytest.approx(DEPTH_PER_ACCURACY * DEFAULT_VERTICAL_ACCURACY_M)
    given_depth = site_minimum(min_depth=0.25)
    assert given_depth.min_depth == 0.25 and np.isnan(given_depth.vertical_accuracy)


@pytest.mark.parametrize(
    "kwargs",
    [dict(vertical_accuracy=0), dict(vertical_accuracy=-0.1), dict(min_depth=float("nan")),
     dict(min_area_m2="big"), dict(min_volume_m3=True), dict(unit="furlong")],
)
def test_bad_minimum_is_refused_in_one_line(kwargs):
    with pytest.raises(InvalidParameter) as err:
        site_minimum(**kwargs)
    assert "\n" not in str(err.value)


def test_minimum_in_another_unit_or_no_hierarchy_is_refused(nested_trench):
    with pytest.raises(InvalidParameter, match="site_minimum\\(unit='m'\\)"):
        significance(nested_trench, site_minimum(unit="ft"))
    with pytest.raises(SillmarkError, match="DepressionHierarchy"):
        significance("trench")
    with pytest.raises(ValueError, match="site_minimum"):
        significance(nested_trench, 0.3)


# --------------------------------------------------------------------------
# Against a brute force
# --------------------------------------------------------------------------


def _brute_force(h, min_depth, min_area, min_volume):
    """Significance from the definitions, node by node, walking up parents."""
    t = h.nodes
    n = len(t)

    def reaches(v):
        k = v - 1
        depth = float(t.spill_elevation[k]) - float(t.pit_elevation[k])
        return depth >= min_depth and t.area_m2[k] >= min_area and t.volume_m3[k] >= min_volume

    significant = set()
    for v in range(1, n + 1):
        p = int(t.parent[v - 1])
        if reaches(v) and (p == 0 or sum(reaches(int(c)) for c in h.children(p)) >= 2):
            significant.add(v)
    owner = [0]
    for v in range(1, n + 1):
        u = v
        while u and u not in significant:
            u = int(t.parent[u - 1])
        owner.append(u)
    return significant, owner


@st.composite
def small_sites(draw):
    rows = draw(st.integers(3, 9))
    cols = draw(st.integers(3, 9))
    cells = draw(st.lists(st.integers(0, 12), min_size=rows * cols, max_size=rows * cols))
    z = (np.array(cells, np.float32).reshape(rows, cols)) / np.float32(4)
    return z, draw(st.sampled_from([4, 8])), draw(st.integers(0, 12)) / 4, \
        draw(st.sampled_from([0.0, 2.0, 5.0])), draw(st.sampled_from([0.0, 1.0, 4.0]))


@settings(max_examples=120, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(small_sites())
def test_matches_brute_force(site):
    z, conn, min_depth, min_area, min_volume = site
    r = priority_flood(z, _edge(z.shape), connectivity=conn)
    h = depression_hierarchy(r)
    s = significance(h, site_minimum(min_depth=min_depth, min_area_m2=min_area,
                                     min_volume_m3=min_volume))
    significant, owner = _brute_force(h, min_depth, min_area, min_volume)
    assert set(s.table.id.tolist()) == significant
    assert s.node_to_significant.tolist() == owner
    tops = h.tops
    assert s.depression_to_significant.tolist() == [0] + [owner[v] for v in tops]
    # Every significant node's parent in the table is the owner of its own parent.
    for v, p in zip(s.table.id.tolist(), s.table.parent.tolist()):
        assert p == owner[int(h.nodes.parent[v - 1])]
    # Cells: the owner of the smallest node whose region holds the cell.
    expected = np.zeros(z.shape, np.int32)
    size = np.full(z.shape, np.iinfo(np.int64).max)
    for v in range(1, len(h) + 1):
        mask = h.region_mask(v) & (h.nodes.cell_count[v - 1] < size)
        expected[mask] = owner[v]
        size[mask] = h.nodes.cell_count[v - 1]
    assert np.array_equal(s.cell_ids(h), expected)
    # Every node is counted once: as significant, or absorbed into one, or in none.
    assert len(s) + int(s.table.absorbed.sum()) + owner.count(0) - 1 == len(h)


# --------------------------------------------------------------------------
# Noisy survey terrain
# --------------------------------------------------------------------------


def test_noise_is_absorbed_and_the_real_basin_stays_on_a_gentle_plane():
    """A plane tilted 5 mm and 2 mm per cell, one bowl cut 1 m deep, 3 cm of noise.

    Without noise the site has exactly one depression (the bowl). The noise makes
    thousands of tiny ones; with the default accuracy (0.10 m, so 0.30 m deep)
    only the bowl is listed, and every other node counts as part of it or of none.
    """
    n = 160
    rr, cc = np.mgrid[:n, :n]
    plane = (50 + 0.005 * cc + 0.002 * rr).astype(np.float32)
    relief = carve_bowl(plane, 80, 80, 25, 1.0)
    rng = np.random.default_rng(7)
    z = (relief + rng.normal(0, 0.03, relief.shape)).astype(np.float32)
    clean = depression_hierarchy(priority_flood(relief, _edge(z.shape)))
    assert len(clean) == 1
    h = depression_hierarchy(priority_flood(z, _edge(z.shape)))
    assert len(h) > 1000  # the noise's doing
    s = significance(h)
    assert len(s) == 1
    bowl = int(s.table.id[0])
    assert s.cell_ids(h)[80, 80] == bowl
    assert abs(float(s.table.depth[0]) - float(clean.nodes.max_depth[0])) < 0.15
    assert abs(float(s.table.area_m2[0]) / float(clean.nodes.area_m2[0]) - 1) < 0.1
    # The exact values stay the hierarchy's own: nothing was smoothed away.
    assert float(s.table.volume_m3[0]) == float(h.nodes.volume_m3[bowl - 1])
    assert int(s.table.absorbed[0]) > 50
    # A tighter depth (the noise's own 3 cm as the accuracy) lets a few noise
    # pools through; an area threshold removes them again.
    s_tight = significance(h, site_minimum(vertical_accuracy=0.03, min_area_m2=200.0))
    assert s_tight.table.id.tolist() == [bowl]


def test_fractal_survey_lists_no_depression_the_noise_made_alone():
    """Fractal relief with a bowl, 3 cm noise: every listed depression lies on a
    depression of the noise-free relief nearly as deep, and the bowl is listed."""
    t = survey_terrain(192, seed=11, noise_sd=0.03, relief_m=3.0, bowls=((96, 96, 30, 1.5),))
    edge = _edge(t.elevation.shape)
    clean = priority_flood(t.relief, edge)
    noisy = priority_flood(t.elevation, edge)
    h = depression_hierarchy(noisy)
    assert len(h) > 3 * len(depression_hierarchy(clean))
    before = (t.elevation.copy(), noisy.onset_stage.copy())
    s = significance(h)
    m = s.minimum.min_depth
    clean_fill = clean.onset_stage - t.relief
    for v in s.table.id:
        region = h.region_mask(int(v))
        # 0.2 m = about 6.5 noise standard deviations of slack.
        assert clean_fill[region].max() >= m - 0.2, f"node {v} is the noise's alone"
    assert s.cell_ids(h)[96, 96] > 0
    assert np.array_equal(before[0], t.elevation)
    assert np.array_equal(before[1], noisy.onset_stage, equal_nan=True)


def test_a_site_without_depressions_lists_none():
    z = np.add.outer(np.arange(5), np.arange(6)).astype(np.float32)
    h = depression_hierarchy(priority_flood(z, _edge(z.shape)))
    s = significance(h)
    assert len(h) == 0 and len(s) == 0
    assert s.node_to_significant.tolist() == [0]
    assert s.depression_to_significant.tolist() == [0]
    assert not s.cell_ids(h).any()


@pytest.mark.slow
def test_kernel_runs_with_bounds_checking(tmp_path):
    """The compiled loop, compiled afresh with numba's bounds checks on, on a
    hierarchy with nesting, several trees and nodes in no significant one."""
    import os
    import subprocess
    import sys
    from pathlib import Path

    root = Path(__file__).resolve().parents[2]
    script = (
        "import numpy as np\n"
        "from sillmark.engine.flood import priority_flood\n"
        "from sillmark.products.hierarchy_sweep import depression_hierarchy\n"
        "from sillmark.products.significance import significance, site_minimum\n"
        "rng = np.random.default_rng(3)\n"
        "z = rng.integers(0, 9, (25, 30)).astype(np.float32)\n"
        "e = np.zeros(z.shape, bool); e[0] = e[-1] = True; e[:, 0] = e[:, -1] = True\n"
        "h = depression_hierarchy(priority_flood(z, e))\n"
        "for d in (0.0, 1.0, 3.0, 100.0):\n"
        "    s = significance(h, site_minimum(min_depth=d))\n"
        "    s.cell_ids(h)\n"
        "print('ok', len(h))\n"
    )
    env = {**os.environ, "NUMBA_BOUNDSCHECK": "1", "NUMBA_CACHE_DIR": str(tmp_path)}
    done = subprocess.run([sys.executable, "-c", script], cwd=root, env=env,
                          capture_output=True, text=True, timeout=600)
    assert done.returncode == 0, done.stderr[-3000:]
    assert done.stdout.startswith("ok")
