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

import numpy as np

from snaplift.linalg._kernels import TEST_BLOCK_ROWS, gaussian_block

__all__ = ["gaussian_map", "row_map", "cached_row_map", "set_cache_limit", "cache_info", "clear_cache",
           "SNAPSHOT_STREAM", "ROW_STREAM"]

#: stream numbers separate the independent test matrices drawn from one seed
SNAPSHOT_STREAM = 0
ROW_STREAM = 1

_lock = threading.Lock()
_pid = os.getpid()
_cache: OrderedDict[tuple, np.ndarray] = OrderedDict()
_limit = 1 << 30
_stats = {"generated": 0, "hits": 0}


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
    blocks = snapshot_index // TEST_BLOCK_ROWS
    for block in np.unique(blocks):
        rows = np.flatnonzero(blocks == block)
        generated = gaussian_block(seed, stream, int(block), width, complex_valued)
        out[rows] = generated[snapshot_index[rows] - block * TEST_BLOCK_ROWS]
    return out


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
