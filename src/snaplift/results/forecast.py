"""Forecast from a result store: advance the fitted model from any snapshot, in field units.

The store holds everything the linear model needs (README.md, "The result store"): the
eigenvalues (``spectrum/``), the modes in field units (``modes/``), the mean or the fixed
point (``prepare/``) and, to start from snapshot ``j``, the amplitudes of the modes at
``j``:

- DMD and optimized DMD: the least-squares amplitudes of the modes' coefficients
  (``operator/mode_coefficient``) against the snapshot's coefficients
  (``basis/coefficient[:, j]``), after subtracting the fixed point (affine fits);
- EDMD: the Koopman eigenfunctions evaluated at the snapshot (``eigenfunctions/value``),
  so that ``x_j = sum_k mode_k phi_k(x_j)`` (Koopman mode expansion, Williams,
  Kevrekidis & Rowley 2015).

Then ``x_{j+s} = offset + sum_k mode_k b_k lambda_k^s`` with the offset the fixed point
(affine fits), the mean (centred data) or zero. A data-driven surrogate is valid only
near the data it was fitted to: a forecast far beyond the fitted time span is an
extrapolation (the store's ``caution`` attribute says so).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from snaplift import __version__
from snaplift.errors import ResultStoreError
from snaplift.results.reading import StoreView
from snaplift.results.store import open_result, read_group, store_array, store_group

__all__ = ["FORECAST_CAUTION", "forecast_fields", "is_complex_data", "overlap_snapshots"]

FORECAST_CAUTION = (
    "This forecast comes from a data-driven linear surrogate. It is valid only near the data it was "
    "fitted on: other operating points, geometries or times beyond the fitted span are extrapolation. "
    "Designs with structural, thermal or safety consequences rest on validated simulation, experiment, "
    "the applicable codes and licensed engineering judgement, not on this tool's forecasts."
)


def forecast_fields(store: str | Path, snapshot: int, n_steps: int,
                    fields: list[str] | None = None,
                    points: dict[str, np.ndarray] | None = None,
                    offsets: np.ndarray | None = None) -> dict[str, np.ndarray]:
    """Model fields at steps ``0 .. n_steps`` after snapshot ``snapshot`` (a column index).

    Parameters
    ----------
    store : path of a complete result store
    snapshot : int
        Column of the snapshot matrix to start from (``diagnostics/time`` gives its time);
        negative values count from the end.
    n_steps : int
        Steps of ``spectrum.attrs['dt']`` to advance (0 returns the model at the start).
    fields : list of str, optional
        Which ``modes/`` fields (default all).
    points : dict of str to ndarray, optional
        Per field, flat indices into its grid (C order): forecast only those points
        (``field -> (n_steps + 1, n_points)``), e.g. probes of a long forecast.
    offsets : ndarray, optional
        Times after the start snapshot (archive time unit) to evaluate the model at, instead
        of the ``n_steps + 1`` steps of ``dt``: ``lambda_k^(offset / dt)`` with the principal
        logarithm, i.e. ``exp(rate_k offset)``, for snapshots at uneven times (optimized DMD,
        Askham & Kutz 2018).

    Returns
    -------
    dict of str to ndarray
        ``field -> (n_steps + 1, *grid)`` values (NaN at masked points; real, or complex
        for an archive of complex fields), plus
        ``"time"`` (n_steps + 1,).

    Examples
    --------
    >>> out = forecast_fields("results/fin-duct.zarr", snapshot=-1, n_steps=20)  # doctest: +SKIP
    >>> out["T"].shape                                                          # doctest: +SKIP
    (21, 50, 250)
    """
    root = open_result(store)
    for group in ("spectrum", "modes", "diagnostics"):
        if group not in root:
            raise ResultStoreError(f"result store {store} has no group '{group}'; it has no fit to forecast from")
    eigenvalue = np.asarray(store_array(root, "spectrum/eigenvalue")[...], dtype=np.complex128)
    dt = float(store_group(root, "spectrum").attrs.get("dt", 1.0))  # type: ignore[arg-type]
    time = np.asarray(store_array(root, "diagnostics/time")[...], dtype=np.float64)
    integer = not isinstance(snapshot, bool) and isinstance(snapshot, (int, np.integer))
    if not integer or not -time.size <= snapshot < time.size:
        raise ResultStoreError(f"snapshot must be a column index in -{time.size}..{time.size - 1}; got {snapshot!r}")
    if isinstance(n_steps, bool) or not isinstance(n_steps, (int, np.integer)) or n_steps < 0:
        raise ResultStoreError(f"n_steps must be an integer >= 0; got {n_steps!r}")
    column = int(snapshot) % time.size
    amplitude = _amplitudes(root, column, eigenvalue, store)
    if offsets is None:
        powers = np.power.outer(eigenvalue, np.arange(int(n_steps) + 1))  # (mode, step)
        after = dt * np.arange(int(n_steps) + 1)
    else:
        after = np.asarray(offsets, dtype=np.float64).ravel()
        powers = np.exp(np.multiply.outer(np.log(eigenvalue.astype(np.complex128)), after / dt))
    weights = amplitude[:, None] * powers
    names = _mode_fields(root) if fields is None else list(fields)
    complex_data = is_complex_data(root)
    out: dict[str, np.ndarray] = {"time": time[column] + after}
    for name in names:
        if name not in store_group(root, "modes"):
            raise ResultStoreError(f"result store {store} has no modes of field '{name}'; "
                                   f"fields: {', '.join(_mode_fields(root))}")
        modes = np.asarray(store_array(root, f"modes/{name}")[...])  # (mode, *grid)
        offset = _offset(root, name)
        if points is not None and name in points:
            chosen = np.asarray(points[name], dtype=np.int64)
            modes = modes.reshape(modes.shape[0], -1)[:, chosen]
            offset = np.asarray(offset).ravel()[chosen] if np.ndim(offset) else offset
        values = np.tensordot(weights, modes, axes=([0], [0]))  # (step, *grid)
        if not complex_data:  # conjugate pairs sum to real values; complex archives keep their phase
            values = values.real
        state_space = "operator" in root and root["operator"].attrs.get("space") == "state"
        out[name] = values if state_space else values + offset
    return out


def is_complex_data(root) -> bool:
    """Whether the store was fitted to complex archive fields (its basis is complex then; for
    real data modes come in conjugate pairs and the model's values are real)."""
    return "basis" in root and "coefficient" in root["basis"] and root["basis/coefficient"].dtype.kind == "c"


def _mode_fields(root) -> list[str]:
    """The ``(mode, *grid)`` arrays of ``modes/`` (not the grid coordinates or per-mode values beside them)."""
    return sorted(name for name, array in root["modes"].arrays()
                  if array.ndim >= 2 and tuple(array.metadata.dimension_names or ("mode",))[0] == "mode")


def _amplitudes(root, column: int, eigenvalue: np.ndarray, store) -> np.ndarray:
    if "eigenfunctions" in root:
        return np.asarray(root["eigenfunctions/value"][:, column], dtype=np.complex128)
    if "operator" not in root or "mode_coefficient" not in root["operator"]:
        raise ResultStoreError(f"result store {store} has no operator/mode_coefficient (written by an older "
                               f"snaplift than {__version__}); run the workflow again to forecast from it")
    modes = np.asarray(root["operator/mode_coefficient"][...], dtype=np.complex128)
    state = np.asarray(root["basis/coefficient"][:, column], dtype=np.complex128)
    if "fixed_point_coefficient" in root["operator"]:
        state = state - np.asarray(root["operator/fixed_point_coefficient"][...])
    # LAPACK gelsd with singular values below eps * largest cut, as scipy.linalg.lstsq's
    # default; numpy's own (importing scipy.linalg cost the report a fifth of a second)
    amplitude, *_ = np.linalg.lstsq(modes, state, rcond=np.finfo(np.float64).eps)
    return amplitude


def _offset(root, name: str) -> np.ndarray | float:
    prepare = root["prepare"] if "prepare" in root else None
    if prepare is None:
        return 0.0
    for key in (f"fixed_point_{name}", f"mean_{name}"):
        if key in prepare:
            return np.asarray(prepare[key][...], dtype=np.float64)
    return 0.0


def overlap_snapshots(view: StoreView, column: int, n_steps: int, archive_length: int | None) -> np.ndarray:
    """Archive snapshot index of each step (-1 where the forecast does not overlap the archive)."""
    index = np.asarray(view.diagnostics["snapshot_index"].values, dtype=np.int64)
    runs = read_group(view.path, "runs") if "runs" in open_result(view.path) else None
    start, stop = 0, index.size
    if runs is not None:
        starts = np.asarray(runs["run_start"], dtype=np.int64)
        lengths = np.asarray(runs["run_length"], dtype=np.int64)
        which = int(np.searchsorted(starts, column, side="right") - 1)
        start, stop = int(starts[which]), int(starts[which] + lengths[which])
        last_run = which == starts.size - 1
    else:
        last_run = True
    run_index = index[start:stop]
    every = int(np.median(np.diff(run_index))) if run_index.size > 1 else 1
    steps = index[column] + every * np.arange(n_steps + 1, dtype=np.int64)
    # within the run's fitted snapshots; past them only if the archive goes on (last run)
    limit = (archive_length if archive_length is not None else int(run_index[-1]) + 1) if last_run \
        else int(run_index[-1]) + 1
    return np.where(steps < limit, steps, -1)
