"""Appending snapshots updates a sketch without reading the old ones; equals a batch run."""

from __future__ import annotations

import numpy as np
import pytest

from snaplift.errors import ArchiveError
from snaplift.linalg.sketch import SketchState
from snaplift.stream.compress import CompressOptions, compress, sketch_append
from snaplift.stream.sketch import finish_sketch


@pytest.mark.parametrize("center", [False, True])
def test_append_equals_batch(archive, snapshot_matrix, known, center):
    x = known(500, 90, 0.85 ** np.arange(1, 91), seed=21, complex_valued=center) + (2.0 if center else 0.0)
    reader, _, _ = archive(x, grid=(25, 20))
    options = CompressOptions(method="sketch", rank=6, seed=9, center=center, scale="rms")
    old_matrix, old_plan = snapshot_matrix(reader, "sketch", snapshots=np.arange(0, 60), rank=6)
    before = compress(old_matrix, old_plan, options)
    new_matrix, new_plan = snapshot_matrix(reader, "sketch", snapshots=np.arange(60, 90), rank=6)
    merged = sketch_append(before.sketch_state, new_matrix, new_plan)
    full_matrix, full_plan = snapshot_matrix(reader, "sketch", rank=6)
    batch = compress(full_matrix, full_plan, options)
    preparation, lowrank = finish_sketch(merged, full_matrix, 6, center=center, scale="rms")
    # reference: the batch path; sketches are linear in the data and the test matrices are
    # keyed by global index (Tropp et al. 2019, Sec. 2.3), so only the summation order differs
    np.testing.assert_allclose(lowrank.singular_value, batch.lowrank.singular_value, rtol=1e-12)
    scale = np.abs(batch.lowrank.coefficient).max()
    np.testing.assert_allclose(lowrank.coefficient, batch.lowrank.coefficient, rtol=0, atol=1e-12 * scale)
    np.testing.assert_allclose(np.asarray(lowrank.basis), np.asarray(batch.lowrank.basis), rtol=0, atol=1e-12)
    np.testing.assert_allclose(preparation.field_scale["u"], batch.preparation.field_scale["u"], rtol=1e-12)
    for name, value in merged.to_arrays().items():
        np.testing.assert_allclose(value, batch.sketch_state[name], rtol=1e-12,
                                   atol=1e-12 * np.abs(value).max(initial=0.0), err_msg=name)


def test_append_refuses_mismatched_state(archive, snapshot_matrix, known):
    x = known(200, 40, 0.8 ** np.arange(1, 41), seed=2)
    reader, _, _ = archive(x)
    matrix, plan = snapshot_matrix(reader, "sketch", snapshots=np.arange(0, 30), rank=3)
    stored = compress(matrix, plan, CompressOptions(method="sketch", rank=3, scale="none")).sketch_state
    overlap, overlap_plan = snapshot_matrix(reader, "sketch", snapshots=np.arange(20, 40), rank=3)
    with pytest.raises(ArchiveError, match="new snapshots start at 20, not after the last stored snapshot 29"):
        sketch_append(stored, overlap, overlap_plan)
    state = SketchState.from_arrays(stored)
    assert state.widths == (7, 15) and state.seed == 0
