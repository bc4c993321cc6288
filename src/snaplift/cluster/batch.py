"""Batch systems: dask-jobqueue options for SLURM/PBS worker jobs, and the resources of an
allocation this run is inside (``SLURM_*`` / ``PBS_*`` variables).
"""

from __future__ import annotations

import os
import socket
import sys
from typing import Any

from snaplift.cluster.memory import _machine_memory
from snaplift.cluster.options import ClusterOptions, single_threaded_blas_environment
from snaplift.errors import ConfigError
from snaplift.units import parse_bytes, parse_duration, parse_walltime, usable_cores


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
