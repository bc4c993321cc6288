"""The fit stage's methods (``fit.method``): from the workflow to one fit result.

The methods themselves (what each is and needs: :mod:`snaplift.fit_methods`; the fit,
arrays in and a :class:`~snaplift.fitting.FitResult` out:
:data:`snaplift.fitting.FIT_METHODS`) know nothing of archives or workflows. This module
builds their :class:`~snaplift.fitting.FitProblem` from the compress result and the scan:

- ``dmd``: DMD of the coefficients (Schmid 2010; Tu et al. 2014), affine when the data
  were centred (Hirsh et al. 2020), optional debiasing (Dawson et al. 2016; Hemati et
  al. 2017); residuals on held-out pairs (Colbrook & Townsend 2024).
- ``edmd``: EDMD (Williams, Kevrekidis & Rowley 2015) of a dictionary (``lift:``) of the
  leading coefficients (``on: coefficients``) or of the raw state (``on: state``, read
  here), with the way back to the state and residuals on held-out pairs.
- ``optimized``: optimized DMD by variable projection (Askham & Kutz 2018) on the leading
  coefficients of one run, at the snapshot times (any spacing).
"""

from __future__ import annotations

import dataclasses
from collections.abc import Callable
from typing import TYPE_CHECKING, Any

import numpy as np

from snaplift.errors import FitError
from snaplift.units import format_bytes
from snaplift.workflow.lift_section import state_dictionary

if TYPE_CHECKING:
    from snaplift.fitting import FitResult

__all__ = ["fit_outcome", "read_state", "state_variables"]


def state_variables(matrix: Any) -> list[str]:
    """Names of the raw state values: a one-point field is its name, else ``<field>_<point>``."""
    names: list[str] = []
    for rows in matrix.fields:
        points = np.arange(int(np.prod(rows.grid))) if rows.keep is None else rows.keep
        if points.size == 1:
            names.append(rows.name)
        else:
            names.extend(f"{rows.name}_{int(p)}" for p in points)
    return names


def read_state(matrix: Any) -> tuple[np.ndarray, int]:
    """The raw (unweighted, unscaled) kept values of every snapshot column: (n, m), bytes read."""
    blocks, read = [], 0
    index = np.asarray(matrix.snapshot_index, dtype=np.int64)
    first, last = int(index[0]), int(index[-1])
    for rows in matrix.fields:
        n_points = int(np.prod(rows.grid))
        raw = np.asarray(matrix.reader.read_tile(rows.archive_field, slice(0, n_points), slice(first, last + 1)))
        read += raw.size * raw.itemsize
        raw = raw[:, index - first]
        blocks.append(raw if rows.keep is None else raw[rows.keep])
    state = np.concatenate(blocks, axis=0)
    if not np.all(np.isfinite(state)):
        row, column = np.argwhere(~np.isfinite(state))[0]
        raise FitError(f"{matrix.reader.path}: the state value {state_variables(matrix)[row]} is not finite at "
                       f"snapshot {int(index[column])}; mask it (archive.mask) or repair the archive")
    return state, read


def fit_outcome(workflow: Any, compressed: Any, scanned: Any, *, memory_budget: int | None = None,
                say: Callable[[str], None] | None = None) -> FitResult:
    """Run ``fit.method`` on the compress result (or the raw state); see the module docstring."""
    # the fitting package (scipy.linalg, ~0.17 s) when a fit runs: the scan imports this
    # module (state_variables) at every run's start, before compress
    from snaplift.fitting import FitProblem, run_fit

    method = workflow.fit.method
    settings = workflow.fit
    common = {"dt": scanned.fit_dt, "run_lengths": np.asarray(scanned.columns_run_lengths, dtype=np.int64),
              "rank": settings.rank_argument(), "holdout": settings.holdout, "seed": settings.seed,
              "trust_threshold": settings.trust_threshold}
    if method == "edmd":
        return _edmd(workflow, compressed, common, memory_budget, say)
    if method == "optimized":
        data = _leading(compressed, settings.coefficients)
        times = np.asarray(scanned.fit_time, dtype=np.float64)
        result = run_fit(method, FitProblem(data, times=times, **common))
        return dataclasses.replace(result, details={"uniform": bool(scanned.uniform), **result.details})
    data = np.asarray(compressed.lowrank.coefficient)
    return run_fit(method, FitProblem(data, affine=workflow.prepare.center, debias=settings.debias, **common))


def _leading(compressed: Any, count: int | None) -> np.ndarray:
    coefficients = np.asarray(compressed.lowrank.coefficient)
    if count is not None and count > coefficients.shape[0]:
        raise FitError(f"fit.coefficients = {count} exceeds the {coefficients.shape[0]} coefficients of compress "
                       "(compress.rank)")
    return coefficients if count is None else coefficients[:count]


def _edmd(workflow: Any, compressed: Any, common: dict[str, Any], memory_budget: int | None,
          say: Callable[[str], None] | None) -> FitResult:
    from snaplift.fitting import FitProblem, run_fit

    settings = workflow.fit
    source = workflow.state_source
    bytes_read = 0
    if source == "state":
        data, bytes_read = read_state(compressed.matrix)
        variables = state_variables(compressed.matrix)
        space = "state"
    else:
        data = _leading(compressed, settings.coefficients)
        variables = [f"c{i}" for i in range(data.shape[0])]
        space = "coefficients"
    if np.iscomplexobj(data):
        if np.max(np.abs(data.imag), initial=0.0) > 1e-12 * max(np.max(np.abs(data.real), initial=0.0), 1e-300):
            raise FitError("fit.method edmd needs real data; the archive fields are complex (use method: dmd)")
        data = data.real
    dictionary = state_dictionary(list(workflow.lift), variables)
    size = dictionary.lifted_bytes(data.shape[0], data.shape[1])
    if say is not None:
        say(f"lift: {dictionary.lifted_size(data.shape[0])} terms on {data.shape[0]} "
            f"{'state values' if space == 'state' else 'coefficients'} x {data.shape[1]} snapshots = "
            f"{format_bytes(size)}")
    result = run_fit("edmd", FitProblem(data, space=space, dictionary=dictionary, memory_budget=memory_budget,
                                        **common))
    found = result.details
    lift = {"terms": found["terms"], "variables": list(variables), "on": space, "lifted_bytes": int(size),
            "names": found["names"], "way_back": found["way_back"],
            "state_projection_error": found["state_projection_error"], "truncation": found["truncation"],
            "dictionary": dictionary.settings(), "bytes_read": int(bytes_read)}
    return dataclasses.replace(result, details=lift)
