"""Random test matrices keyed by global index, generated once per process and cached.

A test matrix row depends only on (seed, stream, global index): the snapshot map
``Omega`` (snapshots x width) is keyed by the archive's snapshot number, the row map
``Psi^T`` (rows x width) by the row of the stacked snapshot matrix. So any tiling, any
subset and any later append see the same numbers (Tropp, Yurtsever, Udell, Cevher 2017,
Sec. 2, need exactly this for linear updates).

Generating a row map costs about as much as one tile's arithmetic, so a process keeps
what it generated (an LRU cache bounded in bytes, :func:`set_cache_limit`): a worker
builds the rows of its tiles on its first tile and reuses them for every later tile and
pass. The cache lives in the process, is never pickled, and starts empty after a fork.
"""

from __future__ import annotations

import os
import threading
from collections import OrderedDict
from concurrent.futures import ThreadPoolExecutor

import numpy as np

from snaplift.linalg._kernels import TEST_BLOCK_ROWS, gaussian_block

__all__ = ["gaussian_map", "row_map", "cached_row_map", "set_cache_limit", "cache_info", "clear_cache", "release",
           "SNAPSHOT_STREAM", "ROW_STREAM"]

#: stream numbers separate the independent test matrices drawn from one seed
SNAPSHOT_STREAM = 0
ROW_STREAM = 1

_lock = threading.Lock()
_pid = os.getpid()
_cache: OrderedDict[tuple, np.ndarray] = OrderedDict()
_limit = 1 << 30
_stats = {"generated": 0, "hits": 0}
#: threads that generate one large test matrix (blocks of rows at a time), and the
#: fewest blocks worth a thread of their own
_GENERATOR_THREADS = max(1, min(4, len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity")
                                else (os.cpu_count() or 1)))
_BLOCKS_PER_THREAD = 64


def gaussian_map(
    snapshot_index: np.ndarray, width: int, *, seed: int, complex_valued: bool, stream: int = SNAPSHOT_STREAM
) -> np.ndarray:
    """Gaussian test matrix whose row ``j`` depends only on global index ``snapshot_index[j]``.

    Rows are generated in fixed blocks of :data:`TEST_BLOCK_ROWS` global indices keyed by
    the seed, so the same index gets the same row whatever tiling or subset is used.

    Example
    -------
    >>> omega = gaussian_map(np.arange(10), 4, seed=0, complex_valued=False)
    >>> omega.shape
    (10, 4)
    """
    snapshot_index = np.asarray(snapshot_index, dtype=np.int64)
    dtype = np.complex128 if complex_valued else np.float64
    out = np.empty((snapshot_index.size, width), dtype=dtype)
    if snapshot_index.size == 0:
        return out
    first, last = int(snapshot_index[0]), int(snapshot_index[-1])
    if last - first + 1 == snapshot_index.size and np.all(np.diff(snapshot_index) == 1):
        _fill_range(out, first, seed, stream, width, complex_valued)
        return out
    # any other selection: group positions by generated block (sorting, not one scan per block)
    blocks = snapshot_index // TEST_BLOCK_ROWS
    order = np.argsort(blocks, kind="stable")
    ordered = blocks[order]
    cuts = np.flatnonzero(np.diff(ordered)) + 1
    for rows in np.split(order, cuts):
        block = int(blocks[rows[0]])
        generated = gaussian_block(seed, stream, block, width, complex_valued)
        out[rows] = generated[snapshot_index[rows] - block * TEST_BLOCK_ROWS]
    return out


def _fill_range(out: np.ndarray, start: int, seed: int, stream: int, width: int, complex_valued: bool) -> None:
    """Rows ``start .. start + len(out)`` of a test matrix, written block by block into ``out``.

    Blocks are independent streams (keyed by their number), so large ranges are generated
    by a few threads at once (the generator releases the GIL); the numbers do not depend
    on the thread count. Whole real blocks are drawn straight into ``out`` (the same
    numbers as :func:`gaussian_block`, without a copy).
    """
    stop = start + out.shape[0]
    blocks = range(start // TEST_BLOCK_ROWS, (stop - 1) // TEST_BLOCK_ROWS + 1)

    def fill(block: int) -> None:
        b0 = block * TEST_BLOCK_ROWS
        lo, hi = max(start, b0), min(stop, b0 + TEST_BLOCK_ROWS)
        if not complex_valued and lo == b0 and hi == b0 + TEST_BLOCK_ROWS:
            rng = np.random.default_rng(np.random.SeedSequence([int(seed), int(stream), int(block)]))
            rng.standard_normal(out=out[lo - start:hi - start])
            return
        generated = gaussian_block(seed, stream, block, width, complex_valued)
        out[lo - start:hi - start] = generated[lo - b0:hi - b0]

    def fill_many(part: range) -> None:
        for block in part:
            fill(block)

    threads = min(_GENERATOR_THREADS, max(1, len(blocks) // _BLOCKS_PER_THREAD))
    if threads <= 1:
        fill_many(blocks)
        return
    step = -(-len(blocks) // (4 * threads))
    parts = [blocks[i:i + step] for i in range(0, len(blocks), step)]
    with ThreadPoolExecutor(threads, thread_name_prefix="snaplift-testmatrix") as pool:
        list(pool.map(fill_many, parts))


def row_map(start: int, stop: int, width: int, *, seed: int, complex_valued: bool,
            stream: int = ROW_STREAM) -> np.ndarray:
    """Rows ``start..stop`` of the row test matrix ``Psi^T`` ((stop - start) x width), uncached."""
    return gaussian_map(np.arange(start, stop), width, seed=seed, complex_valued=complex_valued, stream=stream)


def _check_pid() -> None:
    global _pid, _cache
    if os.getpid() != _pid:
        _pid = os.getpid()
        _cache = OrderedDict()


def cached_row_map(start: int, stop: int, width: int, *, seed: int, complex_valued: bool,
                   stream: int = ROW_STREAM) -> np.ndarray:
    """:func:`row_map` through the per-process cache; the result must not be modified."""
    key = (int(seed), int(stream), int(width), bool(complex_valued), int(start), int(stop))
    with _lock:
        # one generator at a time: a second thread asking for the same rows waits and hits
        _check_pid()
        found = _cache.get(key)
        if found is not None:
            _cache.move_to_end(key)
            _stats["hits"] += 1
            return found
        value = row_map(start, stop, width, seed=seed, complex_valued=complex_valued, stream=stream)
        value.setflags(write=False)
        _stats["generated"] += 1
        if value.nbytes <= _limit:
            _cache[key] = value
            total = sum(v.nbytes for v in _cache.values())
            while total > _limit and len(_cache) > 1:
                _, dropped = _cache.popitem(last=False)
                total -= dropped.nbytes
        return value


def set_cache_limit(nbytes: int) -> None:
    """Bound the bytes of cached test matrices in this process (the tile plan sets it)."""
    global _limit
    with _lock:
        _limit = max(0, int(nbytes))


def cache_info() -> dict[str, int]:
    """Entries, bytes, generated and hit counts of this process's cache (tests, diagnostics)."""
    with _lock:
        _check_pid()
        return {"entries": len(_cache), "bytes": int(sum(v.nbytes for v in _cache.values())), **_stats}


def clear_cache() -> None:
    with _lock:
        _cache.clear()
        _stats.update(generated=0, hits=0)


def release() -> None:
    """Drop the cached matrices of this process, keeping the counts (end of a compress)."""
    with _lock:
        _cache.clear()
