"""Fields no wider than the co-range sketch are kept whole in the sketch state (issue 15).

A field of at most ``l`` rows costs ``rows x m`` values kept as read instead of ``l x m``
for ``Psi_f X_f`` (120 lifted probe rows: 3.8 MB instead of 465 MB). The finish applies
``Psi_f`` to them, so the result is the single-pass sketch of Tropp, Yurtsever, Udell &
Cevher (2017, Alg. 4) all the same: checked here against that algorithm written out with
numpy on the prepared matrix, for a mix of narrow and wide fields, streamed and in memory,
centred or not, and through an append.
"""

from __future__ import annotations

import h5py
import numpy as np
import pytest

from snaplift.archive import open_archive, plan_tiles
from snaplift.archive.matrix import build_snapshot_matrix
from snaplift.linalg._testmatrix import apply_corange, apply_left, gaussian_map, row_map
from snaplift.linalg.sketch import SketchState, exact_layout
from snaplift.stream._passes import Pass, build_jobs, kept_row_blocks, sketch_read
from snaplift.stream.compress import CompressOptions, _source, compress, sketch_append
from snaplift.stream.loop import StreamState, ThreadRunner
from snaplift.stream.sketch import finish_sketch

WIDTHS = {"p": 1, "q": 3, "wide": 90}  # rows of each field; l = 4 * 4 + 3 = 19 at rank 4


def _archive(path, m=120, seed=4):
    rng = np.random.default_rng(seed)
    t = np.arange(m)
    with h5py.File(path, "w") as h5:
        for index, (name, rows) in enumerate(WIDTHS.items()):
            shape = rng.standard_normal((rows, 3))
            signal = np.stack([np.cos(0.21 * t + index), np.sin(0.37 * t), 0.9 ** t])
            h5[name] = (shape @ signal).T + 0.01 * rng.standard_normal((m, rows)) + 1.5 * index
        h5["t"] = 0.1 * t
    return open_archive(str(path))


def _matrix(reader, method, snapshots, in_memory):
    info = reader.describe()
    plan = plan_tiles(info, list(WIDTHS), memory_bytes=64 * 2**20, workers=1, method=method, rank=4,
                      in_memory_limit=16 * 2**20 if in_memory else 0)
    matrix = build_snapshot_matrix(reader, list(WIDTHS), snapshots=snapshots, snapshot_block=plan.block,
                                   snapshot_blocks=None if in_memory else plan.snapshot_blocks)
    return matrix, plan


def _raw(path, snapshots):
    with h5py.File(path, "r") as h5:
        return np.concatenate([np.asarray(h5[name][snapshots]).reshape(len(snapshots), -1).T for name in WIDTHS])


@pytest.mark.parametrize("in_memory", [False, True])
@pytest.mark.parametrize("center", [False, True])
@pytest.mark.parametrize("corange_map", ["gaussian", "sparse"])
def test_kept_rows_give_the_sketch_of_tropp_algorithm_4(tmp_path, in_memory, center, corange_map):
    reader = _archive(tmp_path / "a.h5")
    snapshots = np.arange(120)
    matrix, plan = _matrix(reader, "sketch", snapshots, in_memory)
    assert plan.in_memory == in_memory
    options = CompressOptions(method="sketch", rank=4, seed=7, center=center, scale="rms", corange_map=corange_map)
    result = compress(matrix, plan, options)
    k, l = options.widths(*matrix.shape)
    state = SketchState.from_arrays(result.sketch_state)
    exact, start = exact_layout([f.n_rows for f in matrix.fields], l)
    assert list(exact) == [True, True, False] and state.exact_limit == l
    x = _raw(tmp_path / "a.h5", snapshots)
    # the kept rows are the archive's own values, exactly (h5py read as the reference)
    np.testing.assert_array_equal(state.exact_rows, x[:4].T)
    assert state.corange_sketch.shape == (1, 120, l)

    # Tropp et al. (2017), Alg. 4 on the prepared A = S (X - mu 1^T), written out with numpy
    preparation = result.preparation
    a = x - preparation.mean[:, np.newaxis] if center else x
    a = a * preparation.row_scale[:, np.newaxis]
    omega = gaussian_map(snapshots, k, seed=7, complex_valued=False)
    psi_t = row_map(0, a.shape[0], l, seed=7, complex_valued=False, kind=corange_map)
    q, _ = np.linalg.qr(a @ omega)
    core, *_ = np.linalg.lstsq(apply_left(psi_t, q), apply_corange(a.T.copy(), psi_t).T, rcond=None)
    reference = np.linalg.svd(q @ core, compute_uv=False)[:4]
    np.testing.assert_allclose(result.lowrank.singular_value, reference, rtol=1e-9)


def test_append_with_kept_rows_equals_one_read(tmp_path):
    reader = _archive(tmp_path / "a.h5")
    options = CompressOptions(method="sketch", rank=4, seed=3, center=True, scale="rms")
    old_matrix, old_plan = _matrix(reader, "sketch", np.arange(80), False)
    before = compress(old_matrix, old_plan, options)
    new_matrix, new_plan = _matrix(reader, "sketch", np.arange(80, 120), False)
    merged = sketch_append(before.sketch_state, new_matrix, new_plan)
    full_matrix, full_plan = _matrix(reader, "sketch", np.arange(120), False)
    batch = compress(full_matrix, full_plan, options)
    preparation, lowrank = finish_sketch(merged, full_matrix, 4, center=True, scale="rms")
    # reference: one read of all snapshots; the sketches and kept rows are linear in the data
    # and the test matrices keyed by global index (Tropp et al. 2019, Sec. 2.3)
    np.testing.assert_allclose(lowrank.singular_value, batch.lowrank.singular_value, rtol=1e-11)
    np.testing.assert_array_equal(merged.exact_rows, SketchState.from_arrays(batch.sketch_state).exact_rows)
    for name in WIDTHS:
        assert preparation.field_scale[name] == pytest.approx(batch.preparation.field_scale[name], rel=1e-12)


def test_a_state_written_before_kept_rows_appends_as_it_was(tmp_path):
    # a store from before kept rows: every field sketched, no exact_rows, five parameters
    reader = _archive(tmp_path / "a.h5")
    options = CompressOptions(method="sketch", rank=4, seed=5, scale="rms")
    old_matrix, old_plan = _matrix(reader, "sketch", np.arange(80), False)
    k, l = options.widths(*old_matrix.shape)
    row_blocks = kept_row_blocks(old_matrix, old_plan.point_blocks)
    jobs = build_jobs(old_matrix, row_blocks, list(old_matrix.blocks))
    stream = StreamState("before")
    with ThreadRunner(1) as runner:
        sketch_read(Pass(runner, _source(old_matrix, options, l, row_blocks), in_flight=2), old_matrix, jobs,
                    stream, k, l)
    old = SketchState.from_stream(stream.arrays, [f.n_rows for f in old_matrix.fields], old_matrix.snapshot_index,
                                  5, False, "sparse", corange_width=l).to_arrays()
    old.pop("exact_rows")
    old["parameters"] = old["parameters"][:5]
    new_matrix, new_plan = _matrix(reader, "sketch", np.arange(80, 120), False)
    merged = sketch_append(old, new_matrix, new_plan)
    assert merged.exact_limit == 0 and merged.corange_sketch.shape == (3, 120, l) and merged.exact().shape == (120, 0)
    full_matrix, full_plan = _matrix(reader, "sketch", np.arange(120), False)
    _, lowrank = finish_sketch(merged, full_matrix, 4, center=False, scale="rms")
    batch = compress(full_matrix, full_plan, options)
    # reference: the same sketch (Tropp et al. 2017, Alg. 2 and 4) with the narrow fields kept
    # whole in one read; Psi_f X_f is linear, so only the order of summation differs
    np.testing.assert_allclose(lowrank.singular_value, batch.lowrank.singular_value, rtol=1e-11)


class _StoppingRunner(ThreadRunner):
    """Threads that stop the run (as a kill would) after ``stop_after`` results."""

    def __init__(self, workers: int, stop_after: int) -> None:
        super().__init__(workers)
        self.results = 0
        self.stop_after = stop_after

    def result(self, future):
        value = super().result(future)
        self.results += 1
        if self.results > self.stop_after:
            raise KeyboardInterrupt
        return value


def test_kept_rows_resume_equals_a_clean_run(tmp_path):
    reader = _archive(tmp_path / "a.h5")
    matrix, plan = _matrix(reader, "sketch", np.arange(120), False)
    assert plan.n_tiles >= 4
    options = CompressOptions(method="sketch", rank=4, seed=2, center=True, scale="rms")
    clean = compress(matrix, plan, options)
    folder = tmp_path / "checkpoints"
    with _StoppingRunner(2, plan.n_tiles // 2) as runner, pytest.raises(KeyboardInterrupt):
        compress(matrix, plan, options, runner=runner, checkpoint_dir=folder, checkpoint_every=1)
    with ThreadRunner(2) as runner:
        resumed = compress(matrix, plan, options, runner=runner, checkpoint_dir=folder, checkpoint_every=1)
    assert resumed.info["resumed"]
    # reference: the clean run; the kept rows are copied, not summed, so they are equal exactly
    np.testing.assert_array_equal(resumed.sketch_state["exact_rows"], clean.sketch_state["exact_rows"])
    np.testing.assert_allclose(resumed.lowrank.singular_value, clean.lowrank.singular_value, rtol=1e-12)
