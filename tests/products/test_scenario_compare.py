"""A scenario compared with the base, on a hand-worked embankment with and without a culvert.

The ground (one row of 2 m cells; an invented brook valley), outlet the river
cell in column 0:

    col:    0     1     2     3     4     5     6     7     8     9
    z:    1.0   2.0   6.0   3.0   4.0   5.0   3.5   8.0   8.0   nodata
          river bank  road  pond  field knoll yard  high  high

Base (no edits). The road embankment (6.0) is the only way in from the
river, so every cell behind it is reached over 6.0:
    s_base = 1, 2, 6, 6, 6, 6, 6, 8, 8, NaN

Scenario: a culvert under the road from column 1 to column 3, invert 2.5, and
a barrier raising column 5 (the knoll) to a crest of 7.0. The culvert end in
column 3 is reached at max(level at column 1 = 2.0, invert 2.5, ground 3.0) =
3.0; column 4 from it at max(3.0, 4.0) = 4.0. The road is reached from either
side at 6.0. The knoll, now 7.0, is reached at 7.0 and the yard behind it at
max(7.0, 3.5) = 7.0:
    s_scen = 1, 2, 6, 3, 4, 7, 7, 8, 8, NaN

Changes (scenario - base): column 3: -3.0; column 4: -2.0; columns 5 and 6: +1.0.

At L = 5.0: wet in the base columns 0-1; in the scenario columns 0-1, 3, 4.
    codes: 2 2 1 3 3 1 1 1 1 0  -> newly flooded 2 cells = 8 m², none protected.
At L = 6.5: wet in the base columns 0-6; in the scenario 0-4.
    codes: 2 2 2 2 2 4 4 1 1 0  -> newly protected 2 cells = 8 m², none flooded.

The one base depression is columns 3-6 (s = 6 > z); its pit, the lowest
cell, is column 3 (3.0). Read in the scenario there: 6.0 -> 3.0.
"""

from __future__ import annotations

import numpy as np
import pytest

from sillmark.engine.culverts import culvert_edges
from sillmark.engine.flood import priority_flood
from sillmark.products.scenario_compare import (
    NEWLY_FLOODED,
    NEWLY_PROTECTED,
    compare_at_level,
    compare_codes,
    depression_changes,
    onset_changes,
)

NAN = np.nan
GROUND = np.array([[1.0, 2.0, 6.0, 3.0, 4.0, 5.0, 3.5, 8.0, 8.0, NAN]], np.float32)
BASE_BY_HAND = np.array([[1, 2, 6, 6, 6, 6, 6, 8, 8, NAN]], np.float32)
SCEN_BY_HAND = np.array([[1, 2, 6, 3, 4, 7, 7, 8, 8, NAN]], np.float32)
CELL_M2 = 4.0  # 2 m x 2 m


@pytest.fixture(scope="module")
def runs():
    outlets = np.zeros(GROUND.shape, bool)
    outlets[0, 0] = True
    base = priority_flood(GROUND, outlets)
    edited = GROUND.copy()
    edited[0, 5] = max(edited[0, 5], 7.0)  # the barrier: raised to at least its crest
    culvert = culvert_edges(GROUND.shape, [0], [1], [0], [3], [2.5], elevation=edited)
    scen = priority_flood(edited, outlets, culverts=culvert)
    return base, scen


def test_the_engine_gives_the_hand_worked_onset_stages(runs):
    base, scen = runs
    np.testing.assert_array_equal(base.onset_stage, BASE_BY_HAND)
    np.testing.assert_array_equal(scen.onset_stage, SCEN_BY_HAND)


def test_at_5_the_culvert_floods_the_pond_and_field_and_nothing_is_protected():
    c = compare_at_level(BASE_BY_HAND, SCEN_BY_HAND, 5.0, row_areas=[CELL_M2])
    assert c.codes.tolist() == [[2, 2, 1, 3, 3, 1, 1, 1, 1, 0]]
    assert c.newly_flooded_m2 == 8.0 and c.newly_protected_m2 == 0.0
    assert c.cells == {"nodata": 1, "dry in both": 5, "wet in both": 2,
                       "newly flooded": 2, "newly protected": 0}


def test_at_6_5_the_barrier_protects_the_knoll_and_yard():
    c = compare_at_level(BASE_BY_HAND, SCEN_BY_HAND, 6.5, row_areas=[CELL_M2])
    assert c.codes.tolist() == [[2, 2, 2, 2, 2, 4, 4, 1, 1, 0]]
    assert c.newly_protected_m2 == 8.0 and c.newly_flooded_m2 == 0.0
    assert c.area_m2["wet in both"] == 5 * CELL_M2


def test_a_level_equal_to_the_onset_stage_counts_as_wet():
    # s <= L is wet: at L = 3.0 the pond (scenario 3.0) is newly flooded, the field (4.0) not.
    codes = compare_codes(BASE_BY_HAND, SCEN_BY_HAND, 3.0)
    assert codes[0, 3] == NEWLY_FLOODED and codes[0, 4] == 1


def test_blocks_of_rows_give_the_same_totals_as_one_pass(monkeypatch):
    import sillmark.products.scenario_compare as sc

    base = np.repeat(BASE_BY_HAND, 5, axis=0)
    scen = np.repeat(SCEN_BY_HAND, 5, axis=0)
    areas = np.arange(1.0, 6.0)  # 1..5 m² per row
    whole = compare_at_level(base, scen, 6.5, row_areas=areas)
    monkeypatch.setattr(sc, "BLOCK_ROWS", 2)
    blocked = compare_at_level(base, scen, 6.5, row_areas=areas, keep_codes=False)
    assert blocked.codes is None and blocked.area_m2 == whole.area_m2
    # two protected cells per row, rows of 1..5 m²: 2 x 15 = 30 m²
    assert whole.newly_protected_m2 == 30.0
    assert np.count_nonzero(whole.codes == NEWLY_PROTECTED) == 10


def test_asset_changes_by_hand():
    # a farm on the field (col 4) and a barn in the yard (col 6); a third off the grid
    ch = onset_changes(BASE_BY_HAND, SCEN_BY_HAND, [0, 0, -1], [4, 6, -1])
    assert ch.before[:2].tolist() == [6.0, 6.0] and ch.after[:2].tolist() == [4.0, 7.0]
    assert ch.change[:2].tolist() == [-2.0, 1.0] and np.isnan(ch.change[2])
    wet_before, wet_after = ch.states(5.0)
    assert wet_before.tolist() == [False, False, False]
    assert wet_after.tolist() == [True, False, False]


def test_the_base_depression_is_matched_by_its_pit(runs):
    base, _ = runs
    t = base.depressions
    assert len(t) == 1 and (int(t.pit_row[0]), int(t.pit_col[0])) == (0, 3)
    ch = depression_changes(t, BASE_BY_HAND, SCEN_BY_HAND)
    assert ch.before.tolist() == [6.0] and ch.after.tolist() == [3.0] and ch.change.tolist() == [-3.0]


def test_grids_of_different_shapes_are_refused():
    from sillmark.errors import InvalidParameter

    with pytest.raises(InvalidParameter, match="one shape"):
        compare_at_level(BASE_BY_HAND, SCEN_BY_HAND[:, :5], 5.0)


def test_valid_ground_no_outlet_reaches_is_dry_not_nodata_when_the_dem_is_given():
    # A flap valve shut against the river leaves column 2 unreached in the scenario
    # (NaN onset stage) and in the base too here; with the DEM it is ground, dry in both.
    base = np.array([[1.0, 2.0, NAN, NAN]], np.float32)
    scen = np.array([[1.0, 2.0, NAN, NAN]], np.float32)
    ground = np.array([[1.0, 2.0, 1.5, NAN]], np.float32)
    without = compare_at_level(base, scen, 5.0)
    with_dem = compare_at_level(base, scen, 5.0, elevation=ground)
    assert without.codes.tolist() == [[2, 2, 0, 0]]
    assert with_dem.codes.tolist() == [[2, 2, 1, 0]]
