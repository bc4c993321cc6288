"""Optimized DMD: agreement with exact DMD on uniform steps, options and errors."""

from __future__ import annotations

import numpy as np
import pytest

from snaplift.errors import FitError
from snaplift.fitting import fit_dmd, fit_optimized_dmd, optimized_reconstruct, spectrum_table


def test_uniform_steps_agree_with_exact_dmd(real_system, trajectory, match_error):
    operator, truth = real_system(seed=31)
    states = trajectory(operator, np.random.default_rng(32).standard_normal(operator.shape[0]), 50)
    dt = 0.2
    fit = fit_optimized_dmd(states, dt * np.arange(50), rank=6)
    # Tu et al. 2014 / Askham & Kutz 2018: on exact linear data both give the eigenvalues.
    assert match_error(np.exp(fit.rate * dt), truth) < 1e-9
    assert match_error(fit.eigenvalue, fit_dmd(states, dt).eigenvalue) < 1e-9
    assert fit.converged and fit.relative_error < 1e-10
    np.testing.assert_allclose(
        optimized_reconstruct(fit, dt * np.arange(50)).real, states, atol=1e-8
    )
    table = spectrum_table(fit)  # works with the spectrum helpers through eigenvalue and dt
    np.testing.assert_allclose(np.sort(table["growth"]), np.sort(fit.growth), rtol=1e-10)


def test_projection_onto_pod_modes_for_tall_data():
    t = np.sort(np.random.default_rng(0).uniform(0, 6, 80))
    rates = np.array([-0.2 + 3j, -0.2 - 3j])
    shape = np.random.default_rng(1).standard_normal((40, 1)) + 1j * np.random.default_rng(
        2
    ).standard_normal((40, 1))
    snapshots = (np.hstack([shape, shape.conj()]) @ np.exp(rates[:, None] * t[None, :])).real
    fit = fit_optimized_dmd(snapshots, t, rank=2)
    assert fit.modes.shape == (40, 2)
    # Askham & Kutz 2018, sec. 3: projecting rank-2 data on 2 POD modes loses nothing.
    np.testing.assert_allclose(np.sort_complex(fit.rate), np.sort_complex(rates), rtol=1e-9)


def test_initial_rate_option_and_errors():
    t = np.linspace(0, 5, 40)
    x = np.vstack([np.exp(-0.5 * t), np.exp(-2.0 * t)])
    fit = fit_optimized_dmd(x, t, rank=2, initial_rate=[-0.4, -2.5])
    np.testing.assert_allclose(np.sort(fit.rate.real), [-2.0, -0.5], rtol=1e-9)
    with pytest.raises(FitError, match="increase strictly"):
        fit_optimized_dmd(x, t[::-1], rank=2)
    with pytest.raises(FitError, match="rank 3 is not available"):
        fit_optimized_dmd(x, t, rank=3)
    with pytest.raises(FitError, match="initial_rate"):
        fit_optimized_dmd(x, t, rank=2, initial_rate=[1.0])
    with pytest.raises(FitError, match="length 40"):
        fit_optimized_dmd(x, t[:10], rank=2)
