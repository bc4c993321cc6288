"""Several independent runs: their boundaries and the amplitude of every mode in each run.

One fit (DMD or EDMD) describes all runs with the same eigenvalues and modes; what
differs between runs is how much of each mode they contain. :func:`run_amplitudes`
refits the optimal amplitudes (Jovanovic, Schmid & Nichols 2014) to each run alone:
``x_j ~= c + modes @ (a_run * lambda**(j - start_of_run))``.
"""

from __future__ import annotations

from typing import Any

import numpy as np
from numpy.typing import ArrayLike

from snaplift.errors import FitError
from snaplift.fitting._checks import pair_keep, run_lengths_array, snapshot_matrix
from snaplift.fitting.amplitudes import optimal_amplitudes

__all__ = ["run_lengths_from_mask", "run_starts", "run_amplitudes", "run_amplitude_table"]


def run_lengths_from_mask(pair_mask: ArrayLike | None, n_snapshots: int) -> np.ndarray:
    """Snapshots per run, the runs being separated by removed pairs (inverse of run_pair_mask).

    Examples
    --------
    >>> run_lengths_from_mask(np.array([False, False, True, False]), 5).tolist()
    [3, 2]
    """
    removed = np.flatnonzero(~pair_keep(pair_mask, n_snapshots))
    edges = np.concatenate(([0], removed + 1, [n_snapshots]))
    return np.diff(edges).astype(np.int64)


def run_starts(run_lengths: ArrayLike) -> np.ndarray:
    """Index of the first snapshot of each run."""
    lengths = np.asarray(run_lengths, dtype=np.int64)
    return np.concatenate(([0], np.cumsum(lengths)[:-1])).astype(np.int64)


def _lengths(run_lengths: ArrayLike | None, pair_mask: ArrayLike | None, n: int) -> np.ndarray:
    if run_lengths is not None and pair_mask is not None:
        raise FitError("give run_lengths or pair_mask, not both")
    if run_lengths is None:
        return run_lengths_from_mask(pair_mask, n)
    lengths = run_lengths_array(run_lengths)
    if int(lengths.sum()) != n:
        raise FitError(f"run_lengths add up to {int(lengths.sum())} snapshots; the data have {n}")
    return lengths.astype(np.int64)


def run_amplitudes(
    fit: Any,
    snapshots: ArrayLike,
    *,
    run_lengths: ArrayLike | None = None,
    pair_mask: ArrayLike | None = None,
) -> np.ndarray:
    """Optimal amplitudes of every mode in every run, shape (n_runs, k), complex.

    Parameters
    ----------
    fit : DMDFit or EDMDFit
        Needs ``modes`` (in the space of ``snapshots``), ``eigenvalue`` and
        ``fixed_point`` (None or the affine constant).
    snapshots : array_like, shape (r, m)
        The runs joined in order, one column per snapshot (coefficients for DMD, the
        state for EDMD).
    run_lengths : array_like of int, optional
        Snapshots per run; or
    pair_mask : array_like of bool, optional
        the pair mask the fit used (runs are separated by removed pairs). With neither,
        all snapshots are one run.

    References
    ----------
    Jovanovic, M. R., Schmid, P. J. & Nichols, J. W. (2014), Phys. Fluids 26, 024103.
    """
    data = snapshot_matrix(snapshots, "snapshots")
    modes = np.asarray(fit.modes)
    if data.shape[0] != modes.shape[0]:
        raise FitError(
            f"snapshots must have {modes.shape[0]} rows like the modes; got {data.shape[0]}"
        )
    lengths = _lengths(run_lengths, pair_mask, data.shape[1])
    fixed = getattr(fit, "fixed_point", None)
    rows = []
    for start, length in zip(run_starts(lengths), lengths, strict=True):
        segment = data[:, start : start + length]
        if fixed is not None:
            segment = segment - np.asarray(fixed)[:, None]
        rows.append(optimal_amplitudes(modes, fit.eigenvalue, segment))
    return np.array(rows)


def run_amplitude_table(
    fit: Any,
    snapshots: ArrayLike,
    *,
    run_lengths: ArrayLike | None = None,
    pair_mask: ArrayLike | None = None,
) -> dict[str, np.ndarray]:
    """Amplitudes per run as a table for the result store or a report.

    Returns
    -------
    dict of str to ndarray
        ``run`` (n_runs,), ``run_start`` (n_runs,), ``run_length`` (n_runs,),
        ``amplitude`` (n_runs, k) complex, ``magnitude`` (n_runs, k),
        ``phase`` (n_runs, k) in rad; mode index k in the fit's order.

    Examples
    --------
    >>> from snaplift.fitting import fit_dmd, run_pair_mask
    >>> x = np.array([[1.0, 0.5, 0.25, 3.0, 1.5, 0.75]])
    >>> fit = fit_dmd(x, 1.0, pair_mask=run_pair_mask([3, 3]))
    >>> np.round(run_amplitude_table(fit, x, run_lengths=[3, 3])["magnitude"], 12).tolist()
    [[1.0], [3.0]]
    """
    data = snapshot_matrix(snapshots, "snapshots")
    lengths = _lengths(run_lengths, pair_mask, data.shape[1])
    amplitude = run_amplitudes(fit, data, run_lengths=lengths)
    return {
        "run": np.arange(lengths.size),
        "run_start": run_starts(lengths),
        "run_length": lengths,
        "amplitude": amplitude,
        "magnitude": np.abs(amplitude),
        "phase": np.angle(amplitude),
    }
