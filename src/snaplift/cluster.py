"""Where the work runs: threads, a LocalCluster, an existing scheduler, SLURM/PBS jobs.

Only the workflow runner enters :func:`open_scheduler`; library functions receive the
``compute`` / ``persist`` callables it yields and never create clients themselves.
Worker processes run BLAS single-threaded (the parallelism is across tiles).

Kinds (``cluster.kind``; example profiles in ``configs/``):

- ``threads``: dask's threaded scheduler in this process; no scheduler process.
- ``local``: a distributed LocalCluster, one single-threaded worker process per core.
- ``address``: connect to a running scheduler (``cluster.address``); it is left running.
- ``slurm`` / ``pbs``: worker jobs submitted through dask-jobqueue. With
  ``worker_lifetime`` (default: 10 % or at least 5 minutes short of ``walltime``) workers
  retire before their job is killed, staggered by ``lifetime_stagger``, and the cluster
  adapts to keep ``workers`` alive, so a run longer than one walltime continues on new
  jobs while the scheduler re-runs the retiring workers' tasks elsewhere.
- ``allocation``: this run is itself inside a batch allocation (``sbatch`` script,
  ``salloc``, ``qsub`` job). On one node (``launcher: local``, the default for one node)
  a LocalCluster is sized to the allocation from ``SLURM_CPUS_ON_NODE`` /
  ``SLURM_MEM_PER_NODE`` (PBS: ``NCPUS`` / ``PBS_NUM_PPN``). On several SLURM nodes
  (``launcher: srun``) the scheduler runs in this process and ``srun`` starts
  ``SLURM_NTASKS`` worker processes across the allocation.

Progress: :class:`Scheduler` carries a :class:`TaskProgress`; under distributed it is
driven by futures completing (``distributed.as_completed``), under threads by dask's
local callbacks (which are silent under distributed, hence the two paths).

Memory: ``compress.memory`` bounds the whole process tree of a run. :func:`resident_memory`
measures what the run's processes already hold before a pass (psutil RSS of this process
and its children; through ``Client.run`` each worker process and nanny, also remote ones),
and the tile planner plans the tiles in what remains (:mod:`snaplift.archive.plan`).
"""

from __future__ import annotations

import contextlib
import os
import shutil
import socket
import subprocess
import sys
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass, field
from typing import Any, Protocol

import dask

from snaplift.errors import ConfigError
from snaplift.units import parse_bytes, parse_duration, parse_walltime, usable_cores

__all__ = [
    "ClusterOptions",
    "BASELINE_MARGIN",
    "BASELINE_MARGIN_BYTES",
    "TASK_RETRIES",
    "TASK_MODULES",
    "NullProgress",
    "ResidentMemory",
    "Scheduler",
    "TaskProgress",
    "allocation_resources",
    "jobqueue_options",
    "open_scheduler",
    "resident_memory",
    "single_threaded_blas_environment",
]

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
    from distributed import Client

    environ = {**single_threaded_blas_environment(), "MALLOC_TRIM_THRESHOLD_": "65536"}
    with dask.config.set({"distributed.nanny.pre-spawn-environ": environ,
                          "distributed.worker.daemon": False}):
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
    from dask.callbacks import Callback

    cores = usable_cores()
    workers = section.workers or cores
    memory = parse_bytes(section.memory_per_worker) if section.memory_per_worker else _machine_memory() // 2

    class _Local(Callback):
        # dask's local callbacks: fine under the threaded scheduler, silent under distributed
        def _start_state(self, dsk: Any, state: Any) -> None:
            progress.add_work(len(state.get("ready", ())) + len(state.get("waiting", {})))

        def _posttask(self, key: Any, result: Any, dsk: Any, state: Any, worker_id: Any) -> None:
            progress.advance(1)

    def compute(*args: Any, **kwargs: Any) -> Sequence[Any]:
        with _Local():
            return dask.compute(*args, **kwargs)

    def persist(*args: Any, **kwargs: Any) -> Sequence[Any]:
        with _Local():
            return dask.persist(*args, **kwargs)

    with dask.config.set(scheduler="threads", num_workers=workers):
        yield Scheduler("threads", workers, compute, persist, memory, progress=progress,
                        description={"kind": "threads", "workers": workers, "memory_per_worker": memory,
                                     "profile": section.profile})


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
        kwargs.setdefault("retries", TASK_RETRIES)
        if not any(dask.is_dask_collection(a) for a in args):
            return tuple(args)
        result = client.persist(list(args), **kwargs)
        futures = futures_of(result)
        progress.add_work(len(futures))
        for _ in as_completed(futures, loop=client.loop):
            progress.advance(1)
        return tuple(result)

    dashboard = getattr(client, "dashboard_link", None)
    return Scheduler(kind, workers, compute, persist, int(memory), dashboard=dashboard, client=client,
                     progress=progress, description={"kind": kind, "profile": section.profile,
                                                     "workers": workers, "memory_per_worker": int(memory),
                                                     **description})


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


def _import_jobqueue() -> Any:
    """Import dask-jobqueue without letting it replace the SIGINT handler.

    dask_jobqueue.runner (imported by its SLURM module) sets SIGINT to ``sys.exit()`` for
    the whole process, which would turn Ctrl-C into a silent exit with status 0.
    """
    import signal
    import threading

    if threading.current_thread() is not threading.main_thread():
        import dask_jobqueue

        return dask_jobqueue
    previous = signal.getsignal(signal.SIGINT)
    try:
        import dask_jobqueue
    finally:
        signal.signal(signal.SIGINT, previous)
    return dask_jobqueue


def _expand(path: str | None) -> str | None:
    # profiles name node-local scratch as $TMPDIR or /scratch/$SLURM_JOB_ID
    return os.path.expanduser(os.path.expandvars(path)) if path else None


def _interface_address(interface: str) -> str:
    import psutil

    for address in psutil.net_if_addrs().get(interface, []):
        if address.family == socket.AF_INET:
            return str(address.address)
    raise ConfigError(f"cluster.interface {interface!r} has no IPv4 address on {socket.gethostname()}")


def allocation_resources(environ: dict[str, str] | os._Environ[str]) -> dict[str, Any]:
    """CPUs, memory (bytes), nodes and tasks of the batch allocation this process is in.

    Example
    -------
    >>> allocation_resources({"SLURM_JOB_ID": "7", "SLURM_CPUS_ON_NODE": "8",
    ...                       "SLURM_MEM_PER_NODE": "16000", "SLURM_JOB_NUM_NODES": "1"})["cpus"]
    8
    """
    if environ.get("SLURM_JOB_ID"):
        cpus = int(environ.get("SLURM_CPUS_ON_NODE") or usable_cores())
        nodes = int(environ.get("SLURM_JOB_NUM_NODES") or environ.get("SLURM_NNODES") or 1)
        if environ.get("SLURM_MEM_PER_NODE"):
            memory = int(environ["SLURM_MEM_PER_NODE"]) * 2**20  # SLURM reports MiB
        elif environ.get("SLURM_MEM_PER_CPU"):
            memory = int(environ["SLURM_MEM_PER_CPU"]) * 2**20 * cpus
        else:
            memory = _machine_memory()
        tasks = int(environ.get("SLURM_NTASKS") or nodes * cpus)
        return {"system": "slurm", "job": environ["SLURM_JOB_ID"], "cpus": cpus, "memory": memory,
                "nodes": nodes, "tasks": tasks}
    if environ.get("PBS_JOBID"):
        cpus = int(environ.get("NCPUS") or environ.get("PBS_NUM_PPN") or usable_cores())
        nodes = 1
        nodefile = environ.get("PBS_NODEFILE")
        if nodefile and os.path.isfile(nodefile):
            with open(nodefile) as handle:
                nodes = max(1, len({line.strip() for line in handle if line.strip()}))
        return {"system": "pbs", "job": environ["PBS_JOBID"], "cpus": cpus, "memory": _machine_memory(),
                "nodes": nodes, "tasks": nodes * cpus}
    raise ConfigError(
        "cluster kind 'allocation' runs inside a batch allocation, but neither SLURM_JOB_ID nor PBS_JOBID "
        "is set; start the run from an sbatch/qsub script (or salloc), or use cluster kind 'local'"
    )


def jobqueue_options(section: ClusterOptions) -> dict[str, Any]:
    """Keyword arguments of dask-jobqueue's ``SLURMCluster`` / ``PBSCluster`` for a profile.

    Workers retire ``worker_lifetime`` after they start (default: walltime minus 10 %,
    at least 5 minutes short), spread by ``lifetime_stagger`` (default: 5 % of the
    lifetime), so that no worker is killed by the batch system mid-task all at once.

    Example
    -------
    >>> section = ClusterOptions(kind="slurm", cores=4, memory="8GiB", walltime="01:00:00")
    >>> jobqueue_options(section)["worker_extra_args"]
    ['--lifetime', '3240s', '--lifetime-stagger', '162s']
    """
    if section.kind not in ("slurm", "pbs"):
        raise ConfigError(f"jobqueue_options: cluster kind {section.kind!r} is not a batch kind (slurm, pbs)")
    extra: list[str] = []
    lifetime = parse_duration(section.worker_lifetime) if section.worker_lifetime else None
    if lifetime is None and section.walltime:
        walltime = parse_walltime(section.walltime)
        lifetime = walltime - max(300.0, 0.1 * walltime)
        if lifetime <= 0:
            lifetime = 0.9 * walltime
    if lifetime is not None:
        stagger = parse_duration(section.lifetime_stagger) if section.lifetime_stagger else 0.05 * lifetime
        extra += ["--lifetime", f"{int(lifetime)}s", "--lifetime-stagger", f"{int(stagger)}s"]
    blas = [f"export {name}={value}" for name, value in single_threaded_blas_environment().items()]
    options: dict[str, Any] = {
        "cores": section.cores,
        "memory": _jobqueue_memory(section.memory or "1GiB"),
        "processes": section.processes or 1,
        "queue": section.queue,
        "account": section.account,
        "walltime": section.walltime,
        "job_extra_directives": list(section.job_extra_directives),
        "job_script_prologue": [*blas, *section.job_script_prologue],
        "worker_extra_args": extra,
        "python": section.python or sys.executable,
        "job_name": "snaplift-worker",
        "scheduler_options": {"dashboard_address": ":0"},
    }
    if section.interface:
        options["interface"] = section.interface
        options["scheduler_options"]["interface"] = section.interface
    if section.local_directory:
        options["local_directory"] = section.local_directory
    if section.log_directory:
        options["log_directory"] = section.log_directory
    return {key: value for key, value in options.items() if value is not None}


def _jobqueue_memory(text: str) -> str:
    # dask-jobqueue parses sizes with dask.utils.parse_bytes; give it bytes it cannot misread
    return f"{parse_bytes(text) // 2**20}MiB"
