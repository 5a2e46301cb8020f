"""Where products read a flood result from: arrays in memory, or a results folder on disk.

Every product (the water-level files, the stage table, depression outlines, the
hierarchy files) is written once, against a *result source* that hands out
blocks of rows and windows of its layers. A result held in memory is an
:class:`ArraySource`: its blocks are views of the arrays, and a product run on
it reads the whole grid as one window. A folder that ``sillmark analyse`` wrote
(in memory or by tiles on a cluster) is a :class:`sillmark.io.results_folder.ResultFolder`,
read block by block from its GeoTIFFs, so no product holds a whole raster of
a DEM larger than memory.

The layers a source offers are :data:`LAYERS`: ``elevation`` (float32, NaN on
nodata), ``onset_stage`` (float32, NaN where no outlet reaches), and
``depression_id`` (int32, 0 outside depressions, -1 on nodata and unreached
cells, as in ``depression_id.tif``).
"""

from __future__ import annotations

import dataclasses
import functools
import math
from collections.abc import Iterator
from typing import TYPE_CHECKING, Any, Protocol

import numpy as np

from sillmark.grid.dem import check_layers_on_grid
from sillmark.products.inventory import depression_columns
from sillmark.units import VerticalUnit, unit_of

if TYPE_CHECKING:  # pragma: no cover
    from sillmark.engine.flood import SpillResult
    from sillmark.grid.dem import DEM

#: Layers a result source reads.
LAYERS = ("elevation", "onset_stage", "depression_id")
#: ``depression_id`` on DEM nodata and on cells no outlet reaches (as in the GeoTIFF).
DEPRESSION_ID_NODATA = -1


class ResultSource(Protocol):
    """What every product reads. Implemented by :class:`ArraySource` and
    :class:`sillmark.io.results_folder.ResultFolder`."""

    grid: Any  #: the DEM or its grid: shape, transform, crs, row_areas, vertical_unit
    connectivity: int

    @property
    def unit(self) -> VerticalUnit: ...

    @property
    def pit_elevation(self) -> np.ndarray: ...

    @property
    def spill_elevation(self) -> np.ndarray: ...

    @property
    def depression_columns(self) -> dict[str, np.ndarray]: ...

    @property
    def onset_range(self) -> tuple[float, float]: ...

    @property
    def elevation_range(self) -> tuple[float, float]: ...

    def blocks(self) -> Iterator[tuple[int, int]]: ...

    def window(self, layer: str, r0: int, r1: int, c0: int, c1: int) -> np.ndarray: ...


def rows(source: ResultSource, layer: str, r0: int, r1: int) -> np.ndarray:
    """Rows ``r0:r1`` of ``layer`` across the whole grid."""
    return source.window(layer, r0, r1, 0, source.grid.shape[1])


def _nan_range(values: np.ndarray) -> tuple[float, float]:
    finite = values[~np.isnan(values)]
    if not finite.size:
        return math.nan, math.nan
    return float(finite.min()), float(finite.max())


@dataclasses.dataclass(frozen=True, eq=False)
class ArraySource:
    """A flood result held in memory, as a result source.

    Parameters
    ----------
    dem : DEM
        The DEM the result was computed on.
    result : SpillResult
        From :func:`sillmark.engine.flood.analyse_site` (or arrays memory-mapped
        from a results folder, as the web app holds them).

    Notes
    -----
    Memory: nothing beyond the arrays; :meth:`window` returns views. Blocks are
    one window of the whole grid, so a product makes one pass over the arrays.
    """

    dem: "DEM"
    result: "SpillResult"

    def __post_init__(self) -> None:
        check_layers_on_grid(self.dem, onset_stage=self.result.onset_stage,
                             depression_id=self.result.depression_id)

    @property
    def grid(self) -> "DEM":
        return self.dem

    @property
    def connectivity(self) -> int:
        return int(self.result.connectivity)

    @property
    def unit(self) -> VerticalUnit:
        return unit_of(self.dem)

    @property
    def pit_elevation(self) -> np.ndarray:
        return self.result.depressions.pit_elevation

    @property
    def spill_elevation(self) -> np.ndarray:
        return self.result.depressions.spill_elevation

    @functools.cached_property
    def depression_columns(self) -> dict[str, np.ndarray]:
        """The columns of ``depressions.csv`` (:func:`sillmark.products.inventory.depression_columns`)."""
        return depression_columns(self.result, self.dem)

    @functools.cached_property
    def onset_range(self) -> tuple[float, float]:
        """Lowest and highest onset stage (NaN when no cell is reached)."""
        return _nan_range(self.result.onset_stage)

    @functools.cached_property
    def elevation_range(self) -> tuple[float, float]:
        """Lowest and highest valid ground (NaN when there is none)."""
        return _nan_range(self.dem.elevation)

    def blocks(self) -> Iterator[tuple[int, int]]:
        """One block: every row."""
        yield 0, self.dem.shape[0]

    def window(self, layer: str, r0: int, r1: int, c0: int, c1: int) -> np.ndarray:
        """A view of ``layer`` over rows ``r0:r1`` and columns ``c0:c1``."""
        if layer == "elevation":
            return self.dem.elevation[r0:r1, c0:c1]
        if layer == "onset_stage":
            return self.result.onset_stage[r0:r1, c0:c1]
        if layer == "depression_id":
            ids = self.result.depression_id[r0:r1, c0:c1]
            return np.where(np.isnan(self.result.onset_stage[r0:r1, c0:c1]),
                            np.int32(DEPRESSION_ID_NODATA), ids).astype(np.int32, copy=False)
        raise ValueError(f"unknown layer {layer!r}; a source has {', '.join(LAYERS)}")
