"""Where the tiles' rasters live between the steps of the pipeline.

Every tile step of :mod:`sillmark.engine.pipeline` keeps four arrays per tile
in a *store*: ``"z"`` (the tile's elevations, ``h x w``) and the tile's own
padded ``"level"``, ``"state"`` and ``"label"`` (flat, ``(h + 2) * (w + 2)``,
the layout of :mod:`sillmark.engine._tile_kernels`). A store has three methods:

- ``put(k, name, array)`` and ``get(k, name)``: one tile's array, whole;
- ``rows(k, name, a0, a1, w)``: rows ``a0:a1`` (tile-local) of it, without the
  padding, as a ``(a1 - a0) x w`` array; layers of the whole grid are read
  this way, a band of rows at a time;
- ``start(plan)`` before the first tile, ``whole(name)`` (the whole padded
  grid, if the store holds one) and ``close()``.

:class:`MemoryStore` keeps the tiles in whole-grid arrays, so the layers of
the result are views of them, not copies. :class:`FileStore` keeps
them as ``.npy`` files in a scratch folder, which every worker of a cluster
must be able to reach; it reads just the rows asked for. Either way the
pipeline's arithmetic is the same, so the results are the same bits
(Barnes 2016 keeps tiles on disk the same way for grids larger than memory).

References
----------
Barnes, R. (2016). Parallel priority-flood depression filling for trillion cell
digital elevation models on desktops or clusters. Computers & Geosciences 96,
56-68. doi:10.1016/j.cageo.2016.07.001
"""

from __future__ import annotations

import os
import shutil
import uuid
from pathlib import Path
from typing import Protocol

import numpy as np

__all__ = ["FileStore", "MemoryStore", "TileStore"]

#: Names of the arrays kept per tile; all but ``"z"`` are padded by one cell.
TILE_ARRAYS = ("z", "level", "state", "label")
_SCRATCH_PREFIX = ".sillmark-tiles-"


class TileStore(Protocol):
    """Where tile arrays live: ``put``, ``get``, ``rows``, ``close``."""

    #: Rows of the whole grid worth reading at once (None: all of them).
    block_rows: int | None

    def start(self, plan) -> None: ...

    def put(self, k: int, name: str, array: np.ndarray) -> None: ...

    def whole(self, name: str) -> np.ndarray | None: ...

    def get(self, k: int, name: str) -> np.ndarray: ...

    def rows(self, k: int, name: str, a0: int, a1: int, w: int) -> np.ndarray: ...

    def close(self) -> None: ...


class MemoryStore:
    """Tile arrays held in this process, in three whole-grid arrays.

    :meth:`start` allocates the level, state and label of the whole grid,
    padded by one cell (``(rows + 2) x (cols + 2)``); a tile put is copied
    into its place there and a tile got is copied out of it (with the padding
    a freshly flooded tile has: NaN, blocked, -1), so only the tiles in flight
    exist twice. The layers of the whole grid are then views of these arrays
    (:meth:`whole`), never copies; a tile's elevations are kept as the view
    given. For the engine on threads or in one process; it does not travel
    to other processes.

    Notes
    -----
    Memory: 9 bytes per cell of the padded grid, plus 9 bytes per cell of
    each tile being worked on.
    """

    block_rows = None
    _PAD = {"level": np.nan, "state": 255, "label": -1}
    _DTYPE = {"level": np.float32, "state": np.uint8, "label": np.int32}

    def __init__(self) -> None:
        self._plan = None
        self._grids: dict[str, np.ndarray] = {}
        self._z: dict[int, np.ndarray] = {}

    def start(self, plan) -> None:
        """Make room for the tiles of ``plan`` (a :class:`sillmark.engine.plan.TilePlan`)."""
        self._plan = plan
        shape = (plan.rows + 2, plan.cols + 2)
        self._grids = {name: np.full(shape, self._PAD[name], dtype=self._DTYPE[name])
                       for name in self._PAD}
        self._z = {}

    def _region(self, k: int, name: str) -> np.ndarray:
        r0, r1, c0, c1 = self._plan.bounds(k)
        return self._grids[name][r0 + 1:r1 + 1, c0 + 1:c1 + 1]

    def put(self, k: int, name: str, array: np.ndarray) -> None:
        if name == "z":
            self._z[k] = array
            return
        region = self._region(k, name)
        h, w = region.shape
        region[...] = array.reshape(h + 2, w + 2)[1:-1, 1:-1]

    def get(self, k: int, name: str) -> np.ndarray:
        if name == "z":
            return self._z[k]
        region = self._region(k, name)
        h, w = region.shape
        out = np.full((h + 2, w + 2), self._PAD[name], dtype=self._DTYPE[name])
        out[1:-1, 1:-1] = region
        return out.reshape(-1)

    def rows(self, k: int, name: str, a0: int, a1: int, w: int) -> np.ndarray:
        if name == "z":
            return self._z[k][a0:a1]
        return self._region(k, name)[a0:a1]

    def whole(self, name: str) -> np.ndarray | None:
        """The padded whole-grid array of ``"level"``, ``"state"`` or ``"label"`` itself."""
        return self._grids.get(name)

    def close(self) -> None:
        """Let go of the arrays (views taken of them stay valid)."""
        self._grids = {}
        self._z = {}

    def __getstate__(self):
        raise TypeError("a MemoryStore stays in its process; use a FileStore on a cluster")


class FileStore:
    """Tile arrays as ``.npy`` files in a new scratch folder inside ``folder``.

    The store pickles small (its folder name), so cluster tasks can use it;
    every worker must be able to read and write the folder. :meth:`close`
    removes the scratch folder.

    Notes
    -----
    Disk: 13 bytes per cell (elevation, level, state, label) while the run
    lasts. :meth:`rows` reads with plain reads, no memory map, so the pages
    stay in the page cache and out of the reader's resident memory.
    """

    #: Rows read at once when a layer is read across the grid.
    block_rows = 512

    def __init__(self, folder: str | os.PathLike) -> None:
        path = Path(folder) / f"{_SCRATCH_PREFIX}{uuid.uuid4().hex[:12]}"
        path.mkdir(parents=True)
        self.folder = str(path)
        self._layout: dict[tuple[int, str], tuple[int, np.dtype]] = {}

    def start(self, plan) -> None:
        """Nothing to prepare: each tile is a file of its own."""

    def whole(self, name: str) -> None:
        """No whole-grid arrays: layers are read by rows."""
        return None

    def __getstate__(self):
        return {"folder": self.folder}

    def __setstate__(self, state) -> None:
        self.folder = state["folder"]
        self._layout = {}

    def _path(self, k: int, name: str) -> str:
        return os.path.join(self.folder, f"tile{k:06d}_{name}.npy")

    def put(self, k: int, name: str, array: np.ndarray) -> None:
        with open(self._path(k, name), "wb") as f:
            np.save(f, array, allow_pickle=False)
        self._layout.pop((k, name), None)

    def get(self, k: int, name: str) -> np.ndarray:
        return np.load(self._path(k, name), allow_pickle=False)

    def rows(self, k: int, name: str, a0: int, a1: int, w: int) -> np.ndarray:
        path = self._path(k, name)
        key = (k, name)
        if key not in self._layout:
            with open(path, "rb") as f:
                version = np.lib.format.read_magic(f)
                read_header = (np.lib.format.read_array_header_1_0 if version == (1, 0)
                               else np.lib.format.read_array_header_2_0)
                _, _, dtype = read_header(f)
                self._layout[key] = (f.tell(), np.dtype(dtype))
        offset, dtype = self._layout[key]
        padded = name != "z"
        lw = w + 2 if padded else w
        first = a0 + 1 if padded else a0
        with open(path, "rb") as f:
            f.seek(offset + first * lw * dtype.itemsize)
            data = np.fromfile(f, dtype=dtype, count=(a1 - a0) * lw).reshape(a1 - a0, lw)
        return data[:, 1:-1] if padded else data

    def close(self) -> None:
        shutil.rmtree(self.folder, ignore_errors=True)
