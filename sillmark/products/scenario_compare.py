"""A scenario compared with the base at one outlet water level.

A *scenario* is the site's DEM with a set of edits (culverts, flap valves,
barriers, breaches; :mod:`sillmark.grid.edits`) analysed by the same
Priority-Flood as the base (Barnes, Lehman & Mulla 2014). Both give an onset
stage ``s`` per cell, and at an outlet water level ``L`` a cell is wet exactly
when ``s <= L`` (the minimax path from the outlets reaches it at or below
``L``). Comparing the two thresholds cell by cell gives four kinds of ground:

=====  ==================  =====================================
code   name                rule
=====  ==================  =====================================
0      nodata              no elevation in the DEM
1      dry in both         ``s_base > L`` and ``s_scenario > L``
2      wet in both         ``s_base <= L`` and ``s_scenario <= L``
3      newly flooded       ``s_base > L`` and ``s_scenario <= L``
4      newly protected     ``s_base <= L`` and ``s_scenario > L``
=====  ==================  =====================================

A cell no outlet reaches (onset stage NaN on valid ground) is dry at every
level. The change in onset stage of a place is ``s_scenario - s_base``:
positive means the water reaches it later (higher), negative sooner.

Everything here is pure numpy on arrays a caller gives (in memory, or memory
mapped); it reads no files and knows no web page.

References
----------
Barnes, R., Lehman, C., Mulla, D. (2014). Priority-flood: An optimal
depression-filling and watershed-labeling algorithm for digital elevation
models. Computers & Geosciences 62, 117-127. doi:10.1016/j.cageo.2013.04.024
"""

from __future__ import annotations

import dataclasses

import numpy as np

from sillmark.errors import InvalidParameter
from sillmark.products.stage import checked_level

__all__ = [
    "COMPARE_NODATA", "UNCHANGED_DRY", "UNCHANGED_WET", "NEWLY_FLOODED", "NEWLY_PROTECTED",
    "COMPARE_CODE_NAMES", "ScenarioComparison", "OnsetChanges",
    "compare_codes", "compare_at_level", "onset_changes", "depression_changes",
]

COMPARE_NODATA = 0
UNCHANGED_DRY = 1
UNCHANGED_WET = 2
NEWLY_FLOODED = 3
NEWLY_PROTECTED = 4

#: What each code of the compare raster means, as files and legends name it.
COMPARE_CODE_NAMES = {
    COMPARE_NODATA: "nodata",
    UNCHANGED_DRY: "dry in both",
    UNCHANGED_WET: "wet in both",
    NEWLY_FLOODED: "newly flooded",
    NEWLY_PROTECTED: "newly protected",
}

#: Rows compared at once by :func:`compare_at_level` (bounds its scratch memory).
BLOCK_ROWS = 1024


def _pair(base_onset, scenario_onset) -> tuple[np.ndarray, np.ndarray]:
    base = np.asarray(base_onset)
    scen = np.asarray(scenario_onset)
    if base.ndim != 2 or base.shape != scen.shape:
        raise InvalidParameter(f"the base and scenario onset stages must be grids of one shape, "
                               f"not {base.shape} and {scen.shape}")
    return base, scen


def compare_codes(base_onset, scenario_onset, level, *, valid=None, out=None) -> np.ndarray:
    """The compare code (see the module table) of every cell at outlet water level ``level``.

    Parameters
    ----------
    base_onset, scenario_onset : array
        Onset stages of the base and the scenario on one grid (any shape, e.g.
        a block of rows), NaN on nodata and on cells no outlet reaches.
    level : float
        Outlet water level, in the site's vertical unit; compared at float32,
        the precision of the onset stage.
    valid : bool array, optional
        Cells with an elevation. Default: cells whose onset stage is a number
        in either run (then valid ground no outlet reaches in either reads as
        nodata).
    out : uint8 array, optional
        Written into and returned.

    Returns
    -------
    uint8 array

    Examples
    --------
    >>> import numpy as np
    >>> compare_codes(np.array([1.0, 6.0, 2.0, 6.0, np.nan]),
    ...               np.array([1.0, 3.0, 7.0, 6.0, np.nan]), 5.0).tolist()
    [2, 3, 4, 1, 0]
    """
    base = np.asarray(base_onset)
    scen = np.asarray(scenario_onset)
    if base.shape != scen.shape:
        raise InvalidParameter(f"the base and scenario onset stages differ in shape: "
                               f"{base.shape} and {scen.shape}")
    h = checked_level(level)
    with np.errstate(invalid="ignore"):
        wet_base = base <= h  # NaN: False, dry
        wet_scen = scen <= h
    if valid is None:
        valid = ~(np.isnan(base) & np.isnan(scen))
    elif np.shape(valid) != base.shape:
        raise InvalidParameter("valid must be one flag per cell of the onset stages")
    codes = np.empty(base.shape, np.uint8) if out is None else out
    # 1 + wet_base + 2 * (wet_scen xor wet_base) gives 1, 2, 3, 4 as in the table.
    codes[...] = 1
    codes += wet_base
    codes += (wet_base != wet_scen).astype(np.uint8) * 2
    codes[~np.asarray(valid, bool)] = COMPARE_NODATA
    return codes


@dataclasses.dataclass(frozen=True)
class ScenarioComparison:
    """Newly flooded and newly protected ground at one level.

    Attributes
    ----------
    level : float
        The outlet water level (site's vertical unit).
    cells : dict
        Cell count per code name (:data:`COMPARE_CODE_NAMES`).
    area_m2 : dict
        Area per code name in m² (true cell areas per row).
    codes : uint8 array or None
        The compare code of every cell (None when not kept).
    """

    level: float
    cells: dict
    area_m2: dict
    codes: np.ndarray | None = None

    @property
    def newly_flooded_m2(self) -> float:
        return self.area_m2[COMPARE_CODE_NAMES[NEWLY_FLOODED]]

    @property
    def newly_protected_m2(self) -> float:
        return self.area_m2[COMPARE_CODE_NAMES[NEWLY_PROTECTED]]


def compare_at_level(base_onset, scenario_onset, level, *, row_areas=None, elevation=None,
                     keep_codes: bool = True) -> ScenarioComparison:
    """Compare a scenario with the base at ``level``: codes, counts and areas.

    Parameters
    ----------
    base_onset, scenario_onset : (rows, cols) arrays
        Onset stages of the base and of the scenario (memory-mapped arrays are
        read a block of rows at a time).
    level : float
        Outlet water level, site's vertical unit.
    row_areas : (rows,) array, optional
        True area of one cell in each row, in m² (default 1: areas count cells).
    elevation : (rows, cols) array, optional
        The DEM (NaN on nodata): cells with an elevation are valid, read a
        block at a time. Default as for :func:`compare_codes`.
    keep_codes : bool
        Keep the code grid in the answer (1 byte per cell); without it only
        one block of codes exists at a time.

    Returns
    -------
    ScenarioComparison

    Notes
    -----
    Memory: the code grid (1 byte per cell) when kept, plus a few bytes per
    cell of one block of :data:`BLOCK_ROWS` rows.
    """
    base, scen = _pair(base_onset, scenario_onset)
    rows = base.shape[0]
    areas = np.ones(rows, np.float64) if row_areas is None else np.asarray(row_areas, np.float64)
    if areas.shape != (rows,):
        raise InvalidParameter(f"row_areas must hold one cell area per row ({rows} values)")
    if elevation is not None and np.shape(elevation) != base.shape:
        raise InvalidParameter("the elevation must be a grid of the onset stages' shape")
    h = checked_level(level)
    codes = np.empty(base.shape, np.uint8) if keep_codes else None
    counts = np.zeros(5, np.int64)
    totals = np.zeros(5, np.float64)
    for r0 in range(0, rows, BLOCK_ROWS):
        r1 = min(rows, r0 + BLOCK_ROWS)
        block = compare_codes(base[r0:r1], scen[r0:r1], h,
                              valid=None if elevation is None else ~np.isnan(elevation[r0:r1]),
                              out=None if codes is None else codes[r0:r1])
        per_row = np.stack([np.count_nonzero(block == k, axis=1) for k in range(5)])
        counts += per_row.sum(axis=1)
        totals += per_row @ areas[r0:r1]
    names = [COMPARE_CODE_NAMES[k] for k in range(5)]
    return ScenarioComparison(
        level=float(h),
        cells={n: int(c) for n, c in zip(names, counts)},
        area_m2={n: float(a) for n, a in zip(names, totals)},
        codes=codes,
    )


@dataclasses.dataclass(frozen=True)
class OnsetChanges:
    """Onset stage of some places in the base and in the scenario.

    Attributes
    ----------
    before, after : float64 arrays
        Onset stage at each place in the base and in the scenario (NaN where
        the place has no cell, lies on nodata, or no outlet reaches it).
    change : float64 array
        ``after - before``: positive, the water reaches the place later
        (higher); negative, sooner. NaN where either is NaN.
    """

    before: np.ndarray
    after: np.ndarray
    change: np.ndarray

    def __len__(self) -> int:
        return int(self.before.shape[0])

    def states(self, level) -> tuple[np.ndarray, np.ndarray]:
        """(wet before, wet after) at ``level``: onset stage at most the level (float32)."""
        h = checked_level(level)
        with np.errstate(invalid="ignore"):
            return (self.before.astype(np.float32) <= h, self.after.astype(np.float32) <= h)


def onset_changes(base_onset, scenario_onset, rows, cols) -> OnsetChanges:
    """The onset stage at cells ``(rows[k], cols[k])`` before and after the edits.

    A negative row or column (a place not on the grid) gives NaN.

    Examples
    --------
    >>> import numpy as np
    >>> c = onset_changes(np.array([[6.0, 6.0]]), np.array([[3.0, 7.0]]), [0, 0, -1], [0, 1, 0])
    >>> c.change.tolist()[:2], bool(np.isnan(c.change[2]))
    ([-3.0, 1.0], True)
    """
    base, scen = _pair(base_onset, scenario_onset)
    r = np.asarray(rows, np.int64).ravel()
    c = np.asarray(cols, np.int64).ravel()
    if r.shape != c.shape:
        raise InvalidParameter("give one column per row")
    inside = (r >= 0) & (c >= 0) & (r < base.shape[0]) & (c < base.shape[1])
    before = np.full(r.shape, np.nan)
    after = np.full(r.shape, np.nan)
    before[inside] = base[r[inside], c[inside]]
    after[inside] = scen[r[inside], c[inside]]
    return OnsetChanges(before=before, after=after, change=after - before)


def depression_changes(depressions, base_onset, scenario_onset) -> OnsetChanges:
    """The onset stage of each base depression before and after the edits.

    A depression of the base is matched in the scenario by its lowest cell,
    its pit (``pit_row``, ``pit_col`` of the
    :class:`~sillmark.engine.depressions.DepressionTable`): edits may split,
    merge, drain or create depressions, so the scenario's own inventory need
    not hold the same depressions, but the pit is a fixed place on the ground.
    ``before`` is the base onset stage at the pit (the level at which water
    first stands in the depression from the outlets) and ``after`` the
    scenario's onset stage at the same cell.
    """
    return onset_changes(base_onset, scenario_onset, depressions.pit_row, depressions.pit_col)
