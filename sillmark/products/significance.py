"""Which depressions of a survey DEM count as depressions of their own.

A lidar or drone survey carries a few centimetres of error on every cell, so
its DEM holds a tiny closed depression almost everywhere. They stay in the
onset stage (water does fill them), but a list of depressions should hold only
those the survey can tell from its own noise. This module reads the depression
hierarchy (Barnes, Callaghan & Wickert 2020; :mod:`sillmark.products.hierarchy`)
and keeps the nodes that reach a *site minimum* of depth (and optionally of
area and volume). Every other node is listed only as part of the smallest
significant node that contains it, or of none.

Nothing is recomputed from the DEM and nothing in it is changed: depth, area
and volume are the hierarchy's own exact values, and the onset stage is the
engine's.

Definitions
-----------
A node *reaches the minimum* when its depth (``spill_elevation -
pit_elevation``), its area and its volume at its spill elevation are each at
least the site's thresholds. Those three grow from child to parent (a parent's
region holds its children's, its pit is no higher and its spill elevation no
lower), so the nodes that reach the minimum form the upper part of each tree.

A node that reaches the minimum is **significant** when it is a top, or when
its parent joins it with at least one other node that also reaches the
minimum. A node whose parent joins it only with nodes that do not reach the
minimum is the same depression, a little larger: a pool that swallows a
noise-made pit at its edge. Such a chain of nodes is listed once, by its
highest node, with the depth, area and volume at the level where it meets
another significant depression or spills. The depth of a significant node is
then the morphological *dynamic* of its pit (Grimaud 1992): how far water
rises above the pit before it reaches a deeper significant pool or spills.

References
----------
Barnes, R., Callaghan, K. L., Wickert, A. D. (2020). Computing water flow
through complex landscapes – Part 2: Finding hierarchies in depressions and
morphological segmentations. Earth Surface Dynamics 8, 431–445.
doi:10.5194/esurf-8-431-2020
Grimaud, M. (1992). A new measure of contrast: the dynamics. Proceedings of
SPIE 1769, Image Algebra and Morphological Image Processing III, 292–305.
(Recalled from memory.)
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np

from sillmark.errors import InvalidParameter
from sillmark.products import _significance_kernels
from sillmark.products.hierarchy import DepressionHierarchy
from sillmark.units import VerticalUnit

__all__ = [
    "DEFAULT_VERTICAL_ACCURACY_M",
    "DEPTH_PER_ACCURACY",
    "Significance",
    "SignificantTable",
    "SiteMinimum",
    "significance",
    "site_minimum",
]

#: Vertical accuracy assumed when the user gives none, in metres: about 0.10 m
#: (RMSE over open ground) is usual for airborne lidar. A value recalled from
#: memory, not taken from a cited standard.
DEFAULT_VERTICAL_ACCURACY_M = 0.10

#: Default minimum depth, in multiples of the vertical accuracy. A depth is the
#: difference of two surveyed elevations (spill and pit); with independent
#: errors of standard deviation ``a`` on each, it is uncertain by ``a * sqrt(2)``,
#: and a depth about two of those deep (``2.8 a``, rounded up to ``3 a``) is
#: unlikely to be noise alone. Common practice, not a published standard.
#: Independent noise alone does make a few deeper pools: on invented, nearly
#: flat 200 x 200 sites with 3 cm noise, runs made while writing this module
#: found 4 to 17 pools of 3 to 4 standard deviations each. Where the noise is
#: close to the stated accuracy, an area threshold (``min_area_m2``) removes
#: them (tests/products/test_significance.py shows it).
DEPTH_PER_ACCURACY = 3.0


@dataclasses.dataclass(frozen=True)
class SiteMinimum:
    """What a depression must reach to be listed as one of its own.

    Attributes
    ----------
    min_depth : float
        Least depth, pit to spill elevation, in the site's vertical unit.
    min_area_m2 : float
        Least plan area at the spill elevation, m² (0: no threshold).
    min_volume_m3 : float
        Least storage at the spill elevation, m³ (0: no threshold).
    vertical_accuracy : float
        The DEM's vertical accuracy (RMSE) the depth was derived from, in the
        site's vertical unit; NaN when the depth was given directly.
    unit : VerticalUnit
    """

    min_depth: float
    min_area_m2: float
    min_volume_m3: float
    vertical_accuracy: float
    unit: VerticalUnit


def site_minimum(
    *,
    vertical_accuracy: float | None = None,
    min_depth: float | None = None,
    min_area_m2: float = 0.0,
    min_volume_m3: float = 0.0,
    unit: VerticalUnit | str = VerticalUnit.METRE,
) -> SiteMinimum:
    """The site minimum, from the DEM's vertical accuracy or given outright.

    Parameters
    ----------
    vertical_accuracy : float, optional, keyword-only
        The DEM's vertical accuracy (RMSE), in ``unit``. Default
        :data:`DEFAULT_VERTICAL_ACCURACY_M` converted to ``unit``.
    min_depth : float, optional, keyword-only
        Least depth in ``unit``. Default ``DEPTH_PER_ACCURACY *
        vertical_accuracy``.
    min_area_m2, min_volume_m3 : float, keyword-only
        Least area (m²) and volume (m³); default 0, no threshold.
    unit : VerticalUnit or str, keyword-only
        The site's vertical unit (``"m"``, ``"ft"``, ``"us-ft"``).

    Returns
    -------
    SiteMinimum

    Raises
    ------
    InvalidParameter
        A value that is not a finite number, a negative one, or an accuracy of 0.

    Examples
    --------
    >>> m = site_minimum(vertical_accuracy=0.05)
    >>> round(m.min_depth, 6), m.min_area_m2
    (0.15, 0.0)
    >>> round(site_minimum(unit="ft").min_depth, 4)  # 3 x 0.10 m, in feet
    0.9843
    """
    unit = VerticalUnit.parse(unit)
    if vertical_accuracy is None:
        accuracy = DEFAULT_VERTICAL_ACCURACY_M / unit.metres
    else:
        accuracy = _amount(vertical_accuracy, "vertical accuracy")
        if accuracy == 0:
            raise InvalidParameter("the vertical accuracy must be above 0 (an RMSE, e.g. 0.10 m)")
    if min_depth is None:
        depth = DEPTH_PER_ACCURACY * accuracy
    else:
        depth = _amount(min_depth, "minimum depth")
        if vertical_accuracy is None:
            accuracy = math.nan
    return SiteMinimum(
        min_depth=depth,
        min_area_m2=_amount(min_area_m2, "minimum area (m²)"),
        min_volume_m3=_amount(min_volume_m3, "minimum volume (m³)"),
        vertical_accuracy=accuracy,
        unit=unit,
    )


@dataclasses.dataclass(frozen=True)
class SignificantTable:
    """One row per significant depression, in hierarchy (post-order) order.

    Attributes
    ----------
    id : int32
        Its hierarchy node id.
    parent : int32
        The smallest significant depression that contains it, 0 for none.
    depression : int32
        The engine (SpillResult) depression it lies in.
    pit_row, pit_col : int64
        Its lowest cell.
    pit_elevation, spill_elevation : float32
        In the site's vertical unit.
    spill_row, spill_col : int64
    spill_x, spill_y : float64
        Spill cell centre in the DEM's CRS (NaN without a transform).
    depth : float32
        ``spill_elevation - pit_elevation``.
    area_m2, volume_m3 : float64
        At the spill elevation, exact (the hierarchy's values).
    cell_count : int64
    absorbed : int64
        Hierarchy nodes below the minimum (or chained into it) listed as part
        of this depression and of no smaller significant one.
    """

    id: np.ndarray
    parent: np.ndarray
    depression: np.ndarray
    pit_row: np.ndarray
    pit_col: np.ndarray
    pit_elevation: np.ndarray
    spill_elevation: np.ndarray
    spill_row: np.ndarray
    spill_col: np.ndarray
    spill_x: np.ndarray
    spill_y: np.ndarray
    depth: np.ndarray
    area_m2: np.ndarray
    volume_m3: np.ndarray
    cell_count: np.ndarray
    absorbed: np.ndarray

    def __len__(self) -> int:
        return int(self.id.shape[0])

    @property
    def columns(self) -> tuple[str, ...]:
        return tuple(f.name for f in dataclasses.fields(self))

    def row(self, k: int) -> dict:
        """Row ``k`` (0-based) as plain Python values, NaN as None."""
        if not 0 <= int(k) < len(self):
            raise InvalidParameter(f"no row {k}; the table has {len(self)} rows")
        out = {}
        for name in self.columns:
            v = getattr(self, name)[int(k)].item()
            out[name] = None if isinstance(v, float) and math.isnan(v) else v
        return out


@dataclasses.dataclass(frozen=True, eq=False)
class Significance:
    """Which nodes of a depression hierarchy are significant, and who holds the rest.

    Attributes
    ----------
    minimum : SiteMinimum
    reaches_minimum : bool (n,)
        Per node (index ``id - 1``): depth, area and volume all reach the minimum.
    significant : bool (n,)
        Per node: listed as a depression of its own.
    node_to_significant : int32 (n + 1,)
        Indexed by node id (entry 0 is 0): the smallest significant node
        containing the node (itself if significant), 0 for none.
    depression_to_significant : int32 (n_depressions + 1,)
        Indexed by engine depression id (entry 0 is 0): the smallest
        significant node containing the whole depression, i.e. its top node
        if that is significant, else 0. ``depression_to_significant[result.depression_id]``
        is a raster of it.
    table : SignificantTable
    """

    minimum: SiteMinimum
    reaches_minimum: np.ndarray
    significant: np.ndarray
    node_to_significant: np.ndarray
    depression_to_significant: np.ndarray
    table: SignificantTable

    def __len__(self) -> int:
        return len(self.table)

    def significant_ids(self) -> np.ndarray:
        """Node ids of the significant depressions, ascending."""
        return self.table.id.copy()

    def cell_ids(self, hierarchy: DepressionHierarchy) -> np.ndarray:
        """Raster of the smallest significant depression holding each cell.

        int32 on the hierarchy's grid: the node id of the smallest significant
        depression whose region holds the cell, 0 outside every one. A cell's
        smallest node is the node that owns it in the hierarchy's region
        layout; the answer is that node's ``node_to_significant``.

        Memory: 4 bytes per cell for the raster, 8 per depression cell while
        it is built.
        """
        if not isinstance(hierarchy, DepressionHierarchy) or \
                len(hierarchy) + 1 != self.node_to_significant.shape[0]:
            raise InvalidParameter("cell_ids needs the hierarchy this significance was computed on")
        r = hierarchy.regions
        n = len(hierarchy)
        owner_of_position = np.repeat(np.arange(n + 1, dtype=np.int32), np.diff(r.start))
        rows, cols = hierarchy.shape
        out = np.zeros(rows * cols, dtype=np.int32)
        out[r.cells[r.positions]] = self.node_to_significant[owner_of_position]
        return out.reshape(rows, cols)


def significance(
    hierarchy: DepressionHierarchy, minimum: SiteMinimum | None = None
) -> Significance:
    """Significant depressions of a hierarchy, and where every other node belongs.

    Parameters
    ----------
    hierarchy : DepressionHierarchy
        From :func:`sillmark.products.hierarchy_sweep.depression_hierarchy` or
        :func:`~sillmark.products.hierarchy_sweep.site_hierarchy`.
    minimum : SiteMinimum, optional
        From :func:`site_minimum`; default ``site_minimum(unit=hierarchy.unit)``
        (the default vertical accuracy). Its unit must be the hierarchy's.

    Returns
    -------
    Significance

    Raises
    ------
    InvalidParameter
        Not a hierarchy or not a SiteMinimum, or a minimum in another vertical unit.

    Notes
    -----
    Time linear in the number of nodes: one count of the children that reach
    the minimum, then one pass over the ids from the last down (post-order
    ids put every parent after its children, so each parent is settled before
    them). Memory: a few bytes per node; nothing per cell.

    Examples
    --------
    A trench with a deep pit (0) and a shallow one (4.9) that meet over a
    saddle at 5; the trench spills at 7 into the outlet at its right end. The
    shallow pit is 0.1 deep, below a minimum depth of 0.3, so the trench is
    listed once, with its deep pit:

    >>> import numpy as np
    >>> from sillmark.engine.flood import priority_flood
    >>> from sillmark.products.hierarchy_sweep import depression_hierarchy
    >>> z = np.full((3, 7), 9, np.float32); z[1] = [9, 0, 5, 4.9, 7, 1, 9]
    >>> edge = np.zeros(z.shape, bool); edge[1, 5] = True
    >>> h = depression_hierarchy(priority_flood(z, edge))
    >>> s = significance(h, site_minimum(min_depth=0.3))
    >>> s.significant.tolist(), s.node_to_significant.tolist()
    ([False, False, True], [0, 3, 3, 3])
    >>> float(s.table.depth[0]), int(s.table.absorbed[0])
    (7.0, 2)
    """
    if not isinstance(hierarchy, DepressionHierarchy):
        raise InvalidParameter(
            f"expected a DepressionHierarchy, not {type(hierarchy).__name__}; "
            "run sillmark.products.hierarchy_sweep.depression_hierarchy first"
        )
    if minimum is None:
        minimum = site_minimum(unit=hierarchy.unit)
    if not isinstance(minimum, SiteMinimum):
        raise InvalidParameter(
            f"the minimum must come from site_minimum(), not {type(minimum).__name__}"
        )
    if minimum.unit is not hierarchy.unit:
        raise InvalidParameter(
            f"the minimum depth is in {minimum.unit.value} but the site's elevations are in "
            f"{hierarchy.unit.value}; make it with site_minimum(unit={hierarchy.unit.value!r})"
        )
    t = hierarchy.nodes
    n = len(t)
    parent = np.ascontiguousarray(t.parent, dtype=np.int32)
    ids = np.arange(1, n + 1, dtype=np.int32)
    if parent.shape != (n,) or np.any((parent != 0) & ((parent <= ids) | (parent > n))):
        raise InvalidParameter("the hierarchy's node ids are not in post-order")

    # Exact comparisons in float64 of the stored values: a depth equal to the
    # minimum reaches it.
    depth = t.spill_elevation.astype(np.float64) - t.pit_elevation.astype(np.float64)
    reaches = (
        (depth >= minimum.min_depth)
        & (t.area_m2 >= minimum.min_area_m2)
        & (t.volume_m3 >= minimum.min_volume_m3)
    )
    passing_children = np.bincount(parent[reaches], minlength=n + 1)
    significant = reaches & ((parent == 0) | (passing_children[parent] >= 2))

    node_to_sig = _significance_kernels.smallest_significant(parent, significant)

    tops = hierarchy.tops
    dep_to_sig = np.zeros(tops.shape[0] + 1, dtype=np.int32)
    dep_to_sig[1:] = node_to_sig[tops]

    sig_ids = ids[significant]
    k = sig_ids - 1
    absorbed = np.bincount(node_to_sig[1:][~significant], minlength=n + 1)[sig_ids]
    table = SignificantTable(
        id=sig_ids,
        parent=node_to_sig[parent[k]].astype(np.int32),
        depression=t.depression[k].copy(),
        pit_row=t.pit_row[k].copy(),
        pit_col=t.pit_col[k].copy(),
        pit_elevation=t.pit_elevation[k].copy(),
        spill_elevation=t.spill_elevation[k].copy(),
        spill_row=t.spill_row[k].copy(),
        spill_col=t.spill_col[k].copy(),
        spill_x=t.spill_x[k].copy(),
        spill_y=t.spill_y[k].copy(),
        depth=t.max_depth[k].copy(),
        area_m2=t.area_m2[k].copy(),
        volume_m3=t.volume_m3[k].copy(),
        cell_count=t.cell_count[k].copy(),
        absorbed=absorbed.astype(np.int64),
    )
    return Significance(
        minimum=minimum,
        reaches_minimum=reaches,
        significant=significant,
        node_to_significant=node_to_sig,
        depression_to_significant=dep_to_sig,
        table=table,
    )


def _amount(value, what: str) -> float:
    if isinstance(value, (bool, np.bool_)):
        raise InvalidParameter(f"the {what} must be a number, not {value!r}")
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise InvalidParameter(f"the {what} must be a number, not {value!r}") from None
    if not math.isfinite(v) or v < 0:
        raise InvalidParameter(f"the {what} must be a finite number, 0 or more, not {value!r}")
    return v
