"""Culverts and flap valves as extra edges of the flood graph.

A Priority-Flood (Barnes, Lehman & Mulla 2014) is Dijkstra's algorithm with
``max`` in place of ``+`` on the grid graph. A culvert joins two cells that are
not neighbours: when the flood settles one end at level ``L``, the other end
``b`` may be reached at ``max(L, invert, z(b))``, exactly as a neighbour at
``max(L, z(b))`` but never below the invert. A flap valve is a culvert crossed
one way only, from its first end to its second, which makes the graph
directed; the minimax path is then taken on that directed graph.

In the tiled pipeline (:mod:`sillmark.engine.pipeline`, after Barnes 2016)
every culvert end is a seed of its tile, like a perimeter cell, and each
culvert is one more edge of the seed graph, of level ``max(invert, z(a),
z(b))`` (``z`` of the ends: every level that reaches an end is at least its
own elevation). This module holds the validated edges; the arithmetic is
done by the pipeline's steps.

References
----------
Barnes, R., Lehman, C., Mulla, D. (2014). Priority-flood: An optimal
depression-filling and watershed-labeling algorithm for digital elevation
models. Computers & Geosciences 62, 117-127. doi:10.1016/j.cageo.2013.04.024
Barnes, R. (2016). Parallel priority-flood depression filling for trillion cell
digital elevation models on desktops or clusters. Computers & Geosciences 96,
56-68. doi:10.1016/j.cageo.2016.07.001
Dijkstra, E. W. (1959). A note on two problems in connexion with graphs.
Numerische Mathematik 1, 269-271. doi:10.1007/BF01386390
"""

from __future__ import annotations

import dataclasses

import numpy as np

from sillmark.engine._tile_kernels import CULVERT
from sillmark.errors import InvalidParameter

__all__ = ["CULVERT_CODE", "CulvertEdges", "culvert_edges"]

#: Flood-tree code of a culvert end reached through its culvert: its parent is
#: the culvert's other end (:attr:`CulvertEdges.partner`).
CULVERT_CODE = CULVERT


@dataclasses.dataclass(frozen=True, eq=False)
class CulvertEdges:
    """Culverts on a grid of ``shape``: ends as flat ``row * cols + col`` indices.

    Attributes
    ----------
    shape : (int, int)
    a, b : int64 arrays
        First and last end of each culvert.
    invert : float32 array
        Level water must exceed to pass, in the DEM's vertical unit.
    one_way : bool array
        Flap valve: water passes from ``a`` to ``b`` only.
    """

    shape: tuple[int, int]
    a: np.ndarray
    b: np.ndarray
    invert: np.ndarray
    one_way: np.ndarray

    def __len__(self) -> int:
        return int(self.a.shape[0])

    @property
    def ends(self) -> np.ndarray:
        """Every end, ``a`` then ``b`` (end ``k`` of culvert ``k % n``)."""
        return np.concatenate([self.a, self.b])

    def reversed(self) -> "CulvertEdges":
        """The same culverts with their direction turned round.

        A flood on the reversed graph gives, for every cell, the lowest outlet
        level at which water standing there can leave: the drainage view of a
        flap valve, where the forward flood gives the inflow view.
        """
        return dataclasses.replace(self, a=self.b, b=self.a)

    def candidates(self, row: int, col: int) -> list[tuple[int, float]]:
        """``(other end's flat index, invert)`` of every culvert water may cross to reach
        ``(row, col)``."""
        cell = row * self.shape[1] + col
        out = []
        for k in range(len(self)):
            if self.b[k] == cell:
                out.append((int(self.a[k]), float(self.invert[k])))
            elif self.a[k] == cell and not self.one_way[k]:
                out.append((int(self.b[k]), float(self.invert[k])))
        return out

    def partner(self, row: int, col: int) -> tuple[int, int] | None:
        """The other end of the culvert a flood reached ``(row, col)`` through.

        Among culverts ending at the cell that water may cross towards it, the
        one with the lowest crossing (``None`` if no culvert ends there).
        """
        cols = self.shape[1]
        cell = row * cols + col
        best = None
        for k in range(len(self)):
            if self.b[k] == cell:
                other = int(self.a[k])
            elif self.a[k] == cell and not self.one_way[k]:
                other = int(self.b[k])
            else:
                continue
            if best is None or self.invert[k] < best[0]:
                best = (float(self.invert[k]), other)
        return None if best is None else divmod(best[1], cols)


def culvert_edges(shape, a_rows, a_cols, b_rows, b_cols, invert, one_way=None,
                  *, elevation=None) -> CulvertEdges:
    """Validated culvert edges on a grid of ``shape``.

    Parameters
    ----------
    shape : (int, int)
    a_rows, a_cols, b_rows, b_cols : int arrays
        The two ends of each culvert (water passes from ``a`` to ``b`` when
        one-way).
    invert : float array
        Finite levels, in the DEM's vertical unit.
    one_way : bool array, optional
        Default all False.
    elevation : (rows, cols) float array, optional
        If given, an end on nodata (NaN) is refused.

    Raises
    ------
    InvalidParameter
        Ends outside the grid, on nodata or equal, or a non-finite invert.
    """
    rows, cols = (int(shape[0]), int(shape[1]))
    ar, ac, br, bc = (np.asarray(v, dtype=np.int64).ravel() for v in
                      (a_rows, a_cols, b_rows, b_cols))
    inv = np.asarray(invert, dtype=np.float64).ravel()
    n = ar.shape[0]
    flags = (np.zeros(n, dtype=bool) if one_way is None
             else np.asarray(one_way, dtype=bool).ravel())
    if not all(v.shape[0] == n for v in (ac, br, bc, inv, flags)):
        raise InvalidParameter("every culvert needs both ends, an invert and a one-way flag")
    for name, r, c in (("first", ar, ac), ("last", br, bc)):
        bad = np.flatnonzero((r < 0) | (r >= rows) | (c < 0) | (c >= cols))
        if bad.size:
            raise InvalidParameter(f"culvert {int(bad[0])}: its {name} end lies outside the "
                                   f"grid of {rows} x {cols} cells")
        if elevation is not None:
            nodata = np.flatnonzero(~np.isfinite(np.asarray(elevation)[r, c]))
            if nodata.size:
                raise InvalidParameter(f"culvert {int(nodata[0])}: its {name} end is on "
                                       "nodata; move it onto ground with an elevation")
    if not np.all(np.isfinite(inv)):
        raise InvalidParameter(f"culvert {int(np.flatnonzero(~np.isfinite(inv))[0])}: its "
                               "invert must be a finite level")
    same = np.flatnonzero((ar == br) & (ac == bc))
    if same.size:
        raise InvalidParameter(f"culvert {int(same[0])}: both ends fall in one cell; a "
                               "culvert joins two different cells")
    return CulvertEdges(shape=(rows, cols), a=ar * cols + ac, b=br * cols + bc,
                        invert=inv.astype(np.float32), one_way=flags)
