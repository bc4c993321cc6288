"""Per-field column squares of a tile, taken in pieces, against numpy's sums."""

from __future__ import annotations

import tracemalloc

import numpy as np
import pytest

from snaplift.linalg._kernels import SQUARES_BYTES, field_column_squares


@pytest.mark.parametrize("dtype", [np.float64, np.complex128])
@pytest.mark.parametrize(("snapshots", "columns"), [(1, 7), (375, 200), (3000, 40), (17, 50000)])
def test_field_squares_equal_numpy_sums(dtype, snapshots, columns):
    rng = np.random.default_rng(5)
    raw = rng.standard_normal((snapshots, columns)).astype(dtype)
    if np.iscomplexobj(raw):
        raw += 1j * rng.standard_normal(raw.shape)
    starts = np.unique(np.r_[0, rng.integers(1, columns, size=min(5, columns - 1))])
    edges = np.r_[starts, columns]
    # reference: numpy's sum of |x|^2 over each field's columns
    expected = np.array([np.sum(np.abs(raw[:, a:b]) ** 2, axis=1) for a, b in zip(edges[:-1], edges[1:])])
    np.testing.assert_allclose(field_column_squares(raw, starts), expected, rtol=1e-12)


def test_field_squares_make_no_tile_sized_temporary():
    raw = np.random.default_rng(6).standard_normal((512, 4096))  # a 16 MiB tile
    starts = np.array([0, 1024, 3000])
    field_column_squares(raw, starts)
    tracemalloc.start()
    try:
        field_column_squares(raw, starts)
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    # a piece's squares and numpy's reduction buffer of the same size, and the (fields, snapshots)
    # result: far below the tile's 16 MiB
    assert peak <= 2 * SQUARES_BYTES + 2 * 3 * 512 * 8 + 64 * 1024
