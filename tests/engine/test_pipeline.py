"""Every executor and every tile store runs the same pipeline (sillmark.engine.pipeline).

The tiled Priority-Flood (Barnes 2016) is written once; *how* its tile steps
run (sillmark.engine.executors: serial, threads, Dask) and *where* the tiles
are kept (sillmark.engine.stores: memory, scratch files) must not change a
bit of the result. The reference for correctness is the separate textbook
minimax Dijkstra of tests/textbook_flood.py, so a pipeline that agreed with
itself but computed the wrong thing would still fail here.
"""

from __future__ import annotations

import dataclasses
import pickle

import numpy as np
import pytest

from sillmark.engine.executors import SerialExecutor, ThreadExecutor, dask_executor
from sillmark.engine.flood import priority_flood
from sillmark.engine.pipeline import run_pipeline
from sillmark.engine.tile_inputs import ArrayTiles
from sillmark.engine.stores import FileStore, MemoryStore
from sillmark.errors import InvalidParameter
from tests.loopback import loopback_cluster
from tests.engine.test_flood import synthetic_terrain
from tests.textbook_flood import minimax_stage

TILE = 7


@pytest.fixture(scope="module")
def site():
    """A 37 x 45 terrain with nodata patches and pits, outlets on the edge and one inland."""
    z = synthetic_terrain(37, 45, 2024).astype(np.float32)
    z[10:13, 20:24] = np.nan
    z[30, 5] = np.nan
    mask = np.zeros(z.shape, bool)
    mask[0, :] = mask[-1, :] = mask[:, 0] = mask[:, -1] = True
    mask[18, 30] = True
    return z, mask


def flood(site, executor, store, connectivity=8):
    z, mask = site
    return priority_flood(z, mask, connectivity=connectivity, tile_size=TILE,
                          executor=executor, store=store)


def assert_same_bits(a, b):
    for name in ("onset_stage", "flood_tree", "depression_id"):
        assert np.array_equal(getattr(a, name), getattr(b, name), equal_nan=True), name
    for name in a.depressions.columns:
        assert np.array_equal(getattr(a.depressions, name), getattr(b.depressions, name),
                              equal_nan=True), name
    assert (a.unreached_cells, a.heap_pops) == (b.unreached_cells, b.heap_pops)


def assert_textbook(site, r, connectivity):
    z, mask = site
    s = minimax_stage(z, mask, connectivity)
    assert np.array_equal(r.onset_stage, s, equal_nan=True)


@pytest.mark.parametrize("connectivity", [8, 4])
def test_serial_and_threads_with_either_store_give_the_same_bits(site, tmp_path, connectivity):
    reference = flood(site, SerialExecutor(), MemoryStore(), connectivity)
    assert_textbook(site, reference, connectivity)
    for executor in (SerialExecutor(), ThreadExecutor(3)):
        for store in (MemoryStore(), FileStore(tmp_path)):
            assert_same_bits(reference, flood(site, executor, store, connectivity))
    assert not list(tmp_path.iterdir())  # closing a file store removes its scratch


@pytest.mark.cluster
def test_dask_on_loopback_with_a_file_store_gives_the_same_bits(site, tmp_path):
    reference = flood(site, ThreadExecutor(), MemoryStore())
    assert_textbook(site, reference, 8)
    with loopback_cluster(2) as cluster, dask_executor(scheduler=cluster.scheduler_address) as ex:
        assert_same_bits(reference, flood(site, ex, FileStore(tmp_path)))
        assert ex.received_bytes > 0 and ex.worker_count() == 2


def test_a_wrong_step_is_caught_by_the_textbook(site, monkeypatch):
    # A seed graph solved wrongly (every seed held one unit too high) still
    # agrees across executors, but not with the textbook minimax Dijkstra.
    from sillmark.engine import pipeline

    real = pipeline.solve_seeds

    def off_by_one(plan, floods, dirs, culverts=None):
        return [dataclasses.replace(s, lam=np.where(np.isfinite(s.lam), s.lam + 1, s.lam)
                                    .astype(np.float32)) for s in real(plan, floods, dirs)]

    monkeypatch.setattr(pipeline, "solve_seeds", off_by_one)
    a = flood(site, SerialExecutor(), MemoryStore())
    b = flood(site, ThreadExecutor(2), MemoryStore())
    assert np.array_equal(a.onset_stage, b.onset_stage, equal_nan=True)
    z, mask = site
    assert not np.array_equal(a.onset_stage, minimax_stage(z, mask, 8), equal_nan=True)


def test_layers_read_by_rows_from_a_file_store_equal_the_whole_result(site, tmp_path):
    z, mask = site
    whole = flood(site, SerialExecutor(), MemoryStore())
    store = FileStore(tmp_path)
    try:
        result = run_pipeline(ArrayTiles(z, mask), executor=SerialExecutor(), store=store,
                              tile_size=TILE)
        for layer, expected in (("onset_stage", whole.onset_stage),
                                ("flood_tree", whole.flood_tree),
                                ("depression_id", whole.depression_id),
                                ("fill_depth", whole.fill_depth), ("elevation", z)):
            rows = [result.read(layer, r0, min(r0 + 5, z.shape[0]))
                    for r0 in range(0, z.shape[0], 5)]
            assert np.array_equal(np.concatenate(rows), expected, equal_nan=True), layer
    finally:
        store.close()


def test_executors_keep_order_and_raise_the_first_error():
    items = list(range(23))
    assert SerialExecutor().map(lambda x: x * x, items) == [x * x for x in items]
    assert ThreadExecutor(4).map(lambda x: x * x, items) == [x * x for x in items]
    assert ThreadExecutor(4)(lambda a, b: a + b, [(1, 2), (3, 4)]) == [3, 7]

    def boom(x):
        if x == 5:
            raise ValueError("five")
        return x

    with pytest.raises(ValueError, match="five"):
        ThreadExecutor(3).map(boom, items)
    with pytest.raises(InvalidParameter, match="workers"):
        ThreadExecutor(0)


def test_a_memory_store_does_not_travel_but_a_file_store_does(tmp_path):
    with pytest.raises(TypeError, match="FileStore"):
        pickle.dumps(MemoryStore())
    store = FileStore(tmp_path)
    again = pickle.loads(pickle.dumps(store))
    assert again.folder == store.folder
    store.close()
