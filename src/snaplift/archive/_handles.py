"""Per-process cache of open, read-only archive handles and of derived layouts.

Readers are picklable descriptors; the open files live here, one cache per process.
The cache is keyed by ``(pid, kind, path)``: a child created by ``fork`` sees the pid
change and starts from an empty cache instead of sharing the parent's file handles
(an HDF5 handle or a zarr event loop must not be shared across a fork). Nothing in this
module is ever pickled.

Eviction (the cache holds at most :data:`MAX_HANDLES` handles) only drops the cache's
reference: another thread may still be reading through the evicted handle, and h5py,
numpy and zarr close the underlying file once the last reference is gone.

A handle is reopened when the file's size or modification time changed, so an archive
that grew since it was opened is seen as it is now.

:func:`tile_buffer` gives each reading thread back the memory of its previous large
tile once nothing refers to that tile any more, so that streaming a long archive does
not fault in fresh pages for every tile (that costs about as much as the read itself).
"""

from __future__ import annotations

import os
import sys
import threading
from collections import OrderedDict
from collections.abc import Callable, Hashable
from typing import Any, TypeVar

import numpy as np

from snaplift.errors import ArchiveError, ArchiveFormatError

__all__ = [
    "MAX_HANDLES",
    "HDF5_CHUNK_CACHE_BYTES",
    "hdf5_file",
    "zarr_node",
    "npy_array",
    "memo",
    "signature",
    "peek",
    "forget",
    "clear",
    "cached_handle_count",
    "tile_buffer",
    "release_tile_buffers",
    "TILE_BUFFER_MIN_BYTES",
    "raw_file",
    "read_into",
    "read_pieces",
    "advise",
]

#: at most this many open handles per process; older ones are dropped (LRU)
MAX_HANDLES = 64
#: HDF5 raw-data chunk cache per open file; sized to hold the chunks of one tile row
#: block of a typical field (64 MiB), far above h5py's 1 MiB default, so that a chunk
#: spanning several requested grid rows is decompressed once per tile, not once per row
HDF5_CHUNK_CACHE_BYTES = 64 * 2**20
#: slots of the chunk hash table; a prime well above the number of chunks that fit
HDF5_CHUNK_CACHE_SLOTS = 10007
#: at most this many memoised layouts per process
MAX_MEMOS = 256
#: reads smaller than this get a new array (small allocations are cheap)
TILE_BUFFER_MIN_BYTES = 16 * 2**20

T = TypeVar("T")

_lock = threading.RLock()
_pid = os.getpid()
_handles: OrderedDict[tuple[str, str], tuple[tuple[int, int], Any]] = OrderedDict()
_memos: OrderedDict[Hashable, Any] = OrderedDict()


def _check_pid() -> None:
    """Start from empty caches in a forked child (call with the lock held)."""
    global _pid, _handles, _memos
    pid = os.getpid()
    if pid != _pid:
        # Drop, do not close: the parent's handles belong to the parent.
        _pid = pid
        _handles = OrderedDict()
        _memos = OrderedDict()


def signature(path: str) -> tuple[int, int]:
    """(size, mtime_ns) of a file; for a directory, of its metadata document."""
    probe = path
    if os.path.isdir(path):
        for name in ("zarr.json", ".zgroup", ".zarray"):
            candidate = os.path.join(path, name)
            if os.path.exists(candidate):
                probe = candidate
                break
    try:
        st = os.stat(probe)
    except FileNotFoundError:
        raise ArchiveError(f"archive file not found: {path}") from None
    return (int(st.st_size), int(st.st_mtime_ns))


def _usable(kind: str, handle: Any) -> bool:
    """False for an HDF5 file that someone closed behind the cache's back."""
    return kind != "hdf5" or bool(handle.id.valid)


def _get(kind: str, path: str, opener: Callable[[str], T]) -> T:
    key = (kind, path)
    stamp = signature(path)
    with _lock:
        _check_pid()
        entry = _handles.get(key)
        if entry is not None and entry[0] == stamp and _usable(kind, entry[1]):
            _handles.move_to_end(key)
            return entry[1]  # type: ignore[no-any-return]
    handle = opener(path)
    with _lock:
        _check_pid()
        _handles[key] = (stamp, handle)
        _handles.move_to_end(key)
        while len(_handles) > MAX_HANDLES:
            _handles.popitem(last=False)
    return handle


def _open_hdf5(path: str) -> Any:
    import h5py

    options = dict(
        rdcc_nbytes=HDF5_CHUNK_CACHE_BYTES, rdcc_nslots=HDF5_CHUNK_CACHE_SLOTS, rdcc_w0=1.0
    )
    try:
        # best-effort: take the read lock where the file system supports it, so a
        # concurrent writer is detected, but do not fail on file systems without locks
        return h5py.File(path, "r", locking="best-effort", **options)
    except (OSError, ValueError) as error:
        raise ArchiveFormatError(
            f"cannot open HDF5 file {path} read-only: {str(error).splitlines()[0]}"
        ) from None


def hdf5_file(path: str) -> Any:
    """Open (or reuse) ``path`` as a read-only :class:`h5py.File`."""
    return _get("hdf5", str(path), _open_hdf5)


def _open_raw(path: str) -> Any:
    try:
        return open(path, "rb", buffering=0)  # the handle cache owns it
    except OSError as error:
        raise ArchiveFormatError(f"cannot open {path} for reading: {error.strerror}") from None


def raw_file(path: str) -> Any:
    """Open (or reuse) ``path`` as an unbuffered binary file, for positioned reads."""
    return _get("raw", str(path), _open_raw)


#: bytes of one positioned read request, and of one readahead hint (Linux caps a
#: ``POSIX_FADV_WILLNEED`` call at the device's readahead window, a few MiB)
REQUEST_BYTES = 8 * 2**20
#: bytes hinted ahead of the request being read, so that several requests are in flight
#: (one synchronous 2 MiB request at a time left the device idle between them: measured
#: ~330 MB/s against 1.5 GB/s for dd with 8 MiB requests, issue 16)
READ_AHEAD_BYTES = 64 * 2**20


def advise(fd: int, offset: int, length: int) -> None:
    """Ask the kernel to start reading a byte range now (``POSIX_FADV_WILLNEED``; asynchronous, a
    hint: nothing happens where it is not supported)."""
    if not hasattr(os, "posix_fadvise") or length <= 0:
        return
    end = offset + length
    for start in range(offset, end, REQUEST_BYTES):
        try:
            os.posix_fadvise(fd, start, min(REQUEST_BYTES, end - start), os.POSIX_FADV_WILLNEED)
        except OSError:  # a file system without readahead: plain reads still work
            return


def read_pieces(pieces: list[tuple[Any, ...]]) -> None:
    """Fill each C-contiguous ``out`` of ``pieces`` = ``[(handle, offset, out[, then]), ...]`` from its file.

    Reads in requests of at most :data:`REQUEST_BYTES`, in order, with the next
    :data:`READ_AHEAD_BYTES` hinted to the kernel (:func:`advise`) so that several
    requests are in flight while one is copied: a tile is read at the device's
    sequential speed. The bytes read are the same as :func:`read_into` piece by piece.
    ``then()``, where given, is called as soon as its piece is filled (before the next
    piece is read: a staging buffer can be reused by the next piece).
    """
    requests: list[tuple[Any, int, np.ndarray, Callable[[], None] | None]] = []
    for handle, offset, out, *then in pieces:
        view = out.reshape(-1).view(np.uint8)
        for start in range(0, view.nbytes, REQUEST_BYTES):
            last = start + REQUEST_BYTES >= view.nbytes
            requests.append((handle, offset + start, view[start:start + REQUEST_BYTES],
                             then[0] if then and last else None))
    hinted = 0  # requests hinted so far
    ahead = 0  # bytes hinted beyond the request being read
    for index, (handle, offset, part, done) in enumerate(requests):
        if index < hinted:
            ahead -= part.nbytes
        else:
            advise(handle.fileno(), offset, part.nbytes)
            hinted = index + 1
        while hinted < len(requests) and ahead < READ_AHEAD_BYTES:
            h, o, p, _ = requests[hinted]
            advise(h.fileno(), o, p.nbytes)
            ahead += p.nbytes
            hinted += 1
        read_into(handle, part, offset)
        if done is not None:
            done()


def read_into(handle: Any, out: np.ndarray, offset: int) -> None:
    """Fill the C-contiguous ``out`` with the bytes at ``offset`` of an open file.

    ``os.preadv`` releases the GIL and needs no file position, so several threads read
    through one handle at once.
    """
    view = memoryview(out.reshape(-1).view(np.uint8))  # type: ignore[arg-type]
    fd = handle.fileno()
    done = 0
    while done < view.nbytes:
        count = os.preadv(fd, [view[done:]], offset + done)
        if count <= 0:
            raise ArchiveError(f"{handle.name}: file ended at byte {offset + done} while reading a tile")
        done += count


def _open_zarr(path: str) -> Any:
    import zarr

    try:
        return zarr.open(store=path, mode="r")
    except Exception as error:  # zarr raises several unrelated types for a bad store
        raise ArchiveFormatError(
            f"cannot open zarr store {path} read-only: {str(error).splitlines()[0]}"
        ) from None


def zarr_node(path: str) -> Any:
    """Open (or reuse) a zarr v2/v3 group or array at ``path`` read-only."""
    return _get("zarr", str(path), _open_zarr)


def _open_npy(path: str) -> np.ndarray:
    try:
        return np.load(path, mmap_mode="r", allow_pickle=False)
    except (OSError, ValueError) as error:
        raise ArchiveFormatError(
            f"cannot memory-map {path} as a .npy array: {str(error).splitlines()[0]}"
        ) from None


def npy_array(path: str) -> np.ndarray:
    """Memory-map (or reuse) a ``.npy`` file read-only (``mmap_mode="r"``)."""
    return _get("npy", str(path), _open_npy)


def memo(key: Hashable, build: Callable[[], T], *, refresh: bool = False) -> T:
    """Return the per-process value stored under ``key``, building it on first use.

    Readers keep their parsed layout (which dataset is which field, decoding rules,
    ordered file lists) here, so a tile read does not inspect metadata again.
    ``refresh=True`` rebuilds it (``describe()`` always looks at the archive afresh).
    """
    with _lock:
        _check_pid()
        if not refresh and key in _memos:
            _memos.move_to_end(key)
            return _memos[key]  # type: ignore[no-any-return]
    value = build()
    with _lock:
        _check_pid()
        _memos[key] = value
        _memos.move_to_end(key)
        while len(_memos) > MAX_MEMOS:
            _memos.popitem(last=False)
    return value


def peek(key: Hashable) -> Any:
    """The memoised value under ``key`` in this process, or None."""
    with _lock:
        _check_pid()
        return _memos.get(key)


def forget(key: Hashable) -> None:
    """Remove one memoised value (no error if absent)."""
    with _lock:
        _check_pid()
        _memos.pop(key, None)


def clear(*, close: bool = False) -> None:
    """Empty the caches of this process.

    ``close=True`` also closes HDF5 files explicitly; only do that when no read is in
    flight in another thread.
    """
    with _lock:
        _check_pid()
        handles = [handle for _, handle in _handles.values()]
        _handles.clear()
        _memos.clear()
    if close:
        for handle in handles:
            closer = getattr(handle, "close", None)
            if closer is not None and not isinstance(handle, np.ndarray):
                closer()


def cached_handle_count() -> int:
    """Number of handles currently cached in this process (for tests and diagnostics)."""
    with _lock:
        _check_pid()
        return len(_handles)


def cached_handles() -> list[Any]:
    """The handles cached in this process (tests check they are read-only)."""
    with _lock:
        _check_pid()
        return [handle for _, handle in _handles.values()]


#: per reading thread (by thread id), the memory block of its last large tile
_buffers: dict[int, np.ndarray] = {}
_buffers_lock = threading.Lock()
_buffers_pid = os.getpid()


def _free_count() -> int:
    """References to a dict value nobody else holds, counted the way :func:`tile_buffer` counts."""
    held = {0: np.empty(1, dtype=np.uint8)}
    return sys.getrefcount(held[0])


_FREE = _free_count()


def release_tile_buffers() -> None:
    """Forget every thread's kept tile memory in this process (end of a compress)."""
    with _buffers_lock:
        _buffers.clear()


def tile_buffer(shape: tuple[int, ...], dtype: Any) -> np.ndarray:
    """An uninitialised C-ordered array to read one tile into (the readers' ``out``).

    A large request reuses this thread's previous tile memory when no array, view or
    buffer refers to it any more (every view keeps the memory block alive, so its
    reference count tells); otherwise, for small requests and in the main thread, the
    memory is new. Each other thread keeps at most one block while it lives (blocks of
    ended threads are dropped at the next request) or until :func:`release_tile_buffers`
    (compress calls it when it is done), so the memory held is one tile per live reading
    thread, which the tile planner already counts.
    """
    global _buffers_pid
    dtype = np.dtype(dtype)
    count = int(np.prod(shape, dtype=np.int64))
    nbytes = count * dtype.itemsize
    if nbytes < TILE_BUFFER_MIN_BYTES or threading.current_thread() is threading.main_thread():
        # the main thread lives as long as the process: it keeps nothing
        return np.empty(shape, dtype=dtype)
    ident = threading.get_ident()
    with _buffers_lock:
        if os.getpid() != _buffers_pid:  # a forked child: the parent's blocks are not ours
            _buffers.clear()
            _buffers_pid = os.getpid()
        if len(_buffers) > 1 or (_buffers and ident not in _buffers):
            alive = {thread.ident for thread in threading.enumerate()}
            for gone in [key for key in _buffers if key not in alive]:  # threads that ended
                del _buffers[gone]
        # reuse only a block nobody refers to, large enough and not much larger than needed
        if ident in _buffers and nbytes <= _buffers[ident].nbytes <= 2 * nbytes \
                and sys.getrefcount(_buffers[ident]) == _FREE:
            block = _buffers[ident]
        else:
            block = _buffers[ident] = np.empty(nbytes, dtype=np.uint8)
    return block[:nbytes].view(dtype).reshape(shape)
