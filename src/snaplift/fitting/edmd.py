"""Extended DMD (Williams, Kevrekidis & Rowley 2015): a Koopman operator on a dictionary.

Orientation convention, written down once. The paper stores samples as rows: ``Psi_X``
and ``Psi_Y`` are M x N (M samples, N dictionary terms), ``G = Psi_X^H Psi_X / M``,
``A = Psi_X^H Psi_Y / M``, ``K = G^+ A`` (the least-squares solution of
``Psi_X K ~= Psi_Y``), and an eigenvector ``xi`` of ``K`` gives the eigenfunction
``phi(x) = psi(x)^T xi``. Here, as everywhere in snaplift, samples are columns:
``Psi_X = [psi(x_1) ... psi(x_M)]`` is N x M, i.e. the transpose of the paper's. The
operator acts from the left on lifted columns, ``psi(y_j) ~= L psi(x_j)`` with
``L = Psi_Y Psi_X^+ = K^T`` (plain transpose), so

- the paper's right eigenvectors of ``K`` are our *left* eigenvectors of ``L``:
  ``g^T L = lambda g^T`` and ``phi(x) = g^T psi(x)`` (no conjugation);
- our right eigenvectors ``v`` of ``L`` expand the dictionary, ``psi(x) = sum v_i phi_i(x)``,
  and the Koopman modes of the state are the way back applied to them.

``L`` is never formed from ``G`` (that squares the condition number): with the thin SVD
``Psi_X = W S V^H`` truncated to rank k, ``L_k = W_k^H Psi_Y V_k S_k^{-1}`` (k x k) acts
on the coordinates ``z = W_k^H psi``; without truncation this equals ``K^T`` in the basis
``W``. The way back to the state ``x ~= B z``: ``B`` = the identity rows of ``W_k`` when
the dictionary contains every state variable (exact), otherwise the least-squares
regression of the state on ``z`` over the fitting samples; ``state_projection_error``
reports ``||X - B Z||_F / ||X||_F`` in both cases (nonzero with truncation).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.linalg
from numpy.typing import ArrayLike

from snaplift.errors import FitError
from snaplift.fitting import spectrum
from snaplift.fitting._checks import pair_keep, positive_step, snapshot_matrix
from snaplift.fitting._spectral import SpectrumProperties, freeze_arrays
from snaplift.fitting.amplitudes import optimal_amplitudes
from snaplift.fitting.dmd import _thin_svd, _truncation, normalize_modes
from snaplift.fitting.residuals import (
    HOLDOUT,
    TRUST_THRESHOLD,
    PairSplit,
    eigenpair_residuals,
    nyquist_warnings,
    pair_symmetric,
    split_pairs,
    trusted_flags,
)
from snaplift.lifting import Description, Dictionary, DictionaryPart, as_dictionary

__all__ = ["EDMDFit", "fit_edmd", "forecast_edmd", "eigenfunctions"]

#: a Koopman mode with norm below this fraction of the largest counts as zero
ZERO_MODE = 1e-12
#: eigenvector condition number above which the fit carries a warning
CONDITION_WARNING = 1e8


@dataclass(frozen=True, eq=False)
class EDMDFit(SpectrumProperties):
    """An EDMD fit (arrays are read-only; conventions in the module docstring).

    Attributes
    ----------
    eigenvalue : ndarray, shape (k,), complex
        Discrete-time eigenvalues (per step ``dt``).
    modes : ndarray, shape (n_state, k), complex
        Koopman modes of the state, ``x ~= sum_i modes[:, i] phi_i(x)``; unit norm with
        the largest entry real positive (zero columns for eigenfunctions the state does
        not contain).
    amplitude : ndarray, shape (k,), complex
        Trajectory data: optimal amplitudes (Jovanovic et al. 2014) of the first run,
        ``x_j ~= modes @ (amplitude * eigenvalue**j)``. Independent pairs: the
        eigenfunctions at the first sample, ``phi_i(x_0)``.
    eigenfunction : ndarray, shape (k, m), complex
        ``phi_i`` on every snapshot given (trajectories) or every X sample (pairs),
        scaled so that the modes relation above holds (unit RMS for zero modes).
    eigenfunction_coefficient : ndarray, shape (n_terms, k), complex
        ``phi_i(x) = eigenfunction_coefficient[:, i] @ psi(x)``.
    operator : ndarray, shape (k, k)
        ``L_k``; ``z_{j+1} = operator @ z_j`` with ``z = operator_basis^H psi(x)``.
    operator_basis : ndarray, shape (n_terms, k)
        ``W_k``, leading left singular vectors of the lifted X pair matrix.
    state_map : ndarray, shape (n_state, n_terms)
        The way back, ``x ~= state_map @ psi(x)`` (``= B W_k^H``).
    way_back : {"identity", "regression"}
    state_projection_error : float
        Relative error of the way back on the fitting samples.
    dictionary : Dictionary
        The fitted dictionary (rbf centres etc. set).
    description : Description
        Term names, constant row, identity rows.
    dt : float
    rank : int
        k, the truncation of the lifted data.
    n_pairs : int
        Pairs fitted.
    lifted_singular_value : ndarray
        All singular values of the lifted X pair matrix.
    residual : ndarray, shape (k,)
        Colbrook-Townsend residual of each eigenpair (pairs share the larger value).
    trusted : ndarray of bool, shape (k,)
    trust_threshold : float
    residual_pairs : {"held-out", "training"}
    split : PairSplit
    amplitude_snapshots : int
        Snapshots of the first run the amplitudes were fitted to (0 for pairs).
    warnings : tuple of str
    """

    eigenvalue: np.ndarray
    modes: np.ndarray
    amplitude: np.ndarray
    eigenfunction: np.ndarray
    eigenfunction_coefficient: np.ndarray
    operator: np.ndarray
    operator_basis: np.ndarray
    state_map: np.ndarray
    way_back: str
    state_projection_error: float
    dictionary: Dictionary
    description: Description
    dt: float
    rank: int
    n_pairs: int
    lifted_singular_value: np.ndarray
    residual: np.ndarray
    trusted: np.ndarray
    trust_threshold: float
    residual_pairs: str
    split: PairSplit
    amplitude_snapshots: int
    warnings: tuple[str, ...]

    def __post_init__(self) -> None:
        freeze_arrays(self)

    def __repr__(self) -> str:
        return (
            f"EDMDFit(rank={self.rank}, n_terms={self.n_terms}, n_pairs={self.n_pairs}, "
            f"way_back={self.way_back!r}, trusted={int(self.trusted.sum())}/{self.rank})"
        )

    @property
    def n_terms(self) -> int:
        return self.operator_basis.shape[0]

    @property
    def fixed_point(self) -> None:
        """EDMD has no affine term (lets :func:`~snaplift.fitting.reconstruct` work)."""
        return None


def fit_edmd(
    states: ArrayLike,
    dictionary: Dictionary | DictionaryPart | list[DictionaryPart],
    dt: float,
    *,
    next_states: ArrayLike | None = None,
    pair_mask: ArrayLike | None = None,
    rank: int | float | str | None = None,
    holdout: float = HOLDOUT,
    seed: int = 0,
    trust_threshold: float = TRUST_THRESHOLD,
    memory_budget: int | None = None,
) -> EDMDFit:
    """Fit EDMD (conventions: module docstring) with residuals on held-out pairs.

    Parameters
    ----------
    states : array_like, shape (n_state, m)
        A trajectory (or several runs joined, with ``pair_mask``), one column per
        snapshot; or, with ``next_states``, the X samples.
    dictionary : Dictionary, a dictionary part, or a list of parts
        Data-dependent parts are fitted to the X samples of the fitting pairs.
    dt : float
        Time step between ``x_j`` and ``y_j``.
    next_states : array_like, shape (n_state, m), optional
        ``y_j``, the state one step after ``states[:, j]``: independent pairs.
    pair_mask : array_like of bool, shape (m - 1,), optional
        Trajectories only: True removes pair ``j -> j+1`` (run boundaries, see
        :func:`~snaplift.fitting.run_pair_mask`); many short runs are fine.
    rank : int, float, "optimal" or None
        Truncation of the SVD of the lifted X pair matrix, as in :func:`fit_dmd`: a
        number, an energy fraction, the optimal hard threshold of Gavish & Donoho (2014),
        or None for the numerical rank.
    holdout : float
        Fraction of pairs held out for residuals (:func:`split_pairs`); 0 computes the
        residuals on the fitted pairs.
    seed : int
        Seed of the held-out choice (data-dependent dictionary parts carry their own).
    trust_threshold : float
        Residual at or below which an eigenvalue is trusted.
    memory_budget : int, optional
        Bytes the lifted matrix may take; checked before lifting
        (:meth:`Dictionary.check_budget`).

    Returns
    -------
    EDMDFit
        Modes in ``|amplitude|`` order (see :func:`mode_ranking` for trust-aware order).

    References
    ----------
    Williams, M. O., Kevrekidis, I. G. & Rowley, C. W. (2015), "A data-driven
    approximation of the Koopman operator: extending dynamic mode decomposition",
    J. Nonlinear Sci. 25, 1307-1346.
    Colbrook, M. J. & Townsend, A. (2024), Comm. Pure Appl. Math. 77(1); arXiv:2111.14889.

    Examples
    --------
    >>> from snaplift.lifting import monomials
    >>> x = np.random.default_rng(0).uniform(-1, 1, (1, 50))
    >>> fit = fit_edmd(x, monomials(2), 1.0, next_states=0.5 * x)
    >>> np.round(np.sort(fit.eigenvalue.real), 10).tolist()
    [0.25, 0.5, 1.0]
    """
    data = snapshot_matrix(states, "states")
    if np.iscomplexobj(data):
        raise FitError(
            "fit_edmd needs a real state (dictionaries of complex states are not defined)"
        )
    step = positive_step(dt)
    lifting = as_dictionary(dictionary)
    n_state = data.shape[0]
    independent = next_states is not None
    if next_states is not None:
        if pair_mask is not None:
            raise FitError(
                "pair_mask applies to trajectories; with next_states every column is a pair"
            )
        after = snapshot_matrix(next_states, "next_states")
        if after.shape != data.shape:
            raise FitError(
                f"next_states must have the shape of states {data.shape}; got {after.shape}"
            )
        split = split_pairs(np.zeros(data.shape[1], dtype=bool), holdout, seed, independent=True)
        x_index = y_index = None
        samples = np.hstack([data, after])
        x_of, y_of = np.arange(data.shape[1]), data.shape[1] + np.arange(data.shape[1])
    else:
        if data.shape[1] < 2:
            raise FitError(f"a trajectory needs at least 2 snapshots; got {data.shape[1]}")
        base = ~pair_keep(pair_mask, data.shape[1])
        split = split_pairs(base, holdout, seed)
        samples = data
        x_index, y_index = np.arange(data.shape[1] - 1), np.arange(1, data.shape[1])
        x_of, y_of = x_index, y_index
    fitted = split.fit_pairs
    if memory_budget is not None:
        lifting.check_budget(n_state, samples.shape[1], memory_budget)
    if lifting.needs_fit:
        lifting = lifting.fit(samples[:, x_of[fitted]])
    description = lifting.describe(n_state)
    lifted = lifting(samples)
    psi_x, psi_y = lifted[:, x_of[fitted]], lifted[:, y_of[fitted]]

    left, sigma, right = _thin_svd(psi_x)
    k = _truncation(rank, sigma, psi_x.shape, None)
    basis = left[:, :k]
    image = right(psi_y, k) / sigma[:k]
    operator = basis.conj().T @ image
    eigenvalue, vr = scipy.linalg.eig(operator)
    eigenvalue = eigenvalue.astype(np.complex128)
    # Rows of V^-1 are left eigenvectors, u_i^T operator = lambda_i u_i^T, with u_i^T v_j =
    # delta_ij also inside repeated eigenvalues (where eig's own left vectors need not be).
    conditioning = float(np.linalg.cond(vr))
    if not np.isfinite(conditioning) or conditioning * np.finfo(float).eps > 1e-2:
        raise FitError(
            f"the EDMD operator is not diagonalisable in floating point (eigenvector condition "
            f"number {conditioning:.3g}); truncate the lifted data harder (rank < {k})"
        )
    u = np.linalg.inv(vr).T

    x_fit = samples[:, x_of[fitted]]
    coordinates = basis.conj().T @ psi_x  # z = W_k^H psi = S_k V_k^H
    if description.has_identity:
        rows = np.array(description.identity_rows, dtype=np.intp)
        way_back = "identity"
        state_basis = basis[rows]
    else:
        way_back = "regression"
        state_basis = right(x_fit, k) / sigma[:k]  # X Z^+ with Z^+ = V_k S_k^{-1}
    size = np.linalg.norm(x_fit)
    miss = np.linalg.norm(x_fit - state_basis @ coordinates)
    projection_error = float(miss / size) if size > 0 else 0.0

    raw_modes = state_basis @ vr
    modes, scale = _normalized(raw_modes)
    coefficient = (np.conj(basis) @ u) / scale[None, :]
    values = coefficient.T @ lifted  # eigenfunctions on all samples
    norms = np.linalg.norm(raw_modes, axis=0)
    zero = norms <= ZERO_MODE * norms.max(initial=0.0)
    if np.any(zero):
        rms = np.sqrt(np.mean(np.abs(values[zero][:, x_of[fitted]]) ** 2, axis=1))
        rms = np.where(rms > 0, rms, 1.0)
        coefficient[:, zero] /= rms[None, :]
        values[zero] /= rms[:, None]
        modes[:, zero] = 0.0

    check = split.holdout_pairs if split.holdout_pairs.size else fitted
    residual = eigenpair_residuals(
        eigenvalue, coefficient, lifted[:, x_of[check]], lifted[:, y_of[check]]
    )
    residual = pair_symmetric(residual, eigenvalue)

    if independent:
        amplitude = values[:, 0].copy()
        segment_end = 0
        eigenfunction = values[:, : data.shape[1]]
    else:
        removed = np.flatnonzero(~pair_keep(pair_mask, data.shape[1]))
        segment_end = int(removed[0]) + 1 if removed.size else data.shape[1]
        amplitude = optimal_amplitudes(modes, eigenvalue, data[:, :segment_end])
        eigenfunction = values
    order = spectrum.spectrum_order(eigenvalue, amplitude, step, "amplitude")
    warnings = nyquist_warnings(eigenvalue[order], step)
    if conditioning > CONDITION_WARNING:
        warnings += (
            f"EDMD eigenvectors are nearly dependent (condition number {conditioning:.3g}): "
            "modes and eigenfunctions are sensitive to the data; consider a lower rank",
        )
    state_map = state_basis @ basis.conj().T
    if not np.iscomplexobj(data) and np.allclose(state_map.imag, 0.0, atol=0.0):
        state_map = state_map.real
    return EDMDFit(
        eigenvalue=eigenvalue[order],
        modes=np.ascontiguousarray(modes[:, order]),
        amplitude=amplitude[order],
        eigenfunction=np.ascontiguousarray(eigenfunction[order]),
        eigenfunction_coefficient=np.ascontiguousarray(coefficient[:, order]),
        operator=operator,
        operator_basis=basis,
        state_map=state_map,
        way_back=way_back,
        state_projection_error=projection_error,
        dictionary=lifting,
        description=description,
        dt=step,
        rank=k,
        n_pairs=int(fitted.size),
        lifted_singular_value=sigma,
        residual=residual[order],
        trusted=trusted_flags(residual[order], trust_threshold),
        trust_threshold=float(trust_threshold),
        residual_pairs="held-out" if split.holdout_pairs.size else "training",
        split=split,
        amplitude_snapshots=segment_end,
        warnings=warnings,
    )


def _normalized(raw: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """``normalize_modes(raw)`` and the per-column factor ``s`` with ``modes = raw * s``."""
    modes = normalize_modes(raw)
    reference = np.argmax(np.abs(raw), axis=0)
    columns = np.arange(raw.shape[1])
    pivot = raw[reference, columns]
    scale = np.where(pivot != 0, modes[reference, columns] / np.where(pivot != 0, pivot, 1.0), 1.0)
    return modes, scale


def eigenfunctions(fit: EDMDFit, states: ArrayLike) -> np.ndarray:
    """Eigenfunctions of ``fit`` at new states (n_state, n) -> (k, n), complex."""
    data = snapshot_matrix(states, "states")
    return fit.eigenfunction_coefficient.T @ fit.dictionary(data)


def forecast_edmd(fit: EDMDFit, start: ArrayLike, n_steps: int) -> np.ndarray:
    """States 1 .. n_steps steps after ``start``, through the lifted model and the way back.

    Lifts ``start``, advances the coordinates ``z_{j+1} = operator @ z_j`` (real for real
    data, no eigenvector inversion) and maps back with ``x = B z``.

    Parameters
    ----------
    fit : EDMDFit
    start : array_like, shape (n_state,)
        Any state (need not be a snapshot of the data).
    n_steps : int

    Returns
    -------
    ndarray, shape (n_state, n_steps)
    """
    point = np.asarray(start, dtype=np.float64)
    if point.ndim != 1 or point.size != fit.state_map.shape[0]:
        raise FitError(
            f"start must be one state of {fit.state_map.shape[0]} values; got shape {point.shape}"
        )
    if isinstance(n_steps, bool) or not isinstance(n_steps, (int, np.integer)) or n_steps < 1:
        raise FitError(f"n_steps must be a positive integer; got {n_steps!r}")
    z = fit.operator_basis.conj().T @ fit.dictionary(point[:, None])[:, 0]
    back = fit.state_map @ fit.operator_basis
    out = np.empty((point.size, int(n_steps)), dtype=np.result_type(back, z))
    for j in range(int(n_steps)):
        z = fit.operator @ z
        out[:, j] = back @ z
    return out.real if np.isrealobj(back) and np.isrealobj(fit.operator) else out
