"""What if a controlling sill were higher? The exact answer by flooding again.

:func:`raise_sill` raises a sill on a copy of the DEM and runs the
Priority-Flood again, so the new onset stage and the sill that then controls are
exact: water may find an entirely different way in.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Iterator
from typing import TYPE_CHECKING, Any

import numpy as np
from scipy import ndimage

from sillmark.engine.flood import OUTLET_CODE, SpillResult, priority_flood
from sillmark.errors import InvalidParameter, LocationOutsideDEM
from sillmark.grid.assets import STATUS_OK, Asset, Assets
from sillmark.grid.elevations import MAX_ABS_ELEVATION
from sillmark.grid.ground import position_text
from sillmark.grid.outlets import Outlets
from sillmark.products.assets import Sill, _check_result
from sillmark.units import VerticalUnit

if TYPE_CHECKING:  # pragma: no cover
    from sillmark.grid.dem import DEM

__all__ = ["CREST_TOLERANCE", "WhatIf", "raise_sill", "raise_sills", "sill_crest", "what_if_at"]


@dataclasses.dataclass(frozen=True, eq=False)
class WhatIf:
    """The onset stage of a place if its controlling sill were raised.

    Attributes
    ----------
    name : str or None
        The asset's name, when an :class:`Asset` was given.
    row, col : int
        The place's cell.
    height : float
        How much the sill cell was raised (vertical unit).
    raised : Sill
        The cell that was raised, with its elevation *before* raising.
    raised_elevation : float
        Its elevation after raising (``raised.elevation + height`` in float32).
    own_sill : bool
        The place's own ground was the controlling point (``s == z``), so the
        raised cell is the place itself: raising it stands for raising the
        ground under the asset (a pad, a flood wall round it), not a barrier
        between it and the water.
    onset_before, onset_after : float
        Onset stage of the place now and with the raised sill.
    sill_before, sill_after : Sill
        Controlling sill now (the raised cell) and in the recomputed flood
        (``sill_after.elevation`` is in the raised DEM, so it equals ``onset_after``).
    route_before, route_after : (n, 2) int32 arrays
        ``(row, col)`` of the route from the outlet cell to the place.
    route_after_xy : (n, 2) float64 array
        Cell centres of ``route_after`` in the DEM's CRS.
    unit : VerticalUnit
    explanation : str
        One or two sentences for the user.
    result : SpillResult
        The whole recomputed flood (onset stage of every cell with the raised
        sill): about 9 bytes per cell; drop the WhatIf to free it.
    raised_cells : int
        How many cells were raised to ``raised_elevation``: the crest under the
        barrier (see :func:`sill_crest`), or 1.
    """

    name: str | None
    row: int
    col: int
    height: float
    raised: Sill
    raised_elevation: float
    own_sill: bool
    onset_before: float
    onset_after: float
    sill_before: Sill
    sill_after: Sill
    route_before: np.ndarray
    route_after: np.ndarray
    route_after_xy: np.ndarray
    unit: VerticalUnit
    explanation: str
    result: SpillResult
    raised_cells: int = 1

    @property
    def gain(self) -> float:
        """``onset_after - onset_before``: between 0 and ``height``."""
        return float(np.float32(self.onset_after) - np.float32(self.onset_before))

    @property
    def raised_cell_controls(self) -> bool:
        """The raised cell is still the controlling sill."""
        return (self.sill_after.row, self.sill_after.col) == (self.raised.row, self.raised.col)

    @property
    def changed(self) -> bool:
        """The onset stage rose."""
        return self.onset_after != self.onset_before


def raise_sill(
    dem: "DEM",
    outlets_mask: "Outlets | np.ndarray",
    result: SpillResult,
    asset_or_cell: Any,
    height: Any,
    *,
    connectivity: int | None = None,
    across_crest: bool = True,
) -> WhatIf:
    """The onset stage a place would have if its controlling sill were raised by ``height``.

    The sill cell is raised on a copy of the DEM and the Priority-Flood is run
    again on the whole grid, so the answer is exact: water may come another way,
    and the sill that then controls may lie anywhere on the site.

    Parameters
    ----------
    dem : DEM
    outlets_mask : Outlets or (rows, cols) bool array
        The outlets ``result`` was computed with.
    result : SpillResult
        The flood of ``dem`` with these outlets.
    asset_or_cell : Asset or (row, col)
        The place: an :class:`Asset` with status ``"ok"``, or a cell.
    height : float
        How much to raise the sill, in the DEM's vertical unit; > 0.
    connectivity : {8, 4}, optional, keyword-only
        Must match ``result.connectivity`` (the default).
    across_crest : bool, keyword-only
        Raise the whole crest (default), as a barrier across a notch would:
        the sill cell and the connected ground at most
        :data:`CREST_TOLERANCE` above it (:func:`sill_crest`) are all raised to
        the sill's elevation plus ``height``. With False only the sill cell is
        raised, and on a flat notch the water then goes round it. A place that
        is its own controlling point has only its cell raised.

    Returns
    -------
    WhatIf

    Raises
    ------
    InvalidParameter
        ``height`` is not a positive finite number or too small to change the
        float32 elevation; ``connectivity`` differs from the result's; the
        result or outlets do not belong together.
    LocationOutsideDEM
        The place is outside the grid, on nodata, or reached by no outlet.

    Notes
    -----
    Raising one cell by ``height`` lifts the highest cell of every path through
    it by at most ``height`` and lowers none, so
    ``onset_before <= onset_after <= onset_before + height``. When the sill lies
    on a flat stretch (neighbouring cells at the same elevation) the water goes
    round the raised cell and nothing changes; the result then names the
    neighbour that now controls, at the same elevation. When the place is its
    own controlling point (``s == z``), every path ends on its cell, so the
    onset stage rises by exactly ``height`` (to float32 rounding).

    Cost: a copy of the elevation (4 bytes per cell) and a full flood (9 bytes
    per cell in the result, about 0.5 s for 3 million cells).
    """
    mask = outlets_mask.mask if isinstance(outlets_mask, Outlets) else np.asarray(outlets_mask)
    _check_result(dem, result)
    conn = result.connectivity if connectivity is None else connectivity
    if isinstance(conn, bool) or conn not in (4, 8):
        raise InvalidParameter(f"connectivity must be 8 or 4, not {connectivity!r}")
    if conn != result.connectivity:
        raise InvalidParameter(
            f"connectivity {conn} differs from the result's ({result.connectivity}); "
            "compare like with like: omit connectivity or recompute the result"
        )
    if mask.shape != dem.shape or mask.dtype != np.bool_:
        raise InvalidParameter(
            f"outlets_mask must be a bool array of the DEM's shape {dem.shape}, "
            f"not {mask.dtype} {mask.shape}"
        )
    if not np.array_equal(result.flood_tree == OUTLET_CODE, mask & dem.valid):
        raise InvalidParameter(
            "the outlets differ from those the result was computed with; pass the same outlets"
        )
    name, r, c = _target(asset_or_cell)
    h = _height(height)
    before = result.route(r, c)  # LocationOutsideDEM off the grid, on nodata, unreached
    sr, sc = before.sill_row, before.sill_col
    old = dem.elevation[sr, sc]
    new = np.float32(np.float64(old) + h)
    if not np.isfinite(new):
        raise InvalidParameter(f"raising {float(old):g} by {h:g} exceeds the range a DEM can hold")
    if new == old:
        raise InvalidParameter(
            f"a height of {h:g} is below the precision of the elevation {float(old):g} "
            "(float32); give a larger height"
        )
    z = np.array(dem.elevation, dtype=np.float32, copy=True)
    own = (sr, sc) == (r, c)
    crest_r, crest_c = (
        sill_crest(result, sr, sc, new) if across_crest and not own
        else (np.array([sr]), np.array([sc]))
    )
    z[crest_r, crest_c] = new  # a barrier with its top at the raised sill's level
    # Read-only like DEM.elevation, so the compiled kernels take the same
    # specialisation analyse_site() already used (no second compilation).
    z.flags.writeable = False
    # The same culverts as the flood before (a folder analysed with edits).
    after = priority_flood(z, mask, connectivity=conn, row_areas=dem.row_areas, transform=dem.transform,
                           culverts=result.culverts)
    return _read_what_if(
        dem, result, after, name, r, c, before, float(old), float(new), h, len(crest_r)
    )


#: How far above the sill's own elevation ground still counts as the same crest,
#: in the site's vertical unit: lidar DEMs carry noise of about a decimetre
#: (common practice), so a notch floor is seldom exactly level.
CREST_TOLERANCE = 0.10


def sill_crest(
    result: SpillResult, row: int, col: int, top: float, *, tolerance: float = CREST_TOLERANCE
) -> tuple[np.ndarray, np.ndarray]:
    """Cells a barrier must cover to raise sill ``(row, col)`` to ``top``.

    The crest is the sill cell and every cell connected to it (under the
    result's connectivity), outside any depression, whose ground lies at the
    sill's elevation or at most ``tolerance`` above it (and below ``top``): the
    floor of a notch or a road low spot. Ground below the sill (either side of
    it) and higher parts of the rim are not part of it, so raising a notch
    above the rest of the rim shows which sill controls next.
    """

    z = result.elevation
    floor = z[row, col]
    ceiling = min(float(top), float(floor) + float(tolerance))
    with np.errstate(invalid="ignore"):
        band = (z >= floor) & (z <= np.float32(ceiling)) & (z < np.float32(top))
    band &= result.depression_id == 0
    band[row, col] = True
    structure = np.ones((3, 3), bool) if result.connectivity == 8 else None
    parts, _ = ndimage.label(band, structure=structure)
    rows, cols = np.nonzero(parts == parts[row, col])
    return rows.astype(np.int64), cols.astype(np.int64)


def _read_what_if(
    dem: "DEM", result: SpillResult, after: SpillResult, name: str | None, r: int, c: int,
    before: Any, old: float, new: float, h: float, raised_cells: int = 1,
) -> WhatIf:
    """The :class:`WhatIf` of place ``(r, c)`` from the flood ``after`` with its sill raised."""
    sr, sc = before.sill_row, before.sill_col
    route = after.route(r, c)
    unit = VerticalUnit.parse(dem.vertical_unit)

    def sill(row: int, col: int, elevation: float) -> Sill:
        x, y = dem.xy(row, col)
        return Sill(int(row), int(col), x, y, float(elevation))

    raised = sill(sr, sc, old)
    sill_after = sill(route.sill_row, route.sill_col, route.sill_elevation)
    onset_before = float(result.onset_stage[r, c])
    onset_after = float(after.onset_stage[r, c])
    own = (sr, sc) == (r, c)
    cells_after = np.column_stack([route.rows[::-1], route.cols[::-1]]).astype(np.int32)
    xa, ya = dem.xy(cells_after[:, 0], cells_after[:, 1])
    return WhatIf(
        name=name,
        row=r,
        col=c,
        height=h,
        raised=raised,
        raised_elevation=new,
        own_sill=own,
        onset_before=onset_before,
        onset_after=onset_after,
        sill_before=raised,
        sill_after=sill_after,
        route_before=np.column_stack([before.rows[::-1], before.cols[::-1]]).astype(np.int32),
        route_after=cells_after,
        route_after_xy=np.column_stack([xa, ya]),
        unit=unit,
        explanation=_explain(
            raised, new, h, own, onset_before, onset_after, sill_after, unit, raised_cells,
            where=lambda s: position_text(dem, s.x, s.y),
        ),
        result=after,
        raised_cells=raised_cells,
    )


def what_if_at(what_if: WhatIf, dem: "DEM", result: SpillResult, asset_or_cell: Any) -> WhatIf:
    """The raised sill of ``what_if`` read at another place it controls: no second flood.

    Places behind one sill share its what-if: the raised DEM is the same, so
    its flood (``what_if.result``) answers for all of them. The returned
    :class:`WhatIf` shares that result.

    Parameters
    ----------
    what_if : WhatIf
        From :func:`raise_sill` on ``dem`` and ``result``.
    dem : DEM
    result : SpillResult
        The flood ``what_if`` was computed from (before raising).
    asset_or_cell : Asset or (row, col)
        A place whose controlling sill in ``result`` is the cell ``what_if`` raised.

    Raises
    ------
    InvalidParameter
        ``what_if`` is not a WhatIf of this DEM, or the place's controlling
        sill is another cell (run :func:`raise_sill` for it).
    LocationOutsideDEM
        The place is outside the grid, on nodata, or reached by no outlet.
    """
    if not isinstance(what_if, WhatIf):
        raise InvalidParameter(f"expected a WhatIf from raise_sill(), not {type(what_if).__name__}")
    _check_result(dem, result)
    if what_if.result.elevation.shape != dem.shape:
        raise InvalidParameter("the what-if was computed on another grid; run raise_sill() on this DEM")
    name, r, c = _target(asset_or_cell)
    before = result.route(r, c)
    cell = (before.sill_row, before.sill_col)
    if cell != (what_if.raised.row, what_if.raised.col):
        raise InvalidParameter(
            f"the controlling sill of the place at row {r}, col {c} is the cell at row {cell[0]}, "
            f"col {cell[1]}, not the raised cell at row {what_if.raised.row}, col "
            f"{what_if.raised.col}; run raise_sill() for it"
        )
    return _read_what_if(
        dem, result, what_if.result, name, r, c, before, what_if.raised.elevation,
        what_if.raised_elevation, what_if.height, what_if.raised_cells,
    )


def raise_sills(
    dem: "DEM",
    outlets_mask: "Outlets | np.ndarray",
    result: SpillResult,
    assets: Assets,
    height: Any,
) -> Iterator[tuple[int, WhatIf]]:
    """:func:`raise_sill` for every asset behind a sill, one flood per distinct sill cell.

    Assets whose controlling sill is their own cell (no sill between them and
    the water), and assets without figures (outside the DEM, on nodata, not
    reached), are passed over. The others are grouped by their controlling
    sill cell, in the order each sill is first met; for each group the sill is
    raised and the site flooded once (:func:`raise_sill`), and every asset of
    the group read from that flood (:func:`what_if_at`).

    Yields
    ------
    (int, WhatIf)
        The asset's 0-based index in ``assets`` and its what-if, group by group.

    Notes
    -----
    Each group's flood is held only while its what-ifs are (about 9 bytes per
    cell): consume them one group at a time and keep what you need, not the
    WhatIf objects, to free it. ``height`` is checked before any flood is run.
    """
    if not isinstance(assets, Assets):
        raise InvalidParameter(f"assets must come from read_assets(), not {type(assets).__name__}")
    _check_result(dem, result)
    _height(height)
    groups: dict[tuple[int, int], list[int]] = {}
    for k, a in enumerate(assets):
        if a.status != STATUS_OK or result.flood_tree[a.row, a.col] == 0:
            continue
        route = result.route(a.row, a.col)
        cell = (int(route.sill_row), int(route.sill_col))
        if cell == (a.row, a.col):
            continue
        groups.setdefault(cell, []).append(k)
    for members in groups.values():
        first = raise_sill(dem, outlets_mask, result, assets[members[0]], height)
        yield members[0], first
        for k in members[1:]:
            yield k, what_if_at(first, dem, result, assets[k])
        del first


def _target(asset_or_cell: Any) -> tuple[str | None, int, int]:
    if isinstance(asset_or_cell, Asset):
        a = asset_or_cell
        if a.status != STATUS_OK:
            raise LocationOutsideDEM(
                f"the asset {a.name!r} is {a.status}, so it has no controlling sill; "
                "pick an asset on the DEM's data"
            )
        return a.name, a.row, a.col
    try:
        r, c = asset_or_cell
        ok = all(isinstance(v, (int, np.integer)) and not isinstance(v, bool) for v in (r, c))
    except (TypeError, ValueError):
        ok = False
    if not ok:
        raise InvalidParameter(
            f"give an Asset from read_assets() or a (row, col) cell, not {asset_or_cell!r}"
        )
    return None, int(r), int(c)


def _height(height: Any) -> float:
    if isinstance(height, bool):
        raise InvalidParameter(f"the height must be a number, not {height!r}")
    try:
        h = float(height)
    except (TypeError, ValueError):
        raise InvalidParameter(f"the height must be a number, not {height!r}") from None
    if not math.isfinite(h) or h <= 0:
        raise InvalidParameter(
            f"the height must be a positive finite number (how much to raise the sill), not {height!r}"
        )
    if h > MAX_ABS_ELEVATION:
        raise InvalidParameter(
            f"the height {h:g} is more than any sill could be raised by (at most "
            f"{MAX_ABS_ELEVATION:g} in the site's vertical unit); give the height of the works"
        )
    return h


def _explain(
    raised: Sill, new: float, height: float, own: bool, before: float, after: float,
    sill_after: Sill, unit: VerticalUnit, raised_cells: int = 1, *, where,
) -> str:
    """The what-if in words; ``where(sill)`` names a sill's position (coordinates, never cells)."""
    u = unit.symbol
    at = where(raised)
    if own:
        return (
            f"The asset's own ground ({before:.2f} {u}) is its controlling point: no sill "
            f"stands between it and the water, so there is no barrier to raise. Raising "
            f"its own cell by {height:.2f} {u} (a pad or a wall round it) makes its onset "
            f"stage {after:.2f} {u}."
        )
    what = "the controlling sill" if raised_cells == 1 else (
        f"the crest of the controlling sill ({raised_cells} cells)"
    )
    head = f"Raising {what} at {at} from {raised.elevation:.2f} to {new:.2f} {u}"
    there = where(sill_after)
    if after == before:
        return (
            f"{head} changes nothing: the water goes round it over the cell at {there}, "
            f"at the same elevation ({after:.2f} {u}), which now controls."
        )
    if (sill_after.row, sill_after.col) == (raised.row, raised.col):
        return (
            f"{head} lifts the onset stage from {before:.2f} to {after:.2f} {u}; "
            "the raised cell still controls."
        )
    return (
        f"{head} lifts the onset stage from {before:.2f} to {after:.2f} {u}; the water then "
        f"comes over the sill at {there} ({sill_after.elevation:.2f} {u}), which now controls."
    )
