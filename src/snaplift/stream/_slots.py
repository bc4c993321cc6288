"""Per-process accumulation slots: range products summed in place where the tile was read.

A range product ``Y = X M`` (n x k) gets one term per time block; returning every term
to the driver would move ``n k`` values per tile and fold them serially there, which
costs more than the product itself for time-major tiles. Instead tiles add their terms
into one of ``S`` slots with one BLAS ``gemm`` (no temporary beyond a row chunk; one
column-major accumulator per row block, the faster layout for this product), and the
driver collects the slots at the end of a pass (and before a checkpoint, with no task
running) and sums them in slot order. Tile ``i`` of a pass goes to slot ``i mod S``;
its term is added right after its predecessor's in that slot, so every sum is formed in
the same order on every run (bitwise reproducible for a plan and a worker count, also
across a resume whose checkpoints fall on the same tiles). A slot records the tiles it
holds, so the driver can check that every tile was counted exactly once (a worker that
died loses its slots; their tiles are read again).

**No task ever waits for another.** A tile whose predecessor has not been added yet
(a worker may start tasks in any order: ``distributed`` orders the tasks of one
submission generation by their random keys) parks its product (rows x k, a result in
flight that the memory plan already counts) in the slot and returns; the predecessor,
when it arrives, adds it in order. An earlier version made the tile wait on a
condition: with one thread per worker process the predecessor, queued behind it on the
same worker, could never run (the ``cluster: local`` hang). :func:`collect` adds any
product still parked (its predecessor was lost) after the ordered ones.

Slots live in the process (threads share the driver's; each worker process has its
own) and are never pickled. :func:`collect` empties them. A worker process on the
driver's host makes its slot's accumulator as one whole-height array in a file of the
memory file system the driver named, and hands over only the file's name: the driver maps
it, nothing is sent or copied (:mod:`snaplift.stream._shared_arrays`).
"""

from __future__ import annotations

import os
import threading
from dataclasses import dataclass, field

import numpy as np

from snaplift.stream._shared_arrays import SharedArray, allocate, remove

__all__ = ["add_range_product", "collect", "discard", "release_chunk_buffers"]

_lock = threading.Lock()
_pid = os.getpid()


@dataclass
class _Slot:
    shape: tuple[int, int]
    dtype: np.dtype
    #: the driver's memory file system (:mod:`snaplift.stream._shared_arrays`): in a worker
    #: process, the slot's accumulator is one whole-height array in a file there
    files: tuple[str, str] | None = None
    #: that file, once made (None: the row blocks are arrays of this process)
    shared: SharedArray | None = None
    #: the whole-height array in the file; the row blocks are views of it
    whole: np.ndarray | None = None
    #: one column-major accumulator per row block ``(r0, r1)`` (summed by :func:`_gemm_into`)
    blocks: dict[tuple[int, int], np.ndarray] = field(default_factory=dict)
    tiles: set[int] = field(default_factory=set)
    last: int = -1
    aborted: bool = False
    #: products of tiles whose predecessor had not been added yet: ``{predecessor: (tile, rows, product)}``
    parked: dict[int, tuple[int, tuple[int, int], np.ndarray]] = field(default_factory=dict)
    lock: threading.Lock = field(default_factory=threading.Lock)

    def rows(self, r0: int, r1: int) -> np.ndarray:
        block = self.blocks.get((r0, r1))
        if block is None:
            if self.files is not None and self.whole is None:
                made = allocate(self.shape, self.dtype, self.files)
                self.files = None  # tried once: a file, or row blocks of this process from now on
                if made is not None:
                    self.whole, self.shared = made
            if self.whole is not None:
                # a view: its sums land in place in the whole (each column's rows are
                # contiguous, as in a block of its own, so the product is as fast)
                block = self.whole[r0:r1]
            else:
                block = np.zeros((r1 - r0, self.shape[1]), dtype=self.dtype, order="F")
            self.blocks[(r0, r1)] = block
        return block

    def value(self) -> np.ndarray:
        """The whole ``shape`` accumulator (the row blocks put in place; one block, or the
        whole in a file, is returned as is).

        Empties the slot: each row block is released as soon as it is copied, so the
        slot's memory moves into the result rather than being held twice (issue 11: with
        many row blocks the copies of every slot at once went over compress.memory).
        """
        if self.whole is not None:
            whole, self.whole = self.whole, None
            self.blocks.clear()
            return whole
        if len(self.blocks) == 1:
            (r0, r1), block = next(iter(self.blocks.items()))
            if (r0, r1) == (0, self.shape[0]):
                self.blocks.clear()
                return block
        out = np.zeros(self.shape, dtype=self.dtype, order="F")
        for r0, r1 in sorted(self.blocks):
            out[r0:r1] += self.blocks.pop((r0, r1))
        return out


_slots: dict[tuple[str, str], dict[int, _Slot]] = {}
_aborted: set[str] = set()


#: per tile thread, the chunk buffer of its last large :func:`_gemm_into` (see there)
_chunk_buffers: dict[int, np.ndarray] = {}
#: chunk buffers at least this large are kept for the thread's next tile
KEEP_CHUNK_BYTES = 1 << 20


def _check_pid() -> None:
    global _pid, _slots, _aborted, _chunk_buffers
    if os.getpid() != _pid:
        _pid = os.getpid()
        _slots = {}
        _aborted = set()
        _chunk_buffers = {}


def _chunk_buffer(size: int, dtype: np.dtype) -> np.ndarray:
    """A flat buffer of at least ``size`` items for this thread: the one its previous
    product kept when it fits (taken out while in use), else a new one."""
    with _lock:
        _check_pid()
        kept = _chunk_buffers.pop(threading.get_ident(), None)
    if kept is not None and kept.dtype == dtype and size <= kept.size <= 2 * size:
        return kept
    return np.empty(size, dtype=dtype)


def _keep_chunk_buffer(buffer: np.ndarray) -> None:
    if buffer.nbytes >= KEEP_CHUNK_BYTES:
        with _lock:
            _check_pid()
            _chunk_buffers[threading.get_ident()] = buffer


def release_chunk_buffers() -> None:
    """Drop every thread's kept chunk buffer in this process (a pass's slots are collected)."""
    with _lock:
        _check_pid()
        _chunk_buffers.clear()


#: rows of ``raw^T @ right`` formed at a time by :func:`_gemm_into` (a 10 MiB temporary at k = 81)
GEMM_CHUNK_ROWS = 16384


def _gemm_into(out_rows: np.ndarray, raw: np.ndarray, right: np.ndarray) -> None:
    """``out_rows += raw^T @ right`` in place, a chunk of rows at a time.

    Each chunk is one numpy ``matmul`` ``right^T @ raw[:, chunk]`` (its transpose is the
    chunk of the result, column-major like the slot accumulators), then added in place.
    numpy releases the GIL inside BLAS; scipy's f2py BLAS wrappers (``dgemm`` with
    ``beta = 1``, which would add in one call) hold it for the whole product, and that
    stalls every other tile thread's Python-level work (measured: a spinning thread got
    6 % of its idle progress beside ``scipy.linalg.blas.dgemm``, 100 % beside
    ``numpy.matmul``). The chunked form costs ~10 % more alone and gives the same sums
    (one K-loop per entry, in the same order).
    """
    dtype = np.result_type(out_rows, raw, right)
    left = np.ascontiguousarray(np.asarray(right, dtype=dtype).T)  # k x b
    raw = np.asarray(raw)
    n = raw.shape[1]
    # one chunk buffer for the whole call: a temporary per chunk was a fresh mmap (and its
    # page faults) per chunk in worker processes, whose allocator keeps no freed blocks
    # (distributed's MALLOC_TRIM_THRESHOLD_ of 64 KiB, kept in cluster.options
    # WORKER_MALLOC_ENVIRONMENT): 40 % slower. The thread keeps it for its next tile
    # until the pass's slots are collected (:func:`collect`): a new one per tile was
    # 10 MiB of fresh pages per tile at k = 81 (20 000 page faults per worker and 1 GiB
    # sketch compress). It is the product's own temporary, held between two tiles of the
    # thread, never beside a second one.
    buffer = _chunk_buffer(left.shape[0] * min(n, GEMM_CHUNK_ROWS), np.dtype(np.result_type(left, raw)))
    try:
        for r0 in range(0, n, GEMM_CHUNK_ROWS):
            r1 = min(n, r0 + GEMM_CHUNK_ROWS)
            chunk = buffer[:left.shape[0] * (r1 - r0)].reshape(left.shape[0], r1 - r0)  # C-contiguous, as BLAS writes
            np.matmul(left, raw[:, r0:r1], out=chunk)
            out_rows[r0:r1] += chunk.T
    finally:
        _keep_chunk_buffer(buffer)


def _product(raw: np.ndarray, right: np.ndarray, dtype: np.dtype) -> np.ndarray:
    """``raw^T @ right`` as a new column-major array (a parked term)."""
    out = np.zeros((raw.shape[1], right.shape[1]), dtype=dtype, order="F")
    _gemm_into(out, raw, right)
    return out


def add_range_product(key: str, name: str, shape: tuple[int, int], tile_id: int, rows: tuple[int, int],
                      raw: np.ndarray, right: np.ndarray, slot_index: int = 0, after: int | None = None,
                      files: tuple[str, str] | None = None) -> None:
    """Add ``raw^T @ right`` (raw = the tile, snapshot-major) to rows ``rows`` of slot ``slot_index``.

    With ``after`` (the previous tile of this slot, -1 for the first) the term is added
    right after that tile's; if that one has not been added yet, the term is parked and
    added when it is (module docstring). Never blocks on another task. ``files``: the
    driver's memory file system, where a worker process makes a whole-height
    accumulator, so that the driver collects it without a copy
    (:mod:`snaplift.stream._shared_arrays`).
    """
    dtype = np.result_type(raw, right)
    with _lock:
        _check_pid()
        if key in _aborted:
            raise RuntimeError(f"compress job {key} was stopped")
        group = _slots.setdefault((key, name), {})
        slot = group.get(slot_index)
        if slot is None:
            slot = group[slot_index] = _Slot((int(shape[0]), int(shape[1])), np.dtype(dtype), files)
    r0, r1 = int(rows[0]), int(rows[1])
    with slot.lock:
        if slot.aborted:
            raise RuntimeError(f"compress job {key} was stopped")
        if tile_id in slot.tiles or any(tile_id == parked[0] for parked in slot.parked.values()):
            raise RuntimeError(f"tile {tile_id} added twice to one accumulation slot")
        in_order = after is None or slot.last == after
    if not in_order:
        # the product is formed outside the lock; parking it holds the lock only briefly
        product = _product(raw, right, np.dtype(dtype))
        with slot.lock:
            if slot.last != after:
                slot.parked[int(after)] = (int(tile_id), (r0, r1), product)  # type: ignore[arg-type]
                return
            # the predecessor arrived meanwhile: add the term now (same bits as _gemm_into)
            slot.rows(r0, r1)[...] += product
            slot.tiles.add(tile_id)
            slot.last = tile_id
            _drain(slot)
            return
    with slot.lock:
        _gemm_into(slot.rows(r0, r1), raw, right)
        slot.tiles.add(tile_id)
        slot.last = tile_id
        _drain(slot)


def _drain(slot: _Slot) -> None:
    """Add parked products whose predecessor is now in, in order (caller holds ``slot.lock``)."""
    while slot.last in slot.parked:
        tile_id, (r0, r1), product = slot.parked.pop(slot.last)
        slot.rows(r0, r1)[...] += product
        slot.tiles.add(tile_id)
        slot.last = tile_id


def _empty(key: str, name: str) -> list[tuple[int, _Slot, np.ndarray]]:
    """Take this process's slots for ``(key, name)`` out: ``(slot index, slot, value)`` each."""
    with _lock:
        _check_pid()
        group = _slots.pop((key, name), {})
        _chunk_buffers.clear()  # the pass has drained (or is paused for a checkpoint)
    out = []
    for index, slot in group.items():
        with slot.lock:
            # a parked product whose predecessor never came (its worker was lost): counted
            # after the ordered ones; the predecessor is read again by the driver
            for _, (tile_id, (r0, r1), product) in sorted(slot.parked.items()):
                slot.rows(r0, r1)[...] += product
                slot.tiles.add(tile_id)
            slot.parked.clear()
            out.append((int(index), slot, slot.value()))
    return out


def collect(key: str, name: str) -> dict[int, tuple[np.ndarray, list[int]]]:
    """Empty this process's slots for ``(key, name)``: ``{slot index: (value, tile ids)}``."""
    out = {}
    for index, slot, value in _empty(key, name):
        if slot.shared is not None:  # kept here: the file's name goes, its mapping is the value
            remove(slot.shared)
        out[index] = (value, sorted(slot.tiles))
    return out


def discard(key: str, *, abort: bool = False) -> None:
    """Drop every slot of a job; with ``abort`` also fail its waiting and later tiles (after an error)."""
    with _lock:
        _check_pid()
        if abort:
            _aborted.add(key)
        dropped = [_slots.pop(name) for name in [k for k in _slots if k[0] == key]]
        _chunk_buffers.clear()
    for group in dropped:
        for slot in group.values():
            with slot.lock:
                slot.aborted = abort or slot.aborted
                slot.parked.clear()
                if slot.shared is not None:
                    remove(slot.shared)
                    slot.shared = None
                slot.whole = None
                slot.blocks.clear()


def collect_remote(key: str, name: str) -> dict[int, tuple[np.ndarray | SharedArray, list[int]]]:
    """:func:`collect`, run in a worker process by a task pinned to it: a value made in the
    driver's memory file system is handed over as its
    :class:`~snaplift.stream._shared_arrays.SharedArray` (this process's mapping dropped)."""
    out: dict[int, tuple[np.ndarray | SharedArray, list[int]]] = {}
    for index, slot, value in _empty(key, name):
        out[index] = (slot.shared if slot.shared is not None else value, sorted(slot.tiles))
        del value
    return out
