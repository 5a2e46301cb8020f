"""The depression table: one row per depression, and the flood-tree codes it refers to.

Both are plain values of the Priority-Flood (Barnes, Lehman & Mulla 2014): the
flood tree records the neighbour each cell was settled from, and every
connected region where the onset stage stands above the elevation is a
depression, with its pit, spill point and totals. The pipeline
(:mod:`sillmark.engine.pipeline`) builds the table; :mod:`sillmark.engine.flood`
re-exports everything here.

References
----------
Barnes, R., Lehman, C., Mulla, D. (2014). Priority-flood: An optimal
depression-filling and watershed-labeling algorithm for digital elevation
models. Computers & Geosciences 62, 117-127. doi:10.1016/j.cageo.2013.04.024
"""

from __future__ import annotations

import dataclasses

import numpy as np

from sillmark.engine import _flood_kernels
from sillmark.errors import InvalidParameter

#: Flood-tree code of an outlet cell (the root of the tree).
OUTLET_CODE = _flood_kernels.OUTLET
#: Flood-tree code of a nodata cell or of a cell no outlet reaches.
NO_PARENT_CODE = 0
#: Row and column steps of flood-tree codes 1..8 (NW, N, NE, W, E, SW, S, SE).
DIRECTION_ROW = np.array([-1, -1, -1, 0, 0, 1, 1, 1], dtype=np.int64)
DIRECTION_COL = np.array([-1, 0, 1, -1, 1, -1, 0, 1], dtype=np.int64)
_FOUR = np.array([1, 3, 4, 6])  # N, W, E, S among the eight directions


def directions(connectivity: int) -> np.ndarray:
    """Indices (into NW, N, NE, W, E, SW, S, SE) of the neighbours used.

    Raises
    ------
    InvalidParameter
        If ``connectivity`` is neither 4 nor 8.
    """
    if isinstance(connectivity, (bool, np.bool_)):
        raise InvalidParameter(f"connectivity must be 4 or 8, not {connectivity!r}")
    if connectivity == 8:
        return np.arange(8, dtype=np.int64)
    if connectivity == 4:
        return _FOUR.astype(np.int64)
    raise InvalidParameter(f"connectivity must be 4 or 8, not {connectivity!r}")


@dataclasses.dataclass(frozen=True)
class DepressionTable:
    """One row per depression (ids 1..n); columns are numpy arrays.

    Attributes
    ----------
    id : int32
        Depression id, as in :attr:`SpillResult.depression_id`.
    pit_row, pit_col : int64
        Lowest cell (first in row-major order on ties).
    pit_elevation : float32
        Its elevation, in the site's vertical unit.
    spill_row, spill_col : int64
        Spill point: the rim cell at the spill elevation the overflow leaves
        through (first in raster order among those one hop nearer a way out;
        see the module docstring).
    spill_x, spill_y : float64
        Spill point cell centre in the DEM's CRS (NaN without a transform).
    spill_elevation : float32
        Water level at which the depression starts to overflow.
    spills_to : int32
        Id of the depression the overflow reaches next, or 0 for an outlet (see
        the module docstring).
    max_depth : float32
        ``spill_elevation - pit_elevation``.
    cell_count : int64
    area_m2 : float64
        Plan area of the depression's cells.
    volume_m2_vu : float64
        Storage at the spill elevation, in m² times the vertical unit (sum over
        cells of area times depth). Convert with the vertical unit to m³.
    """

    id: np.ndarray
    pit_row: np.ndarray
    pit_col: np.ndarray
    pit_elevation: np.ndarray
    spill_row: np.ndarray
    spill_col: np.ndarray
    spill_x: np.ndarray
    spill_y: np.ndarray
    spill_elevation: np.ndarray
    spills_to: np.ndarray
    max_depth: np.ndarray
    cell_count: np.ndarray
    area_m2: np.ndarray
    volume_m2_vu: np.ndarray

    def __len__(self) -> int:
        return int(self.id.shape[0])

    @property
    def columns(self) -> tuple[str, ...]:
        return tuple(f.name for f in dataclasses.fields(self))

    def row(self, depression_id: int) -> dict:
        """All columns of one depression as plain Python values."""
        k = int(depression_id) - 1
        if not 0 <= k < len(self):
            raise InvalidParameter(
                f"no depression with id {depression_id}; ids run from 1 to {len(self)}"
            )
        return {name: getattr(self, name)[k].item() for name in self.columns}


def depression_table(
    *, pit_row, pit_col, pit_elevation, spill_row, spill_col, spill_elevation, spills_to,
    cell_count, area_m2, volume_m2_vu, transform=None,
) -> DepressionTable:
    """A :class:`DepressionTable` from its cell-level columns (ids 1..n in the given order).

    Fills in ``id``, ``spill_x``/``spill_y`` (cell centres through ``transform``,
    NaN without one) and ``max_depth`` (``spill_elevation - pit_elevation`` in
    float32), as the pipeline does when it joins the tiles' depression pieces.
    """
    pit_row = np.asarray(pit_row, dtype=np.int64)
    pit_col = np.asarray(pit_col, dtype=np.int64)
    spill_row = np.asarray(spill_row, dtype=np.int64)
    spill_col = np.asarray(spill_col, dtype=np.int64)
    spill_elevation = np.asarray(spill_elevation).astype(np.float32)
    n = pit_row.shape[0]
    if transform is not None:
        t = transform
        cx, cy = spill_col + 0.5, spill_row + 0.5
        spill_x = (t.a * cx + t.b * cy + t.c).astype(np.float64)
        spill_y = (t.d * cx + t.e * cy + t.f).astype(np.float64)
    else:
        spill_x = np.full(n, np.nan)
        spill_y = np.full(n, np.nan)
    pit_z = np.asarray(pit_elevation).astype(np.float32)
    return DepressionTable(
        id=np.arange(1, n + 1, dtype=np.int32),
        pit_row=pit_row,
        pit_col=pit_col,
        pit_elevation=pit_z,
        spill_row=spill_row,
        spill_col=spill_col,
        spill_x=spill_x,
        spill_y=spill_y,
        spill_elevation=spill_elevation,
        spills_to=np.asarray(spills_to).astype(np.int32),
        max_depth=(spill_elevation - pit_z).astype(np.float32),
        cell_count=np.asarray(cell_count, dtype=np.int64),
        area_m2=np.asarray(area_m2, dtype=np.float64),
        volume_m2_vu=np.asarray(volume_m2_vu, dtype=np.float64),
    )
