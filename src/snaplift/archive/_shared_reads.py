"""One read of a raw block for all the lifted fields that need it (``lift:`` pointwise/delays).

The lifted fields of one archive field (``T``, ``T_square``, ``T_delay1`` ...) are row
blocks of their own in the snapshot matrix, and their tiles of one point range and one
column block need the same raw values: the delay copies only look a few snapshots later.
The first tile to ask reads the raw block once (all the snapshots of its column block
plus the window of the delays); the others take their rows of it. An entry lives until
its last user has taken it (``uses``), so the memory held is one raw block per group of
siblings in flight; a bounded number of entries guards against a group that is never
completed (a failed pass). Per process; thread-safe (the threaded scheduler runs sibling
tiles at the same time: the second waits for the first one's read instead of reading).
"""

from __future__ import annotations

import threading
from collections import OrderedDict
from collections.abc import Callable, Hashable
from typing import Any

__all__ = ["shared_block", "MAX_ENTRIES", "clear"]

#: raw blocks kept at most (each is one tile of raw values plus the delay window)
MAX_ENTRIES = 4

_lock = threading.Lock()
_entries: OrderedDict[Hashable, _Entry] = OrderedDict()


class _Entry:
    __slots__ = ("event", "value", "error", "remaining")

    def __init__(self, uses: int) -> None:
        self.event = threading.Event()
        self.value: Any = None
        self.error: BaseException | None = None
        self.remaining = int(uses)


def shared_block(key: Hashable, uses: int, load: Callable[[], Any]) -> tuple[Any, bool]:
    """``(value, read_here)``: ``load()`` once for ``uses`` callers with the same ``key``.

    The value is shared: callers must not modify it (take a copy of the rows they need).
    """
    if uses <= 1:
        return load(), True
    with _lock:
        entry = _entries.get(key)
        owner = entry is None
        if owner:
            entry = _entries[key] = _Entry(uses)
            while len(_entries) > MAX_ENTRIES:
                _entries.popitem(last=False)
        else:
            _entries.move_to_end(key)
    assert entry is not None
    if owner:
        try:
            entry.value = load()
        except BaseException as error:
            entry.error = error
            with _lock:
                _entries.pop(key, None)
            entry.event.set()
            raise
        entry.event.set()
    else:
        entry.event.wait()
        if entry.error is not None:
            return load(), True  # the first read failed: try again here (and fail alike)
    with _lock:
        entry.remaining -= 1
        if entry.remaining <= 0 and _entries.get(key) is entry:
            del _entries[key]
    return entry.value, owner


def clear() -> None:
    """Drop every entry (tests; after a failed pass)."""
    with _lock:
        _entries.clear()
