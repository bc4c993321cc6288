"""Read ahead: the next tile of a worker is read while the worker multiplies the current one.

Reading and arithmetic took turns in each tile task: on a file system that serves
200 MB/s, the device stood idle while a tile was multiplied and the cores while it was
read (issue 16: a single-pass sketch cost 2.2 reads of the archive). Now a tile task
first asks for its own tile, then for the tile its worker takes next (``TileRef.ahead``,
chosen by the driver: the same slot's next tile, so the same worker process), and
multiplies while that one is read. Reads run in a small pool of reader threads of the
process (one per tile thread), never in another task, so a task that waits for its
tile waits only for a read, which ends (the ``cluster: local`` deadlock of
:mod:`snaplift.stream._slots` came from tasks waiting for tasks).

Memory: each tile thread holds the tile it multiplies and its reader thread the next
one: the two tiles per worker of the planner's model (``archive.plan``: "the decoded
tile and the read buffer"). Only plain tiles are read ahead: one field, no mask, no
lift (their reads make a second buffer of their own). A tile read ahead that nobody
takes (a pass that failed, a tile read again after a lost worker) is dropped after
:data:`MAX_PENDING` others or when the compress ends (:func:`clear`).
"""

from __future__ import annotations

import os
import threading
from collections import OrderedDict
from collections.abc import Callable, Hashable
from concurrent.futures import Future, ThreadPoolExecutor
from typing import Any

__all__ = ["request", "take", "clear", "pending_count", "MAX_PENDING"]

#: reads kept waiting for their task at most (older ones are cancelled or dropped)
MAX_PENDING = 8
#: tiles remembered as already asked for, so that a late request does not read one again
MAX_SEEN = 4096

_lock = threading.Lock()
_pid = os.getpid()
_pool: ThreadPoolExecutor | None = None
_pool_threads = 0
_pending: OrderedDict[Hashable, Future[Any]] = OrderedDict()
_seen: OrderedDict[Hashable, None] = OrderedDict()


def _check_pid() -> None:
    global _pid, _pool, _pool_threads, _pending, _seen
    if os.getpid() != _pid:  # a forked child: the parent's threads are not ours
        _pid = os.getpid()
        _pool, _pool_threads = None, 0
        _pending, _seen = OrderedDict(), OrderedDict()


def _executor(threads: int) -> ThreadPoolExecutor:
    global _pool, _pool_threads
    if _pool is None or _pool_threads < threads:
        if _pool is not None:
            _pool.shutdown(wait=False)  # its reads finish; new ones go to the larger pool
        _pool = ThreadPoolExecutor(max(1, threads), thread_name_prefix="snaplift-read")
        _pool_threads = max(1, threads)
    return _pool


def request(key: Hashable, read: Callable[[], Any], threads: int) -> None:
    """Start ``read()`` in a reader thread unless ``key`` was asked for already."""
    with _lock:
        _check_pid()
        if key in _seen:
            return
        _seen[key] = None
        while len(_seen) > MAX_SEEN:
            _seen.popitem(last=False)
        _pending[key] = _executor(threads).submit(read)
        while len(_pending) > MAX_PENDING:
            _, stale = _pending.popitem(last=False)
            stale.cancel()


def take(key: Hashable, read: Callable[[], Any], threads: int) -> Any:
    """The value of ``key``: read ahead, or read now in a reader thread (so that tile
    threads keep no read buffer of their own), waiting only for that read."""
    with _lock:
        _check_pid()
        future = _pending.pop(key, None)
        if future is None:
            _seen[key] = None  # a later request for it reads nothing
            future = _executor(threads).submit(read)
    return future.result()


def clear() -> None:
    """Drop every read ahead of this process (end of a compress; after a failed pass)."""
    with _lock:
        _check_pid()
        for future in _pending.values():
            future.cancel()
        _pending.clear()
        _seen.clear()


def pending_count() -> int:
    """Reads ahead not yet taken in this process (tests)."""
    with _lock:
        _check_pid()
        return len(_pending)
