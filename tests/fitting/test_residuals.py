"""Held-out pair choice, the residual formula, pairs, trust flags, Nyquist warnings."""

from __future__ import annotations

import numpy as np
import pytest

from snaplift.errors import FitError
from snaplift.fitting import (
    TRUST_THRESHOLD,
    eigenpair_residuals,
    run_pair_mask,
    split_pairs,
    trusted_flags,
)
from snaplift.fitting.residuals import nyquist_warnings, pair_symmetric


def _blocks(indices: np.ndarray) -> list[np.ndarray]:
    return np.split(indices, np.flatnonzero(np.diff(indices) > 1) + 1)


def test_one_run_is_held_out_in_five_spread_contiguous_blocks():
    split = split_pairs(500, holdout=0.2, seed=1)
    assert split.scheme == "blocks"
    assert split.holdout_pairs.size == 100 and split.fit_pairs.size == 400
    assert np.intersect1d(split.holdout_pairs, split.fit_pairs).size == 0
    blocks = _blocks(split.holdout_pairs)
    assert len(blocks) == 5 and all(block.size == 20 for block in blocks)
    # one block in each fifth of the record
    assert sorted({int(block[0]) // 100 for block in blocks}) == [0, 1, 2, 3, 4]
    np.testing.assert_array_equal(split.fit_mask, ~np.isin(np.arange(500), split.fit_pairs))
    np.testing.assert_array_equal(split.holdout_mask, ~np.isin(np.arange(500), split.holdout_pairs))


def test_split_is_deterministic_and_seeded():
    a, b = split_pairs(300, 0.2, seed=7), split_pairs(300, 0.2, seed=7)
    np.testing.assert_array_equal(a.holdout_pairs, b.holdout_pairs)
    assert not np.array_equal(a.holdout_pairs, split_pairs(300, 0.2, seed=8).holdout_pairs)


def test_few_runs_are_split_inside_each_run_and_boundaries_are_never_used():
    mask = run_pair_mask([101, 81, 61])
    split = split_pairs(mask, holdout=0.2, seed=0)
    assert split.scheme == "blocks"
    boundary = np.flatnonzero(mask)
    assert not np.isin(boundary, split.fit_pairs).any()
    assert not np.isin(boundary, split.holdout_pairs).any()
    assert split.holdout_pairs.size + split.fit_pairs.size == mask.size - boundary.size
    starts = np.concatenate(([0], boundary + 1))
    for start, stop in zip(starts, np.concatenate((boundary, [mask.size])), strict=True):
        held = split.holdout_pairs[(split.holdout_pairs >= start) & (split.holdout_pairs < stop)]
        assert held.size == round(0.2 * (stop - start))


def test_many_runs_are_held_out_whole():
    mask = run_pair_mask([5] * 20)
    split = split_pairs(mask, holdout=0.2, seed=3)
    assert split.scheme == "runs"
    run_of_pair = np.arange(mask.size) // 5
    held_runs = np.unique(run_of_pair[split.holdout_pairs])
    assert held_runs.size == 4
    for run in held_runs:  # whole runs: all 4 pairs of each held-out run
        assert np.isin(np.flatnonzero((run_of_pair == run) & ~mask), split.holdout_pairs).all()
    assert np.diff(held_runs).min() >= 1 and np.all(held_runs // 5 == np.arange(4))


def test_independent_samples_and_zero_holdout():
    split = split_pairs(np.zeros(50, dtype=bool), 0.2, seed=0, independent=True)
    assert split.scheme == "samples" and split.holdout_pairs.size == 10
    none = split_pairs(40, holdout=0.0)
    assert none.scheme == "none" and none.holdout_pairs.size == 0 and none.fit_pairs.size == 40


def test_split_errors():
    with pytest.raises(FitError, match="holdout"):
        split_pairs(10, holdout=1.0)
    with pytest.raises(FitError, match="leaves"):
        split_pairs(1, holdout=0.5)
    with pytest.raises(FitError, match="no pair"):
        split_pairs(np.ones(4, dtype=bool))


def test_residual_formula_by_hand():
    # res^2 = sum |phi(y) - lambda phi(x)|^2 / sum |phi(x)|^2 (Colbrook & Townsend 2024, eq. 4.1).
    psi_x = np.array([[1.0, 2.0], [0.0, 1.0]])
    psi_y = np.array([[0.5, 1.0], [1.0, 1.0]])
    g = np.array([[1.0], [1.0]])  # phi = psi_1 + psi_2: phi(x) = (1, 3), phi(y) = (1.5, 2)
    expected = np.sqrt(((1.5 - 0.5 * 1) ** 2 + (2 - 0.5 * 3) ** 2) / (1 + 9))
    assert eigenpair_residuals([0.5], g, psi_x, psi_y)[0] == pytest.approx(expected, rel=1e-15)
    assert np.isinf(eigenpair_residuals([0.5], np.zeros((2, 1)), psi_x, psi_y)[0])


def test_pairs_share_their_residual_and_trust():
    eigenvalue = np.array([0.5 + 0.5j, 0.9, 0.5 - 0.5j])
    residual = pair_symmetric([1e-3, 0.5, 2e-2], eigenvalue)
    np.testing.assert_array_equal(residual, [2e-2, 0.5, 2e-2])
    np.testing.assert_array_equal(trusted_flags([1e-3, np.nan, 0.5]), [True, False, False])
    assert TRUST_THRESHOLD == 0.01
    with pytest.raises(FitError, match="trust_threshold"):
        trusted_flags([0.1], threshold=0)


def test_nyquist_warning_once_per_pair():
    dt = 0.1
    near = 0.99 * np.exp(1j * np.pi * 0.95)  # 95 % of the Nyquist frequency 5 Hz
    messages = nyquist_warnings([near, np.conj(near), 0.9], dt)
    assert len(messages) == 1 and "Nyquist frequency 1/(2 dt) = 5" in messages[0]
