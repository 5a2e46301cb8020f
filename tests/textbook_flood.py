"""A slow, separate textbook implementation of the onset stage, for tests only.

Dijkstra's shortest-path algorithm (Dijkstra 1959) with the path cost "highest
elevation on the path" in place of "sum of edge lengths": the bottleneck or
minimax path problem. It uses Python's heapq and dictionaries and shares no code
with the engine, so agreement between the two is evidence for both.
"""

from __future__ import annotations

import heapq
import math

import numpy as np

EIGHT = [(-1, -1), (-1, 0), (-1, 1), (0, -1), (0, 1), (1, -1), (1, 0), (1, 1)]
FOUR = [(-1, 0), (0, -1), (0, 1), (1, 0)]


def minimax_stage(z: np.ndarray, outlets: np.ndarray, connectivity: int = 8) -> np.ndarray:
    """Onset stage by Dijkstra with ``max``; NaN on nodata and unreachable cells."""
    rows, cols = z.shape
    steps = EIGHT if connectivity == 8 else FOUR
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
