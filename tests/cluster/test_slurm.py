"""A real SLURM cluster: worker jobs through dask-jobqueue, and a run inside one allocation.

Skipped where ``sbatch`` is absent, unless ``SNAPLIFT_REQUIRE_SLURM=1`` (set by .ci/run once
its one-node cluster is up), in which case a missing SLURM is a failure, not a skip.
"""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
from pathlib import Path

import h5py
import numpy as np
import pytest
import yaml
import zarr

from snaplift.results.store import read_group
from snaplift.workflow.runner import run_workflow

pytestmark = pytest.mark.slurm

ROOT = Path(__file__).resolve().parents[2]
REQUIRED = os.environ.get("SNAPLIFT_REQUIRE_SLURM") == "1"


def _slurm_or_skip() -> None:
    have = shutil.which("sbatch") is not None
    if have:
        probe = subprocess.run(["sinfo", "-h", "-o", "%T"], capture_output=True, text=True, timeout=30)
        have = probe.returncode == 0 and probe.stdout.strip() != ""
    if not have:
        if REQUIRED:
            pytest.fail("SNAPLIFT_REQUIRE_SLURM=1 but no working SLURM (sbatch / sinfo) was found")
        pytest.skip("no SLURM here (sbatch absent); .ci/run starts a one-node cluster")


def _archive(folder: Path) -> None:
    rng = np.random.default_rng(8)
    pairs = np.array([0.98 * np.exp(0.35j), 0.91 * np.exp(1.1j)])
    phi = rng.standard_normal((150, 2)) + 1j * rng.standard_normal((150, 2))
    x = (phi @ (pairs[:, None] ** np.arange(50)[None, :])).real.T.reshape(50, 10, 15)
    x += 1e-4 * rng.standard_normal(x.shape)
    with h5py.File(folder / "a.h5", "w") as h5:
        h5["t"] = 0.1 * np.arange(50)
        h5.create_dataset("u", data=x, chunks=(1, 10, 15))


def _workflow(folder: Path, name: str, cluster: object, output: str) -> Path:
    data = {"archive": {"path": "a.h5", "fields": ["u"], "time": "t"},
            "compress": {"rank": 6, "oversample": 4, "memory": "4GiB"}, "fit": {"rank": 4},
            "output": {"path": output}, "cluster": cluster}
    path = folder / name
    path.write_text(yaml.safe_dump(data))
    return path


def _assert_equal(a: Path, b: Path) -> None:
    # reference: the same workflow on a local cluster (same seed: same keys, same numbers)
    for group, name in (("basis", "singular_value"), ("basis", "coefficient"), ("spectrum", "eigenvalue"),
                        ("modes", "u")):
        x, y = read_group(a, group)[name], read_group(b, group)[name]
        np.testing.assert_allclose(x, y, rtol=1e-12, atol=1e-12 * np.nanmax(np.abs(y)), err_msg=f"{group}/{name}")


def test_slurm_profile_submits_worker_jobs(tmp_path: Path) -> None:
    _slurm_or_skip()
    _archive(tmp_path)
    local = run_workflow(_workflow(tmp_path, "local.yaml", {"kind": "local", "workers": 2}, "local.zarr"))
    # the example profile, with the keys a one-node CI cluster needs overridden
    profile = {"profile": str(ROOT / "configs" / "slurm-example.yaml"), "queue": None, "account": None,
               "workers": 2, "cores": 1, "memory": "1GiB", "processes": 1, "walltime": "00:15:00",
               "worker_lifetime": "14m", "lifetime_stagger": "30s", "job_extra_directives": [],
               "job_script_prologue": [], "local_directory": str(tmp_path / "scratch"),
               "log_directory": str(tmp_path / "logs"), "start_timeout": 180}
    slurm = run_workflow(_workflow(tmp_path, "slurm.yaml", profile, "slurm.zarr"))
    attrs = dict(zarr.open_group(str(slurm.path), mode="r").attrs)
    assert attrs["cluster"]["kind"] == "slurm"
    assert "#SBATCH" in attrs["cluster"]["job_script"] and "--lifetime 840s" in attrs["cluster"]["job_script"]
    assert list((tmp_path / "logs").glob("*.err"))  # the worker jobs really ran under SLURM
    _assert_equal(slurm.path, local.path)


def test_run_inside_one_allocation_with_srun(tmp_path: Path) -> None:
    _slurm_or_skip()
    _archive(tmp_path)
    local = run_workflow(_workflow(tmp_path, "local.yaml", {"kind": "local", "workers": 2}, "local.zarr"))
    path = _workflow(tmp_path, "inside.yaml", {"kind": "allocation", "launcher": "srun", "start_timeout": 120},
                     "inside.zarr")
    script = tmp_path / "job.sh"
    script.write_text(f"#!/bin/bash\nexec {sys.executable} -m snaplift.cli run {path} --quiet "
                      f"--log {tmp_path}/run.log\n")
    done = subprocess.run(["sbatch", "--wait", "--ntasks=2", "--cpus-per-task=1", "--mem=3G", "--time=10",
                           f"--output={tmp_path}/job.out", str(script)],
                          capture_output=True, text=True, timeout=400)
    output = (tmp_path / "job.out").read_text() if (tmp_path / "job.out").exists() else ""
    assert done.returncode == 0, done.stderr + output
    attrs = dict(zarr.open_group(str(tmp_path / "inside.zarr"), mode="r").attrs)
    assert attrs["cluster"]["launcher"] == "srun" and attrs["cluster"]["workers"] == 2
    assert "compress: finished" in (tmp_path / "run.log").read_text()
    _assert_equal(tmp_path / "inside.zarr", local.path)
