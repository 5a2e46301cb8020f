"""Tests of the curve rows of the depression hierarchy (sillmark.products.hierarchy_curves).

Outside references used here, each named beside its check:
- a hand-worked bowl (the working is in the comments);
- a direct numpy sum over each node's region, sum(max(0, h - z) * cell area),
  the definition of storage;
- the previous route to the same rows: each node's breakpoints from its region
  (DepressionHierarchy.curve) and its values from the per-node tree walk of
  DepressionHierarchy.curves_at, which the segment-tree sweep replaces.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from sillmark.engine.flood import priority_flood
from sillmark.errors import InvalidParameter
from sillmark.products import hierarchy_curves as hc
from sillmark.products.hierarchy_sweep import depression_hierarchy


def edge_mask(shape) -> np.ndarray:
    m = np.zeros(shape, bool)
    m[0, :] = m[-1, :] = m[:, 0] = m[:, -1] = True
    return m


def hierarchy_of(z, areas, *, connectivity=8, unit="m"):
    result = priority_flood(z, edge_mask(z.shape), connectivity=connectivity, row_areas=areas)
    return depression_hierarchy(result, row_areas=areas, unit=unit)


def random_site(seed: int):
    """A small DEM with few distinct levels (ties, plateaus, nesting) or centimetre noise."""
    rng = np.random.default_rng(seed)
    rows, cols = (int(v) for v in rng.integers(4, 16, 2))
    top = int(rng.choice([4, 12, 400]))
    z = rng.integers(0, top, (rows, cols)).astype(np.float32)
    if seed % 2:
        z += rng.normal(0, 0.01, z.shape).astype(np.float32)
    areas = rng.uniform(0.25, 4.0, rows)
    return z, areas, int(rng.choice([4, 8])), str(rng.choice(["m", "ft"]))


def all_rows(h, *, max_points=250, step_rows=100):
    counts = hc.natural_counts(h, max_points=max_points, step_rows=step_rows)
    rows = hc.curve_rows(h, counts, np.ones(len(h), np.int64), max_points=max_points,
                         step_rows=step_rows)
    return counts, rows


def previous_rows(h, max_points, step_rows):
    """Levels and values by the previous route: breakpoints from each node's own region
    (or the stepped levels), values by DepressionHierarchy.curves_at."""
    t = h.nodes
    per = []
    for v in range(1, len(h) + 1):
        levels = h.curve(v).elevation
        if levels.shape[0] > max_points:
            _, levels = hc.stepped_levels(t.pit_elevation[v - 1:v], t.merge_elevation[v - 1:v],
                                          t.spill_elevation[v - 1:v], step_rows)
        per.append(levels)
    start = np.concatenate(([0], np.cumsum([p.shape[0] for p in per]))).astype(np.int64)
    levels = np.concatenate(per)
    area, storage = h.curves_at(start, levels)
    return start, levels, area, storage


# --------------------------------------------------------------------------- hand-worked


def test_hand_worked_bowl_at_each_breakpoint():
    # A rim at 9 m with a notch at 6 m; the inside (2 m cells, 4 m² each):
    #   4 3 5
    #   2 1 3
    #   5 4 5
    # One pit (the 1), spill at 6 through the notch, all nine cells below 6.
    # Cells below each breakpoint h (strictly) and storage sum 4 * (h - z):
    #   h=1: none                                   area  0, storage  0
    #   h=2: {1}                                    area  4, storage  4*1 = 4
    #   h=3: {1, 2}                                 area  8, storage  4*(2+1) = 12
    #   h=4: {1, 2, 3, 3}                           area 16, storage  4*(3+2+1+1) = 28
    #   h=5: {1, 2, 3, 3, 4, 4}                     area 24, storage  4*(4+3+2+2+1+1) = 52
    #   h=6: all nine                               area 36, storage  4*(5+4+3+3+2+2+1+1+1) = 88
    # (each step also checks as the previous storage plus area times 1 m:
    #  4 + 8 = 12, 12 + 16 = 28, 28 + 24 = 52, 52 + 36 = 88).
    z = np.full((5, 5), 9, np.float32)
    z[0, 2] = 6
    z[1:4, 1:4] = [[4, 3, 5], [2, 1, 3], [5, 4, 5]]
    h = hierarchy_of(z, np.full(5, 4.0))
    assert len(h) == 1
    _, rows = all_rows(h)
    assert rows.level.tolist() == [1, 2, 3, 4, 5, 6]
    assert rows.area_m2.tolist() == [0, 4, 8, 16, 24, 36]
    assert rows.storage_m3.tolist() == pytest.approx([0, 4, 12, 28, 52, 88], abs=1e-12)
    assert [hc.POINT_NAMES[c] for c in rows.code] == ["pit"] + ["breakpoint"] * 4 + ["spill"]
    assert rows.storage_m3[-1] == pytest.approx(h.nodes.volume_m3[0], abs=1e-12)


# --------------------------------------------------------------------------- against references


@pytest.mark.parametrize("seed", range(24))
def test_rows_equal_the_previous_route_and_the_direct_sum(seed):
    z, areas, connectivity, unit = random_site(seed)
    h = hierarchy_of(z, areas, connectivity=connectivity, unit=unit)
    if len(h) == 0:
        pytest.skip("no depression in this draw")
    max_points, step_rows = (250, 100) if seed % 3 else (4, 3)
    counts, rows = all_rows(h, max_points=max_points, step_rows=step_rows)
    start, levels, area, storage = previous_rows(h, max_points, step_rows)
    # Same rows (nodes, levels), same values up to the rounding of another order of sums.
    assert np.array_equal(rows.node, np.repeat(np.arange(1, len(h) + 1), np.diff(start)))
    assert np.array_equal(rows.level, levels)
    assert np.array_equal(counts.rows, np.diff(start))
    np.testing.assert_allclose(rows.area_m2, area, rtol=1e-13, atol=0)
    np.testing.assert_allclose(rows.storage_m3, storage, rtol=1e-10, atol=1e-12)
    # Storage is its definition: the sum over the node's region of max(0, h - z) x cell area.
    cell_area = np.broadcast_to(areas[:, None], z.shape)
    metres = h.unit.metres
    for k in range(len(rows)):
        region = h.region_mask(int(rows.node[k]))
        depth = np.maximum(0.0, rows.level[k] - z[region].astype(np.float64))
        direct = float(np.sum(depth * cell_area[region])) * metres
        below = float(np.sum(cell_area[region][z[region] < rows.level[k]]))
        assert rows.storage_m3[k] == pytest.approx(direct, rel=1e-10, abs=1e-12)
        assert rows.area_m2[k] == pytest.approx(below, rel=1e-13, abs=0)


def test_a_deep_chain_of_nested_pools():
    # A staircase: pit k (k = 0..D-1) in column 2k+1 at depth -k, separated by
    # walls that rise towards the outlet side, so pools merge one after another
    # into a chain D levels deep; the rows agree with the direct sums.
    d = 60
    z = np.full((3, 2 * d + 3), 100.0, np.float32)
    for k in range(d):
        z[1, 2 * k + 1] = -float(k)
        z[1, 2 * k + 2] = 50.0 - k  # wall right of pit k
    z[1, 2 * d + 1] = 60.0
    h = hierarchy_of(z, np.ones(3))
    assert len(h) == 2 * d - 1  # d pits and d - 1 merges
    counts, rows = all_rows(h)
    start, levels, area, storage = previous_rows(h, 250, 100)
    np.testing.assert_allclose(rows.storage_m3, storage, rtol=1e-10)
    top = int(h.tops[0])
    mine = rows.node == top
    region = h.region_mask(top)
    for lv, st in zip(rows.level[mine], rows.storage_m3[mine]):
        assert st == pytest.approx(float(np.sum(np.maximum(0.0, lv - z[region]))), rel=1e-12)


# --------------------------------------------------------------------------- listed and cap


def noisy_site():
    rng = np.random.default_rng(7)
    z = (rng.normal(0, 0.03, (40, 40)) + np.hypot(*np.mgrid[-20:20, -20:20]) * 0.05)
    return hierarchy_of(np.round(z, 3).astype(np.float32), np.ones(40))


def test_the_cap_thins_within_the_rows_and_keeps_pit_merge_and_spill():
    h = noisy_site()
    t = h.nodes
    counts, full = all_rows(h)
    natural = int(counts.rows.sum())
    for cap in (natural, natural // 3, 3 * len(h), 2 * len(h)):
        stride, plan = hc.choose_strides(counts, t.volume_m3, None, cap)
        rows = hc.curve_rows(h, counts, stride)
        assert len(rows) <= cap
        assert plan.natural_rows == natural and plan.thinned == (cap < natural)
        # Every kept row is the unthinned row at the same (node, index).
        at = {(int(n), int(i)): k for k, (n, i) in enumerate(zip(full.node, full.index))}
        k = np.array([at[(int(n), int(i))] for n, i in zip(rows.node, rows.index)])
        assert np.array_equal(rows.level, full.level[k])
        assert np.array_equal(rows.storage_m3, full.storage_m3[k])
        kept_nodes = np.unique(rows.node)
        for v in kept_nodes.tolist():
            names = [hc.POINT_NAMES[c] for c in rows.code[rows.node == v]]
            assert names[0] == "pit" and names[-1] == "spill"
            assert ("merge" in names) == (not t.is_leaf[v - 1])
        if plan.omits_nodes:
            # The nodes left out hold no more water than the smallest one kept.
            out = np.setdiff1d(np.arange(1, len(h) + 1), kept_nodes)
            assert out.size and t.volume_m3[out - 1].max() <= t.volume_m3[kept_nodes - 1].min()
        else:
            assert kept_nodes.shape[0] == len(h)


def test_thinning_in_pieces_then_again_is_thinning_at_once():
    h = noisy_site()
    t = h.nodes
    counts, full = all_rows(h)
    cap = int(counts.rows.sum()) // 4
    n = len(h)
    half = n // 2
    pieces = [np.arange(n) < half, np.arange(n) >= half]
    site = hc.plan_thinning([hc.thinning_summary(counts, t.volume_m3, None, cap)], [0], cap)
    # Each piece alone (as a batch would), then the site's plan from the pieces' summaries.
    summaries, kept = [], []
    for mask in pieces:
        stride, _ = hc.choose_strides(counts, t.volume_m3, mask, cap)
        kept.append(hc.curve_rows(h, counts, stride))
        summaries.append(hc.thinning_summary(counts, t.volume_m3, mask, cap))
    again = hc.plan_thinning(summaries, [0, 0], cap)
    assert again == site
    at_once = hc.curve_rows(h, counts, hc.strides(counts, t.volume_m3, None, site))
    final = [r for r in kept]
    stride = hc.strides(counts, t.volume_m3, None, site)
    nodes = np.concatenate([r.node[hc.kept_mask(r.index, r.node, counts, stride)] for r in final])
    index = np.concatenate([r.index[hc.kept_mask(r.index, r.node, counts, stride)] for r in final])
    assert np.array_equal(nodes, at_once.node) and np.array_equal(index, at_once.index)


def test_only_listed_nodes_get_rows():
    h = noisy_site()
    t = h.nodes
    counts, _ = all_rows(h)
    listed = np.zeros(len(h), bool)
    listed[h.tops - 1] = True
    stride, plan = hc.choose_strides(counts, t.volume_m3, listed, 10**9)
    rows = hc.curve_rows(h, counts, stride)
    assert set(np.unique(rows.node).tolist()) == set(h.tops.tolist())
    assert plan.natural_rows == int(counts.rows[listed].sum()) == len(rows)


@pytest.mark.parametrize("cap", [10**9, 60])
def test_counting_the_listed_nodes_alone_gives_their_rows_unchanged(cap):
    # Stepped nodes outside `listed` are not sampled; the listed nodes' counts,
    # strides and rows (thinned or not) must be the same bits as when every node
    # is counted. max_points=5 makes many nodes stepped on this site.
    h = noisy_site()
    t = h.nodes
    full = hc.natural_counts(h, max_points=5, step_rows=4)
    stepped = np.flatnonzero(full.stepped)
    listed = np.zeros(len(h), bool)
    listed[h.tops - 1] = True
    listed[stepped[::3]] = True
    assert (full.stepped & ~listed).any() and (full.stepped & listed).any()
    some = hc.natural_counts(h, max_points=5, step_rows=4, listed=listed)
    assert np.array_equal(some.rows[listed], full.rows[listed])
    assert np.array_equal(some.merge_index[listed], full.merge_index[listed])
    assert np.array_equal(some.stepped, full.stepped)
    assert np.all(some.rows[full.stepped & ~listed] == 0)
    results = []
    for counts in (full, some):
        stride, plan = hc.choose_strides(counts, t.volume_m3, listed, cap)
        results.append((stride, plan, hc.curve_rows(h, counts, stride, max_points=5,
                                                    step_rows=4)))
    (s1, p1, r1), (s2, p2, r2) = results
    assert p1 == p2 and np.array_equal(s1, s2)
    assert len(r1) > 0 and (p1.thinned == (cap == 60))
    for name in ("node", "index", "level", "area_m2", "storage_m3", "code"):
        assert np.array_equal(getattr(r1, name), getattr(r2, name), equal_nan=True)


def test_bad_inputs_get_clear_errors():
    h = noisy_site()
    counts, _ = all_rows(h)
    with pytest.raises(InvalidParameter, match="listed"):
        hc.choose_strides(counts, h.nodes.volume_m3, np.ones(3, bool), 100)
    with pytest.raises(InvalidParameter, match="cap"):
        hc.choose_strides(counts, h.nodes.volume_m3, None, 2)
    with pytest.raises(InvalidParameter, match="max_points"):
        hc.natural_counts(h, max_points=1)
    with pytest.raises(InvalidParameter, match="DepressionHierarchy"):
        hc.natural_counts("not a hierarchy")


def test_stepped_levels_are_round_and_within_the_node():
    # Pit 10.003, spill 12.5 in 10 steps: raw step 0.2497 -> 0.5 (1, 2, 5 x 10^k);
    # multiples of 0.5 strictly inside: 10.5, 11, 11.5, 12; plus pit, merge, spill.
    start, levels = hc.stepped_levels(np.array([10.003]), np.array([11.25]),
                                      np.array([12.5]), 10)
    expect = np.float32([10.003, 10.5, 11, 11.25, 11.5, 12, 12.5]).astype(np.float64)
    expect[0] = 10.003
    expect[-1] = 12.5
    assert start.tolist() == [0, 7]
    assert levels.tolist() == pytest.approx(expect.tolist(), abs=1e-6)
    assert math.isclose(levels[1], 10.5)


@pytest.mark.parametrize("seed", [3, 4, 11])
def test_without_segments_the_table_and_rows_are_the_same_bits(seed):
    # The files' hierarchies are built without the per-node curve segments; the
    # node table's totals come from the same operations in the same order.
    from sillmark.products.hierarchy_sweep import hierarchy_of_cells
    from sillmark.units import VerticalUnit

    z, areas, connectivity, unit = random_site(seed)
    result = priority_flood(z, edge_mask(z.shape), connectivity=connectivity, row_areas=areas)
    table = result.depressions
    args = (z, result.depression_id, table.spill_elevation, table.spill_row, table.spill_col)
    options = dict(connectivity=connectivity, areas=areas, unit=VerticalUnit.parse(unit),
                   transform=None)
    full = hierarchy_of_cells(*args, **options)
    lean = hierarchy_of_cells(*args, **options, segments=False)
    assert len(full) > 1
    for name in full.nodes.columns:
        assert np.array_equal(getattr(full.nodes, name), getattr(lean.nodes, name),
                              equal_nan=True), name
    a, b = all_rows(full)[1], all_rows(lean)[1]
    assert np.array_equal(a.storage_m3, b.storage_m3) and np.array_equal(a.level, b.level)
    with pytest.raises(InvalidParameter, match="segments"):
        lean.curve_at(1, [0.0])
