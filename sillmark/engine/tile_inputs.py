"""Where the pipeline's tiles come from: arrays in memory, or a DEM file by windows.

A *source* has a ``shape`` and ``window(r0, r1, c0, c1)``, which gives a
:class:`TileInput`: the elevations and outlet mask a tile of the
Priority-Flood pipeline (:mod:`sillmark.engine.pipeline`; Barnes, Lehman &
Mulla 2014, tiled after Barnes 2016) floods from.

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
import os
from typing import Any

import numpy as np

__all__ = ["ArrayTiles", "RasterTiles", "TileInput"]


@dataclasses.dataclass(frozen=True)
class TileInput:
    """A tile's cells as a flood reads them: ``z[r0:r1, c0:c1]`` and its outlets."""

    z: np.ndarray
    mask: np.ndarray
    r0: int
    r1: int
    c0: int
    c1: int
    outlet_counts: np.ndarray | None

    @property
    def tile_z(self) -> np.ndarray:
        return self.z[self.r0:self.r1, self.c0:self.c1]


@dataclasses.dataclass(frozen=True, eq=False)
class ArrayTiles:
    """Elevations (float32, NaN nodata) and a boolean outlet mask held in memory.

    The caller has validated both (:func:`sillmark.engine.flood.priority_flood`);
    tiles are views, never copies.
    """

    elevation: np.ndarray
    outlet_mask: np.ndarray

    @property
    def shape(self) -> tuple[int, int]:
        return self.elevation.shape

    def window(self, r0: int, r1: int, c0: int, c1: int) -> TileInput:
        return TileInput(self.elevation, self.outlet_mask, r0, r1, c0, c1, None)


@dataclasses.dataclass(frozen=True, eq=False)
class RasterTiles:
    """A DEM file read window by window, its outlets marked per window.

    ``grid`` is a :class:`sillmark.grid.dem_grid.DEMGrid` and ``outlets`` an
    :class:`sillmark.grid.outlet_plan.OutletPlan`; both pickle small, so cluster
    tasks read their own windows. Each window is read with a one-cell halo
    (for outlets next to nodata).
    """

    grid: Any
    outlets: Any

    @property
    def shape(self) -> tuple[int, int]:
        return self.grid.shape

    @property
    def label(self) -> str:
        return f"'{os.path.basename(self.grid.path)}'"

    def window(self, r0: int, r1: int, c0: int, c1: int) -> TileInput:
        halo = self.grid.read_window(r0 - 1, r1 + 1, c0 - 1, c1 + 1)
        z = np.ascontiguousarray(halo[1:-1, 1:-1])
        mask, counts = self.outlets.window(self.grid, halo, r0, r1, c0, c1)
        return TileInput(z, mask, 0, r1 - r0, 0, c1 - c0, counts)
