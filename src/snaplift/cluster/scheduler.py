"""Opening a scheduler of each kind (threads, local, address, slurm/pbs, allocation); the
only place a dask client is created.
"""

from __future__ import annotations

import contextlib
import os
import shutil
import socket
import subprocess
import sys
from collections.abc import Iterator, Sequence
from typing import Any

from snaplift.cluster.batch import _expand, _import_jobqueue, _interface_address, allocation_resources, jobqueue_options
from snaplift.cluster.memory import _machine_memory
from snaplift.cluster.options import (
    QUIET_CLUSTER_CONFIG,
    TASK_RETRIES,
    ClusterOptions,
    NullProgress,
    Scheduler,
    TaskProgress,
    single_threaded_blas_environment,
    worker_environment,
)
from snaplift.errors import ConfigError
from snaplift.units import parse_bytes, usable_cores


@contextlib.contextmanager
def open_scheduler(section: ClusterOptions, *, progress: TaskProgress | None = None) -> Iterator[Scheduler]:
    """Start (and afterwards stop) the scheduler described by the ``cluster`` section.

    Example
    -------
    >>> with open_scheduler(ClusterOptions(kind="threads")) as scheduler:
    ...     scheduler.kind
    'threads'
    """
    progress = progress or NullProgress()
    if section.kind == "threads":
        yield from _threads(section, progress)
        return
    import dask
    from distributed import Client

    environ = worker_environment()
    # the settings reach the scheduler and nannies started here and, through the nannies,
    # their worker processes; an existing scheduler (kind 'address') keeps its own
    with dask.config.set({"distributed.nanny.pre-spawn-environ": environ,
                          "distributed.worker.daemon": False, **QUIET_CLUSTER_CONFIG}):
        if section.kind == "address":
            client = Client(section.address, timeout=f"{section.start_timeout}s", set_as_default=False)
            try:
                yield _distributed(client, section, progress, "address", {"address": section.address})
            finally:
                client.close()
            return
        with _start_cluster(section) as (cluster, workers, memory, extra):
            client = Client(cluster, set_as_default=False)
            try:
                if section.kind in ("slurm", "pbs") or extra.get("launcher") == "srun":
                    _wait_for_workers(client, section, 1 if section.kind in ("slurm", "pbs") else workers)
                yield _distributed(client, section, progress, section.kind,
                                   {**extra, "workers": workers, "memory_per_worker": memory},
                                   workers=workers, memory=memory)
            finally:
                client.close()


def _threads(section: ClusterOptions, progress: TaskProgress) -> Iterator[Scheduler]:
    cores = usable_cores()
    workers = section.workers or cores
    memory = parse_bytes(section.memory_per_worker) if section.memory_per_worker else _machine_memory() // 2
    # dask (with jinja2, psutil, toolz, cloudpickle: ~0.15 s) is imported on the first call
    # that may hold a dask collection, not as the run starts: the streaming compress runs
    # on its own threads and gives compute/persist plain arrays. Before dask is imported no
    # dask collection can exist, and dask.compute/persist give back such arguments as they are.
    dask_calls = _ThreadedDask(workers, progress)

    def compute(*args: Any, **kwargs: Any) -> Sequence[Any]:
        return dask_calls.run("compute", args, kwargs) if "dask" in sys.modules else args

    def persist(*args: Any, **kwargs: Any) -> Sequence[Any]:
        return dask_calls.run("persist", args, kwargs) if "dask" in sys.modules else args

    with dask_calls.configured():
        yield Scheduler("threads", workers, compute, persist, memory, progress=progress,
                        description={"kind": "threads", "workers": workers, "memory_per_worker": memory,
                                     "profile": section.profile})


class _ThreadedDask:
    """dask's threaded scheduler with ``workers`` threads and the run's progress (dask's
    local callbacks: fine under the threaded scheduler, silent under distributed)."""

    def __init__(self, workers: int, progress: TaskProgress) -> None:
        self.workers, self.progress = workers, progress
        self._callback: Any = None

    @contextlib.contextmanager
    def configured(self) -> Iterator[None]:
        """dask's configuration for the scheduler's lifetime when dask is already imported
        (a caller that computes with dask directly gets these threads); else each call
        sets it (:meth:`run`)."""
        if "dask" not in sys.modules:
            yield
            return
        import dask

        with dask.config.set(scheduler="threads", num_workers=self.workers):
            yield

    def run(self, name: str, args: tuple[Any, ...], kwargs: dict[str, Any]) -> Sequence[Any]:
        import dask

        with dask.config.set(scheduler="threads", num_workers=self.workers), self._local():
            return getattr(dask, name)(*args, **kwargs)

    def _local(self) -> Any:
        if self._callback is None:
            from dask.callbacks import Callback

            progress = self.progress

            class _Local(Callback):
                def _start_state(self, dsk: Any, state: Any) -> None:
                    progress.add_work(len(state.get("ready", ())) + len(state.get("waiting", {})))

                def _posttask(self, key: Any, result: Any, dsk: Any, state: Any, worker_id: Any) -> None:
                    progress.advance(1)

            self._callback = _Local
        return self._callback()


def _distributed(client: Any, section: ClusterOptions, progress: TaskProgress, kind: str,
                 description: dict[str, Any], *, workers: int | None = None,
                 memory: int | None = None) -> Scheduler:
    from distributed import as_completed, futures_of

    if workers is None or memory is None:
        info = client.scheduler_info()["workers"]
        workers = max(1, len(info))
        limits = [w.get("memory_limit") or 0 for w in info.values()]
        memory = int(min(limits)) if limits and min(limits) > 0 else (
            parse_bytes(section.memory_per_worker) if section.memory_per_worker else _machine_memory() // workers)

    def compute(*args: Any, **kwargs: Any) -> Sequence[Any]:
        # persist first so that every output chunk is a future whose completion advances
        # the progress; then gather (a cheap concatenation of finished chunks)
        kwargs.setdefault("retries", TASK_RETRIES)
        import dask

        lazy = [i for i, a in enumerate(args) if dask.is_dask_collection(a)]
        if not lazy:
            return tuple(args)
        persisted = client.persist([args[i] for i in lazy], retries=kwargs["retries"])
        futures = futures_of(persisted)
        progress.add_work(len(futures))
        for _ in as_completed(futures, loop=client.loop):
            progress.advance(1)
        gathered = client.gather(client.compute(persisted, **kwargs))
        out = list(args)
        for i, value in zip(lazy, gathered):
            out[i] = value
        del persisted, futures
        return tuple(out)

    def persist(*args: Any, **kwargs: Any) -> Sequence[Any]:
        import dask

        kwargs.setdefault("retries", TASK_RETRIES)
        if not any(dask.is_dask_collection(a) for a in args):
            return tuple(args)
        result = client.persist(list(args), **kwargs)
        futures = futures_of(result)
        progress.add_work(len(futures))
        for _ in as_completed(futures, loop=client.loop):
            progress.advance(1)
        return tuple(result)

    _warm_workers(client)
    dashboard = getattr(client, "dashboard_link", None)
    return Scheduler(kind, workers, compute, persist, int(memory), dashboard=dashboard, client=client,
                     progress=progress, description={"kind": kind, "profile": section.profile,
                                                     "workers": workers, "memory_per_worker": int(memory),
                                                     **description})


def _warm_workers(client: Any) -> None:
    """Start each worker's one-time costs (libraries a tile imports on first use, BLAS)
    now, without waiting: they overlap the driver's scan instead of the first tiles."""
    from distributed import fire_and_forget

    from snaplift.stream._tasks import warm_process

    try:
        for address in client.scheduler_info().get("workers", {}):
            fire_and_forget(client.submit(warm_process, pure=False, workers=[address], allow_other_workers=False))
    except Exception:  # a warm-up never fails a run: the first tile pays instead
        pass


def _wait_for_workers(client: Any, section: ClusterOptions, n: int) -> None:
    try:
        client.wait_for_workers(n_workers=n, timeout=section.start_timeout)
    except (TimeoutError, OSError) as error:
        raise ConfigError(
            f"cluster kind {section.kind!r}: {n} worker(s) did not start within cluster.start_timeout = "
            f"{section.start_timeout:g} s ({type(error).__name__}); check the queue (squeue / qstat) "
            "and the worker logs in cluster.log_directory"
        ) from None


@contextlib.contextmanager
def _start_cluster(section: ClusterOptions) -> Iterator[tuple[Any, int, int, dict[str, Any]]]:
    from distributed import LocalCluster

    if section.kind == "local":
        cores = usable_cores()
        workers = section.workers or cores
        memory = (parse_bytes(section.memory_per_worker) if section.memory_per_worker
                  else int(0.8 * _machine_memory() / workers))
        cluster = LocalCluster(n_workers=workers, threads_per_worker=section.threads_per_worker or 1,
                               processes=True, memory_limit=memory, dashboard_address=":0",
                               silence_logs=40, interface=section.interface,
                               local_directory=_expand(section.local_directory))
        with contextlib.closing(cluster):
            yield cluster, workers, memory, {}
        return
    if section.kind in ("slurm", "pbs"):
        try:
            dask_jobqueue = _import_jobqueue()
        except ImportError:
            raise ConfigError(
                f"cluster kind {section.kind!r} needs dask-jobqueue; install it with "
                "pip install 'snaplift[cluster]'"
            ) from None
        options = jobqueue_options(section)
        factory = dask_jobqueue.SLURMCluster if section.kind == "slurm" else dask_jobqueue.PBSCluster
        processes = section.processes or 1
        workers = section.workers or processes
        memory = parse_bytes(section.memory or "1GiB") // processes
        batch: Any = factory(**options)
        with contextlib.closing(batch):
            if section.worker_lifetime or section.walltime:
                # retiring workers are replaced by new jobs
                batch.adapt(minimum=workers, maximum=workers)
            else:
                batch.scale(n=workers)
            yield batch, workers, memory, {"job_script": batch.job_script()}
        return
    if section.kind == "allocation":
        resources = allocation_resources(os.environ)
        launcher = section.launcher
        if launcher == "auto":
            launcher = "srun" if resources["nodes"] > 1 else "local"
        threads = section.threads_per_worker or 1
        if launcher == "local":
            workers = section.workers or max(1, resources["cpus"] // threads)
            memory = (parse_bytes(section.memory_per_worker) if section.memory_per_worker
                      else int(0.8 * resources["memory"] / workers))
            cluster = LocalCluster(n_workers=workers, threads_per_worker=threads, processes=True,
                                   memory_limit=memory, dashboard_address=":0", silence_logs=40,
                                   interface=section.interface, local_directory=_expand(section.local_directory))
            with contextlib.closing(cluster):
                yield cluster, workers, memory, {"launcher": "local", **resources}
            return
        if resources["system"] != "slurm" or shutil.which("srun") is None:
            # a valid request not supported yet (PBS across nodes); found at run time, so a
            # ConfigError (one line, exit 2) rather than NotImplementedError's traceback
            raise ConfigError(
                "cluster kind 'allocation' with launcher 'srun' needs a SLURM allocation and srun on PATH; "
                f"found system {resources['system']!r}; workers across several PBS nodes are not supported "
                "yet: use one node (launcher: local) or kind 'pbs'"
            )
        workers = section.workers or resources["tasks"]
        memory = (parse_bytes(section.memory_per_worker) if section.memory_per_worker
                  else int(0.8 * resources["memory"] * resources["nodes"] / workers))
        host = _interface_address(section.interface) if section.interface else socket.gethostname()
        cluster = LocalCluster(n_workers=0, processes=True, host=host, scheduler_port=0,
                               dashboard_address=":0", silence_logs=40)
        command = ["srun", f"--ntasks={workers}", f"--cpus-per-task={threads}", "--export=ALL",
                   sys.executable, "-m", "distributed.cli.dask_worker", cluster.scheduler_address,
                   "--nthreads", str(threads), "--memory-limit", str(memory), "--no-dashboard",
                   "--death-timeout", "60"]
        if section.local_directory:
            command += ["--local-directory", os.path.expandvars(section.local_directory)]
        environ = {**os.environ, **single_threaded_blas_environment()}
        process = subprocess.Popen(command, env=environ, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        try:
            with contextlib.closing(cluster):
                yield cluster, workers, memory, {"launcher": "srun", **resources}
        finally:
            process.terminate()
            try:
                process.wait(timeout=30)
            except subprocess.TimeoutExpired:
                process.kill()
        return
    raise ConfigError(f"cluster.kind {section.kind!r} is not known")  # pragma: no cover - schema forbids
