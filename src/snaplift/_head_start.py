"""Read the head of the archive while the command starts: imports, workflow checks and the
scan take about a second, in which the device that holds the archive stood idle.

``snaplift run`` calls :func:`start` with the archive's file before it imports the engine
(only when the run will read the archive: ``--overwrite`` or no result store yet). A
daemon thread reads the file's first bytes, one request of :data:`REQUEST_BYTES` at a
time (so that the scan's few reads wait behind one request at most), into the page
cache and discards them; the compress stage calls :func:`stop` before its first read and
then finds those bytes in the cache. Time-major archives (HDF5, netCDF) store their first
snapshots first, so these are the bytes of the first tiles. Measured with reads capped
at 200 MB/s (issue 16): ~1 s of startup, ~200 MB of the 2 GiB archive read meanwhile.

Plain ``os`` and ``threading``: this module is imported before numpy.
"""

from __future__ import annotations

import os
import threading

__all__ = ["start", "stop", "HEAD_BYTES", "REQUEST_BYTES"]

#: bytes read ahead at most (a few tiles; well inside any page cache)
HEAD_BYTES = 256 * 2**20
#: bytes per read request
REQUEST_BYTES = 8 * 2**20

_lock = threading.Lock()
_current: list[threading.Event] = [threading.Event()]  # the latest read's stop signal
_read = [0]


def start(path: str, limit: int = HEAD_BYTES) -> bool:
    """Start reading the first ``limit`` bytes of the file ``path`` in a daemon thread.

    False (nothing started) when ``path`` is not a regular file (a series, a zarr folder).
    """
    if not os.path.isfile(path) or limit <= 0:
        return False
    signal = threading.Event()
    with _lock:
        _current[0].set()  # one head read at a time
        _current[0] = signal
        _read[0] = 0
    threading.Thread(target=_read_head, args=(path, int(limit), signal), name="snaplift-head-start",
                     daemon=True).start()
    return True


def stop() -> int:
    """Stop the head read (at its current request); the bytes it read so far."""
    with _lock:
        _current[0].set()
        return _read[0]


def _read_head(path: str, limit: int, signal: threading.Event) -> None:
    try:
        fd = os.open(path, os.O_RDONLY)
    except OSError:
        return
    try:
        end = min(os.fstat(fd).st_size, limit)
        buffer = bytearray(min(REQUEST_BYTES, max(end, 1)))
        offset = 0
        while offset < end and not signal.is_set():
            count = os.preadv(fd, [memoryview(buffer)[:end - offset]], offset)
            if count <= 0:
                break
            offset += count
            with _lock:
                if not signal.is_set():
                    _read[0] = offset
    except OSError:  # a read error is the compress stage's to report, with its context
        pass
    finally:
        os.close(fd)
