"""Which eigenvalues to trust: residuals on held-out pairs (Colbrook & Townsend 2024).

For an eigenpair ``(lambda, g)`` of a fitted operator, with ``phi(x) = g^T psi(x)`` the
eigenfunction it defines on the dictionary ``psi`` (for DMD, ``psi`` is the coordinates
``Q^H x`` of the reduced operator), the residual is

    res(lambda, g)^2 = ||(Psi_Y - lambda Psi_X)^T g||^2 / ||Psi_X^T g||^2
                     = sum_j |phi(y_j) - lambda phi(x_j)|^2 / sum_j |phi(x_j)|^2

over pairs ``(x_j, y_j)`` (columns of ``Psi_X``, ``Psi_Y``; the paper writes samples as
rows, hence the transposes here). It is the relative one-step prediction error of the
eigenfunction, computed directly from the lifted pairs (never from Gram matrices, which
would lose half the digits). Computed on pairs that were not used in the fit, it cannot
be made small by overfitting.

Held-out pairs (:func:`split_pairs`): time series are correlated, so a pair next to a
fitted pair is almost a copy of it and a random or every-k-th choice would give residuals
nearly as optimistic as training ones. We therefore hold out whole contiguous blocks:

- with at least :data:`MIN_RUNS` runs (several trajectories), whole runs: the runs are
  split into ``n_hold = round(holdout * n_runs)`` consecutive groups and one run of each
  group (seeded choice) is held out, so held-out runs are spread over the archive;
- otherwise, within each run, :data:`BLOCKS_PER_RUN` contiguous blocks of
  ``holdout / BLOCKS_PER_RUN`` of its pairs each, one in each fifth of the run at a
  seeded offset, so the held-out pairs sample the whole record (start-up transients and
  late times alike) while each block is long enough to be decorrelated inside;
- independent pairs (``(x_j, y_j)`` given as samples, not a trajectory): a seeded,
  stratified random subset (independent samples do not leak into each other).

Trust threshold (:data:`TRUST_THRESHOLD` = 0.01): the residual is a relative one-step
error; 1 % means the eigenfunction predicts one step ahead to 1 % of its size, i.e. the
eigenvalue is consistent with the data to 0.01 in the complex plane (for a normal
operator, e.g. measure-preserving dynamics, the true spectrum lies within ``res`` of
``lambda``: Colbrook & Townsend 2024, sec. 3). On the unit circle 0.01 is a phase error
of 0.01 rad per step, about 3 % of the frequency of a mode sampled 20 times per period.
Noise in the held-out data puts a floor of about ``sqrt(1 + |lambda|^2)`` times the
noise-to-signal ratio under every residual; for noisy data raise the threshold above that
floor (e.g. 0.15 at 20 dB SNR).
"""

from __future__ import annotations

import numbers
from dataclasses import dataclass

import numpy as np
import scipy.linalg
from numpy.typing import ArrayLike

from snaplift.errors import FitError
from snaplift.fitting import spectrum
from snaplift.fitting._checks import pair_keep

__all__ = [
    "TRUST_THRESHOLD",
    "HOLDOUT",
    "PairSplit",
    "split_pairs",
    "eigenpair_residuals",
    "pair_symmetric",
    "trusted_flags",
    "nyquist_warnings",
    "left_eigenvectors",
]

#: default threshold on the residual below which an eigenvalue is trusted (see module doc)
TRUST_THRESHOLD = 0.01
#: default fraction of pairs held out from the fit
HOLDOUT = 0.2
#: contiguous held-out blocks per run when runs are not held out whole
BLOCKS_PER_RUN = 5
#: from this many runs on, whole runs are held out
MIN_RUNS = 5


@dataclass(frozen=True)
class PairSplit:
    """Which pairs ``(j, j + 1)`` are fitted and which are held out for residuals.

    Attributes
    ----------
    fit_pairs, holdout_pairs : ndarray of int
        Pair indices (pair j joins snapshot j and j + 1; for independent samples, pair j
        is sample j), ascending.
    n_pairs : int
        Number of pair slots (``m - 1`` for m snapshots), including removed ones.
    scheme : {"runs", "blocks", "samples", "none"}
        How the held-out pairs were chosen (module docstring).
    """

    fit_pairs: np.ndarray
    holdout_pairs: np.ndarray
    n_pairs: int
    scheme: str

    def __post_init__(self) -> None:
        self.fit_pairs.setflags(write=False)
        self.holdout_pairs.setflags(write=False)

    @property
    def fit_mask(self) -> np.ndarray:
        """``pair_mask`` (True removes) keeping only the fitted pairs."""
        mask = np.ones(self.n_pairs, dtype=bool)
        mask[self.fit_pairs] = False
        return mask

    @property
    def holdout_mask(self) -> np.ndarray:
        """``pair_mask`` (True removes) keeping only the held-out pairs."""
        mask = np.ones(self.n_pairs, dtype=bool)
        mask[self.holdout_pairs] = False
        return mask


def split_pairs(
    pairs: int | ArrayLike,
    holdout: float = HOLDOUT,
    seed: int = 0,
    *,
    independent: bool = False,
) -> PairSplit:
    """Choose the pairs held out from the fit (scheme: see the module docstring).

    Parameters
    ----------
    pairs : int or array_like of bool
        The number of pairs of one run (``m - 1``), or a ``pair_mask`` (True removes a
        pair, e.g. at run boundaries from :func:`~snaplift.fitting.run_pair_mask`):
        the runs are the stretches of kept pairs.
    holdout : float
        Fraction of pairs to hold out, in ``[0, 1)``; 0 holds out nothing.
    seed : int
        Seed of the choice; the same inputs and seed give the same split.
    independent : bool
        The pairs are independent samples, not a trajectory (stratified random choice).

    Returns
    -------
    PairSplit

    Examples
    --------
    >>> split = split_pairs(100, holdout=0.2, seed=0)
    >>> split.holdout_pairs.size, split.fit_pairs.size, split.scheme
    (20, 80, 'blocks')
    """
    if isinstance(holdout, bool) or not isinstance(holdout, numbers.Real) or not 0 <= holdout < 1:
        raise FitError(f"holdout must be a fraction in [0, 1); got {holdout!r}")
    if isinstance(seed, bool) or not isinstance(seed, numbers.Integral):
        raise FitError(f"seed must be an integer; got {seed!r}")
    if isinstance(pairs, numbers.Integral) and not isinstance(pairs, bool):
        if pairs < 1:
            raise FitError(f"the number of pairs must be >= 1; got {pairs}")
        n_pairs, keep = int(pairs), np.ones(int(pairs), dtype=bool)
    else:
        mask = np.asarray(pairs)
        if mask.ndim != 1:
            raise FitError(f"pairs must be a count or a 1-D pair mask; got shape {mask.shape}")
        keep = pair_keep(mask, mask.size + 1)
        n_pairs = mask.size
    kept = np.flatnonzero(keep)
    if kept.size == 0:
        raise FitError("no pair is left to fit: every pair is removed by the pair mask")
    if holdout == 0:
        return PairSplit(kept, np.empty(0, dtype=np.int64), n_pairs, "none")
    rng = np.random.default_rng(int(seed))
    if independent:
        runs = [kept[i : i + 1] for i in range(kept.size)]
    else:
        runs = np.split(kept, np.flatnonzero(np.diff(kept) > 1) + 1)
    if independent or len(runs) >= MIN_RUNS:
        held = _hold_runs(runs, float(holdout), rng)
        scheme = "samples" if independent else "runs"
    else:
        held = np.concatenate([_hold_blocks(run, float(holdout), rng) for run in runs])
        scheme = "blocks"
    held = np.sort(held).astype(np.int64)
    fitted = np.setdiff1d(kept, held).astype(np.int64)
    if held.size == 0 or fitted.size == 0:
        raise FitError(
            f"holdout {holdout} of {kept.size} pairs leaves {fitted.size} pairs to fit and "
            f"{held.size} to check; use more snapshots or another holdout fraction"
        )
    return PairSplit(fitted, held, n_pairs, scheme)


def _hold_runs(runs: list[np.ndarray], holdout: float, rng: np.random.Generator) -> np.ndarray:
    count = max(1, int(round(holdout * len(runs))))
    groups = np.array_split(np.arange(len(runs)), count)
    chosen = [group[rng.integers(group.size)] for group in groups]
    return np.concatenate([runs[i] for i in chosen])


def _hold_blocks(run: np.ndarray, holdout: float, rng: np.random.Generator) -> np.ndarray:
    size = run.size
    if size < 2:
        return np.empty(0, dtype=np.int64)
    blocks = max(1, min(BLOCKS_PER_RUN, int(round(holdout * size))))
    strata = np.array_split(np.arange(size), blocks)
    total = max(1, int(round(holdout * size)))
    lengths = np.diff(np.round(np.linspace(0, total, blocks + 1)).astype(int))
    held = []
    for stratum, length in zip(strata, lengths, strict=True):
        length = min(int(length), stratum.size)
        if length == 0:
            continue
        offset = int(rng.integers(stratum.size - length + 1))
        held.append(run[stratum[offset : offset + length]])
    return np.concatenate(held) if held else np.empty(0, dtype=np.int64)


def eigenpair_residuals(
    eigenvalue: ArrayLike,
    coefficient: ArrayLike,
    psi_x: ArrayLike,
    psi_y: ArrayLike,
) -> np.ndarray:
    """``res(lambda_i, g_i)`` for each eigenpair, on the pairs ``(psi_x[:, j], psi_y[:, j])``.

    Parameters
    ----------
    eigenvalue : array_like, shape (k,)
    coefficient : array_like, shape (n_terms, k)
        Column i is ``g_i``: ``phi_i(x) = g_i^T psi(x)`` (no conjugation).
    psi_x, psi_y : array_like, shape (n_terms, pairs)
        Lifted pairs, one column per pair.

    Returns
    -------
    ndarray, shape (k,)
        ``||phi_i(Y) - lambda_i phi_i(X)|| / ||phi_i(X)||``; ``inf`` where ``phi_i``
        vanishes on all X samples.

    References
    ----------
    Colbrook, M. J. & Townsend, A. (2024), "Rigorous data-driven computation of spectral
    properties of Koopman operators for dynamical systems", Comm. Pure Appl. Math. 77(1),
    221-283; arXiv:2111.14889.

    Examples
    --------
    >>> x = np.array([[1.0, 2.0, 3.0]])
    >>> eigenpair_residuals([0.5], [[1.0]], x, 0.5 * x).tolist()
    [0.0]
    """
    values = np.asarray(eigenvalue, dtype=np.complex128)
    g = np.asarray(coefficient)
    fx, fy = g.T @ np.asarray(psi_x), g.T @ np.asarray(psi_y)
    if fx.shape[1] == 0:
        raise FitError("residuals need at least one pair; got 0")
    size = np.linalg.norm(fx, axis=1)
    miss = np.linalg.norm(fy - values[:, None] * fx, axis=1)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(size > 0, miss / np.where(size > 0, size, 1.0), np.inf)


def pair_symmetric(residual: ArrayLike, eigenvalue: ArrayLike, tol: float = 1e-8) -> np.ndarray:
    """Both members of a conjugate pair get the larger of their two residuals.

    For real data the two are equal up to rounding; using one value keeps a pair trusted
    or untrusted together.
    """
    result = np.array(residual, dtype=np.float64)
    partner = spectrum.conjugate_pairs(eigenvalue, tol)
    paired = partner >= 0
    result[paired] = np.maximum(result[paired], result[partner[paired]])
    return result


def trusted_flags(residual: ArrayLike, threshold: float = TRUST_THRESHOLD) -> np.ndarray:
    """``residual <= threshold`` (NaN is never trusted)."""
    if isinstance(threshold, bool) or not isinstance(threshold, numbers.Real) or not threshold > 0:
        raise FitError(f"trust_threshold must be a positive number; got {threshold!r}")
    values = np.asarray(residual, dtype=np.float64)
    return np.where(np.isnan(values), False, values <= float(threshold))


def nyquist_warnings(eigenvalue: ArrayLike, dt: float, fraction: float = 0.9) -> tuple[str, ...]:
    """One warning per eigenvalue (one per conjugate pair) near the Nyquist frequency."""
    values = np.asarray(eigenvalue, dtype=np.complex128)
    freq = spectrum.frequency(values, dt)
    near = spectrum.near_nyquist(freq, dt, fraction)
    partner = spectrum.conjugate_pairs(values)
    nyquist = 0.5 / dt
    messages = []
    for i in np.flatnonzero(near):
        if partner[i] >= 0 and partner[i] < i:
            continue
        messages.append(
            f"eigenvalue {i} ({values[i]:.6g}) has frequency {abs(freq[i]):.6g}, within "
            f"{100 * (1 - fraction):.0f} % of the Nyquist frequency 1/(2 dt) = {nyquist:.6g}: "
            "it may be an alias of a faster motion; sample more often to be sure"
        )
    return tuple(messages)


def left_eigenvectors(operator: ArrayLike, eigenvalue: ArrayLike) -> np.ndarray:
    """Columns ``u_i`` with ``u_i^T operator = lambda_i u_i^T``, matched to ``eigenvalue``.

    The eigenvalues of ``operator`` are matched one-to-one to the given ones (which may be
    in any order) by the assignment that minimises the total distance. The vectors are
    the rows of ``V^-1`` (``V`` the right eigenvectors), hence ``u_i^T v_j = delta_ij``.
    """
    matrix = np.asarray(operator)
    wanted = np.asarray(eigenvalue, dtype=np.complex128)
    values, right = scipy.linalg.eig(matrix)
    if values.size != wanted.size:
        raise FitError(f"operator has {values.size} eigenvalues; {wanted.size} were given")
    distance = np.abs(wanted[:, None] - values[None, :])
    columns = np.argmin(distance, axis=1)
    if np.unique(columns).size != columns.size:
        # each row's nearest is a permutation in the common case (the eigenvalues of this very
        # operator): the sum of row minima bounds every assignment from below, so it is the
        # optimal one; otherwise solve the assignment (scipy.optimize costs ~0.2 s to import)
        from scipy import optimize

        _, columns = optimize.linear_sum_assignment(distance)
    # Rows of V^-1 satisfy u^T A = lambda u^T, biorthogonal to V even for repeated values.
    return np.linalg.inv(right).T[:, columns]
