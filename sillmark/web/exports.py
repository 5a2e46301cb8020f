"""The exports of one water level on disk, bounded in size (no Flask; no engine).

Every level a viewer asks a download for is written once into its own folder
(``sites/<site>/runs/<run>/levels/<label>_<assets>/``, see
:mod:`sillmark.web.layout`) and served from there. Left alone, every new
level would leave a folder behind for good, so a viewer could fill the disk
by asking for level after level. :class:`ExportCache` keeps the folders of
every site within ``LEVEL_EXPORT_CACHE_BYTES`` (see
:mod:`sillmark.web.config`): when a new folder (or a level's ZIP) would pass
the limit, the folders used least recently are removed first. A removed level
is simply written again when someone asks for it.

The index is a :class:`cachetools.LRUCache` whose items are folders and whose
sizes are their bytes on disk; at start it is filled from the folders already
there (oldest first), and half-written folders left by a crash are removed.
A file is opened under the cache's lock, so a folder is never removed between
the moment a request finds it and the moment it opens the file (an open file
stays readable after its folder is removed).

When the disk is full while a level is being written, the temporary folder is
removed, the other cached levels are given up to make room, and the write is
tried once more; if there is still no room the request gets
:class:`ExportSpaceError` (507) with a message that names no server path.
"""

from __future__ import annotations

import errno
import logging
import os
import shutil
import threading
from pathlib import Path
from typing import BinaryIO, Callable

from cachetools import LRUCache

from sillmark.errors import InvalidParameter
from sillmark.web.db import StorageError

log = logging.getLogger("sillmark.exports")

#: The file that marks a level folder as complete (written last, before the rename).
COMPLETE = ".complete"
#: errno values that mean the disk, or the user's quota on it, is full.
NO_SPACE = {errno.ENOSPC, errno.EDQUOT, errno.EFBIG}
#: Below this many free bytes, a write error that gives no reason is blamed on space.
LOW_SPACE_BYTES = 4 * 2**20


class ExportSpaceError(StorageError):
    """The disk has no room for a level's exports; answered with 507 (Insufficient Storage)."""


def folder_bytes(folder: Path) -> int:
    """Bytes of the files directly in ``folder`` (0 if it is gone)."""
    total = 0
    try:
        with os.scandir(folder) as entries:
            for entry in entries:
                try:
                    if entry.is_file(follow_symlinks=False):
                        total += entry.stat(follow_symlinks=False).st_size
                except OSError:
                    pass
    except OSError:
        return 0
    return total


def _remove(folder: Path) -> None:
    shutil.rmtree(folder, ignore_errors=True)


def out_of_space(exc: BaseException, where: Path | None = None) -> bool:
    """Whether ``exc`` (or an exception it came from) says the disk is full.

    GDAL (through rasterio) reports a full disk in its own words, and sometimes
    only as a failed write; such an error counts as a full disk when ``where``
    has almost no free space left.
    """
    seen = exc
    vague = False
    while seen is not None:
        if isinstance(seen, OSError) and seen.errno in NO_SPACE:
            return True
        text = str(seen).lower()
        if ("no space left" in text or "disk is full" in text or "disk quota" in text
                or "free disk space" in text):
            return True
        if isinstance(seen, OSError) or type(seen).__module__.startswith("rasterio"):
            vague = True
        seen = seen.__cause__ or seen.__context__
    if vague and where is not None:
        try:
            probe = next(p for p in (where, *where.parents) if p.exists())
            return shutil.disk_usage(probe).free < LOW_SPACE_BYTES
        except (OSError, StopIteration):  # pragma: no cover
            return False
    return False


class _FolderLRU(LRUCache):
    """Folders by recency of use, weighted by bytes; an evicted folder is removed from disk."""

    def popitem(self):
        folder, size = super().popitem()
        _remove(Path(folder))
        log.info("removed the level exports %s (%d bytes) to stay within the cache limit",
                 folder, size)
        return folder, size


class ExportCache:
    """Level export folders of a data folder, within ``limit_bytes`` (see the module docstring)."""

    def __init__(self, data_dir: Path, limit_bytes: int) -> None:
        limit = int(limit_bytes)
        if limit < 1:
            raise InvalidParameter(
                f"LEVEL_EXPORT_CACHE_BYTES must be a positive number of bytes, not {limit_bytes!r}; "
                "e.g. LEVEL_EXPORT_CACHE_BYTES = 2**30 (1 GiB) in the data folder's config.py")
        self.data_dir = Path(data_dir)
        self.limit = limit
        self._lock = threading.RLock()
        self._folders = _FolderLRU(maxsize=limit, getsizeof=int)
        self._scan()

    # -- what the views call ------------------------------------------------

    def known(self, folder: Path) -> bool:
        """Whether ``folder`` is a complete, cached level folder (and mark it used now)."""
        key = str(folder)
        with self._lock:
            if key in self._folders and (folder / COMPLETE).is_file():
                self._folders[key]  # noqa: B018 - a look-up is what moves it to the front
                return True
            self._folders.pop(key, None)
            return False

    def build(self, folder: Path, write: Callable[[Path], None], *, what: str) -> None:
        """Write ``folder`` through a temporary folder with ``write(tmp)``, then index it.

        On a full disk the temporary folder is removed, every other cached folder is
        given up and the write is tried once more; then :class:`ExportSpaceError`.
        ``what`` names the exports in that message (e.g. "the exports at 47.60 m").
        """
        tmp = folder.with_name(f".{folder.name}.tmp")
        for attempt in (1, 2):
            try:
                if tmp.exists():
                    _remove(tmp)
                tmp.mkdir(parents=True)
                write(tmp)
                (tmp / COMPLETE).write_text("ok\n", encoding="ascii")
                if folder.exists():
                    _remove(folder)
                os.replace(tmp, folder)
                break
            except BaseException as exc:
                _remove(tmp)
                if not out_of_space(exc, folder.parent):
                    raise
                if attempt == 2 or not self._give_up_others(folder):
                    raise self.space_error(what) from None
        self.measure(folder)

    def measure(self, folder: Path) -> None:
        """(Re-)count ``folder``'s bytes after a write; may remove the least recently used."""
        key = str(folder)
        size = max(folder_bytes(folder), 1)
        with self._lock:
            self._folders.pop(key, None)
            if size > self.limit:
                # Larger than the whole cache: served to this request, then removed
                # (see open); every other folder stays.
                self._oversize.add(key)
                return
            self._folders[key] = size

    def open(self, folder: Path, name: str) -> BinaryIO | None:
        """Open ``folder/name`` for reading; None if the folder was removed meanwhile.

        Raises FileNotFoundError when the folder is there but has no such file.
        """
        key = str(folder)
        with self._lock:
            if key in self._oversize:
                self._oversize.discard(key)
                try:
                    return open(folder / name, "rb")
                finally:
                    _remove(folder)
            if key not in self._folders:
                return None
            self._folders[key]  # noqa: B018 - used now
            return open(folder / name, "rb")

    def space_error(self, what: str) -> ExportSpaceError:
        return ExportSpaceError(
            f"the server's disk is full, so {what} could not be written (nothing was kept); "
            "the map and its figures still work: try the download again later, or ask the "
            "operator of this server to free some disk space")

    def forget_under(self, folder: Path) -> None:
        """Stop counting the cached folders inside ``folder``, which the caller removes whole.

        (``pop`` forgets a folder without removing it; only eviction removes.)
        """
        prefix = str(Path(folder)) + os.sep
        with self._lock:
            for key in [k for k in self._folders if str(k).startswith(prefix)]:
                self._folders.pop(key, None)

    @property
    def bytes_used(self) -> int:
        with self._lock:
            return int(self._folders.currsize)

    # -- housekeeping -------------------------------------------------------

    def _give_up_others(self, keep: Path) -> bool:
        """Remove every cached folder but ``keep``; whether any was removed."""
        with self._lock:
            others = [k for k in self._folders if k != str(keep)]
            for key in others:
                self._folders.pop(key, None)
                _remove(Path(key))
        return bool(others)

    def _scan(self) -> None:
        """Index the level folders already on disk, oldest first; remove half-written ones."""
        self._oversize: set[str] = set()
        found: list[tuple[float, Path]] = []
        for levels in self.data_dir.glob("sites/*/runs/*/levels"):
            try:
                children = list(levels.iterdir())
            except OSError:  # pragma: no cover
                continue
            for child in children:
                if not child.is_dir():
                    continue
                mark = child / COMPLETE
                if child.name.startswith(".") or not mark.is_file():
                    _remove(child)  # a write a crash interrupted
                    continue
                for part in child.glob(".*.tmp"):  # a ZIP a crash interrupted
                    part.unlink(missing_ok=True)
                try:
                    found.append((mark.stat().st_mtime, child))
                except OSError:  # pragma: no cover
                    continue
        for _, folder in sorted(found):
            self.measure(folder)
        for key in self._oversize:  # larger than the whole cache: nobody is being served it
            _remove(Path(key))
        self._oversize.clear()
