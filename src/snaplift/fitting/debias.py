"""Reduced DMD operators that are not biased by noise in the snapshots.

Plain DMD solves ``Y ~= A X`` by least squares, which treats ``X`` as exact: noise in the
snapshots shrinks ``A`` toward zero and makes every mode look more damped than it is
(Dawson et al. 2016, sec. 2). Two remedies, both on the pair matrices already projected
onto the ``k`` leading POD directions of ``X`` (``x~ = Q^H x``, k x pairs):

- forward-backward (Dawson, Hemati, Williams & Rowley 2016): ``A_f = Y~ X~^+``,
  ``A_b = X~ Y~^+`` (the map backward in time), ``A = (A_f A_b^{-1})^{1/2}``; the noise
  bias of ``A_f`` and of ``A_b^{-1}`` is opposite to first order and cancels in the
  geometric mean. The square root is taken eigenvalue by eigenvalue, with the sign
  closest to the forward estimate, so that frequencies above half the Nyquist
  frequency (where the principal matrix square root picks the wrong branch) survive;
- total least squares (Hemati, Rowley, Deem & Cattafesta 2017): noise on X and Y alike;
  with ``[X~; Y~] = U S V^H`` and ``U_k = [U_11; U_21]`` (its k leading columns, split in
  halves), ``A = U_21 U_11^{-1}``, which is plain DMD on the data projected onto the
  k leading right singular vectors of the stacked matrix.

Both act on column vectors from the left like every operator in :mod:`snaplift.fitting`.
"""

from __future__ import annotations

from typing import Literal

import numpy as np
import scipy.linalg

from snaplift.errors import FitError

__all__ = [
    "DEBIAS_METHODS",
    "debiased_operator",
    "forward_backward_operator",
    "total_least_squares_operator",
]

Debias = Literal["none", "forward-backward", "total-least-squares"]

#: values accepted by ``fit_dmd(debias=...)``
DEBIAS_METHODS: tuple[str, ...] = ("none", "forward-backward", "total-least-squares")

#: reciprocal condition number below which a k x k factor counts as singular
SINGULAR = 1e-12


def forward_backward_operator(x_reduced: np.ndarray, y_reduced: np.ndarray) -> np.ndarray:
    """Forward-backward DMD operator (Dawson et al. 2016) on k x pairs matrices.

    Parameters
    ----------
    x_reduced, y_reduced : ndarray, shape (k, pairs)
        The X and Y pair matrices in the k POD coordinates of X (full row rank).

    Returns
    -------
    ndarray, shape (k, k)
        Real for real data.

    References
    ----------
    Dawson, S. T. M., Hemati, M. S., Williams, M. O. & Rowley, C. W. (2016),
    "Characterizing and correcting for the effect of sensor noise in the dynamic mode
    decomposition", Exp. Fluids 57, 42.

    Examples
    --------
    >>> a = np.array([[0.9, -0.2], [0.2, 0.9]])
    >>> x = np.linalg.matrix_power(a, 0) @ np.eye(2)
    >>> np.allclose(forward_backward_operator(x, a @ x), a)
    True
    """
    forward = _solve_right(y_reduced, x_reduced, "X")
    backward = _solve_right(x_reduced, y_reduced, "Y")
    k = forward.shape[0]
    if np.linalg.cond(backward) * SINGULAR > 1:
        raise FitError(
            "forward-backward debiasing needs an invertible backward operator; the Y pair "
            f"matrix has rank < {k} in the POD coordinates: lower the rank"
        )
    product = forward @ np.linalg.inv(backward)
    values, vectors = scipy.linalg.eig(product)
    if np.linalg.cond(vectors) * SINGULAR > 1:
        raise FitError(
            "forward-backward debiasing needs a diagonalisable operator (defective "
            "eigenvalues found); use debias='total-least-squares' or lower the rank"
        )
    # Forward eigenvalue estimates in the same eigenbasis pick the branch of each root.
    guess = np.diag(np.linalg.solve(vectors, forward @ vectors))
    root = np.sqrt(values.astype(np.complex128))
    root = np.where(np.abs(root - guess) <= np.abs(-root - guess), root, -root)
    operator = vectors @ np.diag(root) @ np.linalg.inv(vectors)
    return _real_if_real(operator, x_reduced, y_reduced)


def total_least_squares_operator(x_reduced: np.ndarray, y_reduced: np.ndarray) -> np.ndarray:
    """Total-least-squares DMD operator (Hemati et al. 2017) on k x pairs matrices.

    Returns ``U_21 U_11^{-1}`` from the k leading left singular vectors of ``[X~; Y~]``.

    References
    ----------
    Hemati, M. S., Rowley, C. W., Deem, E. A. & Cattafesta, L. N. (2017), "De-biasing the
    dynamic mode decomposition for applied Koopman spectral analysis of noisy datasets",
    Theor. Comput. Fluid Dyn. 31, 349-368.

    Examples
    --------
    >>> a = np.array([[0.9, -0.2], [0.2, 0.9]])
    >>> x = np.random.default_rng(0).standard_normal((2, 5))
    >>> np.allclose(total_least_squares_operator(x, a @ x), a)
    True
    """
    k = x_reduced.shape[0]
    if x_reduced.shape[1] < k:
        raise FitError(
            f"total-least-squares debiasing needs at least rank = {k} pairs; "
            f"got {x_reduced.shape[1]}"
        )
    stacked = np.vstack([x_reduced, y_reduced])
    left, _, _ = scipy.linalg.svd(stacked, full_matrices=False, lapack_driver="gesdd")
    top, bottom = left[:k, :k], left[k:, :k]
    if np.linalg.cond(top) * SINGULAR > 1:
        raise FitError(
            "total-least-squares debiasing failed: the X block of the leading singular "
            "vectors is singular (the data do not determine a rank-"
            f"{k} operator): lower the rank"
        )
    # A U_11 = U_21  <=>  U_11^T A^T = U_21^T: a solve, not an explicit inverse.
    operator = np.linalg.solve(top.T, bottom.T).T
    return _real_if_real(operator, x_reduced, y_reduced)


def debiased_operator(x_reduced: np.ndarray, y_reduced: np.ndarray, method: str) -> np.ndarray:
    """Dispatch on ``method`` in ``DEBIAS_METHODS`` (``"none"``: plain least squares)."""
    if method == "forward-backward":
        return forward_backward_operator(x_reduced, y_reduced)
    if method == "total-least-squares":
        return total_least_squares_operator(x_reduced, y_reduced)
    if method == "none":
        return _solve_right(y_reduced, x_reduced, "X")
    raise FitError(f"debias must be one of {', '.join(DEBIAS_METHODS)}; got {method!r}")


def _solve_right(target: np.ndarray, source: np.ndarray, name: str) -> np.ndarray:
    """Least-squares ``M`` with ``M source ~= target`` (source k x pairs of full row rank)."""
    solution, _, rank, _ = scipy.linalg.lstsq(source.T, target.T, lapack_driver="gelsd")
    if rank < source.shape[0]:
        raise FitError(
            f"the {name} pair matrix has rank {rank} < {source.shape[0]} in the POD coordinates; "
            "lower the rank"
        )
    return solution.T


def _real_if_real(operator: np.ndarray, *data: np.ndarray) -> np.ndarray:
    if any(np.iscomplexobj(d) for d in data):
        return operator.astype(np.complex128)
    return np.ascontiguousarray(operator.real)
