"""The shared raw read of lifted sibling tiles: one load for all users, also across threads."""

from __future__ import annotations

import threading
import time

import pytest

from snaplift.archive import _shared_reads


def test_one_load_for_all_users_across_threads() -> None:
    _shared_reads.clear()
    loads = []

    def load():
        loads.append(1)
        time.sleep(0.05)  # the others arrive while the first is still reading
        return "block"

    results = []
    threads = [threading.Thread(target=lambda: results.append(_shared_reads.shared_block("k", 6, load)))
               for _ in range(6)]
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join()
    assert len(loads) == 1 and [value for value, _ in results] == ["block"] * 6
    assert sum(owner for _, owner in results) == 1
    assert not _shared_reads._entries  # the last user released the block


def test_failed_load_is_not_kept() -> None:
    _shared_reads.clear()

    def fail():
        raise OSError("disk")

    with pytest.raises(OSError):
        _shared_reads.shared_block("bad", 2, fail)
    assert "bad" not in _shared_reads._entries
    assert _shared_reads.shared_block("bad", 2, lambda: 1) == (1, True)


def test_entries_are_bounded() -> None:
    _shared_reads.clear()
    for key in range(3 * _shared_reads.MAX_ENTRIES):
        _shared_reads.shared_block(key, 2, lambda key=key: key)  # each waits for a second user that never comes
    assert len(_shared_reads._entries) == _shared_reads.MAX_ENTRIES
    _shared_reads.clear()
