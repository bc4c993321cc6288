"""Orthonormal bases of tall matrices: Householder TSQR and verified CholeskyQR2.

References: numpy.linalg.qr / numpy.linalg.svd (LAPACK) for the factors and spectra;
Demmel, Grigori, Hoemmen, Langou (2012) for TSQR keeping Q^H Q = I whatever the condition;
Fukaya et al. (2014) and Yamamoto et al. (2015) for CholeskyQR2 being orthonormal to
rounding when the condition number is below ~u^(-1/2) = 1e8, and Fukaya et al. (2020) for the
shifted first step beyond it.
"""

from __future__ import annotations

import numpy as np
import pytest

from snaplift.linalg import tsqr as tsqr_module
from snaplift.linalg.tsqr import orthonormal_basis, tsqr
from snaplift.stream.compress import CompressOptions, compress
from snaplift.stream.loop import ThreadRunner


def _conditioned(n: int, m: int, condition: float, *, complex_valued: bool = False, seed: int = 0) -> np.ndarray:
    """``U diag(logspace(0, -log10 condition)) V^H``: 2-norm condition number exactly ``condition``."""
    rng = np.random.default_rng(seed)

    def random(shape: tuple[int, int]) -> np.ndarray:
        x = rng.standard_normal(shape)
        return x + 1j * rng.standard_normal(shape) if complex_valued else x

    u, _ = np.linalg.qr(random((n, m)))
    v, _ = np.linalg.qr(random((m, m)))
    return (u * np.logspace(0.0, -np.log10(condition), m)) @ v.conj().T


def _orthogonality(q: np.ndarray) -> float:
    return float(np.abs(q.conj().T @ q - np.eye(q.shape[1])).max())


@pytest.mark.parametrize("complex_valued", [False, True], ids=["real", "complex"])
def test_tsqr_keeps_orthonormal_columns_at_condition_1e12(complex_valued: bool) -> None:
    a = _conditioned(20000, 40, 1e12, complex_valued=complex_valued, seed=1)
    assert np.linalg.cond(a) == pytest.approx(1e12, rel=1e-2)  # numpy's SVD agrees on the condition
    q, r = tsqr(a, block_rows=1500)  # 14 leaves: a real reduction tree
    assert _orthogonality(q) < 1e-12  # issue 3: Q^H Q = I to 1e-12 at condition 1e12
    np.testing.assert_allclose(q @ r, a, rtol=0, atol=1e-14 * np.abs(a).max())
    assert np.allclose(r, np.triu(r))
    # R agrees with LAPACK's Householder QR up to the sign / phase of each row
    _, r_ref = np.linalg.qr(a)
    np.testing.assert_allclose(np.abs(np.diag(r)), np.abs(np.diag(r_ref)), rtol=1e-6)


def test_tsqr_method_over_an_archive_keeps_orthonormal_basis_at_condition_1e12(archive, snapshot_matrix) -> None:
    x = _conditioned(1200, 30, 1e12, seed=2)
    reader, stored, _ = archive(x, grid=(30, 40))
    matrix, plan = snapshot_matrix(reader, "tsqr", 64 * 2**20, rank=30)
    with ThreadRunner(2) as runner:
        result = compress(matrix, plan, CompressOptions(method="tsqr", rank=30, scale="none"), runner=runner)
    basis = np.asarray(result.lowrank.basis)
    assert _orthogonality(basis) < 1e-12
    s_ref = np.linalg.svd(stored, compute_uv=False)  # LAPACK via numpy
    # leading values to 1e-10 relative (issue 3 target for tsqr); the smallest ones carry
    # rounding of order eps * sigma_1 (backward stability)
    np.testing.assert_allclose(result.lowrank.singular_value[:10], s_ref[:10], rtol=1e-10)
    np.testing.assert_allclose(result.lowrank.singular_value, s_ref[:30], rtol=0, atol=1e-13 * s_ref[0])


@pytest.fixture
def householder_calls(monkeypatch: pytest.MonkeyPatch) -> list[int]:
    """Count the fall-backs of :func:`orthonormal_basis` to the Householder tree."""
    calls: list[int] = []
    original = tsqr_module.tsqr

    def counted(a, **kwargs):
        calls.append(1)
        return original(a, **kwargs)

    monkeypatch.setattr(tsqr_module, "tsqr", counted)
    return calls


# Fortran order repeats the C-order case on the other memory layout: run with the slow checks
@pytest.mark.parametrize("order", ["C", pytest.param("F", marks=pytest.mark.slow)])
@pytest.mark.parametrize("complex_valued", [False, True], ids=["real", "complex"])
@pytest.mark.parametrize("condition", [1.0e1, 1.0e5, 1.0e10])
def test_cholesky_qr_is_used_and_orthonormal_up_to_condition_1e10(householder_calls, complex_valued: bool,
                                                                   condition: float, order: str) -> None:
    a = np.asarray(_conditioned(30000, 50, condition, complex_valued=complex_valued, seed=3), order=order)
    q = orthonormal_basis(a)
    # CholeskyQR2 below ~u^-1/2 = 1e8 (Yamamoto et al. 2015); above, the shifted first step
    # (Fukaya et al. 2020) keeps Cholesky QR going up to ~1/u
    assert householder_calls == []
    assert _orthogonality(q) < 1e-13
    # the same column space as LAPACK's Q: the projectors agree
    q_ref, _ = np.linalg.qr(a)
    np.testing.assert_allclose(q @ (q.conj().T @ a), a, rtol=0, atol=1e-12 * np.abs(a).max())
    s = np.linalg.svd(q.conj().T @ q_ref, compute_uv=False)  # cosines of the principal angles
    np.testing.assert_allclose(s, 1.0, atol=1e-12)


@pytest.mark.parametrize("complex_valued", [False, True], ids=["real", "complex"])
def test_cholesky_qr2_falls_back_to_householder_when_ill_conditioned(householder_calls, complex_valued: bool) -> None:
    a = _conditioned(30000, 50, 1e12, complex_valued=complex_valued, seed=4)
    q = orthonormal_basis(a)
    assert householder_calls == [1]  # the second Gram matrix was far from I (or Cholesky broke down)
    assert _orthogonality(q) < 1e-12
    np.testing.assert_allclose(q @ (q.conj().T @ a), a, rtol=0, atol=1e-12 * np.abs(a).max())


def test_rank_deficient_input_still_gets_an_orthonormal_basis() -> None:
    rng = np.random.default_rng(5)
    a = rng.standard_normal((5000, 12))
    a[:, 7] = a[:, 2] - 0.5 * a[:, 9]  # exactly dependent column: Cholesky of a^T a breaks down
    q = orthonormal_basis(a)
    assert q.shape == (5000, 12) and _orthogonality(q) < 1e-12
    np.testing.assert_allclose(q @ (q.T @ a), a, rtol=0, atol=1e-12 * np.abs(a).max())


def test_short_or_empty_input_goes_to_householder(householder_calls) -> None:
    a = np.random.default_rng(6).standard_normal((30, 20))  # fewer than 2 m rows
    q = orthonormal_basis(a)
    assert householder_calls == [1] and _orthogonality(q) < 1e-13
    assert orthonormal_basis(np.zeros((100, 0))).shape == (100, 0)


@pytest.mark.parametrize("order", ["C", "F"])
@pytest.mark.parametrize("condition", [1.0e5, 1.0e10, 1.0e12, "rank-deficient"])
def test_overwriting_the_input_gives_the_same_basis(condition, order: str) -> None:
    if condition == "rank-deficient":
        a = np.random.default_rng(7).standard_normal((8000, 16))
        a[:, 3] = 2.0 * a[:, 11]
    else:
        a = _conditioned(8000, 16, condition, seed=7)
    a = np.asarray(a, order=order)
    kept = a.copy(order="K")
    q = orthonormal_basis(a, overwrite=True)  # a is garbage afterwards
    assert _orthogonality(q) < 1e-12
    # the same column space as the untouched input, to rounding (backward error ~ u ||a||)
    np.testing.assert_allclose(q @ (q.T @ kept), kept, rtol=0, atol=1e-12 * np.abs(kept).max())
    reference = orthonormal_basis(kept.copy(order="K"))
    np.testing.assert_allclose(np.linalg.svd(q.T @ reference, compute_uv=False)[:15], 1.0, atol=1e-9)


@pytest.mark.parametrize("order", ["C", "F"])
@pytest.mark.parametrize("complex_valued", [False, True])
def test_gram_by_row_blocks_matches_numpy_on_any_core_count(monkeypatch, order, complex_valued):
    # blocks of 7 rows (the last one short): numpy's a^H a is the reference; the sum is
    # formed in block order, so one or two threads give the same bits, exactly Hermitian
    from snaplift.linalg import tsqr as tsqr_module

    monkeypatch.setattr(tsqr_module, "GRAM_CHUNK_ROWS", 7)
    monkeypatch.setattr(tsqr_module, "SMALL_BLAS_VALUES", 0)  # the row blocks and threads, even this small
    rng = np.random.default_rng(21)
    a = rng.standard_normal((53, 6)) + (1j * rng.standard_normal((53, 6)) if complex_valued else 0)
    a = np.asarray(a, order=order)
    expected = a.conj().T @ a
    monkeypatch.setattr(tsqr_module, "usable_cores", lambda: 2)
    two = tsqr_module._gram(a)
    monkeypatch.setattr(tsqr_module, "usable_cores", lambda: 1)
    one = tsqr_module._gram(a)
    np.testing.assert_allclose(two, expected, rtol=0, atol=1e-12)
    np.testing.assert_array_equal(one, two)
    np.testing.assert_array_equal(two, two.conj().T)
    a[3, 2] = np.nan
    assert tsqr_module._gram(a) is None
