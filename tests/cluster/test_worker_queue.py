"""Issue 16, item 3: worker processes keep tiles queued, and run each worker's tiles in order.

Tiles are pinned to workers (tile ``i`` to slot ``i mod S``) and folded in order. A pass
summed in slots keeps ``ClientRunner.queued_tiles`` outstanding, so a worker does not idle
between tiles; the tasks of one worker run in the order they were submitted, so a queued
tile never runs before its predecessor in the slot (it would park a full-height product).
These tests check the order and the bound, never a time.
"""

from __future__ import annotations

import os
import threading
from pathlib import Path
from typing import Any

import h5py
import numpy as np

from snaplift.archive import open_archive, plan_tiles
from snaplift.archive.matrix import build_snapshot_matrix
from snaplift.cluster import open_scheduler
from snaplift.cluster.options import QUIET_CLUSTER_CONFIG, WORKER_MALLOC_ENVIRONMENT
from snaplift.stream.compress import CompressOptions, compress
from snaplift.stream.loop import QUEUED_TILES_PER_WORKER, ClientRunner, ThreadRunner, runner_for
from snaplift.workflow.schema import ClusterSection


def test_tasks_pinned_to_a_one_thread_worker_run_in_the_order_submitted() -> None:
    def started(index: int) -> tuple[int, float]:  # nested: pickled by value for the worker
        import time

        start = time.perf_counter()
        time.sleep(0.02)  # the later tasks are queued behind this one meanwhile
        return index, start

    with open_scheduler(ClusterSection(kind="local", workers=2)) as scheduler, runner_for(scheduler) as runner:
        assert isinstance(runner, ClientRunner)
        assert runner.queued_tiles == QUEUED_TILES_PER_WORKER * 2  # one thread per worker
        # the workers get the allocator setting of cluster.options (the memory plan counts no kept heap)
        seen = scheduler.client.run(lambda: {name: os.environ.get(name) for name in WORKER_MALLOC_ENVIRONMENT})
        assert list(seen.values()) == [WORKER_MALLOC_ENVIRONMENT] * 2
        # and the quiet settings: no statistical profiler (distributed's Worker starts its
        # "profile" callbacks only when distributed.worker.profile.enabled), a 1 s tick
        def worker_settings(names: list[str], dask_worker: Any = None) -> tuple[list[str], dict[str, Any]]:
            import dask  # nested: pickled by value for the worker

            return sorted(dask_worker.periodic_callbacks), {name: dask.config.get(name) for name in names}

        settings = scheduler.client.run(worker_settings, list(QUIET_CLUSTER_CONFIG))
        for callbacks, config in settings.values():
            assert "profile" not in callbacks and "profile-cycle" not in callbacks
            assert config == QUIET_CLUSTER_CONFIG
        # one burst of pinned tasks: distributed would order its queued tasks by their random keys
        futures = [runner.submit(started, index, where=0) for index in range(16)]
        starts = [runner.result(future) for future in futures]
    order = [index for index, _ in sorted(starts, key=lambda item: item[1])]
    assert order == list(range(16))


def test_workers_with_several_threads_keep_the_plans_bound() -> None:
    # two tasks of one slot could run at once on such a worker and park a product
    with open_scheduler(ClusterSection(kind="local", workers=1, threads_per_worker=2)) as scheduler, \
            runner_for(scheduler) as runner:
        assert isinstance(runner, ClientRunner) and runner.slots == 1
        assert runner.queued_tiles == 0


class _CountingRunner(ThreadRunner):
    """Threads that keep ``queued`` tiles outstanding, counting the most ever outstanding."""

    def __init__(self, workers: int, queued: int) -> None:
        super().__init__(workers)
        self.queued_tiles = queued  # type: ignore[misc]
        self.outstanding = 0
        self.most = 0
        self._count_lock = threading.Lock()

    def submit(self, function: Any, *args: Any, where: int | None = None) -> Any:
        with self._count_lock:
            self.outstanding += 1
            self.most = max(self.most, self.outstanding)
        return super().submit(function, *args, where=where)

    def result(self, future: Any) -> Any:
        value = super().result(future)
        with self._count_lock:
            self.outstanding -= 1
        return value


def test_a_pass_summed_in_slots_keeps_the_runners_queue_and_the_same_sums(tmp_path: Path) -> None:
    rng = np.random.default_rng(5)
    n, m = 3000, 60
    u, _ = np.linalg.qr(rng.standard_normal((n, 5)))
    x = (u * (0.6 ** np.arange(5))) @ rng.standard_normal((5, m))
    path = tmp_path / "a.h5"
    with h5py.File(path, "w") as h5:
        h5.create_dataset("u", data=x.T.reshape(m, 30, 100), chunks=(1, 30, 100))
        h5["t"] = 0.1 * np.arange(m)
    reader = open_archive(str(path))
    plan = plan_tiles(reader.describe(), ["u"], memory_bytes=8 * 2**20, workers=2, method="sketch", rank=4)
    plan_tiles_count = plan.n_tiles
    assert plan_tiles_count >= 8 and plan.in_flight == 3  # many tiles, the plan's workers + 1
    matrix = build_snapshot_matrix(reader, ["u"], snapshots=np.arange(m), snapshot_block=1,
                                   snapshot_blocks=plan.snapshot_blocks)
    options = CompressOptions(method="sketch", rank=4, scale="none")
    with _CountingRunner(2, 6) as queued, ThreadRunner(2) as plain:
        deep = compress(matrix, plan, options, runner=queued, in_flight=plan.in_flight)
        shallow = compress(matrix, plan, options, runner=plain, in_flight=plan.in_flight)
    assert queued.most == 6  # the runner's queue, above the plan's 3
    # the same tiles in the same slots, summed in the same order: bit for bit
    np.testing.assert_array_equal(deep.lowrank.singular_value, shallow.lowrank.singular_value)
    # reference: numpy's SVD of the same matrix (rank-5 data: the sketch recovers it to rounding,
    # Tropp et al. 2017)
    np.testing.assert_allclose(deep.lowrank.singular_value[:4], np.linalg.svd(x, compute_uv=False)[:4], rtol=1e-8)
