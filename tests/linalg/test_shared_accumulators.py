"""Range accumulators of worker processes made in the driver's memory file system
(:mod:`snaplift.stream._shared_arrays`): mapped by the driver without a copy, the same sums
as threads, a plain accumulator wherever the file system is not shared or full, and no
file left behind."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from snaplift.cluster import open_scheduler
from snaplift.stream import _shared_arrays, _slots
from snaplift.stream._shared_arrays import SharedArray, SharedDirectory, allocate
from snaplift.stream.compress import CompressOptions, compress
from snaplift.stream.loop import ClientRunner, runner_for
from snaplift.workflow.schema import ClusterSection

pytestmark = pytest.mark.skipif(not Path("/dev/shm").is_dir(), reason="no /dev/shm (Linux memory file system)")


def _files(directory: SharedDirectory) -> list[Path]:
    return sorted(Path(directory.root).glob(f"snaplift-{directory.token}*"))


def test_an_accumulator_made_in_a_file_is_mapped_by_the_driver_with_its_values(tmp_path: Path) -> None:
    directory = SharedDirectory(tmp_path)  # any directory works as the shared file system
    rng = np.random.default_rng(3)
    raw, right = rng.standard_normal((7, 40000)), rng.standard_normal((7, 5))
    try:
        _slots.add_range_product("shared-1", "range", (40000, 5), 0, (0, 40000), raw, right, 0, -1, directory.spec)
        _slots.add_range_product("shared-1", "range", (40000, 5), 1, (0, 40000), 2 * raw, right, 0, 0,
                                 directory.spec)
        parts = _slots.collect_remote("shared-1", "range")
        value, tiles = parts[0]
        assert isinstance(value, SharedArray) and tiles == [0, 1]
        assert len(_files(directory)) == 2  # the probe and the accumulator
        mapped = value.load()
        assert len(_files(directory)) == 1  # the accumulator's name is gone once mapped
        # numpy is the reference: the sum of both tiles' products, column-major as the slots keep it
        np.testing.assert_allclose(mapped, 3 * raw.T @ right, rtol=1e-13, atol=1e-12)
        assert mapped.flags.f_contiguous and mapped.flags.writeable
        mapped += 1.0  # the driver adds the other workers' accumulators into it
    finally:
        directory.close()
    assert _files(directory) == []


def test_row_blocks_of_a_slot_in_a_file_are_views_of_one_accumulator(tmp_path: Path) -> None:
    directory = SharedDirectory(tmp_path)
    rng = np.random.default_rng(5)
    raw, right = rng.standard_normal((4, 40000)), rng.standard_normal((4, 4))
    try:
        # tiles of two row blocks, as a plan that splits the rows gives them to one slot
        for tile, (r0, r1) in enumerate([(0, 25000), (25000, 40000), (0, 25000)]):
            _slots.add_range_product("shared-5", "range", (40000, 4), tile, (r0, r1), raw[:, r0:r1], right, 0,
                                     tile - 1, directory.spec)
        value, tiles = _slots.collect_remote("shared-5", "range")[0]
        assert isinstance(value, SharedArray) and tiles == [0, 1, 2]
        expected = raw.T @ right  # numpy is the reference
        expected[:25000] *= 2  # the first row block came twice
        np.testing.assert_allclose(value.load(), expected, rtol=1e-13, atol=1e-12)
    finally:
        directory.close()


def test_without_the_drivers_probe_or_room_the_accumulator_stays_in_the_process(tmp_path: Path, monkeypatch) -> None:
    directory = SharedDirectory(tmp_path)
    try:
        # another host (or container) sees no probe with this token: a plain array
        assert allocate((40000, 5), np.dtype(np.float64), (str(tmp_path), "0" * 32)) is None
        assert allocate((40000, 5), np.dtype(np.float64), (str(tmp_path / "elsewhere"), directory.token)) is None
        # small accumulators are sent: a file costs more than their bytes
        assert allocate((100, 5), np.dtype(np.float64), directory.spec) is None
        # no room for it beside the margin: a plain array, never a fault on a full file system
        monkeypatch.setattr(_shared_arrays, "FREE_MARGIN_BYTES", 1 << 62)
        assert allocate((40000, 5), np.dtype(np.float64), directory.spec) is None
        raw, right = np.ones((3, 40000)), np.ones((3, 5))
        _slots.add_range_product("shared-2", "range", (40000, 5), 0, (0, 40000), raw, right, 0, -1, directory.spec)
        value, _ = _slots.collect_remote("shared-2", "range")[0]
        assert isinstance(value, np.ndarray)
        np.testing.assert_array_equal(value, np.full((40000, 5), 3.0))  # 1 x 1 summed over 3 snapshots
        assert len(_files(directory)) == 1  # only the probe
    finally:
        directory.close()


def test_a_discarded_slot_and_a_closed_directory_leave_no_file(tmp_path: Path) -> None:
    directory = SharedDirectory(tmp_path)
    raw, right = np.ones((2, 40000)), np.ones((2, 5))
    _slots.add_range_product("shared-3", "range", (40000, 5), 0, (0, 40000), raw, right, 0, -1, directory.spec)
    assert len(_files(directory)) == 2
    _slots.discard("shared-3", abort=True)  # a pass that failed: its accumulator is never read
    assert len(_files(directory)) == 1
    # an accumulator handed over but never mapped (the driver stopped first) goes with the runner
    _slots.add_range_product("shared-4", "range", (40000, 5), 0, (0, 40000), raw, right, 0, -1, directory.spec)
    assert isinstance(_slots.collect_remote("shared-4", "range")[0][0], SharedArray)
    directory.close()
    assert _files(directory) == []


def test_worker_processes_hand_over_accumulators_through_memory_files_with_the_threads_sums(
        archive, snapshot_matrix, known, monkeypatch) -> None:
    # 16384 points x k = 13: a 1.7 MB range accumulator per worker, above SHARED_MIN_BYTES
    x = known(256 * 64, 40, 0.6 ** np.arange(1, 41), seed=23)
    reader, _, _ = archive(x, grid=(256, 64))
    loaded: list[int] = []
    load = SharedArray.load

    def counted(self: SharedArray) -> np.ndarray:
        loaded.append(self.nbytes)
        return load(self)

    monkeypatch.setattr(SharedArray, "load", counted)
    options = {"sketch": CompressOptions(method="sketch", rank=6, scale="none"),
               "randomized": CompressOptions(method="randomized", rank=6, power_iterations=1, scale="none")}
    plans = {method: snapshot_matrix(reader, method, memory=16 * 2**20, workers=2, rank=6) for method in options}
    with open_scheduler(ClusterSection(kind="threads", workers=2)) as scheduler, runner_for(scheduler) as runner:
        threaded = {m: compress(*plans[m], options[m], runner=runner) for m in options}
    with open_scheduler(ClusterSection(kind="local", workers=2)) as scheduler, runner_for(scheduler) as runner:
        assert isinstance(runner, ClientRunner) and runner.accumulator_files is not None
        directory = runner._memory_files
        for method in options:
            local = compress(*plans[method], options[method], runner=runner)
            # the same tiles summed in the same slot order as threads: rounding-level agreement
            # (the threaded run is the reference, issue 3's 1e-12)
            np.testing.assert_allclose(local.lowrank.singular_value, threaded[method].lowrank.singular_value,
                                       rtol=1e-12)
            # numpy's SVD: the leading singular values (decay 0.6, rank 6: within 1e-3, Tropp et al. 2017)
            np.testing.assert_allclose(local.lowrank.singular_value[:3], np.linalg.svd(x, compute_uv=False)[:3],
                                       rtol=1e-3)
        assert directory is not None and len(_files(directory)) == 1  # every accumulator was mapped: the probe
    assert loaded and min(loaded) >= 16384 * 13 * 8  # whole-height accumulators came through files
    assert _files(directory) == []


def test_files_of_a_killed_driver_are_removed_by_the_next_runner_and_a_live_ones_kept(tmp_path: Path) -> None:
    import subprocess
    import sys

    # a driver killed mid-run (a batch system's time limit) never closes its runner: its
    # probe and accumulators would hold memory until the next boot
    child = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"], capture_output=True, text=True,
                           check=True)
    dead_pid = int(child.stdout)  # that process has ended
    namespace = _shared_arrays._owner().split(" ", 1)[1]
    dead, other = "d" * 32, "e" * 32
    (tmp_path / f"snaplift-{dead}.probe").write_text(f"{dead}\n{dead_pid} {namespace}\n")
    (tmp_path / f"snaplift-{dead}-1.acc").write_bytes(b"\0" * 64)
    # another PID namespace: its process ids mean something else here, so it is left alone
    (tmp_path / f"snaplift-{other}.probe").write_text(f"{other}\n{dead_pid} pid:[1]\n")
    (tmp_path / f"snaplift-{other}-1.acc").write_bytes(b"\0" * 64)
    live = SharedDirectory(tmp_path)  # a run in progress (this process)
    try:
        assert not (tmp_path / f"snaplift-{dead}.probe").exists()
        assert not (tmp_path / f"snaplift-{dead}-1.acc").exists()
        assert (tmp_path / f"snaplift-{other}-1.acc").exists()
        (tmp_path / f"snaplift-{live.token}-1.acc").write_bytes(b"\0" * 64)
        later = SharedDirectory(tmp_path)  # a second runner beside it keeps the live run's files
        assert (tmp_path / f"snaplift-{live.token}-1.acc").exists()
        later.close()
        assert allocate((40000, 5), np.dtype(np.float64), live.spec) is not None  # its probe still answers
    finally:
        live.close()
