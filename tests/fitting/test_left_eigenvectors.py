"""Left eigenvectors matched to given eigenvalues (numpy / scipy as the reference)."""

from __future__ import annotations

import numpy as np
import scipy.linalg

from snaplift.fitting.residuals import left_eigenvectors


def _check(matrix: np.ndarray, wanted: np.ndarray) -> None:
    left = left_eigenvectors(matrix, wanted)
    # the definition u_i^T A = lambda_i u_i^T, checked directly with numpy
    np.testing.assert_allclose(left.T @ matrix, wanted[:, None] * left.T, atol=1e-9)


def test_eigenvalues_in_any_order_are_matched() -> None:
    rng = np.random.default_rng(3)
    matrix = rng.standard_normal((6, 6))
    values = scipy.linalg.eigvals(matrix)
    _check(matrix, values[rng.permutation(6)])


def test_a_shared_nearest_falls_back_to_the_assignment() -> None:
    # 1.02 and 1.04 are both nearest to 1.0: the greedy match is not a permutation, and the
    # optimal assignment (scipy.optimize.linear_sum_assignment) pairs 1.02 -> 1.0, 1.04 -> 1.1
    # (0.02 + 0.06 < 0.08 + 0.04)
    matrix = np.diag([1.0, 1.1, 3.0])
    left = left_eigenvectors(matrix, np.array([1.02, 1.04, 3.0]))
    np.testing.assert_allclose(np.abs(left[:, 0]), [1.0, 0.0, 0.0], atol=1e-12)
    np.testing.assert_allclose(np.abs(left[:, 1]), [0.0, 1.0, 0.0], atol=1e-12)
    _check(matrix, np.array([1.0, 1.1, 3.0]))
