"""Input checks shared by the fitting modules: one clear :class:`FitError` per bad value."""

from __future__ import annotations

import numbers

import numpy as np
from numpy.typing import ArrayLike

from snaplift.errors import FitError

__all__ = ["snapshot_matrix", "positive_step", "finite_vector", "pair_keep"]


def snapshot_matrix(values: ArrayLike, name: str) -> np.ndarray:
    """``values`` as a finite 2-D float64 or complex128 array (rows: state, columns: snapshot)."""
    array = np.asarray(values)
    if array.ndim != 2:
        raise FitError(
            f"{name} must be a 2-D array (state x snapshot, one column per snapshot); "
            f"got shape {array.shape}"
        )
    if not (np.issubdtype(array.dtype, np.number) and not np.issubdtype(array.dtype, np.bool_)):
        raise FitError(f"{name} must hold real or complex numbers; got dtype {array.dtype}")
    # Accumulation is always float64 / complex128, whatever the input precision.
    array = array.astype(np.complex128 if np.iscomplexobj(array) else np.float64, copy=False)
    finite = np.isfinite(array)
    if not finite.all():
        row, column = np.argwhere(~finite)[0]
        raise FitError(
            f"{name}[{row}, {column}] is {array[row, column]}; fitting needs finite values "
            f"({int((~finite).sum())} non-finite entries in all): drop or mask those snapshots"
        )
    return array


def finite_vector(values: ArrayLike, name: str, size: int | None = None) -> np.ndarray:
    """``values`` as a finite 1-D float64 or complex128 array, optionally of a given length."""
    array = np.asarray(values)
    if array.ndim != 1:
        raise FitError(f"{name} must be a 1-D array; got shape {array.shape}")
    if size is not None and array.size != size:
        raise FitError(f"{name} must have length {size}; got length {array.size}")
    if not np.issubdtype(array.dtype, np.number) or np.issubdtype(array.dtype, np.bool_):
        raise FitError(f"{name} must hold real or complex numbers; got dtype {array.dtype}")
    array = array.astype(np.complex128 if np.iscomplexobj(array) else np.float64, copy=False)
    bad = np.flatnonzero(~np.isfinite(array))
    if bad.size:
        raise FitError(f"{name}[{bad[0]}] is {array[bad[0]]}; finite values are required")
    return array


def positive_step(dt: object) -> float:
    """The time step as a positive finite float."""
    if isinstance(dt, bool) or not isinstance(dt, numbers.Real):
        raise FitError(f"dt must be a positive real number (time between snapshots); got {dt!r}")
    value = float(dt)
    if not (np.isfinite(value) and value > 0.0):
        raise FitError(f"dt must be a positive finite time between snapshots; got {value}")
    return value


def pair_keep(pair_mask: ArrayLike | None, n_snapshots: int) -> np.ndarray:
    """Boolean array of the pairs ``(j, j + 1)`` that are used (``True`` = kept).

    ``pair_mask[j] = True`` removes pair ``j`` (numpy.ma convention: True means masked out).
    """
    n_pairs = max(n_snapshots - 1, 0)
    if pair_mask is None:
        return np.ones(n_pairs, dtype=bool)
    mask = np.asarray(pair_mask)
    if mask.dtype != np.bool_:
        raise FitError(
            "pair_mask must be a boolean array (True removes pair j -> j+1); "
            f"got dtype {mask.dtype}"
        )
    if mask.shape != (n_pairs,):
        raise FitError(
            f"pair_mask must have shape ({n_pairs},), one entry per pair of consecutive "
            f"snapshots of {n_snapshots}; got shape {mask.shape}"
        )
    return ~mask


def run_lengths_array(run_lengths: ArrayLike) -> np.ndarray:
    """Snapshots per run as int64, each at least 1; FitError otherwise."""
    lengths = np.asarray(run_lengths)
    if lengths.ndim != 1 or lengths.size == 0 or not np.issubdtype(lengths.dtype, np.integer):
        raise FitError(f"run_lengths must be a non-empty 1-D list of integers; got {run_lengths!r}")
    bad = np.flatnonzero(lengths < 1)
    if bad.size:
        raise FitError(f"run_lengths[{bad[0]}] is {lengths[bad[0]]}; every run needs >= 1 snapshot")
    return lengths.astype(np.int64)
