"""The Priority-Flood pipeline, written once: flood tiles, solve, finish, join, total.

The onset stage of every cell (the minimax path elevation from the outlets)
is computed by a Priority-Flood (Barnes, Lehman & Mulla 2014) cut into square
tiles after Barnes (2016), whatever runs the tiles and wherever they are kept:

1. **Flood each tile** (:func:`flood_step`, one item per tile). The tile's
   elevations and outlets come from a *source* (:class:`ArrayTiles`: arrays
   in memory; :class:`RasterTiles`: a DEM file read window by window, its
   outlets marked per window). The tile is flooded from its own perimeter,
   every perimeter cell a seed with a label of its own; its arrays go to the
   store, and back comes a :class:`FloodedTile`: the seed count, the label
   meetings and the perimeter (state, level, label of each perimeter cell).
2. **Solve the seed graph** (:func:`solve_seeds`, here). The links between
   touching perimeter cells of neighbouring tiles, then one minimax Dijkstra
   over seeds, meetings and links give every seed the level it is held to.
3. **Finish each tile** (:func:`finish_step`, one :class:`SeedLevels` per
   tile): ``s = max(sl, lam[label])``, the seeds' parents, the tile's pieces
   of depressions and its spill summary
   (:func:`sillmark.engine._spill_kernels.summarise_tile`); back comes a
   :class:`FinishedTile`.
4. **Join the pieces** (:func:`~sillmark.engine.joining.join_pieces`): pieces that touch across
   tile edges are one depression, numbered in raster order of its first cell;
   pits; spill points and ``spills_to`` by the rule of
   :mod:`sillmark.engine.flood` ("Spill points").
5. **Totals**: every depression's cell count, area and volume, added cell by
   cell in raster order over bands of rows read from the store.

Steps 1 and 3 go through an executor (:mod:`sillmark.engine.executors`), the
tile arrays through a store (:mod:`sillmark.engine.stores`); the steps and the
messages between them (:mod:`sillmark.engine.messages`: no raster) do not depend on
either, so every executor and store gives the same bits. The result,
:class:`TiledFlood`, reads its layers by bands of rows from the store.

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
import functools
import time
from collections.abc import Callable
from typing import Any

import numpy as np

from sillmark.engine import _spill_kernels, _tile_kernels, _tiled_kernels
from sillmark.engine.depressions import (
    DIRECTION_COL,
    DIRECTION_ROW,
    DepressionTable,
    depression_table,
    directions,
)
from sillmark.engine.executors import Executor
from sillmark.engine.joining import join_pieces
from sillmark.engine.messages import (
    FinishedTile,
    FloodedTile,
    JoinedDepressions,
    SeedLevels,
    TileJob,
    ends_in_tile,
)
from sillmark.engine.plan import TilePlan
from sillmark.engine.stores import TileStore
from sillmark.engine.tile_inputs import ArrayTiles, RasterTiles, TileInput  # noqa: F401
from sillmark.errors import InvalidDEM

__all__ = ["ArrayTiles", "RasterTiles", "TiledFlood", "run_pipeline"]

#: ``progress(step, done, total)``; steps are "flood", "graph", "finish", "join", "totals".
Progress = Callable[[str, int, int], None]
#: Layers a :class:`TiledFlood` reads by rows.
LAYERS = ("elevation", "onset_stage", "fill_depth", "depression_id", "flood_tree")


# --------------------------------------------------------------------------- tile steps


def flood_step(job: TileJob, k: int) -> FloodedTile:
    """Step 1 for tile ``k``: read, flood from the perimeter, keep the arrays."""
    started = time.perf_counter()
    plan = job.plan
    r0, r1, c0, c1 = plan.bounds(k)
    w = c1 - c0
    tile = job.source.window(r0, r1, c0, c1)
    end_index, end_local = ends_in_tile(job.culverts, plan, k)
    lz, lstate, llab, seeds, ea, eb, elevel, la, lb, pops = _tile_kernels.flood_tile_arrays(
        tile.z, tile.mask, np.int64(tile.r0), np.int64(tile.r1), np.int64(tile.c0),
        np.int64(tile.c1), DIRECTION_ROW, DIRECTION_COL, directions(job.connectivity),
        end_local,
    )
    z = tile.tile_z
    store = job.store
    store.put(k, "z", z)
    store.put(k, "level", lz)
    store.put(k, "state", lstate)
    store.put(k, "label", llab)
    lw = w + 2
    width = plan.cols + 2
    pidx = plan.perimeter(k)
    if tile.outlet_counts is None:  # arrays the caller has checked: nothing to count
        outlet_cells = valid_cells = 0
    else:  # a window of a file: its outlets lie on valid data already
        outlet_cells = int(np.count_nonzero(tile.mask))
        valid_cells = int(np.count_nonzero(~np.isnan(z)))
    return FloodedTile(
        n_seeds=int(seeds.shape[0] - 1), meet_a=ea, meet_b=eb, meet_level=elevel,
        meet_cell_a=(r0 + la // lw) * width + c0 + la % lw,
        meet_cell_b=(r0 + lb // lw) * width + c0 + lb % lw,
        perimeter_state=lstate[pidx], perimeter_level=lz[pidx], perimeter_label=llab[pidx],
        heap_pops=int(pops), outlet_counts=tile.outlet_counts,
        outlet_cells=outlet_cells, valid_cells=valid_cells,
        seconds=time.perf_counter() - started, end_index=end_index,
        end_label=llab[end_local].copy(), end_level=lz[end_local].copy(),
    )


def finish_step(job: TileJob, seeds: SeedLevels) -> FinishedTile:
    """Step 3 for one tile: final level and tree, pieces of depressions, spill summary."""
    started = time.perf_counter()
    plan, store, k = job.plan, job.store, seeds.k
    r0, r1, c0, c1 = plan.bounds(k)
    h, w = r1 - r0, c1 - c0
    lw = w + 2
    cols = plan.cols
    z = store.get(k, "z")
    lz = store.get(k, "level")
    lstate = store.get(k, "state")
    llab = store.get(k, "label")
    pidx = plan.perimeter(k)
    on_seed = lstate[pidx] == _tile_kernels.SEED
    seed_cells = np.zeros(seeds.lam.shape[0], dtype=np.int64)
    seed_cells[llab[pidx[on_seed]]] = pidx[on_seed]
    end_index, end_local = ends_in_tile(job.culverts, plan, k)
    on_end = lstate[end_local] == _tile_kernels.SEED  # culvert ends inside the tile
    seed_cells[llab[end_local[on_end]]] = end_local[on_end]
    _tile_kernels.finish_tile(
        np.int64(0), np.int64(h), np.int64(0), np.int64(w), lz, lstate, llab, np.int64(0),
        seeds.lam, seed_cells, seeds.own, seeds.other, DIRECTION_ROW, DIRECTION_COL,
        np.int64(lw), seeds.by_culvert,
    )
    dirs = directions(job.connectivity)
    steps = DIRECTION_ROW[dirs] * lw + DIRECTION_COL[dirs]
    back = steps[steps < 0].astype(np.int64)
    first, pit_cell, pit_z, piece_level, _count, valid, unreached = _tiled_kernels.label_tile(
        lz, lstate, llab, z, np.int64(h), np.int64(w), back
    )
    end_piece, end_level = llab[end_local].copy(), lz[end_local].copy()
    store.put(k, "level", lz)
    store.put(k, "state", lstate)
    p_piece = llab[pidx]
    p_outlet = lstate[pidx] == _tile_kernels.OUTLET
    # The spill summary marks dry areas in llab with negative numbers; cleared after.
    offs = (DIRECTION_ROW[dirs] * lw + DIRECTION_COL[dirs]).astype(np.int64)
    spill = _spill_kernels.summarise_tile(
        lz, lstate, llab, np.int64(h), np.int64(w), offs, dirs, np.int64(len(first) - 1), True,
        pidx.astype(np.int64), np.int64(r0), np.int64(c0), np.int64(cols),
    )
    np.maximum(llab, 0, out=llab)
    store.put(k, "label", llab)

    def to_global(li: np.ndarray) -> np.ndarray:
        return (r0 + li // lw - 1) * cols + (c0 + li % lw - 1)

    return FinishedTile(
        first=to_global(first[1:]), pit=to_global(pit_cell[1:]), pit_z=pit_z[1:],
        level=piece_level[1:], perimeter_level=lz[pidx], perimeter_piece=p_piece,
        perimeter_outlet=p_outlet, spill=spill, valid_cells=int(valid),
        unreached_cells=int(unreached), seconds=time.perf_counter() - started,
        end_index=end_index, end_piece=end_piece, end_level=end_level,
    )


# --------------------------------------------------------------------------- client steps


def solve_seeds(plan: TilePlan, floods: list[FloodedTile], dirs: np.ndarray,
                culverts=None) -> list[SeedLevels]:
    """Step 2: links from the perimeters, then the minimax Dijkstra over the seed graph.

    Each culvert is one more edge, between the seeds (or the sea) at its ends,
    of level ``max(invert, z(a), z(b))``; a flap valve's edge is one-way
    (:mod:`sillmark.engine.culverts`).
    """
    rows, cols = plan.shape
    seed_counts = np.array([f.n_seeds for f in floods], dtype=np.int64)
    base = np.concatenate([[0], np.cumsum(seed_counts)[:-1]]).astype(np.int64)
    n_nodes = int(seed_counts.sum()) + 1
    poff = np.concatenate(
        [[0], np.cumsum([len(f.perimeter_state) for f in floods])]).astype(np.int64)
    parts = [_tiled_kernels.perimeter_links(
        np.concatenate([f.perimeter_state for f in floods]),
        np.concatenate([f.perimeter_level for f in floods]),
        np.concatenate([f.perimeter_label for f in floods]),
        poff, base, np.int64(plan.tile_rows), np.int64(plan.tile_cols), np.int64(plan.tile),
        np.int64(rows), np.int64(cols), np.int64(cols + 2), DIRECTION_ROW, DIRECTION_COL, dirs,
    )]
    for t, f in enumerate(floods):
        eu = np.where(f.meet_a == 0, 0, base[t] + f.meet_a)
        ev = np.where(f.meet_b == 0, 0, base[t] + f.meet_b)
        parts.append((eu, ev, f.meet_level, f.meet_cell_a, f.meet_cell_b))
    eu, ev, elevel, ecu, ecv = (np.concatenate([p[k] for p in parts]) for k in range(5))
    n_plain = eu.shape[0]
    one_way = np.zeros(n_plain, dtype=np.bool_)
    if culverts is not None and len(culverts):
        ceu, cev, clevel, ccu, ccv, cway = _culvert_links(plan, floods, base, culverts)
        eu, ev, elevel, ecu, ecv = (np.concatenate([x, y]) for x, y in (
            (eu, ceu), (ev, cev), (elevel, clevel), (ecu, ccu), (ecv, ccv)))
        one_way = np.concatenate([one_way, cway])
    lam, own, other, via = _tile_kernels.solve_graph(
        np.int64(n_nodes), eu.astype(np.int64), ev.astype(np.int64),
        elevel.astype(np.float32), ecu.astype(np.int64), ecv.astype(np.int64), one_way,
    )
    by_culvert = via >= n_plain
    width = cols + 2
    out = []
    for k, f in enumerate(floods):
        r0, _, c0, c1 = plan.bounds(k)
        lw = c1 - c0 + 2
        sl = slice(base[k], base[k] + f.n_seeds + 1)
        out.append(SeedLevels(k=k, lam=lam[sl].copy(), own=_to_local(own[sl], r0, c0, width, lw),
                              other=_to_local(other[sl], r0, c0, width, lw),
                              by_culvert=by_culvert[sl].copy()))
    return out


def _culvert_links(plan: TilePlan, floods: list[FloodedTile], base: np.ndarray, culverts):
    """The culverts as seed-graph edges: nodes, level, end cells (global padded), one-way."""
    ends = culverts.ends
    n_ends = ends.shape[0]
    node = np.full(n_ends, -1, dtype=np.int64)
    level = np.full(n_ends, np.nan, dtype=np.float32)
    for t, f in enumerate(floods):
        node[f.end_index] = np.where(f.end_label == 0, 0, base[t] + f.end_label)
        level[f.end_index] = f.end_level
    n = len(culverts)
    keep = (node[:n] >= 0) & (node[n:] >= 0) & ~np.isnan(level[:n]) & ~np.isnan(level[n:])
    width = plan.cols + 2
    padded = (ends // plan.cols + 1) * width + ends % plan.cols + 1
    edge_level = np.maximum(np.maximum(level[:n], level[n:]), culverts.invert)
    return (node[:n][keep], node[n:][keep], edge_level[keep], padded[:n][keep],
            padded[n:][keep], np.asarray(culverts.one_way, dtype=np.bool_)[keep])


def _to_local(cells: np.ndarray, r0: int, c0: int, width: int, lw: int) -> np.ndarray:
    """Global padded indices to a tile's local padded indices (-1 stays -1)."""
    out = (cells // width - r0) * lw + (cells % width - c0)
    return np.where(cells < 0, -1, out).astype(np.int64)


# --------------------------------------------------------------------------- the result


@dataclasses.dataclass(frozen=True, eq=False)
class TiledFlood:
    """What the pipeline computed: the depression table, counts, and layers by rows.

    Attributes
    ----------
    depressions : DepressionTable
    connectivity : int
    plan : TilePlan
    store : TileStore
        Where the tiles' arrays are (close it when done with the layers).
    joined : JoinedDepressions
    valid_cells, unreached_cells, heap_pops : int
    outlet_cells : int
        Outlet cells on valid data, counted for a :class:`RasterTiles` (0 for
        an :class:`ArrayTiles`, whose caller holds the mask).
    outlet_counts : int64 array or None
        Per outlet source of a :class:`RasterTiles`, cells marked and cells on
        valid data (None for an :class:`ArrayTiles`).
    seconds : dict
        Wall time of each step; ``flood_tasks``, ``finish_tasks``: time the
        tile items took in all.
    whole : dict
        Layers the store holds whole (views of an in-memory store's arrays).
    """

    depressions: DepressionTable
    connectivity: int
    plan: TilePlan
    store: Any
    joined: JoinedDepressions
    valid_cells: int
    unreached_cells: int
    outlet_cells: int
    heap_pops: int
    outlet_counts: np.ndarray | None
    seconds: dict
    whole: dict

    @property
    def shape(self) -> tuple[int, int]:
        return self.plan.shape

    @property
    def tile_size(self) -> int:
        return self.plan.tile

    @property
    def tiles(self) -> int:
        return self.plan.tiles

    def read(self, layer: str, r0: int, r1: int) -> np.ndarray:
        """Rows ``r0:r1`` of one of :data:`LAYERS`, as the in-memory result holds them.

        ``onset_stage`` and ``fill_depth`` are NaN on nodata and unreached
        cells; ``depression_id`` is 0 outside depressions; ``flood_tree`` holds
        codes 1..9 and 0 (nodata, unreached).
        """
        if layer in self.whole:
            return self.whole[layer][r0:r1]
        if layer == "fill_depth":
            s = self.read("onset_stage", r0, r1)
            return np.subtract(s, self.read("elevation", r0, r1), dtype=np.float32)
        return _read_layer(self.plan, self.store, self.joined, layer, r0, r1)

    def row_blocks(self) -> list[tuple[int, int]]:
        """Bands of rows worth reading at once from this result's store."""
        return _row_blocks(self.plan.rows, self.store.block_rows)


def _row_blocks(rows: int, block_rows: int | None) -> list[tuple[int, int]]:
    step = rows if block_rows is None else int(block_rows)
    return [(r0, min(rows, r0 + step)) for r0 in range(0, rows, step)]


_STORED = {"elevation": ("z", np.float32), "onset_stage": ("level", np.float32),
           "depression_id": ("label", np.int32), "flood_tree": ("state", np.uint8)}


def _read_layer(plan: TilePlan, store, joined: JoinedDepressions, layer: str, r0: int,
                r1: int) -> np.ndarray:
    """Rows ``r0:r1`` of a layer, copied from the tiles."""
    name, dtype = _STORED[layer]
    out = np.empty((r1 - r0, plan.cols), dtype=dtype)
    t = plan.tile
    for ti in range(r0 // t, (r1 - 1) // t + 1):
        a0 = max(r0, ti * t)
        a1 = min(r1, (ti + 1) * t)
        for tj in range(plan.tile_cols):
            k = ti * plan.tile_cols + tj
            _, _, c0, c1 = plan.bounds(k)
            part = store.rows(k, name, a0 - ti * t, a1 - ti * t, c1 - c0)
            if layer == "depression_id":
                part = joined.tile_ids(k)[part]
            out[a0 - r0:a1 - r0, c0:c1] = part
    if layer == "flood_tree":
        out[out == _tile_kernels.BLOCKED] = 0
    return out


# --------------------------------------------------------------------------- the run


def run_pipeline(source, *, executor: Executor, store: TileStore, tile_size: int,
                 connectivity: int = 8, row_areas=None, transform=None,
                 progress: Progress | None = None, check_outlets=None,
                 culverts=None) -> TiledFlood:
    """Run the five steps on ``source`` with ``executor`` and ``store``.

    Parameters
    ----------
    source : ArrayTiles or RasterTiles
    executor : Executor
        Runs steps 1 and 3 (one item per tile).
    store : TileStore
        Keeps the tiles' arrays; the layers of a
        :class:`~sillmark.engine.stores.MemoryStore` are turned into the
        result in place at the end (views, no copies).
    tile_size : int
    connectivity : {8, 4}
    row_areas : (rows,) float64 array, optional
        True area of a cell in each row, m² (default 1).
    transform : affine.Affine, optional
        For the spill points' x, y.
    progress : callable, optional
        ``progress(step, done, total)``.
    check_outlets : callable, optional
        ``check_outlets(counts, all_valid)`` after step 1, with the summed
        outlet counts of a :class:`RasterTiles`.
    culverts : CulvertEdges, optional
        Extra edges of the flood graph (:mod:`sillmark.engine.culverts`), on
        valid cells of the grid.

    Returns
    -------
    TiledFlood

    Raises
    ------
    InvalidDEM
        Every cell is nodata.
    """
    rows, cols = source.shape
    plan = TilePlan(rows=rows, cols=cols, tile=tile_size)
    dirs = directions(connectivity)
    job = TileJob(plan=plan, source=source, store=store, connectivity=int(connectivity),
                  culverts=culverts)
    store.start(plan)
    areas = np.ones(rows) if row_areas is None else np.asarray(row_areas, dtype=np.float64)
    times: dict[str, float] = {}

    def report(step: str, done: int, total: int) -> None:
        if progress is not None:
            progress(step, done, total)

    t0 = time.perf_counter()
    report("flood", 0, plan.tiles)
    floods = executor.map(functools.partial(flood_step, job), range(plan.tiles))
    report("flood", plan.tiles, plan.tiles)
    times["flood"] = time.perf_counter() - t0
    times["flood_tasks"] = sum(f.seconds for f in floods)
    valid_cells = sum(f.valid_cells for f in floods)
    if valid_cells == 0 and floods[0].outlet_counts is not None:
        raise InvalidDEM(f"every cell of {getattr(source, 'label', 'the DEM')} is nodata; give "
                         "a DEM with at least one elevation (check the declared nodata value)")
    counts = None
    if floods[0].outlet_counts is not None:
        counts = np.sum([f.outlet_counts for f in floods], axis=0)
        if check_outlets is not None:
            check_outlets(counts, valid_cells == rows * cols)

    t0 = time.perf_counter()
    report("graph", 0, 1)
    seeds = solve_seeds(plan, floods, dirs, culverts)
    report("graph", 1, 1)
    times["graph"] = time.perf_counter() - t0
    heap_pops = sum(f.heap_pops for f in floods)
    outlet_cells = sum(f.outlet_cells for f in floods)
    del floods

    t0 = time.perf_counter()
    report("finish", 0, plan.tiles)
    finished = executor.map(functools.partial(finish_step, job), seeds)
    del seeds
    report("finish", plan.tiles, plan.tiles)
    times["finish"] = time.perf_counter() - t0
    times["finish_tasks"] = sum(f.seconds for f in finished)

    t0 = time.perf_counter()
    report("join", 0, 1)
    joined = join_pieces(plan, finished, dirs, culverts)
    unreached = sum(f.unreached_cells for f in finished)
    valid_cells = sum(f.valid_cells for f in finished)
    del finished
    report("join", 1, 1)
    times["join"] = time.perf_counter() - t0

    # Step 5: totals cell by cell in raster order, the additions of a one-pass
    # labelling, so the sums are the same bits for every tile size and store.
    t0 = time.perf_counter()
    blocks = _row_blocks(rows, store.block_rows)
    report("totals", 0, len(blocks))
    n = joined.n
    count = np.zeros(n + 1, dtype=np.int64)
    area = np.zeros(n + 1, dtype=np.float64)
    volume = np.zeros(n + 1, dtype=np.float64)
    whole: dict[str, np.ndarray] = {}
    grids = {name: store.whole(name) for name in ("level", "state", "label")}
    if all(g is not None for g in grids.values()):
        # The store holds the whole grid: turn its pieces into ids and its
        # states into flood-tree codes in place; the layers are views.
        label = grids["label"]
        for k in range(plan.tiles):
            r0, r1, c0, c1 = plan.bounds(k)
            region = label[r0 + 1:r1 + 1, c0 + 1:c1 + 1]
            region[...] = joined.tile_ids(k)[region]
        state = grids["state"]
        state[state == _tile_kernels.BLOCKED] = 0
        whole = {"onset_stage": grids["level"][1:-1, 1:-1], "depression_id": label[1:-1, 1:-1],
                 "flood_tree": state[1:-1, 1:-1]}
        if isinstance(source, ArrayTiles):
            whole["elevation"] = source.elevation
        blocks = [(0, rows)]
    for b, (r0, r1) in enumerate(blocks):
        s, ids, z = (whole[layer][r0:r1] if layer in whole
                     else _read_layer(plan, store, joined, layer, r0, r1)
                     for layer in ("onset_stage", "depression_id", "elevation"))
        _tiled_kernels.accumulate(ids, s, z, areas[r0:r1], count, area, volume)
        report("totals", b + 1, len(blocks))
    times["totals"] = time.perf_counter() - t0

    spill = joined.spill[1:]
    table = depression_table(
        pit_row=joined.pit[1:] // cols, pit_col=joined.pit[1:] % cols,
        pit_elevation=joined.pit_z[1:], spill_row=spill // cols, spill_col=spill % cols,
        spill_elevation=joined.level[1:], spills_to=joined.spills_to[1:],
        cell_count=count[1:], area_m2=area[1:], volume_m2_vu=volume[1:], transform=transform,
    )
    return TiledFlood(
        depressions=table, connectivity=int(connectivity), plan=plan, store=store,
        joined=joined, valid_cells=int(valid_cells), unreached_cells=int(unreached),
        outlet_cells=int(outlet_cells), heap_pops=int(heap_pops), outlet_counts=counts,
        seconds=times, whole=whole,
    )
