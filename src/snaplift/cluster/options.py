"""The plain options a scheduler is opened with, the scheduler handed to library code, and
the progress protocol it drives.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Any, Protocol

_BLAS_VARIABLES = ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS", "BLIS_NUM_THREADS")

#: a task that raised is tried again this many times (e.g. a transient file-system error);
#: tasks lost with a dead worker are re-run by the scheduler on its own
#: (``distributed.scheduler.allowed-failures``, 3 by default)
TASK_RETRIES = 2


@dataclass(frozen=True)
class ClusterOptions:
    """Where the work runs, as plain options: the workflow converts its validated ``cluster``
    section (``workflow.schema.ClusterSection``, which says what each key means) to this."""

    kind: str = "threads"
    profile: str | None = None
    workers: int | None = None
    threads_per_worker: int | None = None
    memory_per_worker: str | None = None
    address: str | None = None
    queue: str | None = None
    account: str | None = None
    walltime: str | None = None
    cores: int | None = None
    memory: str | None = None
    processes: int | None = None
    job_extra_directives: Sequence[str] = ()
    job_script_prologue: Sequence[str] = ()
    worker_lifetime: str | None = None
    lifetime_stagger: str | None = None
    log_directory: str | None = None
    python: str | None = None
    interface: str | None = None
    local_directory: str | None = None
    launcher: str = "auto"
    start_timeout: float = 600.0


def single_threaded_blas_environment() -> dict[str, str]:
    return {name: "1" for name in _BLAS_VARIABLES}


#: glibc's allocator in worker processes: freed memory above 64 KiB at the heap's top is
#: returned at once (distributed's own default; it also fixes the mmap threshold at 128 KiB,
#: so every larger temporary of a tile task is a fresh mapping, faulted in page by page).
#: Keeping freed blocks as the driver does (an mmap threshold of 32 MiB, 64 MiB kept at the
#: top) cut workers' CPU per 2 GiB sketch compress from 6.8 s to 5.3 s (median, loaded
#: 2-core machine) but kept up to 64 MiB per worker that the memory plan does not count:
#: the slow test of a local cluster near its smallest budget
#: (tests/faults/test_memory_budget.py) went 45-130 MiB over the budget. The budget wins.
WORKER_MALLOC_ENVIRONMENT = {"MALLOC_TRIM_THRESHOLD_": "65536"}


#: ``distributed`` settings of the clusters a run starts (and of its client): periodic work
#: the run does not use, cut. Measured on a 2-core machine (two workers, idle cluster, CPU
#: per 10 s): the driver's event loop (scheduler, nannies, client) 0.38 s -> 0.19 s, each
#: worker 0.30 s -> 0.08 s; during a sketch compress each worker's event loop also spent
#: 0.05-0.1 s per 3 s sampling the tile thread's stack.
#:
#: - ``worker.profile.enabled``: the statistical profiler samples every task thread's stack
#:   every 10 ms (the dashboard's profile page; a run reads no profile);
#: - ``admin.tick.interval``: each server's event-loop health tick, every 20 ms by default,
#:   only to warn when the loop was blocked for ``admin.tick.limit`` (3 s), which a 1 s
#:   tick still notices;
#: - ``admin.system-monitor.interval``: CPU, memory and network samples for the dashboard's
#:   graphs, every 0.5 s by default. Memory limits do not depend on it: the nanny's and the
#:   worker's memory monitors keep their own interval (``worker.memory.monitor-interval``).
QUIET_CLUSTER_CONFIG: dict[str, Any] = {
    "distributed.worker.profile.enabled": False,
    "distributed.admin.tick.interval": "1s",
    "distributed.admin.system-monitor.interval": "2s",
}


def worker_environment() -> dict[str, str]:
    """Environment variables of worker processes: one BLAS thread each, and the allocator above."""
    return {**single_threaded_blas_environment(), **WORKER_MALLOC_ENVIRONMENT}


class TaskProgress(Protocol):
    """What the scheduler reports to: units of work announced and finished."""

    def add_work(self, units: int) -> None: ...

    def advance(self, units: int = 1) -> None: ...


class NullProgress:
    def add_work(self, units: int) -> None:
        pass

    def advance(self, units: int = 1) -> None:
        pass


@dataclass(frozen=True)
class Scheduler:
    """The runner's handle on the scheduler: how to compute and persist, and its size.

    ``client`` is the distributed client (None for ``threads``); ``progress`` receives
    units of work as tasks finish; ``description`` goes into the store's provenance;
    ``task_retries``: how often a failed task is run again on another worker.
    """

    kind: str
    workers: int
    compute: Callable[..., Sequence[Any]]
    persist: Callable[..., Sequence[Any]]
    memory_per_worker: int
    dashboard: str | None = None
    client: Any = None
    progress: TaskProgress = field(default_factory=NullProgress)
    description: dict[str, Any] = field(default_factory=dict)
    task_retries: int = TASK_RETRIES


#: what a tile task loads in a worker process, imported before the worker is measured so
#: that its baseline holds what the pass would load anyway (plus the reader's library: see
#: :func:`resident_memory`); the driver also loads the finishing linear algebra
