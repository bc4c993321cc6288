"""DMD with held-out residuals, and the trust-aware ranking of modes."""

from __future__ import annotations

from types import SimpleNamespace

import numpy as np
import pytest

from snaplift.errors import FitError
from snaplift.fitting import (
    dmd_residuals,
    fit_dmd,
    fit_dmd_with_residuals,
    mode_ranking,
    run_pair_mask,
)
from snaplift.fitting.residuals import pair_symmetric


def test_exact_linear_data_have_zero_residuals(real_system, trajectory):
    operator, _ = real_system(seed=21)
    states = trajectory(operator, np.random.default_rng(22).standard_normal(operator.shape[0]), 80)
    fit, report = fit_dmd_with_residuals(states, 0.1)
    # Colbrook & Townsend 2024: exact eigenpairs have residual 0 on any pairs.
    assert report.pairs == "held-out" and report.n_pairs == 16
    assert report.residual.max() < 1e-9 and report.trusted.all()
    # Amplitudes refitted to the whole run equal those of a fit on all pairs.
    whole = fit_dmd(states, 0.1)
    np.testing.assert_allclose(np.abs(fit.amplitude), np.abs(whole.amplitude), rtol=1e-8)
    assert fit.amplitude_snapshots == 80


def test_affine_and_runs(real_system, trajectory):
    operator, _ = real_system(seed=23)
    rng = np.random.default_rng(24)
    offset = rng.standard_normal(operator.shape[0])
    runs = []
    for _ in range(2):
        run = [rng.standard_normal(operator.shape[0])]
        for _ in range(39):
            run.append(operator @ run[-1] + offset)
        runs.append(np.column_stack(run))
    data = np.hstack(runs)
    fit, report = fit_dmd_with_residuals(data, 0.1, affine=True, pair_mask=run_pair_mask([40, 40]))
    assert report.split.scheme == "blocks" and report.residual.max() < 1e-8
    assert fit.amplitude_snapshots == 40


def test_noise_makes_residuals_large_and_zero_holdout_uses_training_pairs():
    rng = np.random.default_rng(25)
    data = rng.standard_normal((3, 60))  # no dynamics at all
    fit, report = fit_dmd_with_residuals(data, 1.0, holdout=0.0)
    assert report.pairs == "training" and report.n_pairs == 59
    assert report.residual.min() > 0.1 and not report.trusted.any()
    # The report pairs conjugates; dmd_residuals alone gives the raw per-mode values.
    raw = dmd_residuals(fit, data, report.split.fit_mask)
    np.testing.assert_allclose(report.residual, pair_symmetric(raw, fit.eigenvalue), rtol=1e-12)
    with pytest.raises(FitError, match="rows"):
        dmd_residuals(fit, data[:2])


def test_ranking_puts_trusted_modes_first():
    fit = SimpleNamespace(
        eigenvalue=np.array([0.99, 0.9 * np.exp(0.3j), 0.9 * np.exp(-0.3j), 0.5]),
        amplitude=np.array([5.0, 1.0, 1.0, 2.0]),
        dt=1.0,
        trusted=np.array([False, True, True, True]),
    )
    np.testing.assert_array_equal(mode_ranking(fit), [3, 1, 2, 0])
    np.testing.assert_array_equal(mode_ranking(fit, oscillating=True), [1])
    np.testing.assert_array_equal(mode_ranking(fit, trusted=np.ones(4, bool)), [0, 3, 1, 2])
    with pytest.raises(FitError, match="one flag per mode"):
        mode_ranking(fit, trusted=[True])
