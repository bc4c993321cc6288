"""Reconstruction, forecast and their per-snapshot errors."""

from __future__ import annotations

import numpy as np
import pytest

from snaplift.errors import FitError
from snaplift.fitting import (
    fit_dmd,
    forecast,
    forecast_error,
    initial_amplitudes,
    reconstruct,
    reconstruction_error,
    run_pair_mask,
)

DT = 0.1


def test_reconstruct_and_forecast_a_linear_system(real_system, trajectory):
    operator, _ = real_system(seed=20)
    states = trajectory(operator, np.random.default_rng(21).standard_normal(6), 50)
    fit = fit_dmd(states[:, :30], DT)
    # Tu et al. 2014: data from x_{j+1} = A x_j are reproduced exactly by the modal sum.
    np.testing.assert_allclose(reconstruct(fit, n_steps=30).real, states[:, :30], atol=1e-10)
    np.testing.assert_allclose(
        reconstruct(fit, states[:, 0], n_steps=30).real, states[:, :30], atol=1e-10
    )
    ahead = forecast(fit, states[:, 29], 20)
    assert ahead.shape == (6, 20)
    np.testing.assert_allclose(ahead.real, states[:, 30:], atol=1e-9)  # beyond the training data
    assert np.abs(ahead.imag).max() < 1e-10  # real data: conjugate pairs cancel
    assert reconstruction_error(fit, states).max() < 1e-10
    assert forecast_error(fit, states).max() < 1e-10


def test_affine_reconstruction_adds_the_fixed_point(real_system, trajectory):
    operator, _ = real_system(seed=22)
    rng = np.random.default_rng(23)
    states = (
        trajectory(operator, rng.standard_normal(6), 40) + 3.0 * rng.standard_normal(6)[:, None]
    )
    centred = states - states.mean(axis=1, keepdims=True)
    fit = fit_dmd(centred, DT, affine=True)
    # Hirsh et al. 2020: the affine model reproduces centred linear data exactly.
    np.testing.assert_allclose(reconstruct(fit, n_steps=40).real, centred, atol=1e-10)
    assert reconstruction_error(fit, centred).max() < 1e-10
    assert forecast_error(fit, centred).max() < 1e-10
    plain = fit_dmd(centred, DT)
    assert reconstruction_error(plain, centred).max() > 1e-3  # Chen, Tu & Rowley 2012 bias


def test_times_between_samples_follow_the_continuous_rate():
    # Heat equation u_t = nu u_xx, Dirichlet ends (Haberman, ch. 2): exact at any time t.
    nu, dt, n_points = 0.02, 0.4, 40
    x = np.linspace(0.0, 1.0, n_points + 2)[1:-1]
    shapes = np.sin(np.outer(x, [1, 2]) * np.pi)
    decay = nu * (np.array([1, 2]) * np.pi) ** 2

    def field(t):
        return shapes @ (
            np.array([1.0, 0.5])[:, None] * np.exp(-decay[:, None] * np.asarray(t)[None, :])
        )

    samples = field(dt * np.arange(20))
    fit = fit_dmd(samples, dt)
    halfway = np.array([0.0, 0.5 * dt, 3.3 * dt])
    np.testing.assert_allclose(reconstruct(fit, times=halfway).real, field(halfway), atol=1e-10)


def test_errors_per_run(real_system, trajectory):
    operator, _ = real_system(seed=24)
    rng = np.random.default_rng(25)
    runs = [trajectory(operator, rng.standard_normal(6), n) for n in (20, 15)]
    joined = np.hstack(runs)
    mask = run_pair_mask([20, 15])
    fit = fit_dmd(joined, DT, pair_mask=mask)
    # Each run gets its own amplitudes, so both are reproduced (Jovanovic et al. 2014).
    assert reconstruction_error(fit, joined, pair_mask=mask).max() < 1e-10
    assert forecast_error(fit, joined, pair_mask=mask).max() < 1e-10
    # Treated as one run, the second run cannot follow from the first (can fail).
    assert reconstruction_error(fit, joined)[20:].min() > 1e-3


def test_error_of_truncated_fit_is_positive(real_system, trajectory):
    operator, _ = real_system(seed=26)
    states = trajectory(operator, np.random.default_rng(27).standard_normal(6), 30)
    fit = fit_dmd(states, DT, rank=2)
    error = reconstruction_error(fit, states)
    assert error.shape == (30,)
    assert np.all(np.isfinite(error)) and error.max() > 1e-3


def test_zero_snapshot_convention():
    data = np.array([[1.0, 0.5, 0.25, 0.0]])
    fit = fit_dmd(data[:, :3], 1.0)
    error = reconstruction_error(fit, data)
    assert error[3] == np.inf  # 0.125 predicted where 0 is found: relative error undefined
    assert reconstruction_error(fit, np.zeros((1, 2)))[0] == 0.0  # nothing to miss
    np.testing.assert_allclose(initial_amplitudes(fit, [2.0]), [2.0])


def test_reconstruction_errors_are_clear(real_system, trajectory):
    operator, _ = real_system()
    fit = fit_dmd(trajectory(operator, np.ones(6), 20), DT)
    with pytest.raises(FitError, match="exactly one of n_steps"):
        reconstruct(fit)
    with pytest.raises(FitError, match="exactly one of n_steps"):
        reconstruct(fit, n_steps=3, times=[0.0])
    with pytest.raises(FitError, match="n_steps must be a positive integer"):
        reconstruct(fit, n_steps=0)
    with pytest.raises(FitError, match=r"times\[1\] is -1"):
        reconstruct(fit, times=[0.0, -1.0])
    with pytest.raises(FitError, match="first must have length 6"):
        reconstruct(fit, np.ones(5), n_steps=2)
    with pytest.raises(FitError, match="coefficients must have 6 rows"):
        reconstruction_error(fit, np.ones((5, 3)))
    with pytest.raises(FitError, match="n_steps must be a positive integer"):
        forecast(fit, np.ones(6), 0)
