"""The bounded streaming loop: in-flight bound, checkpoints, resume, plans, caches, descriptors."""

from __future__ import annotations

import pickle
import threading
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from snaplift.errors import ConfigError
from snaplift.linalg import _testmatrix
from snaplift.linalg._blas import _libraries, blas_threads
from snaplift.stream.compress import CompressOptions, compress
from snaplift.stream.loop import StreamState, ThreadRunner, load_checkpoint, save_checkpoint
from snaplift.units import parse_every


class RecordingRunner(ThreadRunner):
    """A thread runner that records what it is given and can stop after some results."""

    def __init__(self, workers: int, stop_after: int | None = None) -> None:
        super().__init__(workers)
        self.outstanding = 0
        self.most = 0
        self.args: list[tuple[Any, ...]] = []
        self.results = 0
        self.stop_after = stop_after
        self.lock = threading.Lock()

    def submit(self, function: Any, *args: Any, where: int | None = None) -> Any:
        with self.lock:
            self.outstanding += 1
            self.most = max(self.most, self.outstanding)
            self.args.append(args)
        return super().submit(function, *args, where=where)

    def result(self, future: Any) -> Any:
        value = super().result(future)
        with self.lock:
            self.outstanding -= 1
            self.results += 1
            if self.stop_after is not None and self.results > self.stop_after:
                raise KeyboardInterrupt  # a killed run: nothing after this result is folded
        return value


def _setup(archive, snapshot_matrix, known, method="randomized", **plan):
    x = known(400, 64, 0.8 ** np.arange(1, 65), seed=31)
    reader, stored, _ = archive(x, grid=(20, 20))
    matrix, tile_plan = snapshot_matrix(reader, method, workers=2, rank=5, **plan)
    return matrix, tile_plan, stored


def test_in_flight_is_bounded_and_tasks_carry_no_open_file(archive, snapshot_matrix, known):
    import h5py

    matrix, plan, _ = _setup(archive, snapshot_matrix, known)
    assert plan.n_tiles >= 8  # enough tiles to see the bound at work
    with RecordingRunner(2) as runner:
        compress(matrix, plan, CompressOptions(method="randomized", rank=5), runner=runner, in_flight=3)
    assert runner.most <= 3
    for args in runner.args:
        pickle.dumps(args)  # everything a task gets can travel to a worker process
        stack = list(args)
        while stack:
            item = stack.pop()
            assert not isinstance(item, (h5py.File, h5py.Dataset, h5py.Group)), item
            if hasattr(item, "__dict__") and not isinstance(item, type):
                stack.extend(vars(item).values())
            elif isinstance(item, (tuple, list)):
                stack.extend(item)


@pytest.mark.parametrize("method", ["sketch", "randomized", "tsqr"])
def test_killed_run_resumes_from_checkpoint(archive, snapshot_matrix, known, tmp_path: Path, method):
    # tsqr tiles hold every snapshot; a small budget gives it several row blocks (R factors
    # counted by their actual size, min(rows, m) x m per leaf)
    memory = {"tsqr": 640 * 2**10}.get(method, 64 * 2**20)
    matrix, plan, stored = _setup(archive, snapshot_matrix, known, method=method, memory=memory)
    assert plan.n_tiles >= 4
    options = CompressOptions(method=method, rank=5, center=True)
    reference = compress(matrix, plan, options)
    folder = tmp_path / "checkpoints"
    # stop in the second pass (sketch: half-way through its only pass)
    stop = plan.n_tiles + 3 if method != "sketch" else plan.n_tiles // 2
    with RecordingRunner(2, stop_after=stop) as runner, pytest.raises(KeyboardInterrupt):
        compress(matrix, plan, options, runner=runner, checkpoint_dir=folder, checkpoint_every=2)
    saved = load_checkpoint(folder / "compress.npz")
    assert saved.done or saved.pass_number
    with RecordingRunner(2) as runner:
        resumed = compress(matrix, plan, options, runner=runner, checkpoint_dir=folder, checkpoint_every=2)
    # the resumed run sums the same tile results; slots fix the order, but the checkpoint
    # boundaries differ from the reference run's (it had none), so: equal to rounding
    np.testing.assert_allclose(resumed.lowrank.singular_value, reference.lowrank.singular_value, rtol=1e-12)
    np.testing.assert_allclose(resumed.lowrank.coefficient, reference.lowrank.coefficient, rtol=0,
                               atol=1e-12 * np.abs(reference.lowrank.coefficient).max())
    assert resumed.info["resumed"]
    # at most one interval (2 tiles) plus the tiles in flight at the kill is read again
    assert resumed.bytes_read <= reference.bytes_read - (stop - 2 - 3) * (reference.bytes_read // (
        reference.passes * plan.n_tiles))
    assert resumed.info["bytes_read_all_runs"] >= reference.bytes_read
    assert not (folder / "compress.npz").exists()  # removed once the result is complete


def test_checkpoint_for_another_job_is_ignored(archive, snapshot_matrix, known, tmp_path: Path):
    matrix, plan, _ = _setup(archive, snapshot_matrix, known)
    save_checkpoint(StreamState("some other job", pass_number=3), tmp_path / "compress.npz")
    result = compress(matrix, plan, CompressOptions(method="randomized", rank=5), checkpoint_dir=tmp_path)
    assert not result.info["resumed"] and result.passes == 4


def test_checkpoint_round_trip_is_atomic(tmp_path: Path):
    state = StreamState("k", pass_number=2, arrays={"range": np.arange(6.0).reshape(3, 2) + 1j},
                        done={4, 1}, bytes_read=99, info={"note": "x"})
    path = tmp_path / "deep" / "c.npz"
    state.save(path)
    state.save(path)  # replacing an existing checkpoint
    again = StreamState.load(path)
    restored = (again.key, again.pass_number, again.done, again.bytes_read, again.info)
    assert restored == ("k", 2, {1, 4}, 99, {"note": "x"})
    np.testing.assert_array_equal(again.arrays["range"], state.arrays["range"])
    assert [p.name for p in path.parent.iterdir()] == ["c.npz"]  # no temporary file left behind


def test_parse_every():
    assert parse_every(25) == (25, None)
    assert parse_every("40 tiles") == (40, None)
    assert parse_every("90s") == (None, 90.0)
    assert parse_every("5m") == (None, 300.0)
    assert parse_every("1h30m") == (None, 5400.0)
    for bad in ("soon", 0, "-3s", True):
        with pytest.raises(ConfigError, match="checkpoint_every"):
            parse_every(bad)


@pytest.mark.parametrize("method", ["sketch", "randomized", "tsqr"])
def test_two_tile_plans_give_the_same_result(archive, snapshot_matrix, known, method):
    x = known(600, 48, 0.8 ** np.arange(1, 49), seed=41)
    reader, _, _ = archive(x, grid=(30, 20), chunk=2)
    results, plans = [], []
    # splits rows, shortens blocks (randomized: + the n x k slot the plan counts for its worker)
    small = {"sketch": 310 * 2**10, "tsqr": 420 * 2**10}.get(method, 326 * 2**10)
    for memory in (64 * 2**20, small):
        matrix, plan = snapshot_matrix(reader, method, memory=memory, rank=4)
        plans.append(plan)
        results.append(compress(matrix, plan, CompressOptions(method=method, rank=4, seed=2)))
    assert plans[0].point_blocks != plans[1].point_blocks or plans[0].snapshot_blocks != plans[1].snapshot_blocks
    assert any(len(b) > 1 for b in plans[1].point_blocks)
    a, b = results
    # test matrices are keyed by global row and snapshot (Tropp et al. 2017): only rounding differs
    np.testing.assert_allclose(a.lowrank.singular_value, b.lowrank.singular_value, rtol=1e-12)
    np.testing.assert_allclose(a.lowrank.coefficient, b.lowrank.coefficient, rtol=0,
                               atol=1e-12 * np.abs(a.lowrank.coefficient).max())
    assert a.bytes_read == b.bytes_read  # uncompressed chunks: partial reads read their bytes only


def test_row_test_matrix_is_generated_once_per_process(archive, snapshot_matrix, known):
    matrix, plan, _ = _setup(archive, snapshot_matrix, known, method="sketch")
    _testmatrix.clear_cache()
    with ThreadRunner(2) as runner:
        compress(matrix, plan, CompressOptions(method="sketch", rank=5), runner=runner)
    info = _testmatrix.cache_info()
    blocks = sum(len(b) for b in plan.point_blocks)
    assert plan.n_tiles > blocks
    # one generation per row block (tiles of all time blocks and the driver reuse it)
    assert info["generated"] == blocks and info["hits"] >= plan.n_tiles - blocks


def test_test_matrices_are_keyed_by_global_index():
    whole = _testmatrix.row_map(0, 1000, 7, seed=3, complex_valued=False)
    part = _testmatrix.row_map(300, 700, 7, seed=3, complex_valued=False)
    np.testing.assert_array_equal(whole[300:700], part)
    other_stream = _testmatrix.row_map(0, 10, 7, seed=3, complex_valued=False, stream=0)
    assert not np.allclose(other_stream, whole[:10])


@pytest.mark.skipif(not _libraries(), reason="no OpenBLAS entry point found in this process")
def test_blas_threads_limits_and_restores():
    (setter, getter), *_ = _libraries()
    before = getter()
    with blas_threads(1):
        assert getter() == 1
        with blas_threads(1):
            assert getter() == 1
    assert getter() == before


class _NoReadAhead(ThreadRunner):
    read_ahead = 0


@pytest.mark.parametrize("method", ["sketch", "randomized"])
def test_tiles_read_ahead_give_the_same_result(archive, snapshot_matrix, known, monkeypatch, method):
    from snaplift.stream import _prefetch

    x = known(400, 64, 0.3 ** np.arange(1, 65), seed=33)  # a fast decay: rank 5 captures it
    reader, _, _ = archive(x, grid=(20, 20))
    matrix, plan = snapshot_matrix(reader, method, workers=2, rank=5, memory=2 * 2**20)
    assert plan.n_tiles >= 6
    asked: list[object] = []
    request = _prefetch.request
    monkeypatch.setattr(_prefetch, "request", lambda key, read, threads: (asked.append(key),
                                                                          request(key, read, threads)))
    options = CompressOptions(method=method, rank=5, seed=4, scale="none")
    with ThreadRunner(2) as runner:
        ahead = compress(matrix, plan, options, runner=runner)
    # every tile asked for its own read, and all but the last two of a pass for the next one;
    # in the first read (the sketch task, of both methods) a tile asks for its own read once
    # more, first, before it makes its test matrices
    own_first = plan.n_tiles
    assert len(asked) == ahead.passes * (2 * plan.n_tiles - 2) + own_first
    assert _prefetch.pending_count() == 0  # nothing read ahead is left behind
    asked.clear()
    with _NoReadAhead(2) as runner:
        plain = compress(matrix, plan, options, runner=runner)
    assert not asked
    # the same reads, the same sums in the same order: equal bits
    np.testing.assert_array_equal(ahead.lowrank.singular_value, plain.lowrank.singular_value)
    np.testing.assert_array_equal(ahead.lowrank.coefficient, plain.lowrank.coefficient)
    # and the leading singular values are the matrix's (numpy SVD; tail 0.3^6 of the first, Halko et al. 2011)
    np.testing.assert_allclose(ahead.lowrank.singular_value[:3], np.linalg.svd(x, compute_uv=False)[:3], rtol=1e-3)
