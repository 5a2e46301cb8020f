"""How the tile steps of the pipeline run: one small interface, three executors.

An *executor* has one method, ``map(fn, items) -> list``: ``[fn(x) for x in
items]``, in order, however it is spread out. The pipeline
(:mod:`sillmark.engine.pipeline`) never knows which executor runs it, so the
same Priority-Flood (Barnes, Lehman & Mulla 2014), tiled after Barnes (2016),
runs

- :class:`SerialExecutor`: one item after another in this process (tests,
  small grids, a web worker that must stay light);
- :class:`ThreadExecutor`: on threads of this process; the compiled tile
  kernels release the GIL, so the tiles run at once;
- :class:`DaskExecutor`: on a dask.distributed cluster, either a
  ``LocalCluster`` started for the run or a running scheduler
  (:func:`dask_executor`). Dask is imported only when such an executor is made.

Calling an executor, ``executor(fn, calls)``, runs ``fn(*args)`` for every
tuple in ``calls``: the older map protocol that the window-by-window products
(:mod:`sillmark.products.tiled_hierarchy`) take.

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

import contextlib
import functools
import os
import pickle
import threading
import warnings
from collections.abc import Callable, Iterable, Iterator, Sequence
from typing import Any, Protocol

from sillmark.errors import InvalidParameter

__all__ = [
    "DaskExecutor",
    "Executor",
    "SerialExecutor",
    "ThreadExecutor",
    "dask_executor",
    "serial_map",
]


class Executor(Protocol):
    """Anything with ``map(fn, items) -> list`` (results in the order of ``items``)."""

    def map(self, fn: Callable[[Any], Any], items: Iterable[Any]) -> list: ...


def _star(fn: Callable[..., Any], args: tuple) -> Any:
    return fn(*args)


class _StarCall:
    """``executor(fn, calls)``: ``fn(*args)`` for every tuple of ``calls``, through ``map``."""

    def __call__(self, fn: Callable[..., Any], calls: Sequence[tuple]) -> list:
        return self.map(functools.partial(_star, fn), list(calls))


class SerialExecutor(_StarCall):
    """Run the items one after another in this process.

    Examples
    --------
    >>> SerialExecutor().map(abs, [-1, 2, -3])
    [1, 2, 3]
    """

    def map(self, fn: Callable[[Any], Any], items: Iterable[Any]) -> list:
        return [fn(x) for x in items]


def serial_map(fn: Callable[..., Any], calls: Sequence[tuple]) -> list:
    """``[fn(*args) for args in calls]``: the star-call protocol, in this process."""
    return [fn(*args) for args in calls]


class ThreadExecutor(_StarCall):
    """Run the items on ``workers`` threads of this process (default: one per core).

    The items are dealt out in turn (thread ``w`` takes items ``w``,
    ``w + workers``, ...), one hand-off per thread rather than per item; the
    calling thread is one of the workers. The first exception raised by any
    item is raised again here, after every thread has stopped.
    """

    def __init__(self, workers: int | None = None) -> None:
        n = (os.cpu_count() or 1) if workers is None else int(workers)
        if n < 1:
            raise InvalidParameter(f"workers must be 1 or more, not {workers!r}")
        self.workers = n

    def map(self, fn: Callable[[Any], Any], items: Iterable[Any]) -> list:
        items = list(items)
        results: list = [None] * len(items)
        errors: list[BaseException] = []
        workers = max(1, min(self.workers, len(items)))

        def run(start: int) -> None:
            try:
                for k in range(start, len(items), workers):
                    if errors:
                        return
                    results[k] = fn(items[k])
            except BaseException as exc:  # raised again in the caller's thread
                errors.append(exc)

        threads = [threading.Thread(target=run, args=(w,)) for w in range(1, workers)]
        for th in threads:
            th.start()
        run(0)
        for th in threads:
            th.join()
        if errors:
            raise errors[0]
        return results


def _apply(fn: Callable[[Any], Any], item: Any) -> Any:
    return fn(item)


class DaskExecutor(_StarCall):
    """Run the items as tasks on a dask.distributed cluster through ``client``.

    The function (with whatever it binds, e.g. the pipeline's job) is sent to
    every worker once; each item travels with its own task. Counts the pickled
    bytes sent (:attr:`sent_bytes`) and gathered (:attr:`received_bytes`).
    """

    def __init__(self, client: Any) -> None:
        self.client = client
        self.sent_bytes = 0
        self.received_bytes = 0

    def map(self, fn: Callable[[Any], Any], items: Iterable[Any]) -> list:
        items = list(items)
        if not items:
            return []
        self.sent_bytes += len(pickle.dumps(fn, protocol=5))
        self.sent_bytes += sum(len(pickle.dumps(x, protocol=5)) for x in items)
        shared = self.client.scatter(fn, broadcast=True, hash=False)
        with warnings.catch_warnings():
            # Per-tile items (seed levels) are expected to add up to megabytes.
            warnings.filterwarnings("ignore", message="Sending large graph", category=UserWarning)
            futures = self.client.map(_apply, [shared] * len(items), items, pure=False)
        try:
            results = self.client.gather(futures)
        finally:
            for f in [*futures, shared]:
                f.release()
        self.received_bytes += sum(len(pickle.dumps(r, protocol=5)) for r in results)
        return list(results)

    def worker_count(self) -> int:
        """Workers the scheduler knows of now."""
        return len(self.client.scheduler_info().get("workers", {}))

    def worker_outgoing_bytes(self) -> int:
        """Bytes the workers have sent, to each other and to the client, so far."""
        totals = self.client.run(lambda dask_worker: dask_worker.transfer_outgoing_bytes_total)
        return int(sum(totals.values()))


@contextlib.contextmanager
def dask_executor(*, scheduler: str | None = None, workers: int | None = None,
                  memory_limit: str | int | None = "auto") -> Iterator[DaskExecutor]:
    """A :class:`DaskExecutor` on a cluster, closed on exit.

    Parameters
    ----------
    scheduler : str, optional
        Address of a running scheduler (``tcp://HOST:PORT``) to use as it is.
    workers : int, optional
        Without ``scheduler``: start a ``LocalCluster`` on 127.0.0.1 with this
        many worker processes (default 2) of one thread each, stopped on exit.
    memory_limit : optional
        Per worker of the local cluster (dask's notation, e.g. ``"2GB"``).

    Raises
    ------
    InvalidParameter
        dask.distributed is not installed, the scheduler cannot be reached, or
        ``workers`` is below 1.
    """
    try:
        from distributed import Client, LocalCluster
    except ImportError:  # pragma: no cover - depends on the installation
        raise InvalidParameter(
            "the tiled engine on a cluster needs dask.distributed; install it with "
            "'pip install dask distributed', or run without --scheduler/--workers"
        ) from None
    if scheduler is not None:
        try:
            client = Client(scheduler, timeout=30)
        except (OSError, TimeoutError) as exc:
            raise InvalidParameter(
                f"cannot reach the Dask scheduler at {scheduler} ({exc}); give the address "
                "it prints on start, e.g. tcp://10.0.0.5:8786"
            ) from None
        try:
            yield DaskExecutor(client)
        finally:
            client.close()
        return
    n = 2 if workers is None else int(workers)
    if n < 1:
        raise InvalidParameter(f"workers must be 1 or more, not {workers!r}")
    # The scheduler's HTTP server starts even without a dashboard, on port 8787
    # unless told otherwise: a free port keeps two runs (or another program on
    # 8787) from failing the start.
    cluster = LocalCluster(n_workers=n, threads_per_worker=1, processes=True, host="127.0.0.1",
                           dashboard_address="127.0.0.1:0", memory_limit=memory_limit)
    try:
        client = Client(cluster)
        try:
            yield DaskExecutor(client)
        finally:
            client.close()
    finally:
        cluster.close()
