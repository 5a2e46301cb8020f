"""A dask.distributed cluster on loopback for the tests of the tiled engine."""

from __future__ import annotations

import contextlib

import pytest


@contextlib.contextmanager
def loopback_cluster(n_workers: int):
    """A LocalCluster of ``n_workers`` worker processes (1 thread, 1 GB each) on
    127.0.0.1, started here and closed on exit; skips the test without distributed."""
    distributed = pytest.importorskip("distributed")
    cluster = distributed.LocalCluster(n_workers=n_workers, threads_per_worker=1, processes=True,
                                       host="127.0.0.1", dashboard_address="127.0.0.1:0",
                                       memory_limit="1GB")
    try:
        yield cluster
    finally:
        cluster.close()


def analyse_on_tiles(dem_path, out, *, outlets=("edge",), executor=None, derived=False,
                     **options):
    """:func:`sillmark.run.analyse` on a DEM file read tile by tile, the tiles in
    scratch files, one after another unless an executor is given; by default
    only the engine's files (:data:`sillmark.run.TILED_FILE_NAMES`), which the
    tests of the outlines and the hierarchy add to."""
    from sillmark.engine.executors import SerialExecutor
    from sillmark.run import analyse

    return analyse(dem_path, outlets, out, executor=SerialExecutor() if executor is None
                   else executor, store="files", derived=derived, **options)
