"""Issue 16, item 3: memory a tile thread reuses instead of taking fresh pages per tile.

In worker processes the allocator gives freed blocks back at once (the trim threshold of
``cluster.options.WORKER_MALLOC_ENVIRONMENT``), so every new tile-sized buffer is faulted
in page by page. These tests check which memory is reused and that the sums stay those
of numpy; none depends on a time.
"""

from __future__ import annotations

import threading
from types import SimpleNamespace

import numpy as np

from snaplift.archive import _handles
from snaplift.linalg import _testmatrix
from snaplift.linalg.sketch import psi_products
from snaplift.stream import _prefetch, _slots
from snaplift.stream.compress import _row_maps_ahead


def _address(array: np.ndarray) -> int:
    return int(array.__array_interface__["data"][0])


def test_reads_of_one_tile_thread_alternate_between_two_reader_threads_and_reuse_their_memory() -> None:
    _prefetch.clear()
    _handles.release_tile_buffers()
    readers: list[int | None] = []

    def read() -> np.ndarray:
        readers.append(threading.get_ident())
        return _handles.tile_buffer((_handles.TILE_BUFFER_MIN_BYTES // 8,), np.float64)

    try:
        current = _prefetch.take(("pass", 0), read, 1)  # read now, in a reader thread
        _prefetch.request(("pass", 1), read, 1)  # the next tile, read ahead while this one is used
        first = _address(current)
        following = _prefetch.take(("pass", 1), read, 1)
        del current  # tile 0 is done
        _prefetch.request(("pass", 2), read, 1)
        third = _prefetch.take(("pass", 2), read, 1)
        assert readers[0] != readers[1] and readers[2] == readers[0]
        # tile 2 is read into tile 0's memory, free by then; never into the tile in use
        assert _address(third) == first
        assert not np.shares_memory(third, following)
    finally:
        _prefetch.clear()
        _handles.release_tile_buffers()


def test_range_products_keep_one_chunk_buffer_per_thread_until_the_slots_are_collected() -> None:
    rng = np.random.default_rng(5)
    n = 40000
    raw = rng.standard_normal((6, n))
    right = rng.standard_normal((6, 9))  # a chunk of 9 x 16384 float64: over KEEP_CHUNK_BYTES
    me = threading.get_ident()
    _slots.release_chunk_buffers()
    _slots.add_range_product("buffers", "range", (n, 9), 0, (0, n), raw, right, 0, -1)
    kept = _slots._chunk_buffers[me]
    _slots.add_range_product("buffers", "range", (n, 9), 1, (0, n), 2 * raw, right, 0, 0)
    assert _slots._chunk_buffers[me] is kept
    parts = _slots.collect("buffers", "range")
    assert not _slots._chunk_buffers  # collected: the pass is over
    value, tiles = parts[0]
    assert tiles == [0, 1]
    # numpy's product as the reference
    np.testing.assert_allclose(value, 3 * (raw.T @ right), rtol=1e-12, atol=1e-12)


def test_the_driver_makes_its_row_maps_while_worker_processes_read() -> None:
    fields = [SimpleNamespace(offset=0, stop=700), SimpleNamespace(offset=700, stop=1000)]
    row_blocks = [[(0, 350), (350, 700)], [(0, 300)]]
    inputs = SimpleNamespace(passes=SimpleNamespace(runner=SimpleNamespace(kind="distributed")), corange_width=12,
                             matrix=SimpleNamespace(fields=fields), row_blocks=row_blocks,
                             options=SimpleNamespace(seed=7, corange_map="sparse"),
                             source=SimpleNamespace(complex_valued=False))
    _testmatrix.clear_cache()
    try:
        thread = _row_maps_ahead(inputs)  # type: ignore[arg-type]
        assert thread is not None
        thread.join()
        made = _testmatrix.cache_info()
        assert made["generated"] == 3
        q = np.random.default_rng(1).standard_normal((1000, 4))
        psi_q, _ = psi_products(q, [(0, 700), (700, 1000)], 12, seed=7, complex_valued=False, kind="sparse",
                                row_blocks=row_blocks)
        after = _testmatrix.cache_info()
        assert after["generated"] == 3 and after["hits"] == made["hits"] + 3  # the finish made none again
        # the same numbers as the map made afresh, uncached, as one block
        whole = _testmatrix.row_map(0, 1000, 12, seed=7, complex_valued=False, kind="sparse")
        np.testing.assert_allclose(psi_q, whole.dense().T @ q, rtol=1e-12, atol=1e-12)
        threads = SimpleNamespace(**{**vars(inputs), "passes": SimpleNamespace(runner=SimpleNamespace(kind="threads"))})
        assert _row_maps_ahead(threads) is None  # type: ignore[arg-type]  # tile threads fill the cache
    finally:
        _testmatrix.clear_cache()


def test_sparse_map_rows_do_not_depend_on_the_batch_that_made_them() -> None:
    # one call for 40 blocks of rows, against batches of 16 sharing one set of work arrays
    columns, signs = (a.copy() for a in _testmatrix._sparse_blocks(3, 0, 40, 50, 8))
    work = _testmatrix._SparseWork(16, 8)
    parts = [tuple(a.copy() for a in _testmatrix._sparse_blocks(3, b0, min(40, b0 + 16), 50, 8, work))
             for b0 in range(0, 40, 16)]
    np.testing.assert_array_equal(columns, np.concatenate([p[0] for p in parts]))
    np.testing.assert_array_equal(signs, np.concatenate([p[1] for p in parts]))
    # Floyd's algorithm gives zeta distinct columns per row (Bentley & Floyd 1987), signs +-1
    ordered = np.sort(columns, axis=1)
    assert np.all(np.diff(ordered, axis=1) > 0) and ordered.min() >= 0 and ordered.max() < 50
    assert set(np.unique(signs)) == {-1.0, 1.0}
