"""Raw-field kernels: pointwise observables and the delay (Hankel) plan."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.linalg

from snaplift.errors import ConfigError
from snaplift.lifting import (
    POINTWISE,
    delay_columns,
    delayed_run_lengths,
    hankel,
    pointwise_size,
    pointwise_terms,
)


def test_pointwise_blocks_match_numpy():
    tile = np.random.default_rng(0).standard_normal((5, 4)).astype(np.float32)
    names = ["x", "square", "cube", "abs", "sin", "cos"]
    lifted = pointwise_terms(tile, names)
    assert lifted.shape == (30, 4) == (pointwise_size(5, names), 4) and lifted.dtype == np.float64
    exact = tile.astype(np.float64)
    for block, expected in enumerate(
        [exact, exact**2, exact**3, np.abs(exact), np.sin(exact), np.cos(exact)]
    ):
        np.testing.assert_allclose(lifted[5 * block : 5 * (block + 1)], expected, rtol=1e-15)
    assert set(POINTWISE) == set(names)


def test_pointwise_errors():
    with pytest.raises(ConfigError, match="not available"):
        pointwise_terms(np.ones((2, 2)), ["x", "tan"])
    with pytest.raises(ConfigError, match="twice"):
        pointwise_terms(np.ones((2, 2)), ["x", "x"])
    with pytest.raises(ConfigError, match="non-empty list"):
        pointwise_terms(np.ones((2, 2)), "x")
    with pytest.raises(ConfigError, match="2-D"):
        pointwise_terms(np.ones(3), ["x"])


def test_hankel_of_one_run_matches_scipy():
    signal = np.arange(10.0)
    lifted = hankel(signal[None, :], count=4)
    # scipy.linalg.hankel(c, r): H[i, j] = s[i + j] (reference library).
    np.testing.assert_array_equal(lifted, scipy.linalg.hankel(signal[:4], signal[3:]))


def test_hankel_spacing_and_several_variables():
    data = np.vstack([np.arange(8.0), 10 + np.arange(8.0)])
    lifted = hankel(data, count=3, spacing=2)
    assert lifted.shape == (6, 4)
    np.testing.assert_array_equal(lifted[:, 0], [0, 10, 2, 12, 4, 14])
    np.testing.assert_array_equal(lifted[:, -1], [3, 13, 5, 15, 7, 17])


def test_delay_windows_stay_inside_runs():
    lengths = [7, 5, 9]
    plan = delay_columns(lengths, count=3, spacing=2)
    run_of = np.repeat(np.arange(3), lengths)
    assert len(plan) == 3
    for block in plan[1:]:
        np.testing.assert_array_equal(run_of[block], run_of[plan[0]])
    np.testing.assert_array_equal(plan[2] - plan[0], 4)
    kept = delayed_run_lengths(lengths, 3, 2)
    np.testing.assert_array_equal(kept, [3, 1, 5])
    assert plan[0].size == kept.sum()
    np.testing.assert_array_equal(plan[0], [0, 1, 2, 7, 12, 13, 14, 15, 16])


def test_delay_errors():
    with pytest.raises(ConfigError, match="run 1 has 3 snapshots"):
        delayed_run_lengths([10, 3], count=4, spacing=1)
    assert delayed_run_lengths([10, 3], count=3, spacing=1).tolist() == [8, 1]
    with pytest.raises(ConfigError, match="count"):
        delay_columns([10], count=0)
    with pytest.raises(ConfigError, match="add up"):
        hankel(np.ones((1, 10)), count=2, run_lengths=[4, 4])
