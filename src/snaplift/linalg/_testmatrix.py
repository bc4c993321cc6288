"""Random test matrices keyed by global index, generated once per process and cached.

A test matrix row depends only on (seed, stream, global index): the snapshot map
``Omega`` (snapshots x width) is keyed by the archive's snapshot number, the row map
``Psi^T`` (rows x width) by the row of the stacked snapshot matrix. So any tiling, any
subset and any later append see the same numbers (Tropp, Yurtsever, Udell, Cevher 2017,
Sec. 2, need exactly this for linear updates).

Two kinds of row map: Gaussian (dense, ``rows x width``) and the *sparse sign* map of
Tropp, Yurtsever, Udell, Cevher (2019), Sec. 3.3 (after Clarkson & Woodruff 2013 and
Meng & Mahoney 2013): every row gets ``zeta`` distinct columns chosen uniformly
(Floyd's algorithm: Bentley & Floyd 1987, "A sample of brilliance", CACM 30(9)) holding
random signs +-1, the rest zero. Applied to a tile it costs ``zeta`` additions per entry
instead of ``width`` multiply-adds, it is ~16x smaller to keep, and it is as accurate in
the sketch (measured in ``snaplift bench`` and the tests).

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
from typing import Any

import numpy as np

from snaplift.linalg._kernels import TEST_BLOCK_ROWS, gaussian_block
from snaplift.units import usable_cores

__all__ = ["gaussian_map", "row_map", "cached_row_map", "set_cache_limit", "cache_info", "clear_cache", "release",
           "SNAPSHOT_STREAM", "ROW_STREAM", "SPARSE_STREAM", "ROW_MAPS", "SparseSignMap", "sparse_nonzeros",
           "load_sparse_library", "apply_corange", "apply_left"]

#: stream numbers separate the independent test matrices drawn from one seed
SNAPSHOT_STREAM = 0
ROW_STREAM = 1
SPARSE_STREAM = 2
#: the co-range (row) test matrix kinds of ``compress.corange_map``
ROW_MAPS = ("sparse", "gaussian")
#: nonzeros per row of the sparse sign map: zeta = min(width, 8) (Tropp et al. 2019, Sec. 3.3; from memory)
SPARSE_NONZEROS = 8
#: rows of a tile transposed at a time when a sparse map is applied (a few MiB, cache-resident)
_SPARSE_CHUNK_ROWS = 2048
#: snapshots of a tile transposed at a time into that buffer
_TRANSPOSE_SNAPSHOTS = 8

_lock = threading.Lock()
_pid = os.getpid()
_cache: OrderedDict[tuple, np.ndarray | SparseSignMap] = OrderedDict()
_limit = 1 << 30
_stats = {"generated": 0, "hits": 0}
#: threads that generate one large test matrix (blocks of rows at a time), and the
#: fewest blocks worth a thread of their own
_GENERATOR_THREADS = min(4, usable_cores())
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


def _sparse() -> Any:
    import scipy.sparse as sparse

    return sparse


def load_sparse_library() -> None:
    """Import ``scipy.sparse`` now. A sketch pass calls it before its first read: imported
    by the first co-range product instead, it read its files through the same capped device
    as the archive's tiles (2.5-3 s of the first tile at 200 MB/s, issue 16), and imported
    with this module it cost every command, sketch or not, 0.1 s of startup."""
    _sparse()


def sparse_nonzeros(width: int) -> int:
    """``zeta = min(width, 8)`` nonzeros per row of the sparse sign map."""
    return max(1, min(int(width), SPARSE_NONZEROS))


class _SparseWork:
    """Work arrays of :func:`_sparse_blocks` for ``blocks`` blocks of rows, made once per map
    and reused by every batch: in worker processes, whose allocator gives freed blocks back
    at once (``cluster.options.WORKER_MALLOC_ENVIRONMENT``), each batch's fresh temporaries
    (several MiB) were faulted in page by page."""

    def __init__(self, blocks: int, zeta: int) -> None:
        self.draws = np.empty((blocks, zeta, TEST_BLOCK_ROWS), dtype=np.int64)
        self.bits = np.empty((blocks, TEST_BLOCK_ROWS, zeta), dtype=np.int64)
        self.columns = np.empty((blocks, TEST_BLOCK_ROWS, zeta), dtype=np.int64)
        self.equal = np.empty((blocks, TEST_BLOCK_ROWS, zeta), dtype=bool)
        self.taken = np.empty((blocks, TEST_BLOCK_ROWS), dtype=bool)
        self.signs = np.empty((blocks * TEST_BLOCK_ROWS, zeta), dtype=np.float64)


def _sparse_blocks(seed: int, first: int, last: int, width: int, zeta: int, work: _SparseWork | None = None
                   ) -> tuple[np.ndarray, np.ndarray]:
    """Columns and signs of the blocks ``first..last`` of rows (``(blocks x TEST_BLOCK_ROWS) x zeta``).

    Floyd's algorithm per row: for ``j = width - zeta .. width - 1`` draw ``t`` in
    ``[0, j]`` and take ``j`` if ``t`` is already taken, else ``t``: a uniformly random
    ``zeta``-subset of distinct columns (Bentley & Floyd 1987). Each block's draws come
    from its own generator keyed (seed, stream, block), in a fixed order (the ``zeta``
    draws for all rows of the block, then the signs), so the rows never depend on which
    blocks are generated together; the selection is then done for all blocks at once.
    The results are views of ``work`` (int64 columns, float64 signs), valid until its next use.
    """
    count = max(0, int(last) - int(first))
    if work is None or work.draws.shape[0] < count:
        work = _SparseWork(count, zeta)
    draws, bits, columns = work.draws[:count], work.bits[:count], work.columns[:count]
    highs = np.broadcast_to(np.arange(width - zeta + 1, width + 1, dtype=np.int64)[:, np.newaxis],
                            (zeta, TEST_BLOCK_ROWS))
    for i, block in enumerate(range(int(first), int(last))):
        rng = np.random.default_rng(np.random.SeedSequence([int(seed), SPARSE_STREAM, block]))
        draws[i] = rng.integers(0, highs)  # row z: uniform in [0, width - zeta + z]
        bits[i] = rng.integers(0, 2, size=(TEST_BLOCK_ROWS, zeta))
    taken = work.taken[:count]
    for z, j in enumerate(range(width - zeta, width)):
        t = draws[:, z, :]
        columns[:, :, z] = t
        if z:  # t where it is not taken yet, else j
            equal = work.equal[:count, :, :z]
            np.equal(columns[:, :, :z], t[:, :, np.newaxis], out=equal)
            np.any(equal, axis=2, out=taken)
            np.copyto(columns[:, :, z], j, where=taken)
    signs = work.signs[:count * TEST_BLOCK_ROWS]
    np.multiply(bits.reshape(-1, zeta), 2.0, out=signs)
    signs -= 1.0
    return columns.reshape(-1, zeta), signs


#: blocks of rows generated together (their work arrays, 1 MiB at zeta = 8, stay in cache)
_SPARSE_BATCH_BLOCKS = 16


class SparseSignMap:
    """Rows ``start..stop`` of a sparse sign row map ``Psi^T`` ((stop - start) x width).

    Row ``i`` depends only on (seed, global row ``i``'s block, width), like the Gaussian
    map, so any tiling sees the same matrix. Stored as the CSC arrays of ``Psi`` restricted
    to these rows (``zeta`` entries per column), cut in chunks of rows for
    :meth:`corange`.
    """

    def __init__(self, start: int, stop: int, width: int, *, seed: int) -> None:
        self.start, self.stop, self.width = int(start), int(stop), int(width)
        self.zeta = sparse_nonzeros(width)
        rows = self.stop - self.start
        self.columns = np.empty((rows, self.zeta), dtype=np.int32)
        self.signs = np.empty((rows, self.zeta), dtype=np.float64)
        first = self.start // TEST_BLOCK_ROWS
        last = (max(self.stop, self.start + 1) - 1) // TEST_BLOCK_ROWS + 1
        work = _SparseWork(min(_SPARSE_BATCH_BLOCKS, max(1, last - first)), self.zeta)
        for b0 in range(first, last if rows else first, _SPARSE_BATCH_BLOCKS):
            b1 = min(last, b0 + _SPARSE_BATCH_BLOCKS)
            columns, signs = _sparse_blocks(seed, b0, b1, self.width, self.zeta, work)
            lo, hi = max(self.start, b0 * TEST_BLOCK_ROWS), min(self.stop, b1 * TEST_BLOCK_ROWS)
            offset = b0 * TEST_BLOCK_ROWS
            self.columns[lo - self.start:hi - self.start] = columns[lo - offset:hi - offset]
            self.signs[lo - self.start:hi - self.start] = signs[lo - offset:hi - offset]
        self.columns.setflags(write=False)
        self.signs.setflags(write=False)
        # real chunk matrices, built on first use: views of columns/signs, so they cost
        # only their column pointers (4 bytes per row); several threads may build them at
        # once, harmlessly (the same values)
        self._chunk_psi: tuple[int, list[Any]] | None = None

    @property
    def shape(self) -> tuple[int, int]:
        return self.stop - self.start, self.width

    @property
    def nbytes(self) -> int:
        """Columns, signs and the int32 column pointers of the chunk matrices (built on first use)."""
        return int(self.columns.nbytes + self.signs.nbytes + 4 * (self.stop - self.start))

    def _psi(self, r0: int, r1: int, dtype: np.dtype) -> Any:
        """``Psi`` restricted to local rows ``r0..r1``: a ``width x (r1 - r0)`` CSC matrix.

        Real: its arrays are views of ``columns`` and ``signs`` (int32 pointers, so scipy
        keeps the int32 indices as they are); complex: the signs are copied as complex.
        """
        count = r1 - r0
        indptr = np.arange(0, count * self.zeta + 1, self.zeta, dtype=np.int32)
        data = self.signs[r0:r1].reshape(-1).astype(dtype, copy=False)
        indices = self.columns[r0:r1].reshape(-1)
        if data.dtype != np.float64:
            return _sparse().csc_matrix((data, indices, indptr), shape=(self.width, count))
        # the constructor copies views of read-only arrays; these arrays are valid CSC by
        # construction (zeta distinct row indices < width per column), so set them
        psi = _sparse().csc_matrix((self.width, count), dtype=np.float64)
        psi.data, psi.indices, psi.indptr = data, indices, indptr
        return psi

    def _chunks(self, chunk: int, dtype: np.dtype) -> list[tuple[int, int, Any]]:
        """``(r0, r1, Psi[:, r0:r1])`` for consecutive chunks of ``chunk`` local rows."""
        rows = self.stop - self.start
        bounds = [(r0, min(rows, r0 + chunk)) for r0 in range(0, rows, chunk)]
        if np.dtype(dtype) != np.float64:
            return [(r0, r1, self._psi(r0, r1, dtype)) for r0, r1 in bounds]
        kept = self._chunk_psi
        if kept is None or kept[0] != chunk:
            kept = self._chunk_psi = (chunk, [self._psi(r0, r1, np.dtype(np.float64)) for r0, r1 in bounds])
        return [(r0, r1, matrix) for (r0, r1), matrix in zip(bounds, kept[1])]

    def corange(self, raw: np.ndarray) -> np.ndarray:
        """``raw @ Psi^T`` for a snapshot-major tile ``raw`` (snapshots x rows): (snapshots x width).

        The tile is transposed a chunk of rows at a time into a small buffer (the sparse
        product wants rows of ``X`` contiguous); each chunk is one scatter-add of
        ``zeta`` signed copies of its rows (``scipy.sparse``, outside the GIL).
        """
        m_t, rows = raw.shape
        if rows != self.stop - self.start:
            raise ValueError(f"sparse map of {self.stop - self.start} rows applied to a tile of {rows}")
        dtype = np.result_type(raw.dtype, np.float64)
        out = np.zeros((self.width, m_t), dtype=dtype)
        chunk = max(1, min(rows, _SPARSE_CHUNK_ROWS))
        buffer = np.empty((chunk, m_t), dtype=raw.dtype)
        for r0, r1, psi in self._chunks(chunk, dtype):
            part = buffer[: r1 - r0]
            # transposed a few snapshots at a time: each source row segment stays in cache
            # while it is spread over the buffer (4x faster than one strided copy, measured)
            for s0 in range(0, m_t, _TRANSPOSE_SNAPSHOTS):
                s1 = min(m_t, s0 + _TRANSPOSE_SNAPSHOTS)
                np.copyto(part[:, s0:s1], raw[s0:s1, r0:r1].T)
            out += psi @ part
        return out.T

    def left(self, values: np.ndarray) -> np.ndarray:
        """``Psi values`` for ``values`` with these rows (rows x k, or a vector of rows).

        A chunk of rows at a time, each made contiguous in a small buffer: a column-major
        ``values`` (a range basis) is never copied whole.
        """
        values = np.asarray(values)
        rows = self.stop - self.start
        if values.shape[0] != rows:
            raise ValueError(f"sparse map of {rows} rows applied to {values.shape[0]} rows")
        dtype = np.result_type(values.dtype, np.float64)
        out = np.zeros((self.width, *values.shape[1:]), dtype=dtype)
        for r0, r1, psi in self._chunks(max(1, min(rows, _SPARSE_CHUNK_ROWS)), dtype):
            out += psi @ np.ascontiguousarray(values[r0:r1])
        return out

    def dense(self) -> np.ndarray:
        """The same rows as a dense ``rows x width`` array (tests, small cases)."""
        out = np.zeros(self.shape)
        np.put_along_axis(out, self.columns.astype(np.int64), self.signs, axis=1)
        return out


def apply_corange(raw: np.ndarray, psi: np.ndarray | SparseSignMap) -> np.ndarray:
    """This tile's columns of ``Psi X`` as ``(snapshots, width)`` for either kind of row map.

    Tropp et al. (2017) apply the co-range map without conjugation: ``W = Psi X``.
    """
    if isinstance(psi, SparseSignMap):
        return psi.corange(raw)
    return raw @ psi


def apply_left(psi: np.ndarray | SparseSignMap, values: np.ndarray) -> np.ndarray:
    """``Psi values`` (width x k or width) from these rows of the map, for either kind."""
    if isinstance(psi, SparseSignMap):
        return psi.left(values)
    return psi.T @ values


def row_map(start: int, stop: int, width: int, *, seed: int, complex_valued: bool,
            stream: int = ROW_STREAM, kind: str = "gaussian") -> np.ndarray | SparseSignMap:
    """Rows ``start..stop`` of the row test matrix ``Psi^T`` ((stop - start) x width), uncached.

    ``kind="sparse"`` gives a :class:`SparseSignMap` (real signs, also for complex data).
    """
    if kind == "sparse":
        return SparseSignMap(start, stop, width, seed=seed)
    if kind != "gaussian":
        raise ValueError(f"row map kind {kind!r} is not one of {', '.join(ROW_MAPS)}")
    return gaussian_map(np.arange(start, stop), width, seed=seed, complex_valued=complex_valued, stream=stream)


def _check_pid() -> None:
    global _pid, _cache
    if os.getpid() != _pid:
        _pid = os.getpid()
        _cache = OrderedDict()


def cached_row_map(start: int, stop: int, width: int, *, seed: int, complex_valued: bool,
                   stream: int = ROW_STREAM, kind: str = "gaussian") -> np.ndarray | SparseSignMap:
    """:func:`row_map` through the per-process cache; the result must not be modified."""
    key = (kind, int(seed), int(stream), int(width), bool(complex_valued), int(start), int(stop))
    with _lock:
        # one generator at a time: a second thread asking for the same rows waits and hits
        _check_pid()
        found = _cache.get(key)
        if found is not None:
            _cache.move_to_end(key)
            _stats["hits"] += 1
            return found
        value = row_map(start, stop, width, seed=seed, complex_valued=complex_valued, stream=stream, kind=kind)
        if isinstance(value, np.ndarray):
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
