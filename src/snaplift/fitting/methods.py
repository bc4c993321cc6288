"""The fit methods bound to their names: arrays in, one :class:`FitResult` out.

What each method is and needs lives in :mod:`snaplift.fit_methods` (plain data, so the
schema and the command line can list them cheaply); this module adds the fit itself.
Every method takes a :class:`FitProblem` (snapshots as columns, the time step, the run
lengths and the ``fit:`` settings) and gives a :class:`FitResult`: eigenvalues, modes and
amplitudes (first run and per run), the spectrum properties (rate, frequency, growth,
period, conjugate partner), residuals and trust of every eigenvalue, the model of the
fitted data and the method's own detailed record (``fit``).

- ``dmd``: :func:`~snaplift.fitting.fit_dmd_with_residuals` (Schmid 2010; Tu et al.
  2014), affine with ``affine`` (Hirsh et al. 2020), debiased with ``debias`` (Dawson et
  al. 2016; Hemati et al. 2017); residuals on held-out pairs (Colbrook & Townsend 2024).
- ``edmd``: :func:`~snaplift.fitting.fit_edmd` (Williams, Kevrekidis & Rowley 2015) of
  ``dictionary`` (the state itself when None); residuals on held-out pairs.
- ``optimized``: :func:`~snaplift.fitting.fit_optimized_dmd` (Askham & Kutz 2018) of one
  run at ``times`` (any spacing); residuals on the fitted pairs
  (:func:`~snaplift.fitting.assessment.optimized_residuals`).
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from snaplift.errors import FitError
from snaplift.fit_methods import FIT_METHOD_NAMES, FitMethodInfo, get_fit_method
from snaplift.fitting._spectral import SpectrumProperties
from snaplift.fitting.assessment import (
    ResidualReport,
    fit_dmd_with_residuals,
    mode_ranking,
    optimized_residuals,
)
from snaplift.fitting.dmd import run_pair_mask
from snaplift.fitting.edmd import fit_edmd
from snaplift.fitting.optimized import fit_optimized_dmd
from snaplift.fitting.residuals import HOLDOUT, TRUST_THRESHOLD, PairSplit, nyquist_warnings
from snaplift.fitting.runs import run_amplitudes, run_starts
from snaplift.lifting import identity

__all__ = ["FIT_METHODS", "FitMethod", "FitProblem", "FitResult", "modal_model", "run_fit"]


@dataclass(frozen=True, eq=False)
class FitProblem:
    """What a fit method is given: ``data`` (n, m), one column per snapshot, and settings.

    ``run_lengths`` are the snapshots of each run joined in ``data`` (None: one run);
    ``times`` the snapshot times (optimized DMD; None: ``dt`` apart); ``space`` names the
    rows (``coefficients`` or ``state``). ``rank``, ``holdout``, ``seed`` and
    ``trust_threshold`` are the ``fit:`` keys of the same names; ``affine`` and ``debias``
    apply to DMD, ``dictionary`` and ``memory_budget`` to EDMD.
    """

    data: np.ndarray
    dt: float
    run_lengths: np.ndarray | None = None
    times: np.ndarray | None = None
    space: str = "coefficients"
    rank: int | float | str | None = None
    holdout: float = HOLDOUT
    seed: int = 0
    trust_threshold: float = TRUST_THRESHOLD
    affine: bool = False
    debias: str = "none"
    dictionary: Any = None
    memory_budget: int | None = None

    @property
    def lengths(self) -> np.ndarray:
        """Snapshots per run (one run of every column when ``run_lengths`` is None)."""
        if self.run_lengths is None:
            return np.array([np.asarray(self.data).shape[1]], dtype=np.int64)
        return np.asarray(self.run_lengths, dtype=np.int64)

    def pair_mask(self) -> np.ndarray | None:
        """Pairs across runs removed (None for one run)."""
        lengths = self.lengths
        return run_pair_mask(lengths) if lengths.size > 1 else None


@dataclass(frozen=True, eq=False)
class FitResult(SpectrumProperties):
    """One fit, whatever the method; mode order as fitted (by ``|amplitude|``).

    ``eigenvalue`` (k,) per step ``dt``; ``modes`` (n, k) in the fitted space (``space``:
    ``coefficients`` rows are the compress basis vectors, ``state`` the raw state values);
    ``amplitude`` (k,) of the first run and ``run_amplitude`` (runs, k) of every run;
    ``operator`` the reduced operator; ``data`` the fitted snapshots and ``model`` the
    modal model of them (:func:`modal_model`); ``residuals`` the residual and trust of
    every eigenvalue; ``fixed_point`` the affine constant (DMD with ``affine``);
    ``eigenfunction`` (k, m) on the snapshots (EDMD); ``details`` what the store's
    operator attributes describe the fit with, under ``details_key``; ``fit`` the
    method's own record (:class:`~snaplift.fitting.DMDFit`,
    :class:`~snaplift.fitting.EDMDFit` or :class:`~snaplift.fitting.OptimizedDMDFit`).
    Spectrum properties (``rate``, ``frequency``, ``growth``, ``period``, ``partner``)
    come from ``eigenvalue`` and ``dt``.
    """

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
    details: dict[str, Any] = field(default_factory=dict)
    details_key: str = "lift"
    warnings: tuple[str, ...] = ()
    fit: Any = None

    @property
    def rank(self) -> int:
        """Number of modes."""
        return int(np.asarray(self.eigenvalue).size)

    @property
    def residual(self) -> np.ndarray | None:
        """Residual of every eigenvalue (None without residuals)."""
        return None if self.residuals is None else self.residuals.residual

    @property
    def trusted(self) -> np.ndarray | None:
        """Trust flag of every eigenvalue (None without residuals)."""
        return None if self.residuals is None else self.residuals.trusted

    def ranking(self, *, oscillating: bool = False) -> np.ndarray:
        """Mode indices by importance: trusted first, then ``|amplitude|`` (:func:`mode_ranking`)."""
        return mode_ranking(self, oscillating=oscillating)

    def relative_error(self) -> float:
        """``||data - model||_F / ||data||_F`` (0 for zero data)."""
        data = np.asarray(self.data)
        size = float(np.linalg.norm(data))
        return float(np.linalg.norm(data - self.model) / size) if size > 0 else 0.0


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


def _dmd(problem: FitProblem) -> FitResult:
    data = np.asarray(problem.data)
    lengths = problem.lengths
    try:
        fit, report = fit_dmd_with_residuals(
            data, problem.dt, holdout=problem.holdout, seed=problem.seed,
            trust_threshold=problem.trust_threshold, rank=problem.rank,
            affine=problem.affine, debias=problem.debias, pair_mask=problem.pair_mask(),
        )
    except np.linalg.LinAlgError as error:
        raise FitError(f"DMD fit failed on the {data.shape} coefficients: {error}") from None
    per_run = run_amplitudes(fit, data, run_lengths=lengths)
    model = modal_model(fit.modes, fit.eigenvalue, per_run, lengths, fit.fixed_point)
    return FitResult("dmd", fit.eigenvalue, fit.amplitude, fit.dt, fit.operator, fit.modes, problem.space,
                     data, model, lengths, per_run, report, fixed_point=fit.fixed_point, fit=fit)


def _count_pairs(split: PairSplit, pairs: str) -> int:
    return int(split.holdout_pairs.size if pairs == "held-out" else split.fit_pairs.size)


def _edmd(problem: FitProblem) -> FitResult:
    data = np.asarray(problem.data)
    lengths = problem.lengths
    dictionary = identity() if problem.dictionary is None else problem.dictionary
    fit = fit_edmd(data, dictionary, problem.dt, pair_mask=problem.pair_mask(), rank=problem.rank,
                   holdout=problem.holdout, seed=problem.seed, trust_threshold=problem.trust_threshold,
                   memory_budget=problem.memory_budget)
    report = ResidualReport(residual=np.array(fit.residual), trusted=np.array(fit.trusted),
                            threshold=float(fit.trust_threshold), pairs=fit.residual_pairs,
                            n_pairs=_count_pairs(fit.split, fit.residual_pairs), split=fit.split,
                            warnings=tuple(nyquist_warnings(fit.eigenvalue, fit.dt)))
    per_run = run_amplitudes(fit, data, run_lengths=lengths)
    model = modal_model(fit.modes, fit.eigenvalue, per_run, lengths)
    details = {"terms": int(fit.n_terms), "names": list(fit.description.names), "way_back": fit.way_back,
               "state_projection_error": float(fit.state_projection_error), "truncation": int(fit.rank)}
    return FitResult("edmd", fit.eigenvalue, fit.amplitude, fit.dt, fit.operator, fit.modes, problem.space, data,
                     model, lengths, per_run, report, eigenfunction=np.asarray(fit.eigenfunction), details=details,
                     warnings=tuple(fit.warnings), fit=fit)


def _optimized(problem: FitProblem) -> FitResult:
    data = np.asarray(problem.data)
    lengths = problem.lengths
    if lengths.size > 1:
        raise NotImplementedError(
            f"fit.method 'optimized' fits one run; this archive has {lengths.size} runs "
            "(select one run with archive.snapshots, or use method dmd or edmd)")
    rank = int(problem.rank) if isinstance(problem.rank, (int, np.integer)) else data.shape[0]
    times = (problem.dt * np.arange(data.shape[1]) if problem.times is None
             else np.asarray(problem.times, dtype=np.float64))
    fit = fit_optimized_dmd(data, times, min(rank, data.shape[0]))
    eigenvalue = fit.eigenvalue
    report = optimized_residuals(fit, data, problem.trust_threshold)
    model = fit.modes @ (fit.amplitude[:, None] * np.exp(np.outer(fit.rate, times - times[0])))
    warnings = () if fit.converged else (f"optimized DMD did not converge: {fit.message}",)
    return FitResult("optimized", eigenvalue, fit.amplitude, fit.dt, np.diag(eigenvalue), fit.modes,
                     problem.space, data, model, lengths, fit.amplitude[None, :], report,
                     details={"relative_error": float(fit.relative_error), "converged": bool(fit.converged)},
                     details_key="optimized", warnings=warnings, fit=fit)


@dataclass(frozen=True)
class FitMethod:
    """A fit method: what it is and needs (``info``, :mod:`snaplift.fit_methods`) and its fit."""

    info: FitMethodInfo
    run: Callable[[FitProblem], FitResult]

    @property
    def name(self) -> str:
        return self.info.name

    @property
    def summary(self) -> str:
        return self.info.summary


_RUNS: dict[str, Callable[[FitProblem], FitResult]] = {"dmd": _dmd, "edmd": _edmd, "optimized": _optimized}

#: every fit method by name, in the order of :data:`snaplift.fit_methods.FIT_METHOD_NAMES`
FIT_METHODS: Mapping[str, FitMethod] = {name: FitMethod(get_fit_method(name), _RUNS[name])
                                        for name in FIT_METHOD_NAMES}


def run_fit(method: str, problem: FitProblem) -> FitResult:
    """Fit ``problem`` with the method called ``method`` (a one-line ConfigError if there is none)."""
    return FIT_METHODS[get_fit_method(method).name].run(problem)
