"""Peak resident memory of a process tree during a block (the benchmark's memory figure)."""

from __future__ import annotations

import contextlib
import threading
import time
from collections.abc import Callable
from typing import Any

__all__ = ["ProcessTreeMemory", "timed"]


class ProcessTreeMemory:
    """Peak resident memory of this process and all its children during a ``with`` block.

    On Linux each process's own high-water mark (``VmHWM`` in ``/proc/PID/status``) is
    reset on entry (writing 5 to ``/proc/PID/clear_refs``) and read on exit: nothing runs
    during the block. (A sampling thread would hold the GIL for a moment every few
    milliseconds and slow down the very threads being timed, most of all code that makes
    many small numpy calls.) The peak of the tree is at most the sum of its processes'
    peaks, exact for one process; that sum is reported. Where the high-water mark cannot
    be reset, RSS is sampled every ``interval`` seconds instead.
    """

    def __init__(self, interval: float = 0.05) -> None:
        import psutil

        self._process = psutil.Process()
        self.interval = interval
        self.peak = 0
        self.baseline = 0
        self.sampled = False
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None

    def _tree(self) -> list[Any]:
        return [self._process, *self._process.children(recursive=True)]

    def current(self) -> int:
        total = 0
        for proc in self._tree():
            with contextlib.suppress(Exception):
                total += proc.memory_info().rss
        return total

    @staticmethod
    def _reset(pid: int) -> bool:
        try:
            with open(f"/proc/{pid}/clear_refs", "w") as handle:
                handle.write("5")
            return True
        except OSError:
            return False

    @staticmethod
    def _high_water(pid: int) -> int:
        with contextlib.suppress(OSError, ValueError, IndexError):
            with open(f"/proc/{pid}/status") as handle:
                for line in handle:
                    if line.startswith("VmHWM:"):
                        return int(line.split()[1]) * 1024
        return 0

    def __enter__(self) -> ProcessTreeMemory:
        self.baseline = self.current()
        self.peak = self.baseline
        self.sampled = not all(self._reset(proc.pid) for proc in self._tree())
        if self.sampled:
            self._thread = threading.Thread(target=self._sample, daemon=True)
            self._thread.start()
        return self

    def _sample(self) -> None:
        while not self._stop.wait(self.interval):
            self.peak = max(self.peak, self.current())

    def __exit__(self, *exc: Any) -> None:
        if self._thread is not None:
            self._stop.set()
            self._thread.join()
        if self.sampled:
            self.peak = max(self.peak, self.current())
        else:
            self.peak = max(self.current(), sum(self._high_water(proc.pid) for proc in self._tree()))


def timed(function: Callable[[], Any]) -> tuple[float, Any, ProcessTreeMemory]:
    with ProcessTreeMemory() as memory:
        start = time.perf_counter()
        value = function()
        elapsed = time.perf_counter() - start
    return elapsed, value, memory

