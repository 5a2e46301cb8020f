"""Refuges and roads burned into cells (sillmark.grid.refuges): exact, window by window."""

from __future__ import annotations

import numpy as np
from affine import Affine

from sillmark.grid.dem import dem_from_array
from sillmark.grid.refuges import place_shapes, read_roads

UTM = {"type": "name", "properties": {"name": "EPSG:32633"}}
# A 1 m grid whose north-west corner is (0, 6): cell (row r, col c) spans
# x c..c+1 and y 6-r-1..6-r.
GRID = Affine(1, 0, 0, 0, -1, 6)


def roads(*lines):
    return {"type": "FeatureCollection", "crs": UTM, "features": [
        {"type": "Feature", "properties": {}, "geometry": {"type": "LineString", "coordinates": line}}
        for line in lines]}


def test_a_line_on_a_cell_edge_marks_the_cells_on_both_sides():
    # Worked by hand: the line y = 4 (the edge between rows 1 and 2) from x = 0.5
    # to x = 2.5 meets the closed squares of rows 1 and 2 in columns 0, 1 and 2.
    dem = dem_from_array(np.zeros((5, 5)), transform=GRID)
    cells, _ = read_roads(roads([[0.5, 4], [2.5, 4]]), dem)
    assert sorted(map(tuple, np.argwhere(cells).tolist())) == [
        (1, 0), (1, 1), (1, 2), (2, 0), (2, 1), (2, 2)]


def test_every_window_burns_what_the_whole_grid_burns():
    # Lines ending exactly on cell corners, diagonals through corners: a
    # rasteriser clipped to each window can disagree with itself there.
    dem = dem_from_array(np.zeros((23, 29)), transform=Affine(1, 0, 0, 0, -1, 23))
    shapes = place_shapes(roads([[3, 20], [17, 8], [27, 1]], [[0.25, 0.5], [28.5, 22.75]],
                                [[5, 5], [5, 18], [12, 18]]), dem, "roads")
    whole = shapes.window(0, 23, 0, 29)
    assert whole.sum() > 60
    for step in (4, 7, 10):
        tiled = np.zeros_like(whole)
        for r0 in range(0, 23, step):
            for c0 in range(0, 29, step):
                r1, c1 = min(23, r0 + step), min(29, c0 + step)
                tiled[r0:r1, c0:c1] = shapes.window(r0, r1, c0, c1)
        assert np.array_equal(tiled, whole), step


def test_a_refuge_polygon_marks_the_cells_whose_centre_it_holds():
    # A 2.2 x 2.2 square from (0.9, 1.9) to (3.1, 4.1): cell centres at x 1.5,
    # 2.5 and y 2.5, 3.5 lie inside (rows 2, 3 and columns 1, 2); its edges are
    # wider than a cell, so no thin part adds touched cells.
    dem = dem_from_array(np.zeros((6, 5)), transform=GRID)
    square = {"type": "FeatureCollection", "crs": UTM, "features": [
        {"type": "Feature", "properties": {}, "geometry": {"type": "Polygon", "coordinates": [
            [[0.9, 1.9], [3.1, 1.9], [3.1, 4.1], [0.9, 4.1], [0.9, 1.9]]]}}]}
    shapes = place_shapes(square, dem, "refuges")
    assert sorted(map(tuple, np.argwhere(shapes.window(0, 6, 0, 5)).tolist())) == [
        (2, 1), (2, 2), (3, 1), (3, 2)]
