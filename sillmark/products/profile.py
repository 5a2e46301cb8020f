"""The onset offset: the rise of a sloped water-surface profile at which a cell gets wet.

A river in flood does not stand at one level: its surface falls along the
reach. With the reference surface ``W0`` of a profile
(:mod:`sillmark.grid.profiles`) raised everywhere by an offset ``D``, water
stands on a cell ``c`` when some path from the river reaches ``c`` through
cells ``p`` that all have ``z(p) < W0(p) + D``, i.e. ``z(p) - W0(p) < D``. That
is a threshold on the minimax (bottleneck) path value over the *height above
the profile* ``e = z - W0``, seeded at the centreline's cells. So the one
Priority-Flood (Barnes, Lehman & Mulla 2014), run on ``e`` with the centreline
as its outlets, gives each cell its onset offset ``s_e(c)``: the cell is wet at
offset ``D`` exactly when ``s_e(c) <= D``, and its depth there is
``W0 + D - z``.

Because the offset flood is an ordinary flood on the field ``e``, every product
of a level (water-level maps, the stage table, shielded low ground, assets,
routes) works on it unchanged: the height field plays the elevation and the
offset plays the level. :class:`OffsetSource` presents a results folder that
way, read block by block.

References
----------
Barnes, R., Lehman, C., Mulla, D. (2014). Priority-flood: An optimal
depression-filling and watershed-labeling algorithm for digital elevation
models. Computers & Geosciences 62, 117-127. doi:10.1016/j.cageo.2013.04.024
"""

from __future__ import annotations

import dataclasses
import functools
import math
from collections.abc import Iterator
from typing import Any

import numpy as np
from affine import Affine

from sillmark.engine.flood import SpillResult, priority_flood
from sillmark.engine.tile_inputs import TileInput
from sillmark.grid.outlet_geojson import rasterize_parts
from sillmark.grid.profiles import Profile, reference_level
from sillmark.units import VerticalUnit, unit_of

__all__ = ["OffsetFlood", "OffsetSource", "ProfileTiles", "offset_flood"]


@dataclasses.dataclass(frozen=True, eq=False)
class OffsetFlood:
    """The flood on the height above a profile, held in memory.

    Attributes
    ----------
    reference : float32 array
        ``W0``, the profile level each cell takes (NaN on nodata).
    height_dem : DEM
        The DEM with ``z - W0`` as its elevation (the same grid and units).
    result : SpillResult
        The Priority-Flood on ``z - W0`` from the centreline; its
        ``onset_stage`` is the onset offset.
    centreline_cells : int
        How many cells the centreline seeds.
    """

    reference: np.ndarray
    height_dem: Any
    result: SpillResult
    centreline_cells: int

    @property
    def onset_offset(self) -> np.ndarray:
        return self.result.onset_stage


def offset_flood(dem: Any, profile: Profile, *, connectivity: int = 8, executor=None,
                 tile_size: int | None = None) -> OffsetFlood:
    """Flood the height above ``profile`` from its centreline; see the module notes.

    Memory: the reference level and the height field (float32 each), plus what
    :func:`sillmark.engine.flood.priority_flood` needs.

    Raises
    ------
    InvalidProfile
        The centreline crosses no valid cell of the DEM.
    """
    from sillmark.errors import InvalidProfile

    reference = reference_level(profile, dem)
    height = (dem.elevation - reference).astype(np.float32)
    seeds = profile.centreline_cells(dem) & dem.valid
    count = int(np.count_nonzero(seeds))
    if count == 0:
        raise InvalidProfile(f"{profile.label}: the centreline crosses no valid cell of the DEM")
    height_dem = dataclasses.replace(dem, elevation=height)
    options = {} if tile_size is None else {"tile_size": tile_size}
    result = priority_flood(height, seeds, connectivity=connectivity, row_areas=dem.row_areas,
                            transform=dem.transform, executor=executor, **options)
    return OffsetFlood(reference=reference, height_dem=height_dem, result=result,
                       centreline_cells=count)


@dataclasses.dataclass(frozen=True, eq=False)
class ProfileTiles:
    """A DEM file read window by window as the height above a profile (a pipeline tile source).

    The outlets of every window are the centreline's cells in it; both pickle
    small (the grid's header and the profile's line and stations), so cluster
    tasks compute their own windows.
    """

    grid: Any
    profile: Profile

    @property
    def shape(self) -> tuple[int, int]:
        return self.grid.shape

    @property
    def label(self) -> str:
        return self.profile.label

    def window(self, r0: int, r1: int, c0: int, c1: int) -> TileInput:
        z = np.ascontiguousarray(self.grid.read_window(r0, r1, c0, c1), dtype=np.float32)
        reference = reference_level(self.profile, self.grid, r0, r1, c0, c1)
        transform = self.grid.transform @ Affine.translation(c0, r0)
        seeds = rasterize_parts([], [self.profile.line], z.shape, transform) & ~np.isnan(z)
        return TileInput(z - reference, seeds, 0, r1 - r0, 0, c1 - c0, None)


@dataclasses.dataclass(frozen=True, eq=False)
class OffsetSource:
    """A result source whose levels are offsets of the profile: ``e = z - W0`` is the
    elevation and the onset offset the onset stage.

    ``base`` is the site's own result source (in memory or a folder);
    ``offset_window`` and ``reference_window`` read windows of the onset offset
    and of ``W0``. Depressions are those of the plain flood on ``z``, so this
    source lists none: a level here is not one water level across the site.
    """

    base: Any
    offset_window: Any
    reference_window: Any
    #: Levels of this source are offsets: file names and tags say so.
    level_kind = "offset"

    @property
    def grid(self) -> Any:
        return self.base.grid

    @property
    def connectivity(self) -> int:
        return self.base.connectivity

    @property
    def unit(self) -> VerticalUnit:
        return unit_of(self.base.grid)

    @property
    def pit_elevation(self) -> np.ndarray:
        return np.zeros(0, dtype=np.float32)

    @property
    def spill_elevation(self) -> np.ndarray:
        return np.zeros(0, dtype=np.float32)

    @functools.cached_property
    def depression_columns(self) -> dict[str, np.ndarray]:
        return {name: values[:0] for name, values in self.base.depression_columns.items()}

    @functools.cached_property
    def onset_range(self) -> tuple[float, float]:
        return self._range("onset_stage")

    @functools.cached_property
    def elevation_range(self) -> tuple[float, float]:
        return self._range("elevation")

    def _range(self, layer: str) -> tuple[float, float]:
        low, high = math.inf, -math.inf
        for r0, r1 in self.blocks():
            block = self.window(layer, r0, r1, 0, self.grid.shape[1])
            finite = block[~np.isnan(block)]
            if finite.size:
                low, high = min(low, float(finite.min())), max(high, float(finite.max()))
        return (low, high) if low <= high else (math.nan, math.nan)

    def blocks(self) -> Iterator[tuple[int, int]]:
        return self.base.blocks()

    def window(self, layer: str, r0: int, r1: int, c0: int, c1: int) -> np.ndarray:
        if layer == "elevation":
            z = self.base.window("elevation", r0, r1, c0, c1)
            return (z - self.reference_window(r0, r1, c0, c1)).astype(np.float32)
        if layer == "onset_stage":
            return self.offset_window(r0, r1, c0, c1)
        if layer == "depression_id":
            offset = self.offset_window(r0, r1, c0, c1)
            return np.where(np.isnan(offset), np.int32(-1), np.int32(0))
        return self.base.window(layer, r0, r1, c0, c1)
