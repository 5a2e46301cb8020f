"""Atomic writes: every result file appears whole under its name, or not at all.

A file is written to a temporary name in its folder and renamed over the final
name (:func:`os.replace`, atomic within one file system), so a crash or a full
disk never leaves half a result under a result's name.
"""

from __future__ import annotations

import contextlib
import os
import uuid
from collections.abc import Iterator
from pathlib import Path
from typing import TYPE_CHECKING

if TYPE_CHECKING:  # pragma: no cover
    pass


@contextlib.contextmanager
def atomic_output(path: str | os.PathLike) -> Iterator[Path]:
    """Yield a temporary path beside ``path``; rename it over ``path`` on success.

    The temporary file lives in the same folder, so the final :func:`os.replace`
    is a rename within one file system (atomic on POSIX and on Windows). The data
    are flushed to disk before the rename. On any exception the temporary file is
    removed and the existing ``path``, if any, is left untouched.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> target = pathlib.Path(tempfile.mkdtemp()) / "a.txt"
    >>> with atomic_output(target) as tmp:
    ...     _ = tmp.write_text("done")
    >>> target.read_text()
    'done'
    """
    final = Path(path)
    tmp = final.with_name(f".{final.name}.{uuid.uuid4().hex[:12]}.tmp")
    try:
        yield tmp
        _fsync(tmp)
        os.replace(tmp, final)
    except BaseException:
        with contextlib.suppress(OSError):
            tmp.unlink()
        raise
    _fsync_dir(final.parent)


def _fsync(path: Path) -> None:
    # Best effort: some platforms refuse fsync on a read-only descriptor.
    try:
        fd = os.open(path, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


def _fsync_dir(folder: Path) -> None:
    # Makes the rename itself durable on POSIX; not possible (nor needed) everywhere.
    with contextlib.suppress(OSError, AttributeError):
        fd = os.open(folder, os.O_RDONLY)
        try:
            os.fsync(fd)
        finally:
            os.close(fd)
