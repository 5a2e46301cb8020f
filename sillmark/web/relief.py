"""The relief under the map, written block by block: hillshade and tint pyramids.

:func:`write_relief` draws the hillshade (:func:`sillmark.web.render.hillshade`)
and the elevation tint (:func:`sillmark.web.render.tint_classes`) of a DEM
into ``.npy`` files of an :class:`~sillmark.web.arrays.ArrayWriter`, one block
of rows at a time, then each coarser pyramid level from the level above it,
again by blocks. The levels are the very arrays
:func:`sillmark.web.render.shade_pyramid` makes from the whole grid:

- the hillshade of a cell needs its neighbours one row up and down (central
  differences), so each block is shaded with one row of halo on either side
  and the halo rows dropped; at the first and last row of the grid there is no
  halo and the differences are one-sided, as for the whole grid;
- a coarser level's row ``k`` is made from rows ``2k`` and ``2k + 1`` of the
  finer level alone (:func:`sillmark.web.render.halve`), so blocks of an even
  number of rows halve independently.

Memory: about 30 bytes per cell of one block (:func:`sillmark.web.arrays.block_rows`)
while shading, whatever the size of the DEM.

No Flask in this module: the analysis worker imports it.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

from sillmark.web import render
from sillmark.web.arrays import ArrayWriter, Rows, block_rows

__all__ = ["write_relief", "shaded_rows"]


def shaded_rows(read_rows: Rows, rows: int, r0: int, r1: int, *, dx_m, dy_m: float,
                z_metres: float) -> np.ndarray:
    """Hillshade of rows ``r0:r1`` of a grid of ``rows`` rows, read with one row of halo.

    Equal to ``render.hillshade(whole)[r0:r1]``; ``read_rows(a, b)`` gives rows
    ``a:b`` of the elevations and ``dx_m`` is a float or one width per row.
    """
    a, b = max(r0 - 1, 0), min(r1 + 1, rows)
    dx = dx_m[a:b] if np.ndim(dx_m) == 1 else dx_m
    shade = render.hillshade(read_rows(a, b), dx_m=dx, dy_m=dy_m, z_metres=z_metres)
    return shade[r0 - a: r1 - a]


def write_relief(writer: ArrayWriter, read_rows: Rows, shape: tuple[int, int], *, dx_m,
                 dy_m: float, z_metres: float, z_range: tuple[float, float],
                 progress: Callable[[float], None] | None = None) -> int:
    """Write ``hillshade_<k>.npy`` and ``tint_<k>.npy`` for every pyramid level; return
    how many levels each has.

    Parameters
    ----------
    writer : ArrayWriter
    read_rows : callable
        ``read_rows(a, b)``: rows ``a:b`` of the elevations (float32, NaN nodata).
    shape : (int, int)
        Rows and columns of the grid.
    dx_m, dy_m, z_metres
        As for :func:`sillmark.web.render.hillshade` (``dx_m`` per row on lon/lat grids).
    z_range : (float, float)
        Lowest and highest elevation of the site, the ends of the tint.
    progress : callable, optional
        ``progress(fraction)`` as the levels are written.
    """
    rows, cols = int(shape[0]), int(shape[1])
    step = block_rows(cols)
    z_lo, z_hi = z_range
    # The finest level carries nearly all the work (the others add a third between them).
    fine = None if progress is None else (lambda f: progress(0.75 * f))
    writer.write_rows("hillshade_0", (rows, cols), rows=step, progress=fine,
                      block=lambda r0, r1: shaded_rows(read_rows, rows, r0, r1, dx_m=dx_m,
                                                       dy_m=dy_m, z_metres=z_metres))
    writer.write_rows("tint_0", (rows, cols), rows=step,
                      block=lambda r0, r1: render.tint_classes(read_rows(r0, r1), z_lo, z_hi))
    levels = 1
    shape_k = (rows, cols)
    while render.pyramid_continues(shape_k):
        for kind in ("hillshade", "tint"):
            finer = writer.read(f"{kind}_{levels - 1}")
            half = (shape_k[0] // 2, shape_k[1] // 2)
            writer.write_rows(f"{kind}_{levels}", half, rows=max(1, block_rows(shape_k[1]) // 2),
                              block=lambda r0, r1, finer=finer: render.halve(
                                  np.asarray(finer[2 * r0: 2 * r1])))
            del finer
        shape_k = (shape_k[0] // 2, shape_k[1] // 2)
        levels += 1
        if progress is not None:
            progress(1.0 - 0.25 * 0.5 ** (levels - 1))
    return levels
