"""Shared builders for the fitting tests: linear systems with prescribed eigenvalues."""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
import pytest
import scipy.linalg
import scipy.optimize

#: 2 conjugate pairs and 2 real eigenvalues (one negative), all inside the unit circle
EIGENVALUES = (0.95 * np.exp(0.3j), 0.9 * np.exp(1.1j), 0.8 + 0j, -0.7 + 0j)


def _real_system(eigenvalues: tuple[complex, ...], seed: int) -> tuple[np.ndarray, np.ndarray]:
    """Real A = S D S^-1 with D in real block form (2x2 rotation-scaling per conjugate pair)."""
    blocks, spectrum = [], []
    for value in eigenvalues:
        if value.imag:
            blocks.append(np.array([[value.real, -value.imag], [value.imag, value.real]]))
            spectrum += [value, np.conj(value)]
        else:
            blocks.append(np.array([[value.real]]))
            spectrum.append(value)
    diagonal = scipy.linalg.block_diag(*blocks)
    similarity = np.random.default_rng(seed).standard_normal(diagonal.shape)
    return similarity @ diagonal @ np.linalg.inv(similarity), np.array(spectrum)


def _trajectory(operator: np.ndarray, start: np.ndarray, n_snapshots: int) -> np.ndarray:
    states = np.empty((operator.shape[0], n_snapshots), dtype=np.result_type(operator, start))
    states[:, 0] = start
    for j in range(1, n_snapshots):
        states[:, j] = operator @ states[:, j - 1]
    return states


def _match_error(estimate: np.ndarray, truth: np.ndarray) -> float:
    """Largest |estimate - truth| after the best one-to-one matching."""
    assert estimate.shape == truth.shape, (estimate.shape, truth.shape)
    distance = np.abs(np.asarray(estimate)[:, None] - np.asarray(truth)[None, :])
    rows, cols = scipy.optimize.linear_sum_assignment(distance)
    return float(distance[rows, cols].max())


@pytest.fixture
def real_system() -> Callable[..., tuple[np.ndarray, np.ndarray]]:
    """``real_system(eigenvalues=EIGENVALUES, seed=0) -> (A, all eigenvalues)``."""

    def build(eigenvalues: tuple[complex, ...] = EIGENVALUES, seed: int = 0):
        return _real_system(eigenvalues, seed)

    return build


@pytest.fixture
def trajectory() -> Callable[[np.ndarray, np.ndarray, int], np.ndarray]:
    return _trajectory


@pytest.fixture
def match_error() -> Callable[[np.ndarray, np.ndarray], float]:
    return _match_error
