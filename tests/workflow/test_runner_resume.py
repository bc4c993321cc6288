"""Runs killed (SIGKILL), interrupted (Ctrl-C / SIGTERM) and resumed, as real subprocesses.

Kills are placed with the runner's fault hook (SNAPLIFT_FAULT, see
snaplift.workflow.runner.FAULT_VARIABLE) so that they land at a known point, never
after a sleep: these tests do not depend on wall time.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
from pathlib import Path

import h5py
import numpy as np
import pytest
import yaml
import zarr

from snaplift.results.store import read_group
from snaplift.workflow.runner import FAULT_VARIABLE

SNAPSHOTS = 64


def _setup(folder: Path, cluster: str | dict = "threads", **compress) -> Path:
    rng = np.random.default_rng(4)
    pairs = np.array([0.98 * np.exp(0.3j), 0.92 * np.exp(1.0j), 0.95 * np.exp(0.1j)])
    phi = rng.standard_normal((120, 3)) + 1j * rng.standard_normal((120, 3))
    x = (phi @ (pairs[:, None] ** np.arange(SNAPSHOTS)[None, :])).real.T.reshape(SNAPSHOTS, 10, 12)
    # a noise tail, so that projection and reconstruction errors are well above rounding
    x += 1e-3 * rng.standard_normal(x.shape)
    with h5py.File(folder / "a.h5", "w") as h5:
        h5["t"] = 0.05 * np.arange(SNAPSHOTS)
        h5.create_dataset("u", data=x, chunks=(1, 10, 12))
    settings = {"rank": 6, "oversample": 4, **compress}
    data = {"archive": {"path": "a.h5", "fields": ["u"], "time": "t"}, "prepare": {"center": True},
            "compress": settings, "fit": {"rank": 6}, "output": {"path": "r.zarr"}, "cluster": cluster}
    path = folder / "w.yaml"
    path.write_text(yaml.safe_dump(data))
    return path


def _run(path: Path, fault: str | None = None) -> subprocess.CompletedProcess:
    env = {k: v for k, v in os.environ.items() if k != FAULT_VARIABLE}
    if fault:
        env[FAULT_VARIABLE] = fault
    return subprocess.run([sys.executable, "-m", "snaplift.cli", "run", str(path), "--quiet"],
                          env=env, capture_output=True, text=True, timeout=300)


def _assert_same_results(a: Path, b: Path) -> None:
    # reference: the uninterrupted run of the same workflow. 1e-12 relative; the absolute
    # floor is 1e-12 of the data's magnitude (O(1) here), because the fixed point of this
    # zero-mean system is itself rounding noise (~1e-16)
    for group, name in (("basis", "singular_value"), ("basis", "coefficient"), ("spectrum", "eigenvalue"),
                        ("modes", "u"), ("prepare", "fixed_point_u"), ("diagnostics", "reconstruction_error")):
        x, y = read_group(a, group)[name], read_group(b, group)[name]
        floor = 1e-12 * max(float(np.nanmax(np.abs(y))), 1.0)
        np.testing.assert_allclose(x, y, rtol=1e-12, atol=floor, err_msg=f"{group}/{name}")


def test_killed_after_compress_resumes_without_reading(tmp_path: Path) -> None:
    (tmp_path / "ref").mkdir()
    reference = _run(_setup(tmp_path / "ref"))
    assert reference.returncode == 0, reference.stderr
    folder = tmp_path / "killed"
    folder.mkdir()
    path = _setup(folder)
    killed = _run(path, "compress:end")
    assert killed.returncode == -signal.SIGKILL
    assert not (folder / "r.zarr").exists()  # nothing half-written looks finished
    assert (folder / "r.zarr.staging" / "stages" / "compress.json").exists()
    assert (folder / "r.zarr.lease").exists()  # left behind by the dead run: stale (dead pid)
    resumed = _run(path)
    assert resumed.returncode == 0, resumed.stderr
    attrs = dict(zarr.open_group(str(folder / "r.zarr"), mode="r").attrs)
    assert attrs["stages"]["compress"]["status"] == "kept"
    assert attrs["stages"]["compress"]["bytes_read"] == 0
    assert any("took over the lease" in w for w in attrs["warnings"])
    _assert_same_results(folder / "r.zarr", tmp_path / "ref" / "r.zarr")


def test_killed_during_modes_keeps_compress(tmp_path: Path) -> None:
    path = _setup(tmp_path)
    killed = _run(path, "fit:end")
    assert killed.returncode == -signal.SIGKILL
    resumed = _run(path)
    assert resumed.returncode == 0, resumed.stderr
    stages_record = zarr.open_group(str(tmp_path / "r.zarr"), mode="r").attrs["stages"]
    assert stages_record["compress"]["status"] == "kept" and stages_record["modes"]["status"] == "computed"


def test_sigterm_stops_cleanly_and_says_how_to_resume(tmp_path: Path) -> None:
    # SIGTERM is what SLURM/PBS send at the walltime (and scancel) before SIGKILL
    path = _setup(tmp_path)
    stopped = _run(path, "modes:end:TERM")
    assert stopped.returncode == 130, stopped.stderr
    assert "again to resume" in stopped.stderr and f"snaplift run {path}" in stopped.stderr
    assert "Traceback" not in stopped.stderr
    assert not (tmp_path / "r.zarr").exists() and not (tmp_path / "r.zarr.lease").exists()
    resumed = _run(path)
    assert resumed.returncode == 0, resumed.stderr
    stages_record = zarr.open_group(str(tmp_path / "r.zarr"), mode="r").attrs["stages"]
    assert stages_record["modes"]["status"] == "kept"


def test_ctrl_c_keeps_finished_stages(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    from snaplift.workflow.runner import RunInterrupted, run_workflow

    # importing dask-jobqueue's SLURM module replaces Python's SIGINT handler with sys.exit();
    # the runner must still turn Ctrl-C into a clean, resumable stop
    pytest.importorskip("dask_jobqueue.slurm")
    path = _setup(tmp_path)
    monkeypatch.setenv(FAULT_VARIABLE, "compress:end:INT")  # Ctrl-C right after compress finished
    with pytest.raises(RunInterrupted, match=r"finished stages and checkpoints are kept in .*r\.zarr\.staging"):
        run_workflow(path)
    assert not (tmp_path / "r.zarr.lease").exists()
    monkeypatch.delenv(FAULT_VARIABLE)
    summary = run_workflow(path)
    assert summary.stages["compress"]["status"] == "kept" and summary.bytes_read == 0


# inside pass 0; inside pass 1 (after a pass end: the long case, run with the slow checks)
@pytest.mark.parametrize("killed_after", [5, pytest.param(17, marks=pytest.mark.slow)])
def test_killed_mid_compress_rereads_at_most_one_interval(tmp_path: Path, killed_after: int) -> None:
    from snaplift.archive._plan_compress import _tapered_blocks
    from snaplift.stream.loop import load_checkpoint

    # 8 snapshots per tile: 2 worker threads get TILES_PER_WORKER = 4 blocks each under a
    # budget that holds the process (compress.memory bounds the whole process tree), the last
    # 2 x 8 snapshots in tiles of 2 (the plan's tail split): 6 + 8 = 14 tiles per pass; a
    # checkpoint every 2 tiles
    blocks = _tapered_blocks(SNAPSHOTS, 8, 1, 2)
    assert len(blocks) == 14
    settings = {"checkpoint_every": 2, "memory": "2GiB", "in_memory": "never"}  # streamed tiles
    threads = {"kind": "threads", "workers": 2}
    reference_folder = tmp_path / "ref"
    reference_folder.mkdir()
    reference = _run(_setup(reference_folder, threads, **settings))
    assert reference.returncode == 0, reference.stderr
    full = zarr.open_group(str(reference_folder / "r.zarr"), mode="r").attrs["stages"]["compress"]
    snapshot_bytes = full["bytes_read"] // (full["passes"] * SNAPSHOTS)
    tile_bytes = [(s1 - s0) * snapshot_bytes for s0, s1 in blocks] * full["passes"]  # in the order folded
    folder = tmp_path / "killed"
    folder.mkdir()
    path = _setup(folder, threads, **settings)
    killed = _run(path, f"compress:{killed_after}")  # SIGKILL after that many tiles were folded
    assert killed.returncode == -signal.SIGKILL
    (saved,) = (folder / "r.zarr.staging" / "checkpoint").glob("compress-*/compress.npz")
    state = load_checkpoint(saved)
    resumed = _run(path)
    assert resumed.returncode == 0, resumed.stderr
    record = zarr.open_group(str(folder / "r.zarr"), mode="r").attrs["stages"]["compress"]
    assert record["passes"] == full["passes"] == 4  # 2 + 2q, q = 1 (Halko et al. 2011)
    # the resumed run reads everything but the checkpointed tiles ...
    assert record["bytes_read"] == full["bytes_read"] - state.bytes_read
    # ... so of the tiles the killed run read, at most one interval (2 tiles) is read again
    reread = sum(tile_bytes[:killed_after]) - state.bytes_read
    assert 0 <= reread <= sum(tile_bytes[killed_after - 2:killed_after])  # the last interval: 2 tiles
    assert not list((folder / "r.zarr.staging").glob("*")) if (folder / "r.zarr.staging").exists() else True
    _assert_same_results(folder / "r.zarr", reference_folder / "r.zarr")
