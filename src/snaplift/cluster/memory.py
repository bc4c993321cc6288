"""What the run's processes hold before a pass (psutil RSS of this process, its children and,
through ``Client.run``, each worker process and nanny): the baseline the tile planner plans in.
"""

from __future__ import annotations

import contextlib
import sys
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

TASK_MODULES = ("snaplift.stream._tasks",)
_DRIVER_MODULES = ("snaplift.stream.compress",)
#: reader libraries a task imports when it first opens the archive
_READER_LIBRARIES = ("h5py", "zarr")
#: reserved above a measured baseline, as a fraction of it and at least ``BASELINE_MARGIN_BYTES``:
#: the same processes measure a few MiB apart from run to run (allocator, import order), and
#: a resumed run keeps the plan of the run it resumes only if it measures no more than that
#: run reserved (:meth:`ResidentMemory.reserve`); common practice, not a published figure
BASELINE_MARGIN = 0.04
BASELINE_MARGIN_BYTES = 16 * 2**20


@dataclass(frozen=True)
class ResidentMemory:
    """Resident memory (RSS) the run's processes hold before a pass: the baseline of ``compress.memory``.

    ``driver_bytes`` is this process with its children that are neither workers nor
    nannies (multiprocessing's resource tracker; a LocalCluster's scheduler and nannies
    run inside this process). ``estimated_workers`` of the ``workers`` had not connected
    yet and are counted at the mean of those measured.
    """

    driver_bytes: int = 0
    worker_bytes: int = 0
    nanny_bytes: int = 0
    workers: int = 0
    nannies: int = 0
    estimated_workers: int = 0

    @property
    def total_bytes(self) -> int:
        return int(self.driver_bytes + self.worker_bytes + self.nanny_bytes)

    def reserve(self, recorded: int | None = None) -> int:
        """Bytes of the budget to plan the tiles around: the measured total plus a margin.

        ``recorded`` is what a killed run of the same job reserved: kept when these
        processes measure no more than that, so the resumed run plans the same tiles and
        its checkpoint still matches; otherwise the measurement wins (never less memory).

        Example
        -------
        >>> ResidentMemory(driver_bytes=500 * 2**20).reserve() // 2**20
        520
        >>> ResidentMemory(driver_bytes=500 * 2**20).reserve(recorded=510 * 2**20) // 2**20
        510
        """
        measured = self.total_bytes
        if recorded is not None and measured <= int(recorded):
            return int(recorded)
        return measured + max(BASELINE_MARGIN_BYTES, int(BASELINE_MARGIN * measured))

    @property
    def label(self) -> str:
        """Which processes, for messages: "2 worker processes, 2 nannies and this process"."""
        parts = []
        if self.workers:
            estimated = f" ({self.estimated_workers} not yet started, estimated)" if self.estimated_workers else ""
            parts.append(f"{self.workers} worker process{'es' if self.workers != 1 else ''}{estimated}")
        if self.nannies:
            parts.append(f"{self.nannies} nann{'ies' if self.nannies != 1 else 'y'}")
        parts.append("this process")
        return ", ".join(parts[:-1]) + (" and " if len(parts) > 1 else "") + parts[-1]

    def describe(self) -> dict[str, int]:
        return {"baseline_bytes": self.total_bytes, "driver_bytes": int(self.driver_bytes),
                "worker_bytes": int(self.worker_bytes), "nanny_bytes": int(self.nanny_bytes),
                "workers": int(self.workers), "nannies": int(self.nannies),
                "estimated_workers": int(self.estimated_workers)}


def resident_memory(client: Any = None, *, workers: int | None = None,
                    modules: Sequence[str] = TASK_MODULES) -> ResidentMemory:
    """Measure what the processes of a run hold before a pass (psutil RSS, bytes).

    Every process first imports ``modules`` and the reader libraries this process has
    loaded (h5py, zarr), as its tile tasks would, and gives freed heap pages back
    (:func:`snaplift._process_memory.trim_heap`), so that the baseline holds neither
    less than the pass will find nor memory the pass will reuse. Then: this process
    and its children on this machine; with a distributed ``client`` also every worker
    (``Client.run``) and every nanny (``Client.run(..., nanny=True)``) wherever they run,
    each process counted once. With ``workers`` (the workers the run will have) and fewer
    connected, the missing ones are counted at the mean of those measured (at this
    process's size when none is).

    Example
    -------
    >>> resident_memory().total_bytes > 0   # this process alone (dask's threaded scheduler)
    True
    """
    import psutil

    from snaplift._process_memory import resident

    libraries = tuple(name for name in _READER_LIBRARIES if name in sys.modules)
    remote: dict[tuple[str, int], tuple[str, int]] = {}  # (host, pid) -> (role, rss)
    if client is not None:
        for role, nanny in (("worker", False), ("nanny", True)):
            facts = client.run(resident, (*modules, *libraries) if role == "worker" else (),
                               nanny=nanny, on_error="return")
            for fact in facts.values():
                if isinstance(fact, dict):  # an exception: a worker without a nanny, or one just lost
                    remote.setdefault((str(fact["host"]), int(fact["pid"])), (role, int(fact["rss"])))
    me = resident((*modules, *_DRIVER_MODULES, *libraries))
    host = me["host"]
    tree = {me["pid"]: me["rss"]}
    for child in psutil.Process().children(recursive=True):
        with contextlib.suppress(psutil.Error):
            tree[child.pid] = int(child.memory_info().rss)
    sums = {"worker": [0, 0], "nanny": [0, 0]}
    for (where, pid), (role, rss) in remote.items():
        if where == host and pid == me["pid"]:
            continue  # a LocalCluster's nannies live in this process
        if where == host:
            rss = tree.pop(pid, rss)
        sums[role][0] += rss
        sums[role][1] += 1
    (worker_bytes, measured), (nanny_bytes, nannies) = sums["worker"], sums["nanny"]
    missing = max(0, int(workers or 0) - measured) if client is not None else 0
    if missing:
        each = worker_bytes / measured if measured else me["rss"]
        worker_bytes += int(each * missing)
        if nannies:
            nanny_bytes += int(nanny_bytes / nannies * missing)
            nannies += missing
    return ResidentMemory(driver_bytes=int(sum(tree.values())), worker_bytes=int(worker_bytes),
                          nanny_bytes=int(nanny_bytes), workers=measured + missing, nannies=nannies,
                          estimated_workers=missing)


def _machine_memory() -> int:
    try:
        import psutil

        return int(psutil.virtual_memory().total)
    except Exception:  # pragma: no cover - psutil is a dependency, this is a fallback
        return 8 * 2**30
