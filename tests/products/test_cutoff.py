"""The cut-off stage and island window (sillmark.products.cutoff).

Checked against a hand-worked village on a mound and, with hypothesis, against a
brute force of the definition: for each level h, a breadth-first search from the
refuges over the cells whose onset stage lies above h (cells that never flood
count as above every level). A cell is still connected at h exactly when its
cut-off stage is above h.
"""

from __future__ import annotations

import math
from collections import deque

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from sillmark.engine.flood import analyse_site
from sillmark.errors import InvalidRefuges
from sillmark.grid.dem import dem_from_array
from sillmark.grid.outlets import Outlets
from sillmark.products.cutoff import cutoff_stage, island_window

# Hand-worked: 3 rows x 6 columns, the river is column 5 (the outlets, z = 0).
#   row 0: high ground, then a creek (z = 2) from column 2 to the river;
#   row 1: the road: refuge (9) - road (7) - hollow (3) - road (6) - village on a mound (8) - river;
#   row 2: high ground (9) all along.
# Onset stages (8-neighbour): creek 2; hollow max(3, 2) = 3 (from the creek);
# road (1,3) 6; road (1,1) 7; village 8 (straight from the river); refuge and
# high ground 9.
# Along the road only, the village's route to the refuge crosses the hollow:
# min(8, 6, 3, 7, 9) = 3, so it is cut off at 3 and floods at 8: island window
# 3 <= h < 8, cut first at the hollow (1, 2). Across country it could go round
# by row 2 (all 9): min(8, 9, ..., 9) = 8, no island window at all.
Z = np.array([[9, 9, 2, 2, 2, 0],
              [9, 7, 3, 6, 8, 0],
              [9, 9, 9, 9, 9, 0]], dtype=float)


def village():
    dem = dem_from_array(Z)
    mask = np.zeros(Z.shape, bool)
    mask[:, 5] = True
    result = analyse_site(dem, Outlets(mask=mask, sources=("river",)))
    refuge = np.zeros(Z.shape, bool)
    refuge[1, 0] = True
    return dem, result, refuge


def test_village_on_a_mound_with_one_road():
    dem, result, refuge = village()
    assert result.onset_stage[1].tolist() == [9, 7, 3, 6, 8, 0]
    roads = np.zeros(Z.shape, bool)
    roads[1] = True
    cut = cutoff_stage(result.onset_stage, refuge, valid=dem.valid, passable=roads)
    window = island_window(cut, 1, 4)
    assert (window.start, window.end, window.cut_at) == (3.0, 8.0, (1, 2))
    assert np.isnan(cut.stage[0, 0])  # off the road: no route may use it
    across = cutoff_stage(result.onset_stage, refuge, valid=dem.valid)
    window = island_window(across, 1, 4)
    assert (window.start, window.end) == (8.0, 8.0) and window.is_empty


def test_never_and_always_cut_off():
    # Column 2 is nodata: the right half has no route to the refuge (-inf). The
    # refuge's neighbour (0, 1) is never reached by an outlet (NaN onset), and
    # neither is the refuge: never cut off (+inf).
    s = np.array([[np.nan, np.nan, np.nan, 1.0, 2.0]], dtype=np.float32)
    valid = np.array([[True, True, False, True, True]])
    refuge = np.array([[True, False, False, False, False]])
    cut = cutoff_stage(s, refuge, valid=valid)
    assert cut.stage[0, 0] == math.inf and cut.stage[0, 1] == math.inf
    assert np.isnan(cut.stage[0, 2]) and cut.stage[0, 3] == -math.inf


def test_refuges_on_nodata_are_refused():
    with pytest.raises(InvalidRefuges, match="no refuge"):
        cutoff_stage(np.ones((2, 2), np.float32), np.array([[True, False], [False, False]]),
                     valid=np.array([[False, True], [True, True]]))


def brute_force_connected(s: np.ndarray, usable: np.ndarray, refuge: np.ndarray, h: float) -> np.ndarray:
    above = usable & ~(s <= h)  # NaN onset (never floods) counts as above
    rows, cols = s.shape
    seen = refuge & above
    queue = deque(zip(*np.nonzero(seen)))
    while queue:
        r, c = queue.popleft()
        for dr in (-1, 0, 1):
            for dc in (-1, 0, 1):
                rr, cc = r + dr, c + dc
                if 0 <= rr < rows and 0 <= cc < cols and above[rr, cc] and not seen[rr, cc]:
                    seen[rr, cc] = True
                    queue.append((rr, cc))
    return seen


@settings(max_examples=60, deadline=None)
@given(st.integers(2, 7), st.integers(2, 7), st.integers(0, 2**31 - 1), st.booleans())
def test_cutoff_matches_breadth_first_search(rows, cols, seed, with_roads):
    rng = np.random.default_rng(seed)
    s = rng.integers(0, 8, size=(rows, cols)).astype(np.float32)
    s[rng.random((rows, cols)) < 0.1] = np.nan           # never floods
    valid = rng.random((rows, cols)) > 0.1
    refuge = (rng.random((rows, cols)) < 0.15) & valid
    if not refuge.any():
        return
    roads = rng.random((rows, cols)) < 0.7 if with_roads else None
    cut = cutoff_stage(np.where(valid, s, np.nan), refuge, valid=valid, passable=roads)
    usable = valid if roads is None else valid & (roads | refuge)
    assert np.array_equal(~np.isnan(cut.stage), usable)
    for h in np.arange(-0.5, 8.5, 1.0):
        connected = brute_force_connected(np.where(valid, s, np.nan), usable, refuge, h)
        assert np.array_equal((cut.stage > h) & usable, connected), h
    assert np.all((cut.stage <= np.where(np.isnan(s), np.inf, s)) | ~usable)
