"""Randomized SVD against numpy.linalg.svd and scipy.linalg.subspace_angles."""

from __future__ import annotations

import dask
import dask.array as da
import numpy as np
import pytest
from scipy.linalg import subspace_angles

from snaplift.linalg.randomized import gaussian_map, randomized_svd


def _matrix(n: int, m: int, spectrum: np.ndarray, *, complex_valued: bool, seed: int = 0) -> np.ndarray:
    rng = np.random.default_rng(seed)

    def random(shape):
        x = rng.standard_normal(shape)
        return x + 1j * rng.standard_normal(shape) if complex_valued else x

    u, _ = np.linalg.qr(random((n, spectrum.size)))
    v, _ = np.linalg.qr(random((m, spectrum.size)))
    return (u * spectrum) @ v.conj().T


@pytest.mark.parametrize("complex_valued", [False, True])
@pytest.mark.parametrize("decay", ["geometric", "algebraic"])
def test_singular_values_and_subspaces_match_numpy(complex_valued: bool, decay: str) -> None:
    m = 90
    j = np.arange(1, m + 1)
    spectrum = 0.8**j if decay == "geometric" else j**-2.0
    a = _matrix(1200, m, spectrum, complex_valued=complex_valued)
    result = randomized_svd(da.from_array(a, chunks=(300, 30)), 10, oversample=10, power_iterations=2, seed=4)
    u_ref, s_ref, vh_ref = np.linalg.svd(a, full_matrices=False)  # reference: LAPACK via numpy
    relative = np.abs(result.singular_value - s_ref[:10]) / s_ref[:10]
    # geometric 0.8^j: q=2 power iterations give ~(0.8^20 / 0.8^10)^(2q+1) relative error
    # (Halko, Martinsson, Tropp 2011, Cor. 10.10); the algebraic j^-2 spectrum decays slower
    assert relative.max() < (1e-6 if decay == "geometric" else 1e-3)
    basis = result.basis.compute()
    assert np.allclose(basis.conj().T @ basis, np.eye(10), atol=1e-12)
    # leading 5 left singular vectors: the subspace angle to numpy's is tiny
    angles = subspace_angles(basis[:, :5], u_ref[:, :5])
    assert angles.max() < (1e-5 if decay == "geometric" else 1e-2)
    assert result.passes == 2 + 2 * 2  # Halko et al. 2011: 2 + 2q passes


def test_same_seed_same_result_and_signs() -> None:
    a = _matrix(400, 60, 0.7 ** np.arange(60), complex_valued=True, seed=2)
    x = da.from_array(a, chunks=(100, 20))
    first = randomized_svd(x, 6, seed=11)
    second = randomized_svd(x, 6, seed=11)
    np.testing.assert_array_equal(first.vh, second.vh)
    # phase convention: the largest entry of each right singular vector is real positive
    pivots = first.vh[np.arange(6), np.argmax(np.abs(first.vh), axis=1)]
    np.testing.assert_allclose(pivots.imag, 0, atol=1e-14)
    assert np.all(pivots.real > 0)


def test_test_matrix_rows_are_keyed_by_snapshot_not_tile() -> None:
    whole = gaussian_map(np.arange(1000), 7, seed=3, complex_valued=False)
    part = gaussian_map(np.arange(300, 700, 3), 7, seed=3, complex_valued=False)
    np.testing.assert_array_equal(whole[300:700:3], part)
    assert not np.allclose(gaussian_map(np.arange(10), 7, seed=4, complex_valued=False), whole[:10])


def test_different_column_chunks_give_the_same_result() -> None:
    a = _matrix(500, 80, 0.75 ** np.arange(80), complex_valued=False, seed=5)
    one = randomized_svd(da.from_array(a, chunks=(100, 80)), 8, seed=1)
    other = randomized_svd(da.from_array(a, chunks=(250, 16)), 8, seed=1)
    np.testing.assert_allclose(one.singular_value, other.singular_value, rtol=1e-12)
    np.testing.assert_allclose(one.vh, other.vh, atol=1e-10)


def test_projection_error_is_exact() -> None:
    a = _matrix(300, 40, 0.6 ** np.arange(40), complex_valued=False, seed=6)
    result = randomized_svd(da.from_array(a, chunks=(100, 20)), 5, power_iterations=3, seed=0)
    with dask.config.set(scheduler="sync"):
        basis = result.basis.compute()
    residual = a - basis @ (basis.T @ a)  # reference: direct numpy projection
    expected = np.linalg.norm(residual, axis=0) / np.linalg.norm(a, axis=0)
    np.testing.assert_allclose(result.projection_error(), expected, rtol=1e-6, atol=1e-12)
