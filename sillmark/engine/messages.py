"""The messages between the steps of the Priority-Flood pipeline.

Small frozen dataclasses, no raster: what a tile step needs
(:class:`TileJob`), what each step hands to the next (:class:`FloodedTile`,
:class:`SeedLevels`, :class:`FinishedTile`) and the joined depressions
(:class:`JoinedDepressions`). The steps are in :mod:`sillmark.engine.pipeline`
(Barnes, Lehman & Mulla 2014, tiled after Barnes 2016); whatever executor runs
them, these are all that travel between the client and the workers.

References
----------
Barnes, R., Lehman, C., Mulla, D. (2014). Priority-flood: An optimal
depression-filling and watershed-labeling algorithm for digital elevation
models. Computers & Geosciences 62, 117-127. doi:10.1016/j.cageo.2013.04.024
Barnes, R. (2016). Parallel priority-flood depression filling for trillion cell
digital elevation models on desktops or clusters. Computers & Geosciences 96,
56-68. doi:10.1016/j.cageo.2016.07.001
"""

from __future__ import annotations

import dataclasses
from typing import Any

import numpy as np

from sillmark.engine.plan import TilePlan
from sillmark.engine.stores import TileStore


@dataclasses.dataclass(frozen=True)
class TileJob:
    """What every tile step needs (no cells: it travels to every worker once)."""

    plan: TilePlan
    source: Any
    store: TileStore
    connectivity: int
    culverts: Any = None  # CulvertEdges or None


def ends_in_tile(culverts, plan: TilePlan, k: int) -> tuple[np.ndarray, np.ndarray]:
    """Culvert ends inside tile ``k``: their index in ``culverts.ends`` and local padded index."""
    if culverts is None or len(culverts) == 0:
        return np.zeros(0, dtype=np.int64), np.zeros(0, dtype=np.int64)
    r0, r1, c0, c1 = plan.bounds(k)
    ends = culverts.ends
    r, c = ends // plan.cols, ends % plan.cols
    inside = np.flatnonzero((r >= r0) & (r < r1) & (c >= c0) & (c < c1))
    local = (r[inside] - r0 + 1) * (c1 - c0 + 2) + (c[inside] - c0 + 1)
    return inside.astype(np.int64), local.astype(np.int64)


@dataclasses.dataclass(frozen=True)
class FloodedTile:
    """Step 1's answer for one tile: its seeds, label meetings and perimeter.

    Meetings are label pairs ``a < b`` (``meet_a``, ``meet_b``) at a level,
    with the cell on each side as a global padded index (width ``cols + 2``).
    The perimeter arrays are in perimeter order (:mod:`sillmark.engine.plan`).
    Outlet and valid cells are counted for a window of a file only (0 for
    arrays the caller has checked).
    """

    n_seeds: int
    meet_a: np.ndarray
    meet_b: np.ndarray
    meet_level: np.ndarray
    meet_cell_a: np.ndarray
    meet_cell_b: np.ndarray
    perimeter_state: np.ndarray
    perimeter_level: np.ndarray
    perimeter_label: np.ndarray
    heap_pops: int
    outlet_counts: np.ndarray | None
    outlet_cells: int
    valid_cells: int
    seconds: float
    end_index: np.ndarray = dataclasses.field(default_factory=lambda: np.zeros(0, np.int64))
    end_label: np.ndarray = dataclasses.field(default_factory=lambda: np.zeros(0, np.int32))
    end_level: np.ndarray = dataclasses.field(default_factory=lambda: np.zeros(0, np.float32))


@dataclasses.dataclass(frozen=True)
class SeedLevels:
    """Step 2's answer for one tile: its seeds' levels and the meetings they came by.

    ``own`` and ``other`` are tile-local padded indices (-1 for none);
    ``by_culvert[label]`` is set for a seed whose level came through a culvert.
    """

    k: int
    lam: np.ndarray
    own: np.ndarray
    other: np.ndarray
    by_culvert: np.ndarray


@dataclasses.dataclass(frozen=True)
class FinishedTile:
    """Step 3's answer for one tile: its depression pieces and spill summary.

    Piece columns (index ``j`` for piece ``j + 1``): first cell and pit as
    global ``row * cols + col``, pit elevation, level. Perimeter columns, in
    perimeter order: final level, piece (0 for none), outlet flag.
    """

    first: np.ndarray
    pit: np.ndarray
    pit_z: np.ndarray
    level: np.ndarray
    perimeter_level: np.ndarray
    perimeter_piece: np.ndarray
    perimeter_outlet: np.ndarray
    spill: tuple
    valid_cells: int
    unreached_cells: int
    seconds: float
    end_index: np.ndarray = dataclasses.field(default_factory=lambda: np.zeros(0, np.int64))
    end_piece: np.ndarray = dataclasses.field(default_factory=lambda: np.zeros(0, np.int32))
    end_level: np.ndarray = dataclasses.field(default_factory=lambda: np.zeros(0, np.float32))


@dataclasses.dataclass(frozen=True)
class JoinedDepressions:
    """Step 4's answer: depressions 1..n (index 0 unused) and each tile's piece ids.

    ``pit`` and ``spill`` are global ``row * cols + col``; tile ``k``'s pieces
    are ``piece_id[piece_off[k]:piece_off[k + 1]]``.
    """

    n: int
    piece_off: np.ndarray
    piece_id: np.ndarray
    pit: np.ndarray
    pit_z: np.ndarray
    level: np.ndarray
    spill: np.ndarray
    spills_to: np.ndarray

    def tile_ids(self, k: int) -> np.ndarray:
        """Depression id of tile ``k``'s piece ``j`` at index ``j`` (0 at 0)."""
        ids = np.zeros(self.piece_off[k + 1] - self.piece_off[k] + 1, dtype=np.int32)
        ids[1:] = self.piece_id[self.piece_off[k]:self.piece_off[k + 1]]
        return ids
