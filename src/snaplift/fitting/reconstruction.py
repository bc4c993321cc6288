"""Reconstruction and forecast from a DMD fit, in coefficient space.

The model is ``x_j = c + modes @ diag(a) @ lambda**j`` (``c = fit.fixed_point`` for an
affine fit, else 0), with ``j`` counted from the snapshot the amplitudes ``a`` refer to.
Norms are Euclidean norms of coefficients; for an orthonormal basis of the weighted
snapshot space these equal the physical (weighted) norm of the part of each snapshot
inside the basis.
"""

from __future__ import annotations

import numbers

import numpy as np
import scipy.linalg
from numpy.typing import ArrayLike

from snaplift.errors import FitError
from snaplift.fitting._checks import finite_vector, pair_keep, snapshot_matrix
from snaplift.fitting.amplitudes import BLOCK_SNAPSHOTS, eigenvalue_powers, scaled_amplitudes
from snaplift.fitting.dmd import DMDFit

__all__ = [
    "reconstruct",
    "forecast",
    "reconstruction_error",
    "forecast_error",
    "initial_amplitudes",
]


def initial_amplitudes(fit: DMDFit, first: ArrayLike) -> np.ndarray:
    """Amplitudes that reproduce one snapshot: least squares ``modes @ a = first - c``."""
    state = _state(fit, first, "first")
    if fit.fixed_point is not None:
        state = state - fit.fixed_point
    amplitude, *_ = scipy.linalg.lstsq(
        fit.modes, state.astype(np.complex128), lapack_driver="gelsd"
    )
    return amplitude


def reconstruct(
    fit: DMDFit,
    first: ArrayLike | None = None,
    *,
    n_steps: int | None = None,
    times: ArrayLike | None = None,
) -> np.ndarray:
    """Model states from a starting point, in coefficient space.

    Parameters
    ----------
    fit : DMDFit
    first : array_like, shape (r,), optional
        State at time 0. If omitted the fit's optimal amplitudes are used (time 0 is then
        snapshot 0 of the fitted data).
    n_steps : int, optional
        Return states at steps ``0 .. n_steps-1`` (column 0 is time 0).
    times : array_like, shape (n,), optional
        Or: times ``t >= 0`` after time 0, evaluated as ``exp(rate t)`` (needs not be
        multiples of ``dt``). Give exactly one of ``n_steps`` and ``times``.

    Returns
    -------
    ndarray, shape (r, n), complex
        Take ``.real`` for real data: the imaginary part is rounding.

    Examples
    --------
    >>> from snaplift.fitting import fit_dmd
    >>> fit = fit_dmd(np.array([[1.0, 0.5, 0.25, 0.125]]), dt=1.0)
    >>> np.round(reconstruct(fit, [2.0], n_steps=3).real, 12)
    array([[2. , 1. , 0.5]])
    """
    exponent = _exponents(fit, n_steps, times)
    amplitude = fit.amplitude if first is None else initial_amplitudes(fit, first)
    states = _modal_sum(fit, amplitude, exponent)
    if fit.fixed_point is not None:
        states += fit.fixed_point[:, None]
    return states


def forecast(fit: DMDFit, last: ArrayLike, n_steps: int) -> np.ndarray:
    """States ``1 .. n_steps`` steps after ``last`` (shape (r, n_steps), complex)."""
    count = _count(n_steps, "n_steps")
    return reconstruct(fit, last, n_steps=count + 1)[:, 1:]


def reconstruction_error(
    fit: DMDFit,
    coefficients: ArrayLike,
    *,
    pair_mask: ArrayLike | None = None,
) -> np.ndarray:
    """Relative reconstruction error of every snapshot, ``||x_j - x^_j|| / ||x_j||``.

    The snapshots are split into runs at the pairs removed by ``pair_mask``; in each run
    the fitted modes and eigenvalues get their own optimal amplitudes (Jovanovic, Schmid &
    Nichols 2014), so this measures how well the fitted dynamics can describe each run.
    Where ``||x_j|| = 0`` the result is 0 if reconstructed exactly, else ``inf``.

    Returns
    -------
    ndarray, shape (m,), float
    """
    data = _data(fit, coefficients)
    error = np.empty(data.shape[1])
    for start, stop in _segments(pair_mask, data.shape[1]):
        segment = data[:, start:stop]
        shifted = segment if fit.fixed_point is None else segment - fit.fixed_point[:, None]
        scaled, log_scale = scaled_amplitudes(fit.modes, fit.eigenvalue, shifted)
        for lo in range(0, stop - start, BLOCK_SNAPSHOTS):
            hi = min(lo + BLOCK_SNAPSHOTS, stop - start)
            powers = eigenvalue_powers(fit.eigenvalue, np.arange(lo, hi), log_scale)
            model = fit.modes @ (scaled[:, None] * powers)
            error[start + lo : start + hi] = _relative(shifted[:, lo:hi] - model, segment[:, lo:hi])
    return error


def forecast_error(
    fit: DMDFit,
    coefficients: ArrayLike,
    *,
    pair_mask: ArrayLike | None = None,
) -> np.ndarray:
    """Relative error of a forecast from the first snapshot of each run.

    Each run (split at the pairs removed by ``pair_mask``) is predicted from its first
    snapshot alone (:func:`initial_amplitudes`); entry j is ``||x_j - x^_j|| / ||x_j||``.
    The first entry of each run is the error of representing that snapshot by the modes.

    Returns
    -------
    ndarray, shape (m,), float
    """
    data = _data(fit, coefficients)
    error = np.empty(data.shape[1])
    for start, stop in _segments(pair_mask, data.shape[1]):
        amplitude = initial_amplitudes(fit, data[:, start])
        for lo in range(0, stop - start, BLOCK_SNAPSHOTS):
            hi = min(lo + BLOCK_SNAPSHOTS, stop - start)
            model = _modal_sum(fit, amplitude, np.arange(lo, hi, dtype=np.float64))
            if fit.fixed_point is not None:
                model += fit.fixed_point[:, None]
            block = data[:, start + lo : start + hi]
            error[start + lo : start + hi] = _relative(block - model, block)
    return error


def _modal_sum(fit: DMDFit, amplitude: np.ndarray, exponent: np.ndarray) -> np.ndarray:
    """``modes @ (amplitude * lambda**exponent)`` with zero amplitudes contributing 0."""
    weight = np.asarray(amplitude, dtype=np.complex128)[:, None] * eigenvalue_powers(
        fit.eigenvalue, exponent
    )
    # A zero (underflowed) amplitude of a growing mode times an overflowed power is 0.
    weight[np.asarray(amplitude) == 0, :] = 0.0
    return fit.modes @ weight


def _relative(residual: np.ndarray, reference: np.ndarray) -> np.ndarray:
    miss = np.linalg.norm(residual, axis=0)
    size = np.linalg.norm(reference, axis=0)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(
            size > 0, miss / np.where(size > 0, size, 1.0), np.where(miss > 0, np.inf, 0.0)
        )


def _segments(pair_mask: ArrayLike | None, n_snapshots: int) -> list[tuple[int, int]]:
    """(start, stop) column ranges of the runs separated by removed pairs."""
    removed = np.flatnonzero(~pair_keep(pair_mask, n_snapshots))
    edges = np.concatenate(([0], removed + 1, [n_snapshots]))
    return [(int(a), int(b)) for a, b in zip(edges[:-1], edges[1:], strict=True)]


def _data(fit: DMDFit, coefficients: ArrayLike) -> np.ndarray:
    data = snapshot_matrix(coefficients, "coefficients")
    if data.shape[0] != fit.modes.shape[0]:
        raise FitError(
            f"coefficients must have {fit.modes.shape[0]} rows like the fitted modes; "
            f"got {data.shape[0]}"
        )
    if data.shape[1] == 0:
        raise FitError("coefficients has no snapshots (0 columns)")
    return data


def _state(fit: DMDFit, state: ArrayLike, name: str) -> np.ndarray:
    return finite_vector(state, name, size=fit.modes.shape[0])


def _count(value: object, name: str) -> int:
    if isinstance(value, bool) or not isinstance(value, numbers.Integral) or value < 1:
        raise FitError(f"{name} must be a positive integer; got {value!r}")
    return int(value)


def _exponents(fit: DMDFit, n_steps: int | None, times: ArrayLike | None) -> np.ndarray:
    if (n_steps is None) == (times is None):
        raise FitError(
            "give exactly one of n_steps= (number of steps) and times= (times after time 0)"
        )
    if n_steps is not None:
        return np.arange(_count(n_steps, "n_steps"), dtype=np.float64)
    assert times is not None
    values = finite_vector(times, "times")
    if np.iscomplexobj(values):
        raise FitError("times must be real")
    negative = np.flatnonzero(values < 0)
    if negative.size:
        raise FitError(
            f"times[{negative[0]}] is {values[negative[0]]}; times after time 0 must be >= 0"
        )
    return values / fit.dt
