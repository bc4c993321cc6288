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
"""

from __future__ import annotations

import os
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
