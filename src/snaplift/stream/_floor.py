"""The floor of ``snaplift bench``: the least reading and arithmetic of a rank-r randomized pass.

One read of a time-major HDF5 archive (each stored chunk read once, into a reused
buffer: positioned reads of the chunks' bytes when they are stored unfiltered, as the
HDF5 reader does, else h5py's ``read_direct``) forming the two thin products every
randomized rank-r method needs at least, ``Y = X Omega`` (n x w, summed in place a
chunk of rows at a time outside the GIL, as compress does: see
:func:`snaplift.stream._slots._gemm_into`) and ``W = Psi X`` (written straight into its
rows), of width ``w = r + 10``; ``Y`` is column-major. The test matrices are drawn
before the clock starts. Three schedules are timed and the fastest is the floor (a best
effort, not a strawman):

- ``serial``: read a block, then both products with the whole BLAS thread pool;
- ``prefetch``: a reader thread fills the next buffer while the products of the current
  one run with the whole BLAS thread pool (reading overlaps arithmetic);
- ``workers``: one thread per core, each reading its own blocks and forming its products
  with a single-threaded BLAS into its own ``Y`` (summed at the end): the schedule of
  the streaming compress, without any of its bookkeeping.
"""

from __future__ import annotations

import queue
import threading
import time
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import numpy as np

from snaplift.linalg._blas import blas_threads
from snaplift.stream._slots import _gemm_into
from snaplift.units import usable_cores

__all__ = ["floor_pass", "FLOOR_SCHEDULES"]

FLOOR_SCHEDULES = ("serial", "prefetch", "workers")


def _blocks(m: int, block: int) -> list[tuple[int, int]]:
    return [(j0, min(j0 + block, m)) for j0 in range(0, m, block)]


class _Blocks:
    """Reads snapshots ``j0 .. j1`` of the archive's ``u`` into a buffer (thread-safe)."""

    def __init__(self, path: Path, data) -> None:
        from snaplift.archive.hdf5 import _storage

        self.data = data
        self.layout = _storage(data)
        self.path = str(path)
        self.shape = data.shape
        self._lock = threading.Lock()  # h5py serialises its calls anyway

    def read(self, j0: int, j1: int, out: np.ndarray) -> None:
        from snaplift.archive.hdf5 import read_stored_box

        box = ((j0, j1), *((0, n) for n in self.shape[1:]))
        if not read_stored_box(out, self.layout, box, self.path, self.data):
            with self._lock:  # h5py serialises its calls anyway
                self.data.read_direct(out, np.s_[j0:j1])


def _serial(data, omega, psi_t, block: int) -> tuple[np.ndarray, np.ndarray]:
    m, n = omega.shape[0], psi_t.shape[0]
    y = np.zeros((n, omega.shape[1]), order="F")
    w = np.empty((m, psi_t.shape[1]))
    buffer = np.empty((block, *data.shape[1:]))
    for j0, j1 in _blocks(m, block):
        view = buffer[: j1 - j0]
        data.read(j0, j1, view)
        flat = view.reshape(j1 - j0, n)
        _gemm_into(y, flat, omega[j0:j1])
        np.matmul(flat, psi_t, out=w[j0:j1])
    return y, w


def _prefetch(data, omega, psi_t, block: int) -> tuple[np.ndarray, np.ndarray]:
    m, n = omega.shape[0], psi_t.shape[0]
    y = np.zeros((n, omega.shape[1]), order="F")
    w = np.empty((m, psi_t.shape[1]))
    free: queue.Queue = queue.Queue()
    full: queue.Queue = queue.Queue()
    for _ in range(2):
        free.put(np.empty((block, *data.shape[1:])))
    failure: list[BaseException] = []

    def read() -> None:
        try:
            for j0, j1 in _blocks(m, block):
                buffer = free.get()
                data.read(j0, j1, buffer[: j1 - j0])
                full.put((j0, j1, buffer))
        except BaseException as error:  # pragma: no cover - surfaced below
            failure.append(error)
        full.put(None)

    reader = threading.Thread(target=read, daemon=True)
    reader.start()
    while (item := full.get()) is not None:
        j0, j1, buffer = item
        flat = buffer[: j1 - j0].reshape(j1 - j0, n)
        _gemm_into(y, flat, omega[j0:j1])
        np.matmul(flat, psi_t, out=w[j0:j1])
        free.put(buffer)
    reader.join()
    if failure:  # pragma: no cover
        raise failure[0]
    return y, w


def _workers(data, omega, psi_t, block: int, count: int) -> tuple[np.ndarray, np.ndarray]:
    m, n = omega.shape[0], psi_t.shape[0]
    w = np.empty((m, psi_t.shape[1]))
    blocks = _blocks(m, block)
    def work(index: int) -> np.ndarray:
        y = np.zeros((n, omega.shape[1]), order="F")
        buffer = np.empty((block, *data.shape[1:]))
        for j0, j1 in blocks[index::count]:
            view = buffer[: j1 - j0]
            data.read(j0, j1, view)
            flat = view.reshape(j1 - j0, n)
            _gemm_into(y, flat, omega[j0:j1])
            np.matmul(flat, psi_t, out=w[j0:j1])
        return y

    with blas_threads(1), ThreadPoolExecutor(count) as pool:
        parts = list(pool.map(work, range(count)))
    y = parts[0]
    for part in parts[1:]:
        y += part
    return y, w


def floor_pass(path: Path, width: int, block: int, *, seed: int = 1,
               schedules: tuple[str, ...] = FLOOR_SCHEDULES) -> tuple[float, dict[str, float]]:
    """Time the floor; returns ``(best seconds, {schedule: seconds})`` (see the module docstring).

    Example
    -------
    >>> best, each = floor_pass(Path("bench.h5"), 50, 64)  # doctest: +SKIP
    >>> sorted(each)                                       # doctest: +SKIP
    ['prefetch', 'serial', 'workers']
    """
    import h5py

    times: dict[str, float] = {}
    with h5py.File(path, "r") as h5:
        data = _Blocks(path, h5["u"])
        m, n = data.shape[0], int(np.prod(data.shape[1:]))
        block = max(1, min(int(block), m))
        rng = np.random.default_rng(seed)
        omega = rng.standard_normal((m, width))
        psi_t = rng.standard_normal((n, width))
        reference = None
        for schedule in schedules:
            start = time.perf_counter()
            if schedule == "serial":
                y, w = _serial(data, omega, psi_t, block)
            elif schedule == "prefetch":
                y, w = _prefetch(data, omega, psi_t, block)
            elif schedule == "workers":
                y, w = _workers(data, omega, psi_t, block, usable_cores())
            else:
                raise ValueError(f"unknown floor schedule {schedule!r}; expected one of {FLOOR_SCHEDULES}")
            times[schedule] = time.perf_counter() - start
            # every schedule must form the same products (a floor that skips work is no floor)
            if reference is None:
                reference = (y, w)
            elif not (np.allclose(y, reference[0], rtol=1e-9, atol=1e-9 * np.abs(reference[0]).max())
                      and np.allclose(w, reference[1], rtol=1e-9, atol=1e-9 * np.abs(reference[1]).max())):
                raise RuntimeError(f"floor schedule {schedule!r} formed different products")
            del y, w
    return min(times.values()), times
