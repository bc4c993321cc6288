"""Optimal amplitudes of DMD modes and overflow-safe powers of eigenvalues.

Amplitudes ``b`` minimise ``|| X - Phi diag(b) V ||_F`` over all snapshots of ``X``,
where ``V[k, j] = lambda_k ** j`` is the Vandermonde matrix of the eigenvalues
(Jovanovic, Schmid & Nichols 2014, "Sparsity-promoting dynamic mode decomposition",
Phys. Fluids 26, 024103, eq. (11)-(13)): the normal equations are
``P b = q`` with ``P = (Phi^H Phi) o conj(V V^H)`` and ``q = conj(diag(V X^H Phi))``.
"""

from __future__ import annotations

import numbers

import numpy as np
import scipy.linalg
from numpy.typing import ArrayLike

from snaplift.errors import FitError
from snaplift.fitting._checks import finite_vector, snapshot_matrix

__all__ = ["optimal_amplitudes", "eigenvalue_powers", "BLOCK_SNAPSHOTS"]

#: snapshots per block when Vandermonde rows are formed: bounds memory at m ~ 1e5
BLOCK_SNAPSHOTS = 4096


def eigenvalue_powers(
    eigenvalue: np.ndarray, exponent: np.ndarray, log_scale: np.ndarray | None = None
) -> np.ndarray:
    """``lambda_k ** exponent_j / exp(log_scale_k)`` as a (k, len(exponent)) array.

    Powers go through ``exp(exponent * log(lambda))`` (principal branch, so real
    exponents give ``exp(rate * t)``); ``lambda = 0`` gives 1 at exponent 0 and 0 after.
    ``log_scale`` divides each row by ``exp(log_scale_k)`` inside the exponential, so that
    rows of fast-growing modes do not overflow.
    """
    values = np.asarray(eigenvalue, dtype=np.complex128)
    steps = np.asarray(exponent, dtype=np.float64)
    zero = values == 0
    with np.errstate(divide="ignore"):
        log_value = np.log(np.where(zero, 1.0, values))
    argument = log_value[:, None] * steps[None, :]
    if log_scale is not None:
        argument = argument - np.asarray(log_scale, dtype=np.float64)[:, None]
    powers = np.exp(argument)
    if np.any(zero):
        shift = 0.0 if log_scale is None else log_scale[zero][:, None]
        powers[zero] = np.where(steps[None, :] == 0, np.exp(-shift), 0.0)
    return powers


def _row_log_scale(eigenvalue: np.ndarray, n_snapshots: int) -> np.ndarray:
    """log of the largest ``|lambda ** j|`` over j = 0 .. n-1 (0 for non-growing modes)."""
    magnitude = np.abs(eigenvalue)
    with np.errstate(divide="ignore"):
        log_magnitude = np.log(np.where(magnitude > 0, magnitude, 1.0))
    return np.maximum(0.0, (n_snapshots - 1) * log_magnitude)


def scaled_amplitudes(
    modes: np.ndarray,
    eigenvalue: np.ndarray,
    snapshots: np.ndarray,
    block_size: int = BLOCK_SNAPSHOTS,
) -> tuple[np.ndarray, np.ndarray]:
    """Amplitudes for row-scaled Vandermonde rows: returns ``(b_scaled, log_scale)``.

    ``b = b_scaled * exp(-log_scale)``; working with the scaled pair keeps
    ``Phi diag(b) V`` finite even when ``b`` underflows and ``V`` overflows.
    """
    n_snapshots = snapshots.shape[1]
    log_scale = _row_log_scale(eigenvalue, n_snapshots)
    n_modes = eigenvalue.size
    gram_time = np.zeros((n_modes, n_modes), dtype=np.complex128)
    # rhs_k = sum_j conj(V_kj) (Phi^H X)_kj  (= entry k of conj(diag(V X^H Phi)))
    rhs = np.zeros(n_modes, dtype=np.complex128)
    projected = modes.conj().T @ snapshots  # k x m: one pass over the snapshots
    for start in range(0, n_snapshots, block_size):
        stop = min(start + block_size, n_snapshots)
        powers = eigenvalue_powers(eigenvalue, np.arange(start, stop), log_scale)
        gram_time += powers @ powers.conj().T
        rhs += np.sum(powers.conj() * projected[:, start:stop], axis=1)
    system = (modes.conj().T @ modes) * np.conj(gram_time)
    # P is Hermitian positive semi-definite; least squares (SVD) also copes with a singular
    # P, e.g. repeated eigenvalues, by returning the minimum-norm amplitudes.
    scaled, *_ = scipy.linalg.lstsq(system, rhs, lapack_driver="gelsd")
    return scaled, log_scale


def optimal_amplitudes(
    modes: ArrayLike,
    eigenvalue: ArrayLike,
    snapshots: ArrayLike,
    *,
    block_size: int = BLOCK_SNAPSHOTS,
) -> np.ndarray:
    """Amplitudes that best reconstruct all snapshots from the first one.

    Minimises ``|| snapshots - modes @ diag(b) @ V ||_F`` with ``V[k, j] = lambda_k**j``,
    ``j = 0 .. m-1`` (column 0 is time 0), by the normal equations of Jovanovic, Schmid &
    Nichols (2014), ``((Phi^H Phi) o conj(V V^H)) b = conj(diag(V X^H Phi))``, solved by
    SVD-based least squares. ``V`` is formed ``block_size`` snapshots at a time with each
    row scaled by its largest magnitude, so neither memory nor growing modes overflow.

    Parameters
    ----------
    modes : array_like, shape (r, k)
    eigenvalue : array_like, shape (k,)
    snapshots : array_like, shape (r, m)
        Consecutive snapshots of one run, one per column, with whatever constant the
        model carries (the affine fixed point) already subtracted.
    block_size : int
        Snapshots per Vandermonde block.

    Returns
    -------
    ndarray, shape (k,), complex

    References
    ----------
    Jovanovic, M. R., Schmid, P. J. & Nichols, J. W. (2014), "Sparsity-promoting dynamic
    mode decomposition", Phys. Fluids 26, 024103.

    Examples
    --------
    >>> phi = np.eye(2)
    >>> x = np.array([[1.0, 0.5, 0.25], [2.0, -2.0, 2.0]])
    >>> np.round(optimal_amplitudes(phi, [0.5, -1.0], x).real, 12)
    array([1., 2.])
    """
    phi = _modes(modes)
    values = finite_vector(eigenvalue, "eigenvalue", size=phi.shape[1]).astype(np.complex128)
    data = snapshot_matrix(snapshots, "snapshots")
    if data.shape[0] != phi.shape[0]:
        raise FitError(f"snapshots must have {phi.shape[0]} rows like modes; got {data.shape[0]}")
    if data.shape[1] == 0:
        raise FitError("optimal amplitudes need at least one snapshot; got 0")
    if (
        isinstance(block_size, bool)
        or not isinstance(block_size, numbers.Integral)
        or block_size < 1
    ):
        raise FitError(f"block_size must be a positive integer; got {block_size!r}")
    scaled, log_scale = scaled_amplitudes(phi, values, data, int(block_size))
    with np.errstate(under="ignore"):
        return scaled * np.exp(-log_scale)


def _modes(modes: ArrayLike) -> np.ndarray:
    phi = snapshot_matrix(modes, "modes")
    return phi.astype(np.complex128, copy=False)
