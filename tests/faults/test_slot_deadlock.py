"""Issue 11, item 2: accumulation slots never make a task wait for another task.

The hang: on a LocalCluster (one thread per worker process) a tile pinned to a worker
waited in ``_slots.add_range_product`` for its predecessor in the slot, which was queued
behind it on the same worker (``distributed`` orders the tasks of one submission
generation by their random keys), so it could never run. Now a tile that arrives early
parks its product and returns; the predecessor adds it in order.
"""

from __future__ import annotations

import threading
from pathlib import Path

import h5py
import numpy as np
import pytest

from snaplift.archive import open_archive, plan_tiles
from snaplift.archive.matrix import build_snapshot_matrix
from snaplift.cluster import open_scheduler
from snaplift.stream import _slots
from snaplift.stream.compress import CompressOptions, compress
from snaplift.stream.loop import ClientRunner, runner_for
from snaplift.workflow.schema import ClusterSection

#: a hang guard, not a timing check: a correct run takes a few seconds
GUARD_SECONDS = 240


def _terms(seed: int = 3) -> tuple[np.ndarray, np.ndarray, list[tuple[int, tuple[int, int], np.ndarray, np.ndarray]]]:
    rng = np.random.default_rng(seed)
    x = rng.standard_normal((40, 24))
    omega = rng.standard_normal((24, 5))
    tiles = []
    for c0, c1 in [(0, 6), (6, 12), (12, 18), (18, 24)]:
        for r0, r1 in [(0, 25), (25, 40)]:
            tiles.append((len(tiles), (r0, r1), np.ascontiguousarray(x[r0:r1, c0:c1].T), omega[c0:c1]))
    return x, omega, tiles


def test_a_tile_arriving_before_its_predecessor_does_not_wait() -> None:
    x, omega, tiles = _terms()
    # one slot, chained 0 -> 1 -> ... ; delivered in reverse order by one thread: the old
    # code blocked on the first call forever (it waited for tile 6 in the same thread)
    done = threading.Event()

    def reversed_arrivals() -> None:
        for tile_id, rows, raw, right in reversed(tiles):
            _slots.add_range_product("rev", "range", (40, 5), tile_id, rows, raw, right, 0, tile_id - 1)
        done.set()

    worker = threading.Thread(target=reversed_arrivals, daemon=True)
    worker.start()
    worker.join(GUARD_SECONDS)
    assert done.is_set(), "add_range_product blocked on a tile that had not arrived"
    ((value, ids),) = _slots.collect("rev", "range").values()
    assert ids == list(range(len(tiles)))
    np.testing.assert_allclose(value, x @ omega, rtol=0, atol=1e-12)  # numpy as the reference

    # the same terms in order: the sum is formed in the same order, so bit for bit equal
    for tile_id, rows, raw, right in tiles:
        _slots.add_range_product("fwd", "range", (40, 5), tile_id, rows, raw, right, 0, tile_id - 1)
    ((ordered, _),) = _slots.collect("fwd", "range").values()
    np.testing.assert_array_equal(ordered, value)


def test_a_parked_product_whose_predecessor_never_came_is_still_collected() -> None:
    x, omega, tiles = _terms(4)
    tile_id, rows, raw, right = tiles[3]
    _slots.add_range_product("lost", "range", (40, 5), tile_id, rows, raw, right, 0, 2)  # 0..2 never come
    ((value, ids),) = _slots.collect("lost", "range").values()
    assert ids == [3]  # the driver reads the missing tiles 0..2 again
    expected = np.zeros((40, 5))
    expected[rows[0]:rows[1]] = raw.T @ right  # numpy as the reference
    np.testing.assert_allclose(value, expected, rtol=0, atol=1e-12)


def _wide_archive(path: Path, n: int, m: int) -> None:
    rng = np.random.default_rng(11)
    # rank-6 data with a decaying spectrum: a wide archive (many points, few snapshots)
    u, _ = np.linalg.qr(rng.standard_normal((n, 6)))
    x = (u * (0.7 ** np.arange(6))) @ rng.standard_normal((6, m))
    with h5py.File(path, "w") as h5:
        h5.create_dataset("u", data=x.T.reshape(m, n // 100, 100), chunks=(1, n // 100, 100))
        h5["t"] = 0.1 * np.arange(m)


def _local_cluster_runs(tmp_path: Path, repeats: int) -> None:
    path = tmp_path / "wide.h5"
    _wide_archive(path, 40_000, 20)
    reader = open_archive(str(path))
    info = reader.describe()
    options = CompressOptions(method="randomized", rank=8, oversample=4, power_iterations=1, scale="none")
    # 20 MiB for the tiles and the driver, plus what the plan counts for each worker process's
    # n x k slot (8 bytes x 40,000 points x k = 18, the planner's width for rank 8): the same tiles as before
    plan = plan_tiles(info, ["u"], memory_bytes=20 * 2**20 + 2 * 8 * 40_000 * 18, workers=2,
                      method="randomized", rank=8)
    matrix = build_snapshot_matrix(reader, ["u"], snapshots=np.arange(20), snapshot_block=1,
                                   snapshot_blocks=plan.snapshot_blocks)
    with open_scheduler(ClusterSection(kind="local", workers=2)) as scheduler, runner_for(scheduler) as runner:
        assert isinstance(runner, ClientRunner) and runner.slots == 2
        outcomes: list[np.ndarray] = []
        failure: list[BaseException] = []

        def body() -> None:
            try:
                for _ in range(repeats):
                    outcomes.append(compress(matrix, plan, options, runner=runner).lowrank.singular_value)
            except BaseException as error:  # reported below, in the test's thread
                failure.append(error)

        thread = threading.Thread(target=body, daemon=True)
        thread.start()
        thread.join(GUARD_SECONDS * max(1, repeats // 3))
        assert not thread.is_alive(), f"LocalCluster compress hung after {len(outcomes)} of {repeats} runs"
        assert not failure, failure
    assert len(outcomes) == repeats
    # reference: numpy's SVD of the same matrix (rank 6 data; Halko et al. 2011 with q = 1
    # recovers it to rounding)
    with h5py.File(path) as h5:
        reference = np.linalg.svd(h5["u"][...].reshape(20, -1).T, compute_uv=False)[:6]
    for values in outcomes:
        np.testing.assert_allclose(values[:6], reference, rtol=1e-8)
        # same plan, same order of sums; not bit for bit: a worker's product with a scattered
        # operand can take another numpy/BLAS route depending on where the received frame lies in
        # memory (seen: 1-ulp differences between repeats under load), so agreement to rounding
        np.testing.assert_allclose(values[:6], outcomes[0][:6], rtol=1e-13)


def test_local_cluster_compress_of_a_wide_archive_never_hangs(tmp_path: Path) -> None:
    _local_cluster_runs(tmp_path, repeats=2)  # the slow test below runs it 20 times


@pytest.mark.slow
def test_local_cluster_compress_of_a_wide_archive_never_hangs_twenty_times(tmp_path: Path) -> None:
    _local_cluster_runs(tmp_path, repeats=20)


def test_pinned_tasks_submitted_out_of_order_finish_on_a_one_thread_worker() -> None:
    # the cause, reproduced deterministically: the successor reaches the single worker thread
    # first; with a waiting slot this task never finished
    x, omega, tiles = _terms(5)
    with open_scheduler(ClusterSection(kind="local", workers=1)) as scheduler:
        client = scheduler.client
        address = sorted(client.scheduler_info()["workers"])[0]
        for tile_id, rows, raw, right in reversed(tiles):
            future = client.submit(_slots.add_range_product, "pinned", "range", (40, 5), tile_id, rows, raw, right,
                                   0, tile_id - 1, pure=False, workers=[address], allow_other_workers=False)
            future.result(timeout=GUARD_SECONDS)  # one at a time: the successor really runs first
        parts = client.run(_slots.collect_remote, "pinned", "range")
    ((value, ids),) = next(iter(parts.values())).values()
    assert ids == list(range(len(tiles)))
    np.testing.assert_allclose(value, x @ omega, rtol=0, atol=1e-12)  # numpy as the reference


@pytest.mark.timeout(GUARD_SECONDS)
def test_collect_fetches_live_workers_slots_and_skips_a_lost_one() -> None:
    # ClientRunner.collect: one task pinned to each worker, gathered straight from it; a
    # worker lost before the collect gives nothing (its tiles are read again by the pass)
    # instead of a task waiting forever for a worker that is gone
    def _exit_worker() -> None:  # nested: pickled by value for the worker
        import os

        os._exit(1)  # a worker process that dies (its nanny starts another under a new address)

    x, omega, tiles = _terms(7)
    with open_scheduler(ClusterSection(kind="local", workers=2)) as scheduler, runner_for(scheduler) as runner:
        assert isinstance(runner, ClientRunner) and runner.slots == 2
        client = scheduler.client
        for tile_id, rows, raw, right in tiles:
            slot = tile_id % 2
            previous = tile_id - 2 if tile_id >= 2 else -1
            runner.result(runner.submit(_slots.add_range_product, "lost", "range", (40, 5), tile_id, rows, raw,
                                        right, slot, previous, where=slot))
        received = runner.bytes_received
        parts = runner.collect("lost", "range")  # both workers alive: every tile, once
        assert sorted(i for _, ids in parts.values() for i in ids) == list(range(len(tiles)))
        np.testing.assert_allclose(sum(value for value, _ in parts.values()), x @ omega, rtol=0,
                                   atol=1e-12)  # numpy as the reference
        assert runner.bytes_received - received >= 2 * 40 * 5 * 8  # two slot accumulators came back
        for tile_id, rows, raw, right in tiles:  # again, then the worker of slot 1 dies
            slot = tile_id % 2
            previous = tile_id - 2 if tile_id >= 2 else -1
            runner.result(runner.submit(_slots.add_range_product, "again", "range", (40, 5), tile_id, rows, raw,
                                        right, slot, previous, where=slot))
        lost = runner.addresses[1]
        try:
            client.run(_exit_worker, workers=[lost])
        except Exception:  # the worker dies while answering
            pass
        parts = runner.collect("again", "range")
    # slot 0's tiles (the even ones) only, summed as numpy sums them
    assert list(parts) == [0]
    value, ids = parts[0]
    assert ids == [i for i in range(len(tiles)) if i % 2 == 0]
    reference = np.zeros((40, 5))
    for tile_id, rows, raw, right in tiles:
        if tile_id % 2 == 0:
            reference[rows[0]:rows[1]] += raw.T @ right  # numpy as the reference
    np.testing.assert_allclose(value, reference, rtol=0, atol=1e-12)
