"""A slow, separate textbook implementation of the onset stage, for tests only.

Dijkstra's shortest-path algorithm (Dijkstra 1959) with the path cost "highest
elevation on the path" in place of "sum of edge lengths": the bottleneck or
minimax path problem. It uses Python's heapq and dictionaries and shares no code
with the engine, so agreement between the two is evidence for both.

Culverts are extra edges of the graph: a list of ``((ra, ca), (rb, cb),
invert, one_way)``; crossing one from a cell settled at ``level`` reaches the
other end at ``max(level, invert, z(end))``, and a one-way culvert is crossed
from its first end to its last only (a directed graph; Dijkstra's algorithm
runs on directed graphs unchanged).
"""

from __future__ import annotations

import heapq
import math

import numpy as np

EIGHT = [(-1, -1), (-1, 0), (-1, 1), (0, -1), (0, 1), (1, -1), (1, 0), (1, 1)]
FOUR = [(-1, 0), (0, -1), (0, 1), (1, 0)]


def minimax_stage(z: np.ndarray, outlets: np.ndarray, connectivity: int = 8,
                  culverts=()) -> np.ndarray:
    """Onset stage by Dijkstra with ``max``; NaN on nodata and unreachable cells."""
    rows, cols = z.shape
    steps = EIGHT if connectivity == 8 else FOUR
    extra = {}
    for a, b, invert, one_way in culverts:
        extra.setdefault(tuple(a), []).append((tuple(b), float(invert)))
        if not one_way:
            extra.setdefault(tuple(b), []).append((tuple(a), float(invert)))
    best = {}
    heap = []
    for r in range(rows):
        for c in range(cols):
            if outlets[r, c] and not math.isnan(z[r, c]):
                best[(r, c)] = float(z[r, c])
                heap.append((float(z[r, c]), r, c))
    heapq.heapify(heap)
    done = set()
    while heap:
        level, r, c = heapq.heappop(heap)
        if (r, c) in done:
            continue
        done.add((r, c))
        for dr, dc in steps:
            rr, cc = r + dr, c + dc
            if not (0 <= rr < rows and 0 <= cc < cols) or math.isnan(z[rr, cc]):
                continue
            candidate = max(level, float(z[rr, cc]))
            if candidate < best.get((rr, cc), math.inf):
                best[(rr, cc)] = candidate
                heapq.heappush(heap, (candidate, rr, cc))
        for (rr, cc), invert in extra.get((r, c), []):
            if math.isnan(z[rr, cc]):
                continue
            candidate = max(level, invert, float(z[rr, cc]))
            if candidate < best.get((rr, cc), math.inf):
                best[(rr, cc)] = candidate
                heapq.heappush(heap, (candidate, rr, cc))
    out = np.full(z.shape, np.nan, dtype=np.float32)
    for (r, c), level in best.items():
        out[r, c] = level
    return out


def components(mask: np.ndarray, connectivity: int = 8) -> list[set]:
    """Connected components of a boolean grid, by breadth-first search."""
    rows, cols = mask.shape
    steps = EIGHT if connectivity == 8 else FOUR
    seen = np.zeros(mask.shape, bool)
    found = []
    for r in range(rows):
        for c in range(cols):
            if mask[r, c] and not seen[r, c]:
                part = set()
                todo = [(r, c)]
                seen[r, c] = True
                while todo:
                    a, b = todo.pop()
                    part.add((a, b))
                    for dr, dc in steps:
                        aa, bb = a + dr, b + dc
                        if 0 <= aa < rows and 0 <= bb < cols and mask[aa, bb] and not seen[aa, bb]:
                            seen[aa, bb] = True
                            todo.append((aa, bb))
                found.append(part)
    return found


def canonical_spills(z: np.ndarray, s: np.ndarray, ids: np.ndarray, outlets: np.ndarray,
                     connectivity: int = 8) -> dict:
    """Spill cell and ``spills_to`` of every depression by the rule of sillmark.engine.flood.

    A slow, literal reading of the rule in the module docstring of
    :mod:`sillmark.engine.flood` ("Spill points"), written with Python sets and
    breadth-first search and sharing no code with the engine. ``s`` is the
    onset stage (NaN where unreached), ``ids`` the depression ids (0 outside
    depressions). Returns ``{id: ((spill_row, spill_col), spills_to)}``.
    """
    rows, cols = z.shape
    steps = EIGHT if connectivity == 8 else FOUR

    def neighbours(r, c):
        for dr, dc in steps:
            rr, cc = r + dr, c + dc
            if 0 <= rr < rows and 0 <= cc < cols:
                yield rr, cc

    reached = ~np.isnan(s)
    dry = reached & (ids == 0)
    # Dry areas: connected cells with s == z at one level.
    area_of = {}
    areas = []
    for r in range(rows):
        for c in range(cols):
            if dry[r, c] and (r, c) not in area_of:
                level = s[r, c]
                todo, cells = [(r, c)], []
                area_of[(r, c)] = len(areas)
                while todo:
                    cell = todo.pop()
                    cells.append(cell)
                    for nb in neighbours(*cell):
                        if dry[nb] and s[nb] == level and nb not in area_of:
                            area_of[nb] = len(areas)
                            todo.append(nb)
                areas.append((level, cells))
    exits = []
    touching = [dict() for _ in areas]  # area -> {depression: first rim cell}
    for a, (level, cells) in enumerate(areas):
        ways = [cell for cell in cells
                if outlets[cell] or any(s[nb] < level for nb in neighbours(*cell))]
        exits.append(min(ways, key=lambda rc: rc[0] * cols + rc[1]) if ways else None)
        for cell in cells:
            for nb in neighbours(*cell):
                d = int(ids[nb])
                if d > 0 and s[nb] == level:
                    best = touching[a].get(d)
                    if best is None or cell[0] * cols + cell[1] < best[0] * cols + best[1]:
                        touching[a][d] = cell
    # Hop distances from the ways out over the graph of dry areas and depressions.
    dep_areas = {}
    for a, found in enumerate(touching):
        for d in found:
            dep_areas.setdefault(d, []).append(a)
    dist = {("a", a): 0 for a in range(len(areas)) if exits[a] is not None}
    queue = list(dist)
    while queue:
        nxt = []
        for kind, k in queue:
            near = ([("d", d) for d in touching[k]] if kind == "a"
                    else [("a", a) for a in dep_areas.get(k, [])])
            for node in near:
                if node not in dist:
                    dist[node] = dist[(kind, k)] + 1
                    nxt.append(node)
        queue = nxt

    def lowest_neighbour(cell):
        best = None
        for nb in neighbours(*cell):
            if not np.isnan(s[nb]) and (best is None or s[nb] < s[best]):
                best = nb
        return best

    def water_from(a):
        while True:
            if exits[a] is None:
                near = [d for d in touching[a] if dist.get(("d", d)) == dist[("a", a)] - 1]
                return min(near)
            if outlets[exits[a]]:
                return 0
            nb = lowest_neighbour(exits[a])
            if ids[nb] > 0:
                return int(ids[nb])
            a = area_of[nb]

    out = {}
    for d in range(1, int(ids.max(initial=0)) + 1):
        want = dist[("d", d)] - 1
        rims = [touching[a][d] for a in dep_areas[d] if dist.get(("a", a)) == want]
        spill = min(rims, key=lambda rc: rc[0] * cols + rc[1])
        out[d] = (spill, water_from(area_of[spill]))
    return out
