"""The head of the archive read while ``snaplift run`` starts (snaplift._head_start)."""

from __future__ import annotations

import threading

from snaplift import _head_start


def _join() -> None:
    for thread in threading.enumerate():
        if thread.name == "snaplift-head-start":
            thread.join(timeout=30)


def test_reads_the_first_bytes_up_to_the_limit(tmp_path):
    path = tmp_path / "archive.h5"
    path.write_bytes(b"\1" * (3 * 2**20))
    assert _head_start.start(str(path), limit=2**20 + 5)
    _join()
    # it reads exactly the limit, not the whole file (the limit is not a multiple of the request)
    assert _head_start.stop() == 2**20 + 5


def test_a_small_file_is_read_whole_and_a_folder_not_at_all(tmp_path):
    path = tmp_path / "probe.h5"
    path.write_bytes(b"\2" * 1000)
    assert _head_start.start(str(path))
    _join()
    assert _head_start.stop() == 1000
    assert not _head_start.start(str(tmp_path))  # a zarr folder or a series: nothing to read ahead


def test_stop_ends_the_read_early(tmp_path):
    path = tmp_path / "big.h5"
    path.write_bytes(b"\3" * (64 * 2**20))
    _head_start.stop()
    assert _head_start.start(str(path))
    seen = _head_start.stop()
    _join()
    # stopped at its current request: at most one request more than when it was told
    assert _head_start.stop() <= seen + _head_start.REQUEST_BYTES
