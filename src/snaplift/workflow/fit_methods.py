"""The fit stage's methods (``fit.method``) as one outcome the store writes the same way.

- ``dmd``: projected/exact DMD of the coefficients (Schmid 2010; Tu et al. 2014), with
  the affine term when the data were centred (Hirsh et al. 2020) and optional debiasing
  (Dawson et al. 2016; Hemati et al. 2017); residuals on held-out pairs.
- ``edmd``: EDMD (Williams, Kevrekidis & Rowley 2015) of a dictionary (``lift:``) of the
  leading coefficients (``on: coefficients``) or of the raw state (``on: state``), with
  the way back to the state and residuals on held-out pairs (Colbrook & Townsend 2024).
- ``optimized``: optimized DMD by variable projection (Askham & Kutz 2018) on the leading
  coefficients of one run, any time spacing; its residuals are computed on the fitted
  pairs (it fits every snapshot), each pair advanced by its own time step.

Every method gives a :class:`FitOutcome`: eigenvalues, amplitudes (first run) and
amplitudes per run, modes in the space that was fitted (``coefficients``: rows are the
compress basis vectors; ``state``: the raw state values), the model of the fitted data
(for reconstruction errors), eigenfunctions on the snapshots (EDMD) and a description
of the dictionary.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from snaplift.errors import FitError
from snaplift.fitting import (
    ResidualReport,
    fit_dmd_with_residuals,
    fit_edmd,
    fit_optimized_dmd,
    run_pair_mask,
)
from snaplift.fitting.residuals import PairSplit, nyquist_warnings, pair_symmetric, trusted_flags
from snaplift.fitting.runs import run_amplitudes, run_starts

__all__ = ["FitOutcome", "fit_outcome", "read_state", "state_variables", "modal_model"]


@dataclass(frozen=True, eq=False)
class FitOutcome:
    """What the fit stage hands to the store (module docstring); mode order as fitted."""

    method: str
    eigenvalue: np.ndarray
    amplitude: np.ndarray
    dt: float
    operator: np.ndarray
    modes: np.ndarray
    space: str
    data: np.ndarray
    model: np.ndarray
    run_lengths: np.ndarray
    run_amplitude: np.ndarray
    residuals: ResidualReport | None
    fixed_point: np.ndarray | None = None
    eigenfunction: np.ndarray | None = None
    #: what the store's operator attributes describe the fit with, under ``details_key``:
    #: ``lift`` (EDMD: the dictionary, lifted size, way back and its error) or
    #: ``optimized`` (time spacing, relative error of the fit)
    details: dict[str, Any] = field(default_factory=dict)
    details_key: str = "lift"
    warnings: tuple[str, ...] = ()
    fit: Any = None


def modal_model(modes: np.ndarray, eigenvalue: np.ndarray, amplitudes: np.ndarray, run_lengths: np.ndarray,
                fixed_point: np.ndarray | None = None) -> np.ndarray:
    """``x_j = c + modes @ (b_run * lambda^(j - start of run))`` for every run (columns joined)."""
    lengths = np.asarray(run_lengths, dtype=np.int64)
    out = np.empty((modes.shape[0], int(lengths.sum())), dtype=np.complex128)
    for run, (start, length) in enumerate(zip(run_starts(lengths), lengths, strict=True)):
        powers = np.power.outer(np.asarray(eigenvalue, dtype=np.complex128), np.arange(length))
        out[:, start:start + length] = modes @ (amplitudes[run][:, None] * powers)
    if fixed_point is not None:
        out += np.asarray(fixed_point)[:, None]
    return out


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


def _pairs_mask(run_lengths: np.ndarray) -> np.ndarray | None:
    return run_pair_mask(run_lengths) if run_lengths.size > 1 else None


def fit_outcome(workflow: Any, compressed: Any, scanned: Any, *, memory_budget: int | None = None,
                say: Callable[[str], None] | None = None) -> FitOutcome:
    """Run ``fit.method`` on the compress result (or the raw state); see the module docstring."""
    method = workflow.fit.method
    run_lengths = np.asarray(scanned.columns_run_lengths, dtype=np.int64)
    if method == "dmd":
        return _dmd(workflow, compressed, scanned, run_lengths)
    if method == "edmd":
        return _edmd(workflow, compressed, scanned, run_lengths, memory_budget, say)
    if method == "optimized":
        return _optimized(workflow, compressed, scanned, run_lengths)
    raise NotImplementedError(f"fit.method {method!r}")


def _dmd(workflow: Any, compressed: Any, scanned: Any, run_lengths: np.ndarray) -> FitOutcome:
    coefficients = np.asarray(compressed.lowrank.coefficient)
    settings = workflow.fit
    try:
        fit, report = fit_dmd_with_residuals(
            coefficients, scanned.fit_dt, holdout=settings.holdout, seed=settings.seed,
            trust_threshold=settings.trust_threshold, rank=settings.rank_argument(),
            affine=workflow.prepare.center, debias=settings.debias, pair_mask=_pairs_mask(run_lengths),
        )
    except np.linalg.LinAlgError as error:
        raise FitError(f"DMD fit failed on the {coefficients.shape} coefficients: {error}") from None
    per_run = run_amplitudes(fit, coefficients, run_lengths=run_lengths)
    model = modal_model(fit.modes, fit.eigenvalue, per_run, run_lengths, fit.fixed_point)
    return FitOutcome("dmd", fit.eigenvalue, fit.amplitude, fit.dt, fit.operator, fit.modes, "coefficients",
                      coefficients, model, run_lengths, per_run, report, fixed_point=fit.fixed_point, fit=fit)


def _leading(compressed: Any, count: int | None) -> np.ndarray:
    coefficients = np.asarray(compressed.lowrank.coefficient)
    if count is not None and count > coefficients.shape[0]:
        raise FitError(f"fit.coefficients = {count} exceeds the {coefficients.shape[0]} coefficients of compress "
                       "(compress.rank)")
    return coefficients if count is None else coefficients[:count]


def _edmd(workflow: Any, compressed: Any, scanned: Any, run_lengths: np.ndarray, memory_budget: int | None,
          say: Callable[[str], None] | None) -> FitOutcome:
    from snaplift.units import format_bytes
    from snaplift.workflow.lift_section import state_dictionary

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
    terms = dictionary.lifted_size(data.shape[0])
    size = dictionary.lifted_bytes(data.shape[0], data.shape[1])
    if say is not None:
        say(f"lift: {terms} terms on {data.shape[0]} {'state values' if space == 'state' else 'coefficients'} "
            f"x {data.shape[1]} snapshots = {format_bytes(size)}")
    fit = fit_edmd(data, dictionary, scanned.fit_dt, pair_mask=_pairs_mask(run_lengths), rank=settings.rank_argument(),
                   holdout=settings.holdout, seed=settings.seed, trust_threshold=settings.trust_threshold,
                   memory_budget=memory_budget)
    report = ResidualReport(residual=np.array(fit.residual), trusted=np.array(fit.trusted),
                            threshold=float(fit.trust_threshold), pairs=fit.residual_pairs,
                            n_pairs=_count_pairs(fit.split, fit.residual_pairs), split=fit.split,
                            warnings=tuple(nyquist_warnings(fit.eigenvalue, fit.dt)))
    per_run = run_amplitudes(fit, data, run_lengths=run_lengths)
    model = modal_model(fit.modes, fit.eigenvalue, per_run, run_lengths)
    lift = {"terms": int(fit.n_terms), "variables": list(variables), "on": space, "lifted_bytes": int(size),
            "names": list(fit.description.names), "way_back": fit.way_back,
            "state_projection_error": float(fit.state_projection_error), "truncation": int(fit.rank),
            "dictionary": dictionary.settings(), "bytes_read": int(bytes_read)}
    return FitOutcome("edmd", fit.eigenvalue, fit.amplitude, fit.dt, fit.operator, fit.modes, space, data, model,
                      run_lengths, per_run, report, eigenfunction=np.asarray(fit.eigenfunction), details=lift,
                      warnings=tuple(fit.warnings), fit=fit)


def _count_pairs(split: PairSplit, pairs: str) -> int:
    return int(split.holdout_pairs.size if pairs == "held-out" else split.fit_pairs.size)


def _optimized(workflow: Any, compressed: Any, scanned: Any, run_lengths: np.ndarray) -> FitOutcome:
    if run_lengths.size > 1:
        raise NotImplementedError(
            f"fit.method 'optimized' fits one run; this archive has {run_lengths.size} runs "
            "(select one run with archive.snapshots, or use method dmd or edmd)")
    settings = workflow.fit
    data = _leading(compressed, settings.coefficients)
    rank = int(settings.rank) if isinstance(settings.rank, int) else data.shape[0]
    times = np.asarray(scanned.fit_time, dtype=np.float64)
    fit = fit_optimized_dmd(data, times, min(rank, data.shape[0]))
    eigenvalue = np.exp(fit.rate * fit.dt)
    # residual of each exponential on every fitted pair, the pair advanced by its own step
    left = np.linalg.pinv(fit.modes).T  # g_i^T x = coordinate of mode i
    steps = np.diff(times)
    fx, fy = left.T @ data[:, :-1], left.T @ data[:, 1:]
    advance = np.exp(np.outer(fit.rate, steps))
    miss = np.linalg.norm(fy - advance * fx, axis=1)
    norm = np.linalg.norm(fx, axis=1)
    residual = pair_symmetric(np.where(norm > 0, miss / np.where(norm > 0, norm, 1.0), np.inf), eigenvalue)
    split = PairSplit(np.arange(steps.size), np.array([], dtype=np.int64), int(steps.size), "none")
    report = ResidualReport(residual=residual, trusted=trusted_flags(residual, settings.trust_threshold),
                            threshold=float(settings.trust_threshold), pairs="training", n_pairs=int(steps.size),
                            split=split, warnings=tuple(nyquist_warnings(eigenvalue, fit.dt)))
    model = fit.modes @ (fit.amplitude[:, None] * np.exp(np.outer(fit.rate, times - times[0])))
    warnings = () if fit.converged else (f"optimized DMD did not converge: {fit.message}",)
    return FitOutcome("optimized", eigenvalue, fit.amplitude, fit.dt, np.diag(eigenvalue), fit.modes,
                      "coefficients", data, model, run_lengths, fit.amplitude[None, :], report,
                      details={"uniform": bool(scanned.uniform), "relative_error": float(fit.relative_error),
                               "converged": bool(fit.converged)}, details_key="optimized",
                      warnings=warnings, fit=fit)
