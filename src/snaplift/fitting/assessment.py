"""Residuals for DMD fits, and the ranking that decides which modes matter.

:func:`fit_dmd_with_residuals` is the DMD counterpart of what :func:`fit_edmd` does by
itself: fit on the pairs that are not held out (:func:`split_pairs`), then compute the
residual of every eigenpair (Colbrook & Townsend 2024) on the held-out pairs. For DMD
the dictionary is the coordinates of the reduced operator, ``psi(x) = Q^H (x - c)``
(``c`` the affine fixed point, 0 without), and the eigenfunctions come from its left
eigenvectors.

:func:`mode_ranking` orders modes by trust first, then amplitude: a large amplitude on
an eigenvalue the data do not support (a spurious one) should not outrank a trusted one.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import ArrayLike

from snaplift.errors import FitError
from snaplift.fitting import spectrum
from snaplift.fitting._checks import pair_keep, snapshot_matrix
from snaplift.fitting.amplitudes import optimal_amplitudes
from snaplift.fitting.dmd import DMDFit, fit_dmd
from snaplift.fitting.optimized import OptimizedDMDFit
from snaplift.fitting.residuals import (
    HOLDOUT,
    TRUST_THRESHOLD,
    PairSplit,
    eigenpair_residuals,
    left_eigenvectors,
    nyquist_warnings,
    pair_symmetric,
    split_pairs,
    trusted_flags,
)

__all__ = [
    "ResidualReport",
    "dmd_residuals",
    "fit_dmd_with_residuals",
    "mode_ranking",
    "optimized_residuals",
]


@dataclass(frozen=True, eq=False)
class ResidualReport:
    """Residual and trust of every mode of a fit, in the fit's mode order.

    Attributes
    ----------
    residual : ndarray, shape (k,)
        Colbrook-Townsend residual (conjugate pairs share the larger value).
    trusted : ndarray of bool, shape (k,)
        ``residual <= threshold``.
    threshold : float
    pairs : {"held-out", "training"}
        Which pairs the residuals were computed on (training only when holdout = 0).
    n_pairs : int
        Number of those pairs.
    split : PairSplit
    warnings : tuple of str
        Near-Nyquist eigenvalues, one message per conjugate pair.
    """

    residual: np.ndarray
    trusted: np.ndarray
    threshold: float
    pairs: str
    n_pairs: int
    split: PairSplit
    warnings: tuple[str, ...]

    def __post_init__(self) -> None:
        self.residual.setflags(write=False)
        self.trusted.setflags(write=False)


def dmd_residuals(
    fit: DMDFit,
    coefficients: ArrayLike,
    pair_mask: ArrayLike | None = None,
) -> np.ndarray:
    """Residual of every DMD eigenpair on the pairs of ``coefficients`` kept by ``pair_mask``.

    Parameters
    ----------
    fit : DMDFit
    coefficients : array_like, shape (r, m)
        Snapshots in the coordinates the fit was made in.
    pair_mask : array_like of bool, shape (m - 1,), optional
        True removes a pair (pass a split's ``holdout_mask`` to use held-out pairs only).

    Returns
    -------
    ndarray, shape (k,)
        In the order of ``fit.eigenvalue`` (not yet pair-symmetrised).

    References
    ----------
    Colbrook, M. J. & Townsend, A. (2024), Comm. Pure Appl. Math. 77(1); arXiv:2111.14889.
    """
    data = snapshot_matrix(coefficients, "coefficients")
    if data.shape[0] != fit.operator_basis.shape[0]:
        raise FitError(
            f"coefficients must have {fit.operator_basis.shape[0]} rows like the fit; "
            f"got {data.shape[0]}"
        )
    used = np.flatnonzero(pair_keep(pair_mask, data.shape[1]))
    if used.size == 0:
        raise FitError("dmd_residuals needs at least one pair; the pair mask removes all")
    shift = 0.0 if fit.fixed_point is None else fit.fixed_point[:, None]
    basis_h = fit.operator_basis.conj().T
    psi_x = basis_h @ (data[:, used] - shift)
    psi_y = basis_h @ (data[:, used + 1] - shift)
    left = left_eigenvectors(fit.operator, fit.eigenvalue)
    return eigenpair_residuals(fit.eigenvalue, left, psi_x, psi_y)


def fit_dmd_with_residuals(
    coefficients: ArrayLike,
    dt: float,
    *,
    holdout: float = HOLDOUT,
    seed: int = 0,
    pair_mask: ArrayLike | None = None,
    trust_threshold: float = TRUST_THRESHOLD,
    **options: Any,
) -> tuple[DMDFit, ResidualReport]:
    """DMD fitted on the pairs not held out, with residuals on the held-out pairs.

    Parameters
    ----------
    coefficients : array_like, shape (r, m)
    dt : float
    holdout : float
        Fraction of pairs held out (:func:`split_pairs`); 0 fits all pairs and computes
        the residuals on them (``report.pairs == "training"``).
    seed : int
        Seed of the held-out choice.
    pair_mask : array_like of bool, optional
        Pairs removed before anything else (run boundaries).
    trust_threshold : float
        See :data:`~snaplift.fitting.residuals.TRUST_THRESHOLD`.
    **options
        ``rank``, ``affine``, ``singular_values``, ``mode_type``, ``debias`` of
        :func:`fit_dmd`.

    Returns
    -------
    (DMDFit, ResidualReport)
        The amplitudes are refitted to the whole first run (held-out pairs included:
        they only fix how much of each mode the data contain), and the modes are in
        ``|amplitude|`` order like :func:`fit_dmd`; the report follows that order.

    Examples
    --------
    >>> c = np.array([[0.9**j for j in range(40)], [(-0.5)**j for j in range(40)]])
    >>> fit, report = fit_dmd_with_residuals(c, dt=1.0)
    >>> bool(report.trusted.all()), report.pairs
    (True, 'held-out')
    """
    data = snapshot_matrix(coefficients, "coefficients")
    n_snapshots = data.shape[1]
    base = ~pair_keep(pair_mask, n_snapshots)
    split = split_pairs(base, holdout, seed)
    fit = fit_dmd(data, dt, pair_mask=split.fit_mask, **options)
    removed = np.flatnonzero(base)
    segment_end = int(removed[0]) + 1 if removed.size else n_snapshots
    segment = data[:, :segment_end]
    if fit.fixed_point is not None:
        segment = segment - fit.fixed_point[:, None]
    amplitude = optimal_amplitudes(fit.modes, fit.eigenvalue, segment)
    order = spectrum.spectrum_order(fit.eigenvalue, amplitude, fit.dt, "amplitude")
    fit = dataclasses.replace(
        fit,
        eigenvalue=fit.eigenvalue[order],
        modes=np.ascontiguousarray(fit.modes[:, order]),
        amplitude=amplitude[order],
        amplitude_snapshots=segment_end,
    )
    check = split.holdout_mask if split.holdout_pairs.size else split.fit_mask
    residual = pair_symmetric(dmd_residuals(fit, data, check), fit.eigenvalue)
    report = ResidualReport(
        residual=residual,
        trusted=trusted_flags(residual, trust_threshold),
        threshold=float(trust_threshold),
        pairs="held-out" if split.holdout_pairs.size else "training",
        n_pairs=int(split.holdout_pairs.size or split.fit_pairs.size),
        split=split,
        warnings=nyquist_warnings(fit.eigenvalue, fit.dt),
    )
    return fit, report


def optimized_residuals(
    fit: OptimizedDMDFit,
    snapshots: ArrayLike,
    trust_threshold: float = TRUST_THRESHOLD,
) -> ResidualReport:
    """Residual of every exponential of an optimized DMD fit on the pairs it was fitted to.

    Optimized DMD fits every snapshot, so no pair is held out. Each pair ``(x_j, x_{j+1})``
    is advanced by its own step ``t_{j+1} - t_j``: with ``g_i`` the rows of the
    pseudo-inverse of the modes (``g_i^T x`` is the coordinate of mode ``i``), the
    residual of mode ``i`` is ``||g_i^T Y - exp(rate_i dt_j) g_i^T X|| / ||g_i^T X||``
    over the pairs, the relative form of Colbrook & Townsend (2024) for the eigenfunction
    ``g_i^T x`` (conjugate pairs share the larger value).

    Parameters
    ----------
    fit : OptimizedDMDFit
    snapshots : array_like, shape (n, m)
        The snapshots the fit was made on, at ``fit.times``.
    trust_threshold : float

    Returns
    -------
    ResidualReport
        ``pairs == "training"``; in the fit's mode order.

    References
    ----------
    Colbrook, M. J. & Townsend, A. (2024), Comm. Pure Appl. Math. 77(1); arXiv:2111.14889.
    Askham, T. & Kutz, J. N. (2018), SIAM J. Appl. Dyn. Syst. 17(1), 380-416.
    """
    data = snapshot_matrix(snapshots, "snapshots")
    if data.shape != (fit.modes.shape[0], fit.times.size):
        raise FitError(
            f"snapshots must be the {fit.modes.shape[0]} x {fit.times.size} matrix the fit was made on; "
            f"got {data.shape[0]} x {data.shape[1]}"
        )
    left = np.linalg.pinv(fit.modes).T  # g_i^T x = coordinate of mode i
    steps = np.diff(fit.times)
    fx, fy = left.T @ data[:, :-1], left.T @ data[:, 1:]
    advance = np.exp(np.outer(fit.rate, steps))
    miss = np.linalg.norm(fy - advance * fx, axis=1)
    norm = np.linalg.norm(fx, axis=1)
    eigenvalue = fit.eigenvalue
    residual = pair_symmetric(np.where(norm > 0, miss / np.where(norm > 0, norm, 1.0), np.inf), eigenvalue)
    split = PairSplit(np.arange(steps.size), np.array([], dtype=np.int64), int(steps.size), "none")
    return ResidualReport(
        residual=residual,
        trusted=trusted_flags(residual, trust_threshold),
        threshold=float(trust_threshold),
        pairs="training",
        n_pairs=int(steps.size),
        split=split,
        warnings=tuple(nyquist_warnings(eigenvalue, fit.dt)),
    )


def mode_ranking(
    fit: Any,
    *,
    trusted: ArrayLike | None = None,
    oscillating: bool = False,
) -> np.ndarray:
    """Mode indices in order of importance: trusted before untrusted, then ``|amplitude|``.

    Parameters
    ----------
    fit : DMDFit, EDMDFit or OptimizedDMDFit
        Anything with ``eigenvalue``, ``amplitude`` and ``dt``; its own ``trusted``
        attribute is used when present (EDMD).
    trusted : array_like of bool, optional
        Trust flags in the fit's mode order (from a :class:`ResidualReport` for DMD).
        Without flags from either source, all modes count as trusted.
    oscillating : bool
        Keep only modes with a positive frequency (one member of each conjugate pair),
        e.g. to find the fundamental of a periodic motion.

    Returns
    -------
    ndarray of int
        Within one trust class the order of
        :func:`~snaplift.fitting.spectrum_order` by amplitude (ties: frequency, growth).

    Examples
    --------
    >>> from types import SimpleNamespace
    >>> fit = SimpleNamespace(eigenvalue=np.array([0.9, 0.5j, -0.5j]),
    ...                       amplitude=np.array([3.0, 1.0, 1.0]), dt=1.0)
    >>> mode_ranking(fit, trusted=[False, True, True]).tolist()
    [1, 2, 0]
    """
    eigenvalue = np.asarray(fit.eigenvalue, dtype=np.complex128)
    flags = trusted if trusted is not None else getattr(fit, "trusted", None)
    flags = np.ones(eigenvalue.size, bool) if flags is None else np.asarray(flags, dtype=bool)
    if flags.shape != eigenvalue.shape:
        raise FitError(
            f"trusted must have one flag per mode ({eigenvalue.size}); got shape {flags.shape}"
        )
    order = spectrum.spectrum_order(eigenvalue, fit.amplitude, fit.dt, "amplitude")
    order = order[np.argsort(~flags[order], kind="stable")]
    if oscillating:
        order = order[spectrum.frequency(eigenvalue[order], fit.dt) > 0]
    return order
