"""Step 4 of the Priority-Flood pipeline: tiles' pieces joined into depressions.

Pieces of depressions that touch across tile edges are one depression
(union-find over the perimeters, Tarjan & van Leeuwen 1984), numbered in
raster order of its first cell; each gets its pit, and its spill point and
``spills_to`` by the rule of :mod:`sillmark.engine.flood` ("Spill points"),
from the tiles' spill summaries. Tiling after Barnes (2016).

References
----------
Barnes, R. (2016). Parallel priority-flood depression filling for trillion cell
digital elevation models on desktops or clusters. Computers & Geosciences 96,
56-68. doi:10.1016/j.cageo.2016.07.001
Tarjan, R. E., van Leeuwen, J. (1984). Worst-case analysis of set union
algorithms. Journal of the ACM 31(2), 245-281. doi:10.1145/62.2160
"""

from __future__ import annotations

import numpy as np

from sillmark.engine import _spill_kernels, _spill_resolve_kernels, _tiled_kernels
from sillmark.engine.depressions import DIRECTION_COL, DIRECTION_ROW
from sillmark.engine.messages import FinishedTile, JoinedDepressions
from sillmark.engine.plan import TilePlan


def join_pieces(plan: TilePlan, finished: list[FinishedTile], dirs: np.ndarray,
                culverts=None) -> JoinedDepressions:
    """Step 4: depressions from pieces, numbered in raster order; pits; spill points.

    With culverts, a depression that drains only through a culvert has no dry
    way out at its spill elevation; its spill point is then the culvert end
    it drains through (:func:`_culvert_spills`).
    """
    rows, cols = plan.shape
    n_pieces = np.array([len(f.first) for f in finished], dtype=np.int64)
    piece_off = np.concatenate([[0], np.cumsum(n_pieces)]).astype(np.int64)
    total = int(piece_off[-1])
    poff = np.concatenate(
        [[0], np.cumsum([len(f.perimeter_piece) for f in finished])]).astype(np.int64)
    p_piece = np.concatenate([f.perimeter_piece for f in finished]).astype(np.int32)
    forest = np.arange(total, dtype=np.int64)
    _tiled_kernels.union_pieces(p_piece, poff, piece_off, np.int64(plan.tile_rows),
                                np.int64(plan.tile_cols), np.int64(plan.tile), np.int64(rows),
                                np.int64(cols), DIRECTION_ROW, DIRECTION_COL, dirs, forest)
    root = _tiled_kernels.roots(forest)
    first = np.concatenate([f.first for f in finished]).astype(np.int64)
    pit = np.concatenate([f.pit for f in finished]).astype(np.int64)
    pit_z = np.concatenate([f.pit_z for f in finished]).astype(np.float32)
    level = np.concatenate([f.level for f in finished]).astype(np.float32)

    # Number depressions by their first cell in raster order.
    first_of_root = np.full(total, np.iinfo(np.int64).max, dtype=np.int64)
    np.minimum.at(first_of_root, root, first)
    roots = np.flatnonzero(root == np.arange(total))
    n = int(roots.shape[0])
    id_of_root = np.zeros(total, dtype=np.int32)
    id_of_root[roots[np.argsort(first_of_root[roots], kind="stable")]] = np.arange(
        1, n + 1, dtype=np.int32)
    piece_id = id_of_root[root] if total else np.zeros(0, dtype=np.int32)

    # Pit: the lowest cell, first in raster order on ties.
    order = np.lexsort((pit, pit_z, piece_id))
    head = np.ones(total, dtype=bool)
    head[1:] = piece_id[order][1:] != piece_id[order][:-1]
    best = order[head]  # one piece per depression, ids ascending
    dep_pit = np.zeros(n + 1, dtype=np.int64)
    dep_pit_z = np.zeros(n + 1, dtype=np.float32)
    dep_level = np.zeros(n + 1, dtype=np.float32)
    dep_pit[1:] = pit[best]
    dep_pit_z[1:] = pit_z[best]
    dep_level[1:] = level[best]

    # Spill points and spills_to, from the tiles' spill summaries.
    parts = []
    p_dep = []
    area_base = 0
    for t, f in enumerate(finished):
        ids_t = np.concatenate([[0], piece_id[piece_off[t]:piece_off[t + 1]]]).astype(np.int32)
        parts.append(_spill_parts(f.spill, ids_t, area_base))
        area_base += len(f.spill[0])
        p_dep.append(ids_t[f.perimeter_piece])
    joined = {key: np.concatenate([p[key] for p in parts]) for key in parts[0]}
    spill, spills_to = _spill_resolve_kernels.resolve_spills(
        np.int64(n), joined["a_level"].astype(np.float32), joined["a_exit"].astype(np.int64),
        joined["a_kind"].astype(np.int8), joined["a_val"].astype(np.int64),
        joined["adj_area"].astype(np.int64), joined["adj_dep"].astype(np.int32),
        joined["adj_cell"].astype(np.int64),
        np.concatenate([f.perimeter_level for f in finished]).astype(np.float32),
        np.concatenate(p_dep).astype(np.int32), joined["p_area"].astype(np.int64),
        np.concatenate([f.perimeter_outlet for f in finished]).astype(np.bool_),
        joined["p_low_level"].astype(np.float32), joined["p_low_dir"].astype(np.int64),
        joined["p_low_kind"].astype(np.int8), joined["p_low_val"].astype(np.int64),
        poff, np.int64(plan.tile), np.int64(plan.tile_rows), np.int64(plan.tile_cols),
        np.int64(rows), np.int64(cols), DIRECTION_ROW, DIRECTION_COL, dirs.astype(np.int64),
    )
    if culverts is not None and len(culverts) and np.any(spill[1:] < 0):
        end_dep = np.zeros(2 * len(culverts), dtype=np.int32)
        end_level = np.full(2 * len(culverts), np.nan, dtype=np.float32)
        for t, f in enumerate(finished):
            ids_t = np.concatenate([[0], piece_id[piece_off[t]:piece_off[t + 1]]])
            end_dep[f.end_index] = ids_t[f.end_piece]
            end_level[f.end_index] = f.end_level
        _culvert_spills(culverts, end_dep, end_level, dep_level, dep_pit, spill, spills_to)
    return JoinedDepressions(n=n, piece_off=piece_off, piece_id=piece_id.astype(np.int32),
                             pit=dep_pit, pit_z=dep_pit_z, level=dep_level, spill=spill,
                             spills_to=spills_to)


def _spill_parts(summary, piece_ids: np.ndarray, area_base: int) -> dict:
    """One tile's spill summary in global numbers.

    ``piece_ids[k]`` is the depression id of the tile's piece ``k``
    (``piece_ids[0] == 0``); the tile's dry areas 1..m become global areas
    ``area_base .. area_base + m - 1`` (-1 for none).
    """
    (a_level, a_exit, a_kind, a_val, adj_area, adj_dep, adj_cell,
     p_area, p_low_level, p_low_dir, p_low_kind, p_low_val) = summary

    def targets(kind, val):
        out = val.copy()
        dep = kind == _spill_kernels.KIND_DEPRESSION
        out[dep] = piece_ids[val[dep]]
        area = kind == _spill_kernels.KIND_AREA
        out[area] = area_base + val[area] - 1
        return out

    return {
        "a_level": a_level, "a_exit": a_exit, "a_kind": a_kind, "a_val": targets(a_kind, a_val),
        "adj_area": (area_base + adj_area.astype(np.int64) - 1), "adj_dep": piece_ids[adj_dep],
        "adj_cell": adj_cell,
        "p_area": np.where(p_area > 0, area_base + p_area.astype(np.int64) - 1, -1),
        "p_low_level": p_low_level, "p_low_dir": p_low_dir, "p_low_kind": p_low_kind,
        "p_low_val": targets(p_low_kind, p_low_val),
    }


def _culvert_spills(culverts, end_dep: np.ndarray, end_level: np.ndarray, dep_level: np.ndarray,
                    dep_pit: np.ndarray, spill: np.ndarray, spills_to: np.ndarray) -> None:
    """Spill point and ``spills_to`` of depressions left without one (``spill < 0``).

    Such a depression drains through a culvert: its spill point is the first
    end (raster order) inside it whose culvert carries water out of it (both
    ways, or from its first end) no higher than its spill elevation, and it
    spills to the depression at the other end (0 for none). Failing that
    (a flap valve lets outlet water in but none out), the first such end
    whatever the culvert's direction. Failing that, the
    first culvert end outside any depression at its spill elevation (water
    leaves through a culvert from the dry ground around it), spilling to 0;
    failing that, its pit. The choice uses the ends' depressions and levels
    only, so it is the same for every tiling. Writes into ``spill`` and
    ``spills_to``.
    """
    n = len(culverts)
    ends = culverts.ends
    other = np.concatenate([np.arange(n, 2 * n), np.arange(n)])
    out_ok = np.concatenate([np.ones(n, dtype=bool), ~np.asarray(culverts.one_way, bool)])
    crossing = np.concatenate([culverts.invert, culverts.invert]).astype(np.float32)
    crossing = np.maximum(crossing, end_level[other])
    for d in np.flatnonzero(spill < 0):
        if d == 0:
            continue
        inside = (end_dep == d) & (end_dep[other] != d) & (crossing <= dep_level[d])
        inside = np.flatnonzero(inside & out_ok) if np.any(inside & out_ok) else np.flatnonzero(
            inside)
        if inside.size:
            j = inside[np.lexsort((inside, ends[inside]))[0]]
            spill[d] = ends[j]
            spills_to[d] = end_dep[other[j]]
            continue
        around = np.flatnonzero((end_dep == 0) & (end_level == dep_level[d]))
        spill[d] = ends[around].min() if around.size else dep_pit[d]
        spills_to[d] = 0
