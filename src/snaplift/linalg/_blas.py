"""Limit the BLAS thread pool of this process while tiles run in threads.

Under dask's threaded scheduler the parallelism is across tiles (one tile per thread);
a multi-threaded BLAS inside each tile then oversubscribes the cores. Worker processes
get ``OPENBLAS_NUM_THREADS=1`` in their environment; a running process can only be told
through the library's own ``*_set_num_threads`` entry point, found here with ctypes among
the OpenBLAS copies this process has loaded. Without one it does nothing.
"""

from __future__ import annotations

import contextlib
import ctypes
import threading
from collections.abc import Callable, Iterator

__all__ = ["blas_threads"]

_SET = ("scipy_openblas_set_num_threads64_", "scipy_openblas_set_num_threads", "openblas_set_num_threads64_",
        "openblas_set_num_threads")
_GET = ("scipy_openblas_get_num_threads64_", "scipy_openblas_get_num_threads", "openblas_get_num_threads64_",
        "openblas_get_num_threads")
_lock = threading.Lock()
_depth = 0
_saved: list[tuple[Callable[[int], object], int]] = []


def _libraries() -> list[tuple[Callable[[int], object], Callable[[], int]]]:
    found: list[tuple[Callable[[int], object], Callable[[], int]]] = []
    try:
        with open("/proc/self/maps") as maps:
            paths = sorted({line.split()[-1] for line in maps
                            if "openblas" in line and line.split()[-1].startswith("/")})
    except OSError:
        return found
    for path in paths:
        try:
            lib = ctypes.CDLL(path)
        except OSError:
            continue
        setter = next((getattr(lib, n) for n in _SET if hasattr(lib, n)), None)
        getter = next((getattr(lib, n) for n in _GET if hasattr(lib, n)), None)
        if setter is not None and getter is not None:
            found.append((setter, getter))
    return found


@contextlib.contextmanager
def blas_threads(count: int) -> Iterator[None]:
    """Run the block with at most ``count`` BLAS threads (re-entrant; restored afterwards)."""
    global _depth, _saved
    import numpy  # noqa: F401  make sure numpy's BLAS is loaded before looking for it

    with _lock:
        if _depth == 0:
            _saved = []
            for setter, getter in _libraries():
                _saved.append((setter, int(getter())))
                setter(int(count))
        _depth += 1
    try:
        yield
    finally:
        with _lock:
            _depth -= 1
            if _depth == 0:
                for setter, previous in _saved:
                    setter(previous)
                _saved = []
