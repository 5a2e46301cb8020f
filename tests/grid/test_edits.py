"""Edits files: culverts, flap valves, barriers and breaches placed on a DEM.

Hand-worked DEMs with the working in comments. The test grid is the default
of ``dem_from_array``: 1 m cells in EPSG:32633 whose north-west corner is
(500000, 5000000), so cell (row, col) has its centre at
(500000.5 + col, 4999999.5 - row).
"""

from __future__ import annotations

import numpy as np
import pyproj
import pytest

from sillmark.engine.culverts import culvert_edges
from sillmark.engine.flood import priority_flood
from sillmark.errors import InvalidEdits
from sillmark.grid.dem import dem_from_array
from sillmark.grid.edits import read_edits

X0, Y0 = 500000.0, 5000000.0
UTM = {"type": "name", "properties": {"name": "EPSG:32633"}}


def centre(row, col):
    return [X0 + col + 0.5, Y0 - row - 0.5]


def collection(*features):
    return {"type": "FeatureCollection", "crs": UTM, "features": list(features)}


def feature(kind, coords, geometry="LineString", **props):
    return {"type": "Feature", "properties": {"kind": kind, **props},
            "geometry": {"type": geometry, "coordinates": coords}}


# A levee (column 3, 4 m) between a river and low land. The river is column 0
# (outlets, 1 m), the river side 2 m, the land behind the levee 3 m; a 9 m
# frame closes the rest.
#
#        col: 0  1  2  3  4  5  6
#   row 0:    9  9  9  9  9  9  9
#   row 1:    1  2  2  4  3  3  9
#   row 2:    1  2  2  4  3  3  9
#   row 3:    1  2  2  4  3  3  9
#   row 4:    9  9  9  9  9  9  9
LEVEE = np.array([[9] * 7] + [[1, 2, 2, 4, 3, 3, 9]] * 3 + [[9] * 7], dtype=np.float32)
RIVER = np.zeros(LEVEE.shape, bool)
RIVER[1:4, 0] = True
LAND = (slice(1, 4), slice(4, 6))
# Down the levee's crest, from the centre of cell (0, 3) to that of (4, 3).
ALONG_LEVEE = [centre(0, 3), centre(4, 3)]
# A small square around the centre of cell (2, 3), the middle of the levee.
AROUND_MIDDLE = [[[X0 + 3.2, Y0 - 2.8], [X0 + 3.8, Y0 - 2.8], [X0 + 3.8, Y0 - 2.2],
                  [X0 + 3.2, Y0 - 2.2], [X0 + 3.2, Y0 - 2.8]]]


def flood_with(edits, dem):
    z, changed = edits.apply(dem.elevation)
    culverts = culvert_edges(z.shape, **edits.culvert_ends()) if edits.culverts else None
    return priority_flood(z, RIVER, culverts=culverts), changed


def test_the_levee_alone_holds_the_land_to_its_crest():
    # Water crosses the levee at 4 m: the land (3 m) is a depression 1 m deep.
    r = priority_flood(LEVEE, RIVER)
    assert np.all(r.onset_stage[LAND] == 4.0)


def test_a_barrier_along_the_levee_raises_the_land_onset_to_its_crest():
    # The barrier touches cells (0..4, 3); the levee cells (1..3, 3) at 4 m are
    # raised to the 5 m crest, the frame cells at 9 m stay. The land is then
    # reached over 5 m.
    dem = dem_from_array(LEVEE)
    edits = read_edits(collection(feature("barrier", ALONG_LEVEE, crest=5.0, name="wall")), dem)
    (e,) = edits.items
    assert sorted(zip(e.rows.tolist(), e.cols.tolist())) == [(r, 3) for r in range(5)]
    assert e.length_m == pytest.approx(4.0)
    r, changed = flood_with(edits, dem)
    assert changed == [3]
    assert np.all(r.onset_stage[LAND] == 5.0)
    assert np.array_equal(dem.elevation, LEVEE)  # the user's DEM is not changed


def test_a_breach_through_the_raised_levee_floods_the_land_at_its_ground():
    # Barrier first (levee to 5 m), then a breach polygon over cell (2, 3) down
    # to 2 m: water passes river side (2 m) -> breach (2 m) -> land (3 m), so
    # the land's onset is its own ground, 3 m, and no depression remains.
    dem = dem_from_array(LEVEE)
    edits = read_edits(collection(
        feature("barrier", ALONG_LEVEE, crest=5.0),
        feature("breach", AROUND_MIDDLE, geometry="Polygon", level=2.0)), dem)
    assert [(int(e.rows[0]), int(e.cols[0])) for e in edits.items[1:]] == [(2, 3)]
    r, changed = flood_with(edits, dem)
    assert changed == [3, 1]
    assert np.all(r.onset_stage[LAND] == 3.0)
    assert len(r.depressions) == 0
    assert r.onset_stage[1, 3] == 5.0  # the rest of the barrier still stands


def test_a_diagonal_barrier_is_a_four_connected_wall_water_cannot_slip_through():
    # Flat ground at 1 m, 6 x 6, one outlet in the south-west corner cell. A
    # 10 m barrier runs corner to corner, north-west to south-east, through
    # cell corners. Under 8-connectivity a wall of the diagonal cells alone
    # would let water step diagonally between them; the 4-connected walk adds
    # a cell at every corner, so the cells north-east of the wall are reached
    # only over the crest.
    z = np.ones((6, 6), np.float32)
    dem = dem_from_array(z)
    edits = read_edits(collection(feature("barrier", [[X0, Y0], [X0 + 6, Y0 - 6]], crest=10.0)),
                       dem)
    (e,) = edits.items
    steps = np.abs(np.diff(e.rows)) + np.abs(np.diff(e.cols))
    assert np.all(steps == 1)  # each cell shares an edge with the next
    outlet = np.zeros(z.shape, bool)
    outlet[5, 0] = True
    edited, _ = edits.apply(z)
    s = priority_flood(edited, outlet).onset_stage
    wall = set(zip(e.rows.tolist(), e.cols.tolist()))
    for r in range(6):
        for c in range(6):
            if (r, c) not in wall:
                assert s[r, c] == (10.0 if c > r else 1.0), (r, c)


def test_a_culvert_given_in_lon_lat_joins_the_cells_of_its_ends():
    # RFC 7946 coordinates (no crs member): the centres of cells (2, 1) and
    # (2, 5) taken to lon/lat with pyproj; a culvert with invert 2.5 m through
    # the levee. The land is then reached at max(2 (river side), 2.5, 3) = 3 m.
    dem = dem_from_array(LEVEE)
    to_lonlat = pyproj.Transformer.from_crs("EPSG:32633", "OGC:CRS84", always_xy=True)
    ends = [list(to_lonlat.transform(*centre(2, 1))), list(to_lonlat.transform(*centre(2, 5)))]
    obj = {"type": "FeatureCollection",
           "features": [feature("culvert", ends, invert=2.5, name="C1")]}
    edits = read_edits(obj, dem)
    (e,) = edits.items
    assert (e.rows.tolist(), e.cols.tolist()) == ([2, 2], [1, 5])
    r, _ = flood_with(edits, dem)
    assert np.all(r.onset_stage[LAND] == 3.0)
    lines = edits.describe("m")
    assert "culvert 'C1'" in lines[0] and "invert 2.50 m, datum not stated" in lines[0]


@pytest.mark.parametrize(("bad", "words"), [
    (feature("dam", ALONG_LEVEE, crest=5.0, name="Old dam"), "feature 1 ('Old dam') has kind 'dam'"),
    (feature("culvert", [centre(2, 1), centre(2, 5)]), "needs a finite number 'invert'"),
    (feature("barrier", ALONG_LEVEE, crest="high"), "needs a finite number 'crest'"),
    (feature("barrier", [centre(2, 1), [X0 + 20, Y0 - 2]], crest=5.0), "leaves the DEM"),
    (feature("culvert", [centre(2, 1)], geometry="Point", invert=1.0), "geometry 'Point'"),
    (feature("culvert", [centre(2, 1), centre(0, 0)], invert=1.0, name="on hole"), "nodata"),
])
def test_a_bad_edit_gets_one_line_naming_the_feature(bad, words):
    z = LEVEE.copy()
    z[0, 0] = np.nan
    dem = dem_from_array(z)
    good = feature("barrier", ALONG_LEVEE, crest=5.0)
    with pytest.raises(InvalidEdits) as caught:
        read_edits(collection(good, bad), dem)
    text = str(caught.value)
    assert words in text and "feature 1" in text and "\n" not in text


def _lonlat(*points):
    to_lonlat = pyproj.Transformer.from_crs("EPSG:32633", "OGC:CRS84", always_xy=True)
    return [list(to_lonlat.transform(*p)) for p in points]


@pytest.mark.parametrize(("bad", "words"), [
    # Two clicks on one spot of a map: both ends of the culvert at the same lon/lat.
    (feature("culvert", _lonlat(centre(2, 1), centre(2, 1)), invert=2.5), "both ends in one cell"),
    (feature("barrier", _lonlat(centre(2, 3), centre(2, 3), centre(2, 3)), crest=5.0),
     "all its vertices at one point"),
    # Three corners on one meridian enclose nothing (their longitude that of cell (2, 3)).
    (feature("breach", [[[p[0], q[1]] for q in _lonlat(centre(1, 3), centre(2, 3), centre(3, 3),
                                                      centre(1, 3))] for p in _lonlat(centre(2, 3))],
             geometry="Polygon", level=2.0), "encloses no area"),
    (feature("breach", [_lonlat(*[centre(2, 3)] * 4)], geometry="Polygon", level=2.0),
     "encloses no area"),
])
def test_a_degenerate_lon_lat_edit_gets_one_line_not_a_crash(bad, words):
    # RFC 7946 input is densified on its way to the DEM's CRS; a line of length
    # zero cannot be split, so it must be refused in words before that step.
    dem = dem_from_array(LEVEE)
    with pytest.raises(InvalidEdits) as caught:
        read_edits({"type": "FeatureCollection", "features": [bad]}, dem)
    text = str(caught.value)
    assert words in text and "feature 0" in text and "\n" not in text
