"""The onset offset of a sloped water-surface profile (sillmark.products.profile).

Checked against a hand-worked sloped channel and, with hypothesis, against a
brute force: for each offset D, a breadth-first search from the centreline's
cells over the cells with z < W0 + D (the definition, sharing no code with the
engine).
"""

from __future__ import annotations

from collections import deque

import numpy as np
import pytest
from affine import Affine
from hypothesis import given, settings
from hypothesis import strategies as st

from sillmark.errors import InvalidProfile
from sillmark.grid.dem import dem_from_array
from sillmark.grid.profiles import read_profile, reference_level
from sillmark.products.profile import offset_flood
from sillmark.products.source import ArraySource
from sillmark.products.stage import FLOODED, SHIELDED, level_blocks

UTM = {"type": "name", "properties": {"name": "EPSG:32633"}}
ORIGIN = Affine(1, 0, 500_000, 0, -1, 5_000_003)  # 1 m cells; row 0's centres at y = 5 000 002.5


def profile_file(line, stations):
    features = [{"type": "Feature", "properties": {},
                 "geometry": {"type": "LineString", "coordinates": line}}]
    for x, y, level in stations:
        features.append({"type": "Feature", "properties": {"level": level},
                         "geometry": {"type": "Point", "coordinates": [x, y]}})
    return {"type": "FeatureCollection", "crs": UTM, "features": features}


# A river along row 0 (y = 5 000 002.5), falling from 10 at the first cell's centre
# (x = 500 000.5) to 5 at the last's (x = 500 005.5): W0 = 10 - j in column j.
RIVER = profile_file([[500_000.5, 5_000_002.5], [500_005.5, 5_000_002.5]],
                     [(500_000.5, 5_000_002.5, 10.0), (500_005.5, 5_000_002.5, 5.0)])

# Hand-worked channel (3 rows x 6 columns). Row 0 is the river bed, one below the
# profile (e = z - W0 = -1); row 1 a ridge one above it (e = +1); row 2 a bowl
# behind the ridge, half a unit above the profile (e = +0.5). Every cell of a
# column has the same W0 (its nearest centreline point has the same x).
#   onset offset: row 0 = -1 (the river's own cells seed at their height);
#                 row 1 = +1; row 2 = +1 (water crosses the ridge first).
#   At D = 0.75 the bowl lies below the raised profile (0.5 < 0.75) but no path
#   reaches it: shielded low ground. At D = 1 it is wet, depth W0 + 1 - z = 0.5.
W0 = 10.0 - np.arange(6)
CHANNEL = np.vstack([W0 - 1.0, W0 + 1.0, W0 + 0.5])


def test_hand_worked_channel():
    dem = dem_from_array(CHANNEL, transform=ORIGIN)
    profile = read_profile(RIVER, dem)
    assert np.allclose(reference_level(profile, dem), np.tile(W0, (3, 1)))
    flood = offset_flood(dem, profile)
    assert flood.centreline_cells == 6
    assert np.allclose(flood.onset_offset, [[-1] * 6, [1] * 6, [1] * 6])
    source = ArraySource(flood.height_dem, flood.result)
    state, _ = level_blocks(source, 0.75).classify(0, 3)
    assert (state[0] == FLOODED).all() and (state[2] == SHIELDED).all()
    assert not ((state[1] == FLOODED) | (state[1] == SHIELDED)).any()
    # Depth at offset 1 on the bowl: W0 + 1 - z = 0.5 in every column.
    state, depth = level_blocks(source, 1.0).classify(0, 3)
    assert (state == FLOODED).all()
    assert np.allclose(depth[2], 0.5) and np.allclose(depth[0], 2.0)


def test_stations_beyond_the_ends_hold_their_level_and_order_does_not_matter():
    # Stations at x = 501.5 (8) and 503.5 (6), given in reverse order: cells
    # before 501.5 take 8, after 503.5 take 6, and fall linearly between.
    stations = [(500_003.5, 5_000_002.5, 6.0), (500_001.5, 5_000_002.5, 8.0)]
    river = profile_file([[500_000.0, 5_000_002.5], [500_006.0, 5_000_002.5]], stations)
    dem = dem_from_array(np.zeros((2, 6)), transform=ORIGIN)
    w0 = reference_level(read_profile(river, dem), dem)
    assert np.allclose(w0[0], [8, 8, 7, 6, 6, 6]) and np.allclose(w0[1], w0[0])


@pytest.mark.parametrize("features, words", [
    ([], "0 LineStrings"),
    ([{"type": "Feature", "properties": {},
       "geometry": {"type": "LineString", "coordinates": [[500_000, 5_000_001], [500_003, 5_000_001]]}},
      {"type": "Feature", "properties": {"level": "high"},
       "geometry": {"type": "Point", "coordinates": [500_000, 5_000_001]}}], "numeric 'level'"),
    ([{"type": "Feature", "properties": {},
       "geometry": {"type": "LineString", "coordinates": [[500_000, 5_000_001], [500_003, 5_000_001]]}},
      {"type": "Feature", "properties": {"level": 3},
       "geometry": {"type": "Point", "coordinates": [500_000, 5_000_001]}}], "1 station"),
    ([{"type": "Feature", "properties": {},
       "geometry": {"type": "LineString", "coordinates": [[0, 0], [3, 0]]}},
      {"type": "Feature", "properties": {"level": 3}, "geometry": {"type": "Point", "coordinates": [0, 0]}},
      {"type": "Feature", "properties": {"level": 2}, "geometry": {"type": "Point", "coordinates": [3, 0]}}],
     "misses the DEM"),
])
def test_bad_profiles_are_refused_in_words(features, words):
    dem = dem_from_array(np.zeros((3, 6)), transform=ORIGIN)
    with pytest.raises(InvalidProfile, match=words):
        read_profile({"type": "FeatureCollection", "crs": UTM, "features": features}, dem)


def brute_force_wet(e: np.ndarray, seeds: np.ndarray, offset: float) -> np.ndarray:
    """Cells a path from the seeds reaches through cells with e < offset (8-neighbour BFS)."""
    rows, cols = e.shape
    wet = np.zeros(e.shape, dtype=bool)
    queue = deque()
    for r, c in zip(*np.nonzero(seeds & (e < offset))):
        wet[r, c] = True
        queue.append((r, c))
    while queue:
        r, c = queue.popleft()
        for dr in (-1, 0, 1):
            for dc in (-1, 0, 1):
                rr, cc = r + dr, c + dc
                if 0 <= rr < rows and 0 <= cc < cols and not wet[rr, cc] and e[rr, cc] < offset:
                    wet[rr, cc] = True
                    queue.append((rr, cc))
    return wet


@settings(max_examples=40, deadline=None)
@given(st.integers(3, 7), st.integers(3, 8), st.integers(0, 2**31 - 1),
       st.floats(-2, 2), st.floats(-2, 2))
def test_onset_offset_matches_a_breadth_first_search(rows, cols, seed, upstream, downstream):
    rng = np.random.default_rng(seed)
    z = rng.integers(0, 12, size=(rows, cols)).astype(float) / 2
    z[rng.random((rows, cols)) < 0.1] = np.nan
    x0, x1 = 500_000.0, 500_000.0 + cols
    river = profile_file([[x0, 5_000_002.5], [x1, 5_000_002.5]],
                         [(x0, 5_000_002.5, 3 + upstream), (x1, 5_000_002.5, 3 + downstream)])
    dem = dem_from_array(z, transform=ORIGIN)
    profile = read_profile(river, dem)
    # W0 by hand for a straight line along x: the station levels interpolated
    # at each cell centre's x (the nearest point of the line has the cell's x).
    centre_x = x0 + np.arange(cols) + 0.5
    expected_w0 = np.interp(centre_x, [x0, x1], [3 + upstream, 3 + downstream]).astype(np.float32)
    w0 = reference_level(profile, dem)
    assert np.allclose(np.where(dem.valid, w0, 0), np.where(dem.valid, expected_w0, 0), atol=1e-5)
    if not (dem.valid[0].any()):
        return
    flood = offset_flood(dem, profile)
    e = flood.height_dem.elevation
    seeds = np.zeros(z.shape, bool)
    seeds[0] = dem.valid[0]  # the line runs along row 0's centres
    values = np.unique(e[~np.isnan(e)])
    for offset in np.concatenate([(values[:-1] + values[1:]) / 2, [values[0] - 1, values[-1] + 1]]):
        expected = brute_force_wet(np.where(np.isnan(e), np.inf, e), seeds, offset)
        got = flood.onset_offset <= offset
        assert np.array_equal(got & dem.valid, expected), offset
