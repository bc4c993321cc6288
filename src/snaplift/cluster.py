"""Where the work runs: dask's threaded scheduler or a distributed LocalCluster.

Only the workflow runner enters :func:`open_scheduler`; library functions receive the
``compute`` / ``persist`` callables it yields and never create clients themselves.
Worker processes run BLAS single-threaded (the parallelism is across tiles).
"""

from __future__ import annotations

import contextlib
import os
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass
from typing import Any

import dask

from snaplift.workflow.schema import ClusterSection, parse_bytes

__all__ = ["Scheduler", "open_scheduler", "single_threaded_blas_environment"]

_BLAS_VARIABLES = ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS", "BLIS_NUM_THREADS")


def single_threaded_blas_environment() -> dict[str, str]:
    return {name: "1" for name in _BLAS_VARIABLES}


@dataclass(frozen=True)
class Scheduler:
    """The runner's handle on the scheduler: how to compute and persist, and its size."""

    kind: str
    workers: int
    compute: Callable[..., Sequence[Any]]
    persist: Callable[..., Sequence[Any]]
    memory_per_worker: int
    dashboard: str | None = None


def _machine_memory() -> int:
    try:
        import psutil

        return int(psutil.virtual_memory().total)
    except Exception:  # pragma: no cover - psutil is a dependency, this is a fallback
        return 8 * 2**30


@contextlib.contextmanager
def open_scheduler(section: ClusterSection) -> Iterator[Scheduler]:
    """Start (and afterwards stop) the scheduler described by the ``cluster`` section.

    Example
    -------
    >>> from snaplift.workflow.schema import ClusterSection
    >>> with open_scheduler(ClusterSection(kind="threads")) as scheduler:
    ...     scheduler.kind
    'threads'
    """
    cores = os.cpu_count() or 1
    if section.kind == "threads":
        workers = section.workers or cores
        memory = parse_bytes(section.memory_per_worker) if section.memory_per_worker else _machine_memory() // 2
        with dask.config.set(scheduler="threads", num_workers=workers):
            yield Scheduler("threads", workers, dask.compute, dask.persist, memory)
        return
    from distributed import Client, LocalCluster

    workers = section.workers or cores
    threads = section.threads_per_worker or 1
    memory = (
        parse_bytes(section.memory_per_worker)
        if section.memory_per_worker
        else int(0.8 * _machine_memory() / workers)
    )
    environ = {**single_threaded_blas_environment(), "MALLOC_TRIM_THRESHOLD_": "65536"}
    with dask.config.set({"distributed.nanny.pre-spawn-environ": environ,
                          "distributed.worker.daemon": False}):
        cluster = LocalCluster(
            n_workers=workers,
            threads_per_worker=threads,
            processes=True,
            memory_limit=memory,
            dashboard_address=None,
            silence_logs=40,
        )
        client = Client(cluster, set_as_default=False)
        try:
            def compute(*args: Any, **kwargs: Any) -> Sequence[Any]:
                futures = client.compute(list(args), **kwargs)
                return tuple(client.gather(futures))

            def persist(*args: Any, **kwargs: Any) -> Sequence[Any]:
                return tuple(client.persist(list(args), **kwargs))

            yield Scheduler("local", workers, compute, persist, memory)
        finally:
            client.close()
            cluster.close()
