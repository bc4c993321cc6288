"""Fitting: DMD / EDMD / optimized DMD, debiasing, residuals, spectra, rank, reconstruction.

Every fit method of the registry (:data:`FIT_METHODS`, names and needs in
:mod:`snaplift.fit_methods`) takes a :class:`FitProblem` and returns a :class:`FitResult`.

Everything here works on small in-memory numpy arrays (the coefficients ``C = U^H X``,
r x m, or a small raw state); mapping modes back to physical fields with the basis ``U``
is the caller's job.
Orientation convention: snapshots are columns and operators act from the left,
``x_{j+1} ~= A x_j`` (see :mod:`snaplift.fitting.dmd`).
"""

from __future__ import annotations

from snaplift.fitting.amplitudes import optimal_amplitudes
from snaplift.fitting.assessment import (
    ResidualReport,
    dmd_residuals,
    fit_dmd_with_residuals,
    mode_ranking,
    optimized_residuals,
)
from snaplift.fitting.debias import (
    DEBIAS_METHODS,
    forward_backward_operator,
    total_least_squares_operator,
)
from snaplift.fitting.dmd import DMDFit, fit_dmd, normalize_modes, run_pair_mask
from snaplift.fitting.edmd import EDMDFit, eigenfunctions, fit_edmd, forecast_edmd
from snaplift.fitting.methods import (
    FIT_METHODS,
    FitMethod,
    FitProblem,
    FitResult,
    modal_model,
    run_fit,
)
from snaplift.fitting.optimized import OptimizedDMDFit, fit_optimized_dmd, optimized_reconstruct
from snaplift.fitting.rank import (
    choose_rank,
    hard_threshold,
    threshold_coefficient_known_noise,
    threshold_coefficient_unknown_noise,
)
from snaplift.fitting.reconstruction import (
    forecast,
    forecast_error,
    initial_amplitudes,
    reconstruct,
    reconstruction_error,
)
from snaplift.fitting.residuals import (
    HOLDOUT,
    TRUST_THRESHOLD,
    PairSplit,
    eigenpair_residuals,
    split_pairs,
    trusted_flags,
)
from snaplift.fitting.runs import run_amplitude_table, run_amplitudes, run_lengths_from_mask
from snaplift.fitting.spectrum import (
    conjugate_pairs,
    continuous_rate,
    frequency,
    growth,
    near_nyquist,
    period,
    spectrum_order,
    spectrum_table,
)

__all__ = [
    "DMDFit",
    "fit_dmd",
    "normalize_modes",
    "run_pair_mask",
    "optimal_amplitudes",
    "choose_rank",
    "hard_threshold",
    "threshold_coefficient_known_noise",
    "threshold_coefficient_unknown_noise",
    "reconstruct",
    "forecast",
    "reconstruction_error",
    "forecast_error",
    "initial_amplitudes",
    "continuous_rate",
    "frequency",
    "growth",
    "period",
    "near_nyquist",
    "conjugate_pairs",
    "spectrum_order",
    "spectrum_table",
    "DEBIAS_METHODS",
    "forward_backward_operator",
    "total_least_squares_operator",
    "EDMDFit",
    "fit_edmd",
    "forecast_edmd",
    "eigenfunctions",
    "OptimizedDMDFit",
    "fit_optimized_dmd",
    "optimized_reconstruct",
    "HOLDOUT",
    "TRUST_THRESHOLD",
    "PairSplit",
    "split_pairs",
    "eigenpair_residuals",
    "trusted_flags",
    "ResidualReport",
    "dmd_residuals",
    "fit_dmd_with_residuals",
    "mode_ranking",
    "optimized_residuals",
    "FIT_METHODS",
    "FitMethod",
    "FitProblem",
    "FitResult",
    "modal_model",
    "run_fit",
    "run_amplitudes",
    "run_amplitude_table",
    "run_lengths_from_mask",
]
