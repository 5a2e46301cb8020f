"""The cut-off stage: the water level at which a dry place loses its last dry route
to a refuge.

A dry route stays passable at stage ``h`` while every cell on it has onset stage
``s`` above ``h``. So the stage at which a cell's last dry route to a refuge is
cut is its **cut-off stage**

    k(c) = max over routes R from c to a refuge of ( min over cells p on R of s(p) )

the maximin (widest) path value on the onset stage. It is the dual of the
onset stage's minimax path: with ``f = -s``, ``-k`` is the minimax path value
of ``f`` from the refuges, so the same Priority-Flood (Barnes, Lehman & Mulla
2014) seeded at the refuge cells computes it. Since a route includes its own
first cell, ``k(c) <= s(c)``; the place is an **island**, dry but cut off, for
stages ``k(c) <= h < s(c)``: its island window.

Cells no outlet reaches never flood (their onset stage is NaN); they count as
always passable. Two kinds of cells get no finite cut-off stage:

- ``+inf``: a route of cells that never flood leads to a refuge; the place is
  never cut off;
- ``-inf``: no route at all (nodata, or off the road network, in between);
  the place is cut off at every stage.

Nodata cells, and cells off the road network when movement keeps to roads, are
NaN.

References
----------
Barnes, R., Lehman, C., Mulla, D. (2014). Priority-flood: An optimal
depression-filling and watershed-labeling algorithm for digital elevation
models. Computers & Geosciences 62, 117-127. doi:10.1016/j.cageo.2013.04.024
Pollack, M. (1960). The maximum capacity through a network. Operations Research
8(5), 733-736. doi:10.1287/opre.8.5.733 (the widest-path problem).
"""

from __future__ import annotations

import dataclasses
import math
from typing import Any

import numpy as np

from sillmark.engine.flood import SpillResult, priority_flood
from sillmark.engine.tile_inputs import TileInput
from sillmark.errors import InvalidRefuges, LocationOutsideDEM

__all__ = ["AssetCutOff", "CutOff", "CutoffTiles", "IslandWindow", "asset_cutoff", "cutoff_stage", "island_window"]


@dataclasses.dataclass(frozen=True, eq=False)
class CutOff:
    """The cut-off stage of every cell, and the flood that found it.

    Attributes
    ----------
    stage : float32 array
        ``k(c)``; ``+inf`` never cut off, ``-inf`` no route to a refuge, NaN
        on nodata and impassable cells.
    onset_stage : float32 array
        The onset stage it was computed from.
    passable : bool array
        Cells a route may use.
    widest : SpillResult
        The Priority-Flood on the negated onset stage from the refuges; its
        routes lead each cell back to a refuge along a widest route.
    """

    stage: np.ndarray
    onset_stage: np.ndarray
    passable: np.ndarray
    widest: SpillResult

    def cut_cell(self, row: int, col: int) -> tuple[int, int] | None:
        """The cell where the last dry route from ``(row, col)`` goes under first,
        or None when the place is never cut off or has no route at all."""
        k = float(self.stage[row, col])
        if not math.isfinite(k):
            return None
        route = self.widest.route(row, col)
        return int(route.sill_row), int(route.sill_col)


def cutoff_stage(onset_stage: np.ndarray, refuges: np.ndarray, *, valid: np.ndarray,
                 passable: np.ndarray | None = None, connectivity: int = 8) -> CutOff:
    """The cut-off stage of every cell; see the module notes.

    Parameters
    ----------
    onset_stage : (rows, cols) float array
        NaN on nodata and on cells no outlet reaches; ``valid`` tells the two apart.
    valid : (rows, cols) bool array
        Cells with data.
    refuges : (rows, cols) bool array
        Cells of safe places (rest centres, high ground).
    passable : (rows, cols) bool array, optional
        Cells a route may use besides the refuges (e.g. a road network);
        default every valid cell.
    connectivity : {8, 4}

    Raises
    ------
    InvalidRefuges
        No refuge lies on a usable cell.

    Examples
    --------
    A row of cells: a refuge on a rise (onset 5), a dip in the road (onset 2)
    and a village on a mound (onset 4). The village's only route crosses the
    dip, so it is cut off at stage 2 and floods at 4: its island window is
    ``2 <= h < 4``.

    >>> import numpy as np
    >>> s = np.array([[5.0, 2.0, 4.0]], dtype=np.float32)
    >>> cut = cutoff_stage(s, np.array([[True, False, False]]), valid=np.ones((1, 3), bool))
    >>> cut.stage.tolist()
    [[5.0, 2.0, 2.0]]
    """
    s = np.asarray(onset_stage, dtype=np.float32)
    valid = np.asarray(valid, dtype=bool)
    refuge = np.asarray(refuges, dtype=bool)
    if s.shape != refuge.shape or s.shape != valid.shape:
        raise InvalidRefuges(
            f"the refuge mask ({refuge.shape}) is not on the onset stage's grid ({s.shape})")
    usable = valid if passable is None else valid & (np.asarray(passable, dtype=bool) | refuge)
    seeds = refuge & usable
    if not seeds.any():
        raise InvalidRefuges("no refuge lies on a cell with data; place the refuges on the site")
    finite = s[usable & ~np.isnan(s)]
    top = float(finite.max()) + 1.0 if finite.size else 1.0
    widest = priority_flood(negated_onset(s, usable, top), seeds, connectivity=connectivity)
    stage = stage_from_widest(widest.onset_stage, usable, top)
    return CutOff(stage=stage, onset_stage=s, passable=usable, widest=widest)


def negated_onset(s: np.ndarray, usable: np.ndarray, top: float) -> np.ndarray:
    """The field the widest-route flood runs on: ``-s``, with ``-top`` on cells that
    never flood (NaN onset) and NaN where no route may go. ``top`` lies above
    every finite onset stage of the site."""
    never = usable & np.isnan(s)
    return np.where(usable, -np.where(never, np.float32(top), s), np.nan).astype(np.float32)


def stage_from_widest(widest: np.ndarray, usable: np.ndarray, top: float) -> np.ndarray:
    """The cut-off stage from the widest-route flood's onset stage: ``+inf`` at ``top``
    (never cut off), ``-inf`` where no refuge is reached, NaN off the usable cells."""
    stage = -widest
    stage = np.where(stage >= np.float32(top), np.float32(np.inf), stage)
    stage = np.where(usable & np.isnan(widest), np.float32(-np.inf), stage)
    return np.where(usable, stage, np.float32(np.nan)).astype(np.float32)


@dataclasses.dataclass(frozen=True, eq=False)
class CutoffTiles:
    """The widest-route flood's tile source on a results folder: each window reads the
    onset stage and the DEM and burns the refuges and roads (a pipeline tile source).

    ``onset(r0, r1, c0, c1)`` reads the onset stage; ``grid`` the DEM by
    windows; ``refuges`` and ``roads`` are :class:`sillmark.grid.refuges.PlacedShapes`
    (roads None: every cell with data may be used). ``top`` lies above every
    finite onset stage. All pickle small, so cluster tasks read their own windows.
    """

    grid: Any
    onset: Any
    refuges: Any
    roads: Any
    top: float

    @property
    def shape(self) -> tuple[int, int]:
        return self.grid.shape

    @property
    def label(self) -> str:
        return self.refuges.label

    def usable(self, r0: int, r1: int, c0: int, c1: int) -> tuple[np.ndarray, np.ndarray]:
        """The cells routes may use, and the refuge cells, of a window."""
        valid = ~np.isnan(self.grid.read_window(r0, r1, c0, c1))
        refuge = self.refuges.window(r0, r1, c0, c1) & valid
        if self.roads is None:
            return valid, refuge
        return valid & (self.roads.window(r0, r1, c0, c1) | refuge), refuge

    def window(self, r0: int, r1: int, c0: int, c1: int) -> TileInput:
        usable, refuge = self.usable(r0, r1, c0, c1)
        s = np.asarray(self.onset(r0, r1, c0, c1), dtype=np.float32)
        field = np.ascontiguousarray(negated_onset(s, usable, self.top))
        return TileInput(field, refuge & usable, 0, r1 - r0, 0, c1 - c0, None)


@dataclasses.dataclass(frozen=True)
class IslandWindow:
    """When a place is an island: dry but cut off, for ``start <= h < end``.

    ``start`` is the cut-off stage (``-inf``: cut off at every stage; ``+inf``:
    never); ``end`` the onset stage (``+inf``: never floods). ``cut_at`` is the
    cell (row, col) where the last route goes under first, or None.
    """

    start: float
    end: float
    cut_at: tuple[int, int] | None

    @property
    def is_empty(self) -> bool:
        return not self.start < self.end


def island_window(cut: CutOff, row: int, col: int) -> IslandWindow:
    """The island window of cell ``(row, col)``.

    Raises
    ------
    LocationOutsideDEM
        The cell lies outside the grid or on a cell no route may use.
    """
    rows, cols = cut.stage.shape
    if not (0 <= row < rows and 0 <= col < cols):
        raise LocationOutsideDEM(f"cell ({row}, {col}) is outside the DEM")
    k = float(cut.stage[row, col])
    if math.isnan(k):
        raise LocationOutsideDEM(f"cell ({row}, {col}) is nodata or off the routes allowed")
    s = float(cut.onset_stage[row, col])
    end = math.inf if math.isnan(s) else s
    return IslandWindow(start=k, end=end, cut_at=cut.cut_cell(row, col))


@dataclasses.dataclass(frozen=True, eq=False)
class AssetCutOff:
    """The cut-off stage and island window of each asset, at one water level.

    One entry per asset; NaN (and -1 in cell indices) for assets without
    figures. With a road network, an asset reaches the roads at its nearest
    road cell (``access_row``, ``access_col``); its cut-off stage is that
    cell's, but never above the asset's own onset stage.

    Attributes
    ----------
    stage : float64
        The cut-off stage (``+inf`` never, ``-inf`` no route at any level).
    island_from, island_to : float64
        The island window ``island_from <= h < island_to`` (equal when empty).
    is_island : bool
        Whether the asset is an island at this level.
    cut_row, cut_col : int64
        The cell where its last route goes under first (-1 if none).
    access_row, access_col : int64
        The cell its routes start from.
    """

    stage: np.ndarray
    island_from: np.ndarray
    island_to: np.ndarray
    is_island: np.ndarray
    cut_row: np.ndarray
    cut_col: np.ndarray
    access_row: np.ndarray
    access_col: np.ndarray


def asset_cutoff(cut: CutOff, rows: np.ndarray, cols: np.ndarray, level: float) -> AssetCutOff:
    """The cut-off figures of the assets at cells ``(rows, cols)`` (-1 for none) at ``level``."""
    from scipy import ndimage

    n = len(rows)
    _, (near_r, near_c) = ndimage.distance_transform_edt(~cut.passable, return_indices=True)
    out = {name: np.full(n, np.nan) for name in ("stage", "island_from", "island_to")}
    ints = {name: np.full(n, -1, np.int64) for name in ("cut_row", "cut_col", "access_row", "access_col")}
    island = np.zeros(n, bool)
    h = np.float32(level)
    for k in range(n):
        r, c = int(rows[k]), int(cols[k])
        if r < 0 or c < 0 or not cut.passable.any():
            continue
        ar, ac = (r, c) if cut.passable[r, c] else (int(near_r[r, c]), int(near_c[r, c]))
        own = float(cut.onset_stage[r, c])
        own = math.inf if math.isnan(own) else own
        k_here = min(float(cut.stage[ar, ac]), own)
        out["stage"][k] = k_here
        out["island_from"][k] = k_here
        out["island_to"][k] = own
        island[k] = k_here <= h < own
        ints["access_row"][k], ints["access_col"][k] = ar, ac
        if math.isfinite(k_here):
            if k_here == own and own < float(cut.stage[ar, ac]):
                ints["cut_row"][k], ints["cut_col"][k] = r, c  # its own ground goes under first
            else:
                found = cut.cut_cell(ar, ac)
                if found is not None:
                    ints["cut_row"][k], ints["cut_col"][k] = found
    return AssetCutOff(is_island=island, **out, **ints)
