"""Resident memory of one process, measured the same way in the driver and in each worker.

:func:`snaplift.cluster.resident_memory` runs :func:`resident` in this process and, through
``Client.run``, in every worker process and nanny. It lives apart from
:mod:`snaplift.cluster` and imports nothing heavy, so that running it in a worker does not
itself add to what it measures (``snaplift.cluster`` pulls in the workflow schema).
"""

from __future__ import annotations

import ctypes
import ctypes.util
import functools
import importlib
import os
import socket
from collections.abc import Sequence
from typing import Any

__all__ = ["resident", "trim_heap"]


def trim_heap() -> bool:
    """Give freed heap pages back to the system (glibc ``malloc_trim(0)``); False where absent.

    Memory a finished pass freed but the allocator kept would be reused by the next pass;
    counted in the baseline it would be counted twice. dask's documentation recommends the
    same call to release a worker's unmanaged memory.
    """
    trim = _malloc_trim()
    return bool(trim(0)) if trim is not None else False


@functools.cache
def _malloc_trim() -> Any:
    """glibc's ``malloc_trim``, looked up once per process: among the symbols the process
    has loaded (the C library's), else through ``find_library``, which runs ``ldconfig`` in
    a child process (5-10 ms of every run's start), and a child of a large process, counted
    between its fork and its exec, is as large again in a sum over the process tree (issue 11)."""
    try:
        return ctypes.CDLL(None).malloc_trim
    except (OSError, AttributeError, TypeError):  # not glibc, or no handle on the process itself
        pass
    name = ctypes.util.find_library("c")
    if not name:
        return None
    try:
        return ctypes.CDLL(name).malloc_trim
    except (OSError, AttributeError):  # not glibc (musl, macOS): nothing to trim
        return None


def resident(modules: Sequence[str] = ()) -> dict[str, Any]:
    """Import ``modules`` (what a tile task would load anyway), trim the heap, report RSS.

    Returns ``{"host", "pid", "rss"}``; ``rss`` in bytes (psutil).
    """
    import psutil

    for name in modules:
        try:
            importlib.import_module(name)
        except ImportError:  # an optional reader library this environment lacks
            pass
    trim_heap()
    return {"host": socket.gethostname(), "pid": os.getpid(), "rss": int(psutil.Process().memory_info().rss)}
