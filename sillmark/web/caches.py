"""One least-recently-used cache for the web app, shared by every cache it keeps.

The server holds several things it would rather not compute twice: open sites,
the figures of recent water levels, routes of assets, pixel-to-cell lookups of
map tiles and encoded tile images. Each is a :class:`LockedLRU`: a
:class:`cachetools.LRUCache` behind a lock (request threads share it), bounded by
a count of entries or, with ``getsizeof``, by their total size, and counting its
hits and misses for the benches.

Examples
--------
>>> cache = LockedLRU(2)
>>> cache.put("a", 1); cache.put("b", 2); cache.put("c", 3)
>>> cache.get("a") is None, cache.get("c")
(True, 3)
>>> sized = LockedLRU(10, getsizeof=len)
>>> sized.put("big", b"x" * 11)  # larger than the whole cache: not kept
>>> sized.get("big") is None, sized.currsize
(True, 0)
"""

from __future__ import annotations

import threading
from collections.abc import Callable, Hashable
from typing import Any

from cachetools import LRUCache

__all__ = ["LockedLRU"]


class LockedLRU:
    """A thread-safe LRU cache bounded by entries (or by size with ``getsizeof``).

    Parameters
    ----------
    maxsize : int
        Most entries kept, or most total size when ``getsizeof`` is given.
    getsizeof : callable, optional
        Size of one value (e.g. ``len`` of encoded bytes).
    """

    def __init__(self, maxsize: int, *, getsizeof: Callable[[Any], int] | None = None) -> None:
        self.maxsize = max(0 if getsizeof else 1, int(maxsize))
        self._cache: LRUCache = LRUCache(maxsize=self.maxsize, getsizeof=getsizeof)
        self._lock = threading.Lock()
        self.hits = 0
        self.misses = 0

    def get(self, key: Hashable, default: Any = None) -> Any:
        """The value of ``key`` (now the most recently used), or ``default``."""
        with self._lock:
            try:
                value = self._cache[key]
            except KeyError:
                self.misses += 1
                return default
            self.hits += 1
            return value

    def put(self, key: Hashable, value: Any) -> None:
        """Keep ``value`` under ``key``, dropping the least recently used beyond the bound.

        A value larger than the whole cache is not kept.
        """
        with self._lock:
            try:
                self._cache[key] = value
            except ValueError:  # cachetools: the value alone exceeds maxsize
                self._cache.pop(key, None)

    def setdefault(self, key: Hashable, value: Any) -> Any:
        """The value already kept under ``key``, or ``value`` after keeping it."""
        with self._lock:
            if key in self._cache:
                return self._cache[key]
            try:
                self._cache[key] = value
            except ValueError:
                pass
            return value

    def discard_where(self, predicate: Callable[[Hashable], bool]) -> None:
        """Drop every entry whose key satisfies ``predicate``."""
        with self._lock:
            for key in [k for k in self._cache if predicate(k)]:
                del self._cache[key]

    def values(self) -> list:
        """The values kept, least recently used first (a snapshot)."""
        with self._lock:
            return list(self._cache.values())

    @property
    def currsize(self) -> int:
        """Entries kept, or their total size with ``getsizeof``."""
        with self._lock:
            return int(self._cache.currsize)

    def __contains__(self, key: Hashable) -> bool:
        with self._lock:
            return key in self._cache

    def __len__(self) -> int:
        with self._lock:
            return len(self._cache)
