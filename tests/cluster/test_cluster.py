"""Scheduler kinds: threads, local, address, allocation; SLURM/PBS job scripts; worker loss."""

from __future__ import annotations

import textwrap
from pathlib import Path

import dask
import dask.array as da
import h5py
import numpy as np
import pytest
import yaml

from snaplift.cluster import allocation_resources, jobqueue_options, open_scheduler
from snaplift.errors import ConfigError
from snaplift.results.store import read_group
from snaplift.workflow.runner import run_workflow
from snaplift.workflow.schema import ClusterSection


class _Counter:
    def __init__(self) -> None:
        self.work = 0
        self.done = 0

    def add_work(self, units: int) -> None:
        self.work += units

    def advance(self, units: int = 1) -> None:
        self.done += units


def _product() -> tuple[da.Array, np.ndarray]:
    x = np.arange(400.0).reshape(40, 10)
    return da.from_array(x, chunks=(10, 10)) @ da.from_array(x.T, chunks=(10, 10)), x @ x.T


def test_threads_compute_reports_progress() -> None:
    counter = _Counter()
    lazy, expected = _product()
    with open_scheduler(ClusterSection(kind="threads", workers=2), progress=counter) as scheduler:
        (value,) = scheduler.compute(lazy)
    np.testing.assert_array_equal(value, expected)  # reference: numpy matmul
    assert counter.done > 0 and counter.work >= counter.done


def test_local_cluster_progress_comes_from_futures() -> None:
    counter = _Counter()
    lazy, expected = _product()
    with open_scheduler(ClusterSection(kind="local", workers=1), progress=counter) as scheduler:
        (value,) = scheduler.compute(lazy)
        assert scheduler.client is not None and scheduler.workers == 1
    np.testing.assert_array_equal(value, expected)  # reference: numpy matmul
    assert counter.work == 16 and counter.done == 16  # one future per output chunk (4 x 4)


def test_address_kind_uses_a_running_scheduler() -> None:
    from distributed import LocalCluster

    lazy, expected = _product()
    with LocalCluster(n_workers=1, threads_per_worker=1, processes=False, dashboard_address=None) as cluster:
        section = ClusterSection(kind="address", address=cluster.scheduler_address)
        with open_scheduler(section) as scheduler:
            (value,) = scheduler.compute(lazy)
            assert scheduler.kind == "address" and scheduler.workers == 1
        assert len(cluster.scheduler_info["workers"]) == 1  # left running
    np.testing.assert_array_equal(value, expected)


def test_pbs_job_script_renders_every_setting() -> None:
    dask_jobqueue = pytest.importorskip("dask_jobqueue")
    section = ClusterSection(kind="pbs", cores=8, memory="32GiB", processes=2, queue="workq", account="proj7",
                             walltime="02:00:00", job_extra_directives=["-l place=scatter"],
                             local_directory="$TMPDIR", interface="lo", job_script_prologue=["module load x"])
    with dask_jobqueue.PBSCluster(**jobqueue_options(section)) as cluster:
        script = cluster.job_script()
    assert "#PBS -q workq" in script and "#PBS -A proj7" in script
    assert "#PBS -l walltime=02:00:00" in script and "#PBS -l place=scatter" in script
    assert "ncpus=8" in script and "--nworkers 2" in script and "--nthreads 4" in script
    # walltime 2 h: workers retire 12 min early (10 %), staggered over 5 % of their lifetime
    assert "--lifetime 6480s" in script and "--lifetime-stagger 324s" in script
    assert "--local-directory $TMPDIR" in script and "--interface lo" in script
    assert "export OMP_NUM_THREADS=1" in script and "module load x" in script


def test_slurm_job_script_renders_every_setting() -> None:
    dask_jobqueue = pytest.importorskip("dask_jobqueue")
    section = ClusterSection(kind="slurm", cores=4, memory="8GiB", processes=1, queue="short", account="proj7",
                             walltime="00:30:00", worker_lifetime="25m", lifetime_stagger="2m",
                             job_extra_directives=["--exclusive"], local_directory="/scratch/$SLURM_JOB_ID")
    with dask_jobqueue.SLURMCluster(**jobqueue_options(section)) as cluster:
        script = cluster.job_script()
    assert "#SBATCH -p short" in script and "#SBATCH -A proj7" in script
    assert "#SBATCH -t 00:30:00" in script and "#SBATCH --exclusive" in script
    assert "#SBATCH --cpus-per-task=4" in script and "#SBATCH --mem=8G" in script
    assert "--lifetime 1500s --lifetime-stagger 120s" in script
    assert "--local-directory /scratch/$SLURM_JOB_ID" in script


def test_allocation_resources_from_the_environment(tmp_path: Path) -> None:
    slurm = allocation_resources({"SLURM_JOB_ID": "12", "SLURM_CPUS_ON_NODE": "16", "SLURM_MEM_PER_NODE": "64000",
                                  "SLURM_JOB_NUM_NODES": "2", "SLURM_NTASKS": "32"})
    assert slurm == {"system": "slurm", "job": "12", "cpus": 16, "memory": 64000 * 2**20, "nodes": 2, "tasks": 32}
    nodefile = tmp_path / "nodes"
    nodefile.write_text("n1\nn1\nn2\n")
    pbs = allocation_resources({"PBS_JOBID": "7.server", "NCPUS": "8", "PBS_NODEFILE": str(nodefile)})
    assert pbs["nodes"] == 2 and pbs["cpus"] == 8
    with pytest.raises(ConfigError, match="neither SLURM_JOB_ID nor PBS_JOBID"):
        allocation_resources({})


def test_allocation_kind_on_one_node(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("SLURM_JOB_ID", "1")
    monkeypatch.setenv("SLURM_CPUS_ON_NODE", "1")
    monkeypatch.setenv("SLURM_MEM_PER_NODE", "2000")
    monkeypatch.setenv("SLURM_JOB_NUM_NODES", "1")
    lazy, expected = _product()
    with open_scheduler(ClusterSection(kind="allocation")) as scheduler:
        (value,) = scheduler.compute(lazy)
        assert scheduler.workers == 1
        assert scheduler.memory_per_worker == int(0.8 * 2000 * 2**20)
        assert scheduler.description["launcher"] == "local"
    np.testing.assert_array_equal(value, expected)


_KILLER = '''
import os, signal
from pathlib import Path
from distributed.diagnostics.plugin import WorkerPlugin

MARKER = Path({marker!r})


class KillOnce(WorkerPlugin):
    """SIGKILL this worker process at its third task, once per test (the marker file)."""

    def __init__(self):
        self.started = 0

    def transition(self, key, start, finish, **kwargs):
        if finish == "executing":
            self.started += 1
            if self.started == 3 and not MARKER.exists():
                MARKER.write_text(str(os.getpid()))
                os.kill(os.getpid(), signal.SIGKILL)


async def dask_setup(worker):
    await worker.plugin_add(KillOnce(), name="kill-once")
'''


@pytest.mark.timeout(180)  # a hang here (a task waiting on a dead worker) must fail, not stall CI
def test_worker_killed_mid_run_is_survived(tmp_path: Path) -> None:
    rng = np.random.default_rng(3)
    pairs = np.array([0.97 * np.exp(0.5j), 0.9 * np.exp(1.4j)])
    phi = rng.standard_normal((80, 2)) + 1j * rng.standard_normal((80, 2))
    x = (phi @ (pairs[:, None] ** np.arange(40)[None, :])).real.T.reshape(40, 8, 10)
    with h5py.File(tmp_path / "a.h5", "w") as h5:
        h5["t"] = 0.1 * np.arange(40)
        h5.create_dataset("u", data=x, chunks=(1, 8, 10))
    # compress.memory bounds the whole process tree (interpreters included); the 40 snapshots
    # still make 8 tiles a pass for 2 workers (snaplift.archive.plan.TILES_PER_WORKER)
    # (in_memory: never: the small matrix would otherwise be compressed in the driver, on no worker)
    base = {"archive": {"path": "a.h5", "fields": ["u"], "time": "t"}, "compress": {"rank": 4, "oversample": 4,
            "memory": "2GiB", "in_memory": "never"}}
    (tmp_path / "threads.yaml").write_text(yaml.safe_dump({**base, "cluster": "threads", "output": {"path": "t.zarr"}}))
    (tmp_path / "local.yaml").write_text(yaml.safe_dump({**base, "cluster": {"kind": "local", "workers": 2},
                                                         "output": {"path": "l.zarr"}}))
    marker = tmp_path / "killed"
    script = tmp_path / "killer.py"
    script.write_text(textwrap.dedent(_KILLER.format(marker=str(marker))))
    threads = run_workflow(tmp_path / "threads.yaml")
    with dask.config.set({"distributed.worker.preload": [str(script)]}):
        local = run_workflow(tmp_path / "local.yaml")
    assert marker.exists()  # a worker really died mid-run
    # reference: the threaded run of the same workflow (same seed, same keys)
    np.testing.assert_allclose(read_group(local.path, "basis")["singular_value"],
                               read_group(threads.path, "basis")["singular_value"], rtol=1e-12)
    np.testing.assert_allclose(read_group(local.path, "spectrum")["eigenvalue"],
                               read_group(threads.path, "spectrum")["eigenvalue"], rtol=1e-10)


def test_a_cancelled_pinned_task_counts_as_a_lost_worker() -> None:
    # distributed reports a task pinned to a worker that died either as lost or as
    # cancelled ("already forgotten"); both resume from the checkpoint, other errors do not
    from distributed.client import FutureCancelledError

    from snaplift.workflow.runner import _worker_lost

    assert _worker_lost(FutureCancelledError("sketch_task-1", reason="already forgotten"))
    assert _worker_lost(RuntimeError("a worker holding compress accumulators was lost; run again"))
    assert not _worker_lost(ValueError("bad tile"))
