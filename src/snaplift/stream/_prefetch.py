"""Read ahead: the next tile of a worker is read while the worker multiplies the current one.

Reading and arithmetic took turns in each tile task: on a file system that serves
200 MB/s, the device stood idle while a tile was multiplied and the cores while it was
read (issue 16: a single-pass sketch cost 2.2 reads of the archive). Now a tile task
first asks for its own tile, then for the tile its worker takes next (``TileRef.ahead``,
chosen by the driver: the same slot's next tile, so the same worker process), and
multiplies while that one is read. Reads run in a small pool of reader threads of the
process (two per tile thread, see Lanes), never in another task, so a task that waits for its
tile waits only for a read, which ends (the ``cluster: local`` deadlock of
:mod:`snaplift.stream._slots` came from tasks waiting for tasks).

Memory: each tile thread holds the tile it multiplies and a reader thread the next
one: the two tiles per worker of the planner's model (``archive.plan``: "the decoded
tile and the read buffer"). Only plain tiles are read ahead: one field, no mask, no
lift (their reads make a second buffer of their own). A tile read ahead that nobody
takes (a pass that failed, a tile read again after a lost worker) is dropped after
:data:`MAX_PENDING` others or when the compress ends (:func:`clear`).

Lanes: the reads a tile thread asks for alternate between two reader threads of its own
(:data:`LANES`). A reader thread reads into the tile memory it kept from its previous
read when nothing refers to it any more (:func:`snaplift.archive._handles.tile_buffer`).
With one reader thread, that memory was always the tile being multiplied (read ahead
means the previous read is the current tile), so every read took fresh memory and
faulted it in page by page: in a worker process, whose allocator returns freed blocks at
once (``cluster.options.WORKER_MALLOC_ENVIRONMENT``), the whole archive went through
page faults, 136 000 per worker for a 1 GiB sketch compress, 0.3-1.2 s of system time
per worker on a loaded 2-core machine. With two lanes the read of tile ``i + 2`` goes
to the lane that read tile ``i``, done by then, and reuses its memory. The lanes keep
one tile each: the same two tiles per tile thread.
"""

from __future__ import annotations

import os
import threading
from collections import OrderedDict
from collections.abc import Callable, Hashable
from concurrent.futures import Future, ThreadPoolExecutor
from typing import Any

__all__ = ["request", "take", "clear", "pending_count", "MAX_PENDING", "LANES"]

#: reads kept waiting for their task at most (older ones are cancelled or dropped)
MAX_PENDING = 8
#: tiles remembered as already asked for, so that a late request does not read one again
MAX_SEEN = 4096
#: reader threads per tile thread; its reads alternate between them (module docstring)
LANES = 2

_lock = threading.Lock()
_pid = os.getpid()
#: per asking thread (tile thread) its reader threads and the number of reads it asked for
_lanes: dict[int, tuple[list[ThreadPoolExecutor], list[int]]] = {}
_pending: OrderedDict[Hashable, Future[Any]] = OrderedDict()
_seen: OrderedDict[Hashable, None] = OrderedDict()


def _check_pid() -> None:
    global _pid, _lanes, _pending, _seen
    if os.getpid() != _pid:  # a forked child: the parent's threads are not ours
        _pid = os.getpid()
        _lanes = {}
        _pending, _seen = OrderedDict(), OrderedDict()


def _executor(threads: int) -> ThreadPoolExecutor:
    """The next lane of the calling tile thread (caller holds ``_lock``). ``threads`` is
    the tile threads' count per process, kept for the callers; each has its own lanes."""
    ident = threading.get_ident()
    entry = _lanes.get(ident)
    if entry is None:
        alive = {thread.ident for thread in threading.enumerate()}
        for gone in [key for key in _lanes if key not in alive]:  # tile threads that ended
            for pool in _lanes.pop(gone)[0]:
                pool.shutdown(wait=False)
        entry = _lanes[ident] = ([ThreadPoolExecutor(1, thread_name_prefix="snaplift-read") for _ in range(LANES)],
                                 [0])
    pools, count = entry
    pool = pools[count[0] % len(pools)]
    count[0] += 1
    return pool


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
        # the reader threads end (a read under way finishes first), and with them the tile
        # memory they kept
        for pools, _ in _lanes.values():
            for pool in pools:
                pool.shutdown(wait=False)
        _lanes.clear()


def pending_count() -> int:
    """Reads ahead not yet taken in this process (tests)."""
    with _lock:
        _check_pid()
        return len(_pending)
