"""Tests of the depression hierarchy and its stage curves (sillmark.products.hierarchy).

Outside references used here, each named beside its check:
- hand-worked DEMs (the working is in the comments);
- the spill engine's own depression table (sillmark.engine.flood.SpillResult), which the
  tops of the hierarchy must reproduce;
- a slow, separate implementation of the construction described by Barnes,
  Callaghan & Wickert (2020, Earth Surf. Dynam. 8, 431-445,
  doi:10.5194/esurf-8-431-2020): a Priority-Flood from the outlets and from every
  pit at once labels each cell with the basin it floods from, then Kruskal's
  algorithm merges basins over their lowest shared saddles (``basin_kruskal``);
- a slow thresholding reference: each node's region is the breadth-first
  component of ``z < spill`` holding its pit, and its area and storage at a level
  are sums over that region's cells (``threshold_region``, ``threshold_curve``);
- closed-form volumes of solids of revolution: cone ``V = pi r^2 h / 3``,
  paraboloid of revolution ``V = pi r^2 h / 2`` (Archimedes: half the
  circumscribing cylinder) and the prismoidal formula
  ``V = h/6 (A1 + 4 Am + A2)``, exact for a frustum of a cone, as tabulated in the
  mensuration section of the CRC Standard Mathematical Tables and Formulae
  (D. Zwillinger, ed.; edition and section recalled from memory);
- the Jacksboro fault DEM that matplotlib ships as sample data.
"""

from __future__ import annotations

import contextlib
import heapq
import json
import math

import numpy as np
import pytest
from affine import Affine
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from sillmark.products import _hierarchy_kernels as kernels
from sillmark.grid.dem import dem_from_array
from sillmark.errors import InvalidParameter, SillmarkError
from sillmark.engine.flood import priority_flood
from sillmark.products.hierarchy_sweep import depression_hierarchy, site_hierarchy
from sillmark.units import VerticalUnit
from tests.textbook_flood import EIGHT, FOUR, components


def edge_mask(shape) -> np.ndarray:
    m = np.zeros(shape, bool)
    m[0, :] = m[-1, :] = m[:, 0] = m[:, -1] = True
    return m


def grid(rows) -> np.ndarray:
    return np.array(rows, dtype=np.float32)


def build(z, outlets=None, *, connectivity=8, **options):
    outlets = edge_mask(z.shape) if outlets is None else outlets
    result = priority_flood(z, outlets, connectivity=connectivity,
                            row_areas=options.get("row_areas"))
    return result, depression_hierarchy(result, **options)


def cells_of(mask) -> set:
    return {(int(r), int(c)) for r, c in np.argwhere(mask)}


# --------------------------------------------------------------------------
# Hand-worked DEMs
# --------------------------------------------------------------------------

# Three levels of depressions. Edge cells are outlets; the edge is 9 except the
# low outlet (2, 8) = 0, which the trench reaches over the sill (2, 7) = 7.
#
#   col:   0  1  2  3  4  5  6  7  8
#   row 0  9  9  9  9  9  9  9  9  9
#   row 1  9  1  9  9  9  9  9  9  9      A: pit plateau {(1,1), (2,1)} at 1
#   row 2  9  1  4  2  6  3  5  7  0      B: pit (2,3) at 2;  C: pit (2,5) at 3
#   row 3  9  9  9  5  9  9  9  9  9      (2,6)=5 and (3,3)=5 have lower neighbours
#   row 4  9  9  9  9  9  9  9  9  9
#
# Rising water: A and B meet over the saddle (2,2) = 4 -> node AB (merge 4).
# At 5, (3,3) joins AB and (2,6) joins C. At 6 the saddle (2,4) joins AB and C
# -> node ABC (merge 6), which spills over (2,7) = 7 to the outlet.
# Regions and storage at the spill level (1 m² cells, depth summed):
#   A  = {(1,1),(2,1)} below 4:                     (4-1)*2          = 6
#   B  = {(2,3)} below 4:                           4-2              = 2
#   AB = A, B, (2,2), (3,3) below 6:                5+5+2+4+1        = 17
#   C  = {(2,5),(2,6)} below 6:                     3+1              = 4
#   ABC = all eight cells below 7:   6+6+3+5+1+4+2+2                 = 29
# Post-order ids, children lowest pit first: A=1, B=2, AB=3, C=4, ABC=5.
THREE_LEVELS = [
    [9, 9, 9, 9, 9, 9, 9, 9, 9],
    [9, 1, 9, 9, 9, 9, 9, 9, 9],
    [9, 1, 4, 2, 6, 3, 5, 7, 0],
    [9, 9, 9, 5, 9, 9, 9, 9, 9],
    [9, 9, 9, 9, 9, 9, 9, 9, 9],
]


@pytest.mark.parametrize("connectivity", [8, 4])
def test_three_levels_of_nesting(connectivity):
    # Every link in the working above is a side (not corner) contact, so both
    # neighbourhoods give the same tree.
    z = grid(THREE_LEVELS)
    result, h = build(z, connectivity=connectivity)
    t = h.nodes
    assert len(h) == 5
    assert t.parent.tolist() == [3, 3, 5, 5, 0]
    assert [h.children(v).tolist() for v in range(1, 6)] == [[], [], [1, 2], [], [3, 4]]
    assert t.is_leaf.tolist() == [True, True, False, True, False]
    assert list(zip(t.pit_row.tolist(), t.pit_col.tolist())) == [
        (1, 1), (2, 3), (1, 1), (2, 5), (1, 1)
    ]
    assert t.pit_elevation.tolist() == [1, 2, 1, 3, 1]
    assert t.spill_elevation.tolist() == [4, 4, 6, 6, 7]
    assert np.isnan(t.merge_elevation[[0, 1, 3]]).all()
    assert t.merge_elevation[[2, 4]].tolist() == [4, 6]
    # Spill cells: the saddle (2,2) for A and B, (2,4) for AB and C, the sill
    # (2,7) for the top.
    assert list(zip(t.spill_row.tolist(), t.spill_col.tolist())) == [
        (2, 2), (2, 2), (2, 4), (2, 4), (2, 7)
    ]
    assert t.volume_m3.tolist() == [6, 2, 17, 4, 29]
    assert t.cell_count.tolist() == [2, 1, 5, 2, 8]
    assert t.area_m2.tolist() == [2, 1, 5, 2, 8]
    assert t.max_depth.tolist() == [3, 2, 5, 3, 6]
    assert h.region(3)[1].tolist() == [1, 1, 2, 3, 3]
    assert cells_of(h.region_mask(4)) == {(2, 5), (2, 6)}
    # The top is the engine's one depression (same cells, spill, volume).
    assert cells_of(h.region_mask(5)) == cells_of(result.depression_id == 1)
    assert result.depressions.row(1)["volume_m2_vu"] == 29
    # Stage curve of the top, worked by hand: below 4 the pools are separate,
    # e.g. at 4: A holds 6, B 2, C 1 -> 9 over 4 cells (z < 4: two 1s, 2, 3).
    c = h.curve(5)
    assert c.elevation.tolist() == [1, 2, 3, 4, 5, 6, 7]
    assert c.area_m2.tolist() == [0, 2, 3, 4, 5, 7, 8]
    assert c.storage_m3.tolist() == [0, 2, 5, 9, 14, 21, 29]
    at = h.curve_at(5, [0.5, 1, 1.5, 4, 4.5, 7, 7.5])
    assert at.area_m2[:6].tolist() == [0, 0, 2, 4, 5, 8]
    assert at.storage_m3[:6].tolist() == [0, 0, 1, 9, 11.5, 29]
    assert math.isnan(at.storage_m3[6]) and math.isnan(at.area_m2[6])


def test_pools_meeting_at_one_level_share_one_node():
    # Trench (row 1) between walls of 9, low outlet at (1, 7) = 0:
    #   9 | 1 5 2 5 3 6 | 0
    # Pits 1, 2 and 3 meet over two saddles, both at 5: one node at 5 with three
    # children (not a cascade of two nodes at the same level). It spills over
    # (1, 6) = 6. Volumes: 5-1=4, 5-2=3, 5-3=2 at 5; at 6: 5+1+4+1+3 = 14.
    z = np.full((3, 8), 9, np.float32)
    z[1] = [9, 1, 5, 2, 5, 3, 6, 0]
    _, h = build(z)
    assert len(h) == 4
    assert h.children(4).tolist() == [1, 2, 3]
    assert h.nodes.merge_elevation[3] == 5 and h.nodes.spill_elevation[3] == 6
    assert h.nodes.volume_m3.tolist() == [4, 3, 2, 14]
    assert h.nodes.spill_col[:3].tolist() == [2, 2, 4]


def test_plateau_pit_and_flat_saddle():
    # Trench row 1:  9 | 2 2 4 4 4 1 | 7 0
    # Pit A is the plateau {(1,1), (1,2)} at 2 (its first cell (1,1) names it);
    # the flat {(1,3), (1,4), (1,5)} at 4 is no pit (lower neighbours), it is the
    # saddle where A meets pit B (1,6) = 1: the flat fills from A until (1,5)
    # touches B, so (1,5) is the spill cell. The top spills over (1,7) = 7.
    # Volumes: A 2*(4-2) = 4; B 4-1 = 3; top 5+5+3+3+3+6 = 25.
    z = np.full((3, 9), 9, np.float32)
    z[1] = [9, 2, 2, 4, 4, 4, 1, 7, 0]
    _, h = build(z)
    t = h.nodes
    # Children are numbered lowest pit first: B = 1, A = 2, top = 3.
    assert len(h) == 3 and h.children(3).tolist() == [1, 2]
    assert (t.pit_row[1], t.pit_col[1]) == (1, 1)
    assert (t.pit_row[0], t.pit_col[0]) == (1, 6)
    assert t.volume_m3.tolist() == [3, 4, 25]
    assert (t.spill_row[1], t.spill_col[1]) == (1, 5)
    assert t.cell_count.tolist() == [1, 2, 6]


# Cell (1, 1) touches (2, 2) only at a corner, and (2, 2) touches the low edge
# outlet (3, 3) only at a corner.
DIAGONAL = [
    [5, 5, 5, 5],
    [5, 1, 5, 5],
    [5, 5, 2, 5],
    [5, 5, 5, 0],
]


def test_corner_contacts_follow_the_connectivity():
    # D8: (1,1) fills to 2 and spills over (2,2): one depression, one leaf.
    _, h8 = build(grid(DIAGONAL), connectivity=8)
    assert len(h8) == 1 and h8.nodes.spill_elevation[0] == 2
    # 4-neighbour: two separate depressions, each a leaf and a top, filling to 5.
    _, h4 = build(grid(DIAGONAL), connectivity=4)
    assert len(h4) == 2 and h4.tops.tolist() == [1, 2]
    assert h4.nodes.spill_elevation.tolist() == [5, 5]
    assert h4.nodes.volume_m3.tolist() == [4, 3]


def test_units_areas_transform_and_site_wrapper():
    z = grid(THREE_LEVELS)
    areas = np.array([1.0, 2.0, 2.0, 3.0, 1.0])
    t = Affine(2.0, 0.0, 1000.0, 0.0, -2.0, 5000.0)
    _, h = build(z, row_areas=areas, unit="ft", transform=t)
    # Top: rows 1..3 with areas 2, 2, 3 m²; depths in feet (from the working):
    # row 1: 6 ft * 2 m²; row 2: (6+3+5+1+4+2) ft * 2 m²; row 3: 2 ft * 3 m².
    expected = (6 * 2 + 21 * 2 + 2 * 3) * 0.3048  # NIST HB 44: 1 ft = 0.3048 m
    assert h.nodes.volume_m3[4] == pytest.approx(expected, rel=1e-12)
    assert h.nodes.area_m2[4] == 2 + 6 * 2 + 3
    assert h.unit is VerticalUnit.FOOT
    # Spill point (2, 7): centre x = 1000 + 2 * 7.5, y = 5000 - 2 * 2.5.
    assert (h.nodes.spill_x[4], h.nodes.spill_y[4]) == (1015.0, 4995.0)
    dem = dem_from_array(z, vertical_unit="us-ft")
    hs = site_hierarchy(dem, priority_flood(dem.elevation, edge_mask(z.shape)))
    assert hs.unit is VerticalUnit.US_SURVEY_FOOT
    assert hs.nodes.volume_m3[4] == pytest.approx(29 * 1200 / 3937, rel=1e-12)
    assert not math.isnan(hs.nodes.spill_x[4])


def test_json_flat_and_nested():
    z = grid(THREE_LEVELS)
    _, h = build(z)
    flat = json.loads(h.to_json())
    assert flat["node_count"] == 5 and len(flat["nodes"]) == 5
    assert "not a hydraulic model" in flat["caution"]
    top = flat["nodes"][4]
    assert top["children"] == [3, 4] and top["parent"] == 0
    assert type(top["volume_m3"]) is float and type(top["pit_row"]) is int
    assert flat["nodes"][0]["merge_elevation"] is None and top["spill_x"] is None
    nested = json.loads(h.to_json(nested=True, indent=1))
    (root,) = nested["depressions"]
    assert root["id"] == 5
    assert [c["id"] for c in root["children"]] == [3, 4]
    assert [c["id"] for c in root["children"][0]["children"]] == [1, 2]
    assert root["children"][0]["children"][0]["volume_m3"] == 6.0
    # Same fields both ways.
    assert set(root) == set(top)


def test_no_depressions_gives_an_empty_hierarchy():
    z = np.arange(20, dtype=np.float32).reshape(4, 5)
    _, h = build(z)
    assert len(h) == 0 and h.tops.size == 0
    assert json.loads(h.to_json())["nodes"] == []
    with pytest.raises(InvalidParameter, match="empty"):
        h.curve(1)


def test_bad_inputs_get_clear_errors():
    z = grid(THREE_LEVELS)
    result, h = build(z)
    with pytest.raises(InvalidParameter, match="SpillResult"):
        depression_hierarchy(z)
    with pytest.raises(InvalidParameter, match="row_areas"):
        depression_hierarchy(result, row_areas=[1.0, 2.0])
    with pytest.raises(InvalidParameter, match="row_areas"):
        depression_hierarchy(result, row_areas=[1.0, 1.0, -1.0, 1.0, 1.0])
    with pytest.raises(InvalidParameter, match="vertical unit"):
        depression_hierarchy(result, unit="furlong")
    with pytest.raises(InvalidParameter, match="transform"):
        depression_hierarchy(result, transform=(1, 0, 0, 0, -1, 0))
    with pytest.raises(InvalidParameter, match="1 to 5"):
        h.curve(6)
    with pytest.raises(InvalidParameter, match="whole number"):
        h.children(1.5)
    with pytest.raises(InvalidParameter, match="finite"):
        h.curve_at(5, [1.0, math.nan])
    with pytest.raises(InvalidParameter, match="finite"):
        h.curve_at(5, "high")
    with pytest.raises(InvalidParameter, match="finite"):
        h.curves_at([0, 1, 1, 1, 1, 2], [1.0, math.inf])
    with pytest.raises(InvalidParameter, match="non-decreasing"):
        h.curves_at([0, 1, 1], [1.0])  # 5 nodes need 6 starts
    with pytest.raises(InvalidParameter, match="non-decreasing"):
        h.curves_at([0, 2, 1, 2, 2, 2], [1.0, 2.0])
    with pytest.raises(InvalidParameter, match="non-decreasing"):
        h.curves_at([0, 1, 1, 1, 1, 3], [1.0, 2.0])  # ends past the levels
    with pytest.raises(InvalidParameter, match="1 to 1"):
        h.top_node(2)
    with pytest.raises(SillmarkError, match="grid"):
        site_hierarchy(dem_from_array(z[:4]), result)


# --------------------------------------------------------------------------
# Slow references
# --------------------------------------------------------------------------


def _steps(connectivity):
    return EIGHT if connectivity == 8 else FOUR


def pit_plateaus(z, outlets, connectivity):
    """Plateaus (equal-elevation components) with no lower neighbour and no outlet."""
    rows, cols = z.shape
    valid = ~np.isnan(z)
    seen = np.zeros(z.shape, bool)
    pits = []
    for r in range(rows):
        for c in range(cols):
            if not valid[r, c] or seen[r, c]:
                continue
            part, todo, lower = [], [(r, c)], False
            seen[r, c] = True
            while todo:
                a, b = todo.pop()
                part.append((a, b))
                for dr, dc in _steps(connectivity):
                    aa, bb = a + dr, b + dc
                    if not (0 <= aa < rows and 0 <= bb < cols) or not valid[aa, bb]:
                        continue
                    if z[aa, bb] < z[a, b]:
                        lower = True
                    elif z[aa, bb] == z[a, b] and not seen[aa, bb]:
                        seen[aa, bb] = True
                        todo.append((aa, bb))
            if not lower and not any(outlets[p] for p in part):
                pits.append(sorted(part))
    return pits


def basin_kruskal(z, outlets, connectivity):
    """The hierarchy as the 2020 paper builds it, slowly, sharing no code.

    Priority-Flood (heapq) from the outlets (label 0) and every pit plateau
    (labels 1..) at once labels each cell by the basin it floods from. For each
    pair of touching basins the lowest saddle is the least ``max(z)`` over
    neighbouring cell pairs across their border. Kruskal's algorithm then adds
    saddles in ascending elevation with union-find; all saddles of one
    elevation are taken together: pools joined at that level without the outlet
    basin become one node; each pool joined to the outlet basin there ends its
    tree. Returns {frozenset(pit cells of the node's leaves): spill elevation}
    for every node in a tree that reaches the outlets.
    """
    rows, cols = z.shape
    pits = pit_plateaus(z, outlets, connectivity)
    label = -np.ones(z.shape, int)
    heap, seq = [], 0
    for r, c in np.argwhere(outlets & ~np.isnan(z)):
        label[r, c] = 0
        heap.append((float(z[r, c]), seq, int(r), int(c)))
        seq += 1
    for k, part in enumerate(pits, start=1):
        for r, c in part:
            label[r, c] = k
            heap.append((float(z[r, c]), seq, r, c))
            seq += 1
    heapq.heapify(heap)
    while heap:
        level, _, r, c = heapq.heappop(heap)
        for dr, dc in _steps(connectivity):
            rr, cc = r + dr, c + dc
            if 0 <= rr < rows and 0 <= cc < cols and not np.isnan(z[rr, cc]) and label[rr, cc] < 0:
                label[rr, cc] = label[r, c]
                heapq.heappush(heap, (max(level, float(z[rr, cc])), seq, rr, cc))
                seq += 1
    saddle = {}
    for r in range(rows):
        for c in range(cols):
            for dr, dc in _steps(connectivity):
                rr, cc = r + dr, c + dc
                if not (0 <= rr < rows and 0 <= cc < cols):
                    continue
                a, b = label[r, c], label[rr, cc]
                if a < 0 or b < 0 or a == b:
                    continue
                key = (min(a, b), max(a, b))
                w = max(float(z[r, c]), float(z[rr, cc]))
                saddle[key] = min(saddle.get(key, math.inf), w)
    up = list(range(len(pits) + 1))

    def find(a):
        while up[a] != a:
            up[a] = up[up[a]]
            a = up[a]
        return a

    pits_of = {k: frozenset([pits[k - 1][0]]) for k in range(1, len(pits) + 1)}
    closed = {k: {} for k in range(1, len(pits) + 1)}  # finished nodes per pool
    nodes = {}
    by_level = {}
    for key, w in saddle.items():
        by_level.setdefault(w, []).append(key)
    for w in sorted(by_level):
        before = {find(a) for key in by_level[w] for a in key}
        for a, b in by_level[w]:
            ra, rb = find(a), find(b)
            up[max(ra, rb)] = min(ra, rb)  # the outlet basin (0) stays a root
        groups = {}
        for r0 in before:
            groups.setdefault(find(r0), []).append(r0)
        for root, members in groups.items():
            pools = [p for p in members if p != 0]
            if root == 0:  # these pools reach the outlets at w: their trees end
                for p in pools:
                    nodes.update(closed.pop(p))
                    nodes[pits_of[p]] = w
            elif len(pools) >= 2:  # pools meeting at w: one new node
                done = {}
                for p in pools:
                    done.update(closed.pop(p))
                    done[pits_of[p]] = w
                pits_of[root] = frozenset().union(*(pits_of[p] for p in pools))
                closed[root] = done
    return nodes


def our_nodes(h):
    """{frozenset(pit cells of the node's leaves): spill elevation} of a hierarchy."""
    t = h.nodes
    out = {}
    for v in range(1, len(h) + 1):
        sub = h.subtree(v) - 1
        pits = frozenset(
            (int(t.pit_row[k]), int(t.pit_col[k])) for k in sub if t.is_leaf[k]
        )
        out[pits] = float(t.spill_elevation[v - 1])
    return out


def threshold_region(z, pit, level, connectivity):
    """Breadth-first component of ``z < level`` holding ``pit``."""
    below = ~np.isnan(z) & (np.nan_to_num(z, nan=np.inf) < level)
    for part in components(below, connectivity):
        if pit in part:
            return part
    return set()


def threshold_curve(z, region, areas, level, metres):
    """Area of the region's cells below ``level`` and their storage, cell by cell."""
    a = v = 0.0
    for r, c in region:
        if z[r, c] < level:
            a += areas[r]
            v += areas[r] * (level - float(z[r, c]))
    return a, v * metres


# --------------------------------------------------------------------------
# Random DEMs against the references and the engine
# --------------------------------------------------------------------------


@st.composite
def small_sites(draw):
    rows = draw(st.integers(1, 10))
    cols = draw(st.integers(1, 10))
    # Few distinct levels make plateaus, flat saddles and ties common.
    top = draw(st.sampled_from([3, 6, 40]))
    values = draw(st.lists(st.integers(0, top), min_size=rows * cols, max_size=rows * cols))
    z = np.array(values, dtype=np.float32).reshape(rows, cols)
    if rows > 2 and cols > 2 and draw(st.booleans()):
        # A high rim with one notch, outlets on the edge: one large depression
        # holding many pits, so nesting is common.
        z[edge_mask(z.shape)] = top + 1
        z[0, draw(st.integers(0, cols - 1))] = draw(st.integers(0, top + 1))
        outlets = edge_mask(z.shape)
    else:
        holes = draw(st.lists(st.booleans(), min_size=rows * cols, max_size=rows * cols))
        z[np.array(holes).reshape(rows, cols) & (draw(st.integers(0, 3)) == 0)] = np.nan
        outlets = edge_mask(z.shape) if draw(st.booleans()) else np.zeros(z.shape, bool)
        extra = draw(st.lists(st.booleans(), min_size=rows * cols, max_size=rows * cols))
        outlets |= np.array(extra).reshape(rows, cols) & (draw(st.integers(0, 4)) == 0)
        outlets &= ~np.isnan(z)
        if not outlets.any():
            valid = np.argwhere(~np.isnan(z))
            if len(valid) == 0:
                z[0, 0] = 1.0
                valid = np.array([[0, 0]])
            outlets[tuple(valid[draw(st.integers(0, len(valid) - 1))])] = True
    connectivity = draw(st.sampled_from([4, 8]))
    areas = np.array(
        draw(st.lists(st.floats(0.25, 4.0), min_size=rows, max_size=rows)), dtype=np.float64
    )
    unit = draw(st.sampled_from(["m", "ft"]))
    return z, outlets, connectivity, areas, unit


@pytest.mark.slow
@settings(max_examples=250, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(small_sites())
def test_random_sites_against_the_references(case):
    z, outlets, conn, areas, unit = case
    result = priority_flood(z, outlets, connectivity=conn, row_areas=areas)
    h = depression_hierarchy(result, row_areas=areas, unit=unit)
    t = h.nodes
    metres = VerticalUnit.parse(unit).metres

    # Tops = the engine's depressions, one each, same cells, spill, area, volume.
    deps = result.depressions
    assert h.tops.shape[0] == len(deps)
    for d in range(1, len(deps) + 1):
        top = h.top_node(d)
        k = top - 1
        assert t.parent[k] == 0 and t.depression[k] == d
        assert np.array_equal(h.region_mask(top), result.depression_id == d)
        assert t.spill_elevation[k] == deps.spill_elevation[d - 1]
        assert (t.spill_row[k], t.spill_col[k]) == (deps.spill_row[d - 1], deps.spill_col[d - 1])
        assert (t.pit_row[k], t.pit_col[k]) == (deps.pit_row[d - 1], deps.pit_col[d - 1])
        assert t.cell_count[k] == deps.cell_count[d - 1]
        assert t.area_m2[k] == pytest.approx(deps.area_m2[d - 1], rel=1e-12)
        assert t.volume_m3[k] == pytest.approx(deps.volume_m2_vu[d - 1] * metres, rel=1e-9)

    # The paper's construction (basin Priority-Flood + Kruskal) gives the same
    # nodes, each named by the pits below it, with the same spill elevations.
    assert our_nodes(h) == basin_kruskal(z, outlets, conn)

    # Leaves are exactly the pit plateaus inside depressions, named by their
    # first cell; every leaf holds water.
    pits = [p for p in pit_plateaus(z, outlets, conn) if result.depression_id[p[0]] > 0]
    leaves = {(int(t.pit_row[k]), int(t.pit_col[k])) for k in np.flatnonzero(t.is_leaf)}
    assert leaves == {p[0] for p in pits}
    assert np.all(t.max_depth > 0)

    for v in range(1, len(h) + 1):
        k = v - 1
        pit = (int(t.pit_row[k]), int(t.pit_col[k]))
        spill = float(t.spill_elevation[k])
        region = cells_of(h.region_mask(v))
        # Region = the thresholded component holding the pit.
        assert region == threshold_region(z, pit, spill, conn)
        assert t.cell_count[k] == len(region)
        assert t.pit_elevation[k] == min(z[p] for p in region)
        # Nesting: children are the components of z < merge level in the region
        # (at least two), and above that level the region is one piece.
        kids = h.children(v)
        if not t.is_leaf[k]:
            merge = float(t.merge_elevation[k])
            below = np.zeros(z.shape, bool)
            for p in region:
                below[p] = z[p] < merge
            assert len(kids) >= 2
            assert sorted(map(sorted, components(below, conn))) == sorted(
                sorted(cells_of(h.region_mask(c))) for c in kids
            )
            assert all(t.spill_elevation[c - 1] == merge for c in kids)
        levels = sorted({float(z[p]) for p in region} | {spill})
        floor = float(t.pit_elevation[k]) if t.is_leaf[k] else float(t.merge_elevation[k])
        for lv in levels:
            if lv > floor:
                sub = np.zeros(z.shape, bool)
                for p in region:
                    sub[p] = z[p] < lv
                assert len(components(sub, conn)) == 1
        # Curves: breakpoints and arbitrary levels against the cell-by-cell sums.
        curve = h.curve(v)
        assert curve.elevation.tolist() == levels
        for e, a, s in zip(curve.elevation, curve.area_m2, curve.storage_m3):
            ra, rs = threshold_curve(z, region, areas, e, metres)
            assert a == pytest.approx(ra, rel=1e-12, abs=1e-12)
            assert s == pytest.approx(rs, rel=1e-9, abs=1e-12)
        probes = levels + [(x + y) / 2 for x, y in zip(levels, levels[1:])]
        probes += [levels[0] - 0.5, spill + 0.25]
        got = h.curve_at(v, probes)
        for lv, a, s in zip(probes, got.area_m2, got.storage_m3):
            if lv > spill:
                assert math.isnan(a) and math.isnan(s)
                continue
            ra, rs = threshold_curve(z, region, areas, lv, metres)
            assert a == pytest.approx(ra, rel=1e-12, abs=1e-12)
            assert s == pytest.approx(rs, rel=1e-9, abs=1e-12)
        # Storage non-decreasing and convex; area non-decreasing; the slope of
        # storage on each piece is the area of the next breakpoint.
        e, a, s = curve.elevation, curve.area_m2, curve.storage_m3
        assert np.all(np.diff(a) >= 0) and np.all(np.diff(s) >= 0)
        slope = np.diff(s) / np.diff(e)
        assert np.allclose(slope, a[1:] * metres, rtol=1e-9)
        assert np.all(np.diff(slope) >= -1e-9 * np.abs(slope[1:]))
        assert s[-1] == pytest.approx(t.volume_m3[k], rel=1e-12)
        assert a[-1] == pytest.approx(t.area_m2[k], rel=1e-12)


@pytest.mark.parametrize("seed", range(4))
@pytest.mark.parametrize("connectivity", [8, 4])
def test_rolling_terrain_against_the_basin_construction(seed, connectivity):
    # Larger grids than the property test: smoothed noise on 36 x 36 cells
    # rounded to 0.5 m, so pits nest several levels deep and saddles tie.
    from scipy.ndimage import gaussian_filter

    rng = np.random.default_rng(seed)
    z = gaussian_filter(rng.standard_normal((36, 36)), 1.5) * 40
    z = (np.round(z * 2) / 2).astype(np.float32)
    outlets = edge_mask(z.shape)
    result, h = build(z, outlets, connectivity=connectivity)
    assert len(h) > h.tops.shape[0]  # there is nesting to check
    # Barnes, Callaghan & Wickert (2020): basin Priority-Flood + Kruskal.
    assert our_nodes(h) == basin_kruskal(z, outlets, connectivity)
    for d in range(1, len(result.depressions) + 1):
        assert np.array_equal(h.region_mask(h.top_node(d)), result.depression_id == d)


def _levels_of_every_node(h):
    """Per node: its pit, merge and spill elevations, a level between and one
    above its spill, in no order; as (level_start, levels) for curves_at."""
    t = h.nodes
    per = []
    for k in range(len(t)):
        pit, spill = float(t.pit_elevation[k]), float(t.spill_elevation[k])
        merge = float(t.merge_elevation[k])
        per.append([spill + 0.5, pit, (pit + spill) / 2, spill]
                   + ([merge] if math.isfinite(merge) else []))
    start = np.concatenate([[0], np.cumsum([len(p) for p in per])]).astype(np.int64)
    return start, np.array([x for p in per for x in p], dtype=np.float64)


@settings(max_examples=40, deadline=None)
@given(small_sites())
def test_curves_of_every_node_at_once_equal_them_node_by_node(case):
    z, outlets, conn, areas, unit = case
    h = depression_hierarchy(priority_flood(z, outlets, connectivity=conn, row_areas=areas),
                             row_areas=areas, unit=unit)
    start, levels = _levels_of_every_node(h)
    area, storage = h.curves_at(start, levels)
    assert area.shape == storage.shape == levels.shape
    for v in range(1, len(h) + 1):
        one = h.curve_at(v, levels[start[v - 1]:start[v]])
        assert np.array_equal(area[start[v - 1]:start[v]], one.area_m2, equal_nan=True)
        assert np.array_equal(storage[start[v - 1]:start[v]], one.storage_m3, equal_nan=True)
    # Above the spill: NaN, as curve_at says (the first level of every node).
    assert np.all(np.isnan(area[start[:-1]]))


@contextlib.contextmanager
def plain_python_kernels():
    """Swap the compiled kernels of sillmark.products._hierarchy_kernels for their Python source."""
    names = ["sweep", "postorder", "bucket", "segments", "curve_at", "curves_at", "full_curve"]
    saved = {name: getattr(kernels, name) for name in names}
    try:
        for name in names:
            setattr(kernels, name, saved[name].py_func)
        yield
    finally:
        for name, fn in saved.items():
            setattr(kernels, name, fn)


@settings(max_examples=40, deadline=None)
@given(small_sites())
def test_kernels_run_as_plain_python(case):
    # The loops as plain Python (numpy raises IndexError on any index past the
    # end of an array) give the compiled result.
    z, outlets, conn, areas, unit = case
    result = priority_flood(z, outlets, connectivity=conn, row_areas=areas)
    compiled = depression_hierarchy(result, row_areas=areas, unit=unit)
    with plain_python_kernels():
        plain = depression_hierarchy(result, row_areas=areas, unit=unit)
        plain_curves = [
            (plain.curve(v), plain.curve_at(v, [float(plain.nodes.merge_elevation[v - 1])
                                                if not plain.nodes.is_leaf[v - 1] else 0.0]))
            for v in range(1, len(plain) + 1)
        ]
        start, levels = _levels_of_every_node(plain)
        plain_all = plain.curves_at(start, levels)
    assert compiled.to_json() == plain.to_json()
    for got, ref in zip(plain_all, compiled.curves_at(start, levels)):
        assert np.array_equal(got, ref, equal_nan=True)
    for v, (curve, at) in enumerate(plain_curves, start=1):
        ref = compiled.curve(v)
        assert np.array_equal(curve.storage_m3, ref.storage_m3)
        assert np.array_equal(at.storage_m3, compiled.curve_at(v, at.elevation).storage_m3)


# --------------------------------------------------------------------------
# Closed-form solids
# --------------------------------------------------------------------------

CELL = 0.5  # m
RADIUS_CELLS = 300  # r / d
TOP = 10.0  # m, the plain around the solids: every solid's spill elevation
DEPTH = 6.0  # m


def lipschitz_bound(support_radius, slope, volume, d=CELL):
    """Relative error bound of a cell-centre sum for a volume.

    For a depth function f that is Lipschitz with constant ``slope`` and zero
    outside a disc of radius ``support_radius``, each cell's term d²·f(centre)
    differs from the integral of f over the cell by at most d²·slope·d/√2 (no
    point of a cell is farther than d/√2 from its centre), and the cells that
    meet the disc cover at most pi (R + d)². So
    |sum - V| <= pi (R + d)² slope d / √2. With r/d = 300 this is below 1 %;
    the cone gives 3 (1 + d/r)² d/(√2 r) ~ 0.7 %. float32 rounding of the
    elevations (half an ulp at 10 m, 5e-7 m) adds far less than 1e-6.
    """
    return math.pi * (support_radius + d) ** 2 * slope * d / math.sqrt(2) / volume + 1e-6


@pytest.fixture(scope="module")
def solids():
    """Cone, paraboloid bowl and flat-bottomed frustum sunk into a plain at TOP."""
    r = RADIUS_CELLS * CELL
    n = 2 * RADIUS_CELLS + 11
    yy, xx = np.mgrid[0:n, 0:n]
    rho = np.hypot(xx - n // 2, yy - n // 2) * CELL
    cone = np.where(rho < r, DEPTH * (1 - rho / r), 0.0)
    bowl = np.where(rho < r, DEPTH * (1 - (rho / r) ** 2), 0.0)
    rb = r / 2
    frustum = np.where(rho <= rb, DEPTH, np.where(rho < r, DEPTH * (r - rho) / (r - rb), 0.0))
    depth = np.hstack([cone, bowl, frustum])
    z = (TOP - depth).astype(np.float32)
    areas = np.full(z.shape[0], CELL * CELL)
    result = priority_flood(z, edge_mask(z.shape), row_areas=areas)
    return result, depression_hierarchy(result, row_areas=areas)


def test_solid_volumes_against_closed_forms(solids):
    result, h = solids
    r = RADIUS_CELLS * CELL
    rb = r / 2
    assert len(h) == 3 and h.tops.tolist() == [1, 2, 3]
    assert np.all(h.nodes.spill_elevation == TOP)
    # CRC Standard Mathematical Tables (Zwillinger, ed.; recalled from memory).
    cone = math.pi * r**2 * DEPTH / 3
    bowl = math.pi * r**2 * DEPTH / 2
    a1, am, a2 = math.pi * rb**2, math.pi * ((rb + r) / 2) ** 2, math.pi * r**2
    frustum = DEPTH / 6 * (a1 + 4 * am + a2)  # prismoidal formula
    checks = [
        (cone, lipschitz_bound(r, DEPTH / r, cone)),
        (bowl, lipschitz_bound(r, 2 * DEPTH / r, bowl)),
        (frustum, lipschitz_bound(r, DEPTH / (r - rb), frustum)),
    ]
    for k, (exact, bound) in enumerate(checks):
        got = h.nodes.volume_m3[k]
        assert abs(got - exact) / exact <= bound, (k, got, exact, bound)
        # The curve at the spill level is the engine's volume for that depression.
        at = h.curve_at(k + 1, [TOP]).storage_m3[0]
        assert at == pytest.approx(result.depressions.volume_m2_vu[k], rel=1e-9)
        assert at == pytest.approx(got, rel=1e-12)
    # Plan area at the spill level: a disc of radius r; cells cut by the circle
    # lie within d/√2 of it, so |count·d² - pi r²| <= 2 pi r √2 d (relative
    # 2√2 d/r ~ 0.9 %).
    for k in range(3):
        got = h.nodes.area_m2[k]
        assert abs(got - math.pi * r**2) <= 2 * math.pi * r * math.sqrt(2) * CELL


@pytest.mark.parametrize("fraction", [0.25, 0.5, 0.8])
def test_solid_stage_curves_part_full(solids, fraction):
    _, h = solids
    r = RADIUS_CELLS * CELL
    rb = r / 2
    y = DEPTH * fraction  # water depth above the lowest point
    level = TOP - DEPTH + y
    # Cone: the water is a cone of height y, radius r·y/h.
    rc = r * y / DEPTH
    # Paraboloid: radius r·sqrt(y/h), volume half the cylinder (Archimedes).
    rp = r * math.sqrt(y / DEPTH)
    # Frustum: bottom rb, water-line radius rb + (r - rb)·y/h; prismoidal formula.
    rf = rb + (r - rb) * y / DEPTH
    frustum = y / 6 * (math.pi * rb**2 + 4 * math.pi * ((rb + rf) / 2) ** 2 + math.pi * rf**2)
    cases = [
        (math.pi * rc**2 * y / 3, rc, lipschitz_bound(rc, DEPTH / r, math.pi * rc**2 * y / 3)),
        (math.pi * rp**2 * y / 2, rp, lipschitz_bound(rp, 2 * DEPTH / r, math.pi * rp**2 * y / 2)),
        (frustum, rf, lipschitz_bound(rf, DEPTH / (r - rb), frustum)),
    ]
    for k, (exact, radius, bound) in enumerate(cases):
        got = h.curve_at(k + 1, [level])
        assert abs(got.storage_m3[0] - exact) / exact <= bound, (k, got, exact, bound)
        # Area of the water surface: a disc (perimeter bound as above).
        disc = math.pi * radius**2
        assert abs(got.area_m2[0] - disc) <= 2 * math.pi * radius * math.sqrt(2) * CELL


# --------------------------------------------------------------------------
# A real landscape
# --------------------------------------------------------------------------


def test_jacksboro_tops_and_curves():
    # The Jacksboro fault DEM that matplotlib ships as sample data (344 x 403
    # int16 metres at 3 arc-seconds; source recalled from memory as USGS NED).
    from matplotlib import cbook

    z = np.asarray(cbook.get_sample_data("jacksboro_fault_dem.npz")["elevation"])
    result, h = build(z.astype(np.float32))
    t = h.nodes
    assert h.tops.shape[0] == len(result.depressions) > 0
    assert t.is_leaf.sum() > h.tops.shape[0]  # some depressions nest
    np.testing.assert_allclose(
        t.volume_m3[h.tops - 1], result.depressions.volume_m2_vu, rtol=1e-9
    )
    assert np.array_equal(t.cell_count[h.tops - 1], result.depressions.cell_count)
    for v in h.tops:
        assert np.array_equal(h.region_mask(int(v)), result.depression_id == t.depression[v - 1])
    # A child's region lies in its parent's, and the parent holds at least the
    # children's storage at their spill level (which is its merge level).
    for v in range(1, len(h) + 1):
        p = int(t.parent[v - 1])
        if p:
            assert not (h.region_mask(v) & ~h.region_mask(p)).any()
            kids = h.children(p)
            at = h.curve_at(p, [float(t.merge_elevation[p - 1])]).storage_m3[0]
            assert at == pytest.approx(t.volume_m3[kids - 1].sum(), rel=1e-12)


@pytest.mark.parametrize("connectivity", [8, 4])
def test_the_sweep_cut_into_parts_gives_the_same_hierarchy(monkeypatch, connectivity):
    # On a large site the sweep runs in parts of whole depressions on threads;
    # the parts are independent, so any cut must give the same hierarchy, bit for
    # bit. Forced here on a small noisy site (every ~40 cells a part, 3 CPUs).
    from scipy.ndimage import gaussian_filter

    from sillmark.products import hierarchy_sweep

    rng = np.random.default_rng(7)
    z = gaussian_filter(rng.standard_normal((48, 48)), 1.0) * 20
    z = (np.round(z * 4) / 4).astype(np.float32)
    outlets = edge_mask(z.shape)
    _, whole = build(z, outlets, connectivity=connectivity)
    assert len(whole.tops) >= 4 and len(whole) > len(whole.tops)
    monkeypatch.setattr(hierarchy_sweep, "SWEEP_PART_CELLS", 40)
    monkeypatch.setattr(hierarchy_sweep.os, "cpu_count", lambda: 3)
    seen = []
    real = hierarchy_sweep._sweep_bounds
    monkeypatch.setattr(hierarchy_sweep, "_sweep_bounds",
                        lambda *a: seen.append(real(*a)) or seen[-1])
    _, cut = build(z, outlets, connectivity=connectivity)
    assert len(seen[0]) == 4  # three parts, cut between depressions
    for field in ("id", "parent", "depression", "pit_row", "pit_col", "spill_row", "spill_col",
                  "merge_elevation", "spill_elevation", "cell_count", "area_m2", "volume_m3",
                  "children_ids"):
        assert np.array_equal(getattr(whole.nodes, field), getattr(cut.nodes, field),
                              equal_nan=True), field
    assert np.array_equal(whole.regions.cells, cut.regions.cells)
    assert np.array_equal(whole.regions.positions, cut.regions.positions)


@pytest.mark.parametrize("spread", [0.0, 1e-3, 4.0, 1e30])
def test_large_groups_sort_by_radix_into_the_comparison_order(spread):
    # Groups of RADIX_GROUP_CELLS cells or more take the radix path, the others the
    # comparison sort; both must give numpy's lexsort by (group, elevation, position),
    # with ties (every seventh cell shares one height), -0.0 beside +0.0, and
    # heights of both signs.
    rng = np.random.default_rng(7)
    big = kernels.RADIX_GROUP_CELLS
    sizes = np.array([3, big + 5, 1, 0, 2 * big, 40])
    group = np.repeat(np.arange(sizes.size), sizes)
    n = group.size
    z = (rng.standard_normal(n) * spread).astype(np.float32)
    z[::7] = z[1]
    z[2::11] = np.float32(-0.0)
    z[3::13] = np.float32(0.0)
    position = np.arange(n, dtype=np.int64)
    start = np.concatenate([[0], np.cumsum(sizes)]).astype(np.int64)
    bits = (z + np.float32(0.0)).view(np.uint32)
    got = kernels.sort_within_groups(bits, position, start)
    assert np.array_equal(got, np.lexsort((position, z + np.float32(0.0), group)))
    assert np.array_equal(kernels.sort_within_groups.py_func(bits, position, start), got)
