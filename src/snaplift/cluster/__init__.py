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

from snaplift.cluster.batch import allocation_resources, jobqueue_options
from snaplift.cluster.memory import (
    BASELINE_MARGIN,
    BASELINE_MARGIN_BYTES,
    TASK_MODULES,
    ResidentMemory,
    resident_memory,
)
from snaplift.cluster.options import (
    TASK_RETRIES,
    ClusterOptions,
    NullProgress,
    Scheduler,
    TaskProgress,
    single_threaded_blas_environment,
)
from snaplift.cluster.scheduler import open_scheduler

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
