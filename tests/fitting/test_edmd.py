"""EDMD on dictionaries: the way back, eigenfunctions, forecasts, runs, options."""

from __future__ import annotations

import numpy as np
import pytest

from snaplift.errors import ConfigError, FitError
from snaplift.fitting import (
    eigenfunctions,
    fit_dmd,
    fit_edmd,
    forecast_edmd,
    normalize_modes,
    reconstruct,
    run_pair_mask,
)
from snaplift.lifting import Dictionary, identity, monomials, rbf

DT = 0.1
JACOBIAN = np.array([[0.9, -0.1], [0.0, 0.8]])  # Williams et al. 2015, sec. 4.1


def _slow_map(x: np.ndarray, dt: float = 0.25, mu: float = -0.05, lam: float = -1.0) -> np.ndarray:
    # Exact flow of x1' = mu x1, x2' = lam (x2 - x1^2) (Brunton et al. 2016, PLoS ONE).
    b = lam / (lam - 2 * mu)
    return np.vstack(
        [
            x[0] * np.exp(mu * dt),
            b * x[0] ** 2 * np.exp(2 * mu * dt) + (x[1] - b * x[0] ** 2) * np.exp(lam * dt),
        ]
    )


def test_identity_dictionary_is_exact_dmd(real_system, trajectory, match_error):
    operator, truth = real_system(seed=11)
    states = trajectory(operator, np.random.default_rng(12).standard_normal(operator.shape[0]), 40)
    edmd = fit_edmd(states, identity(), DT, holdout=0.0)
    dmd = fit_dmd(states, DT)
    # Williams, Kevrekidis & Rowley 2015, sec. 3.3: with the state as dictionary EDMD is DMD.
    assert match_error(edmd.eigenvalue, truth) < 1e-10
    for i, value in enumerate(dmd.eigenvalue):
        j = int(np.argmin(np.abs(edmd.eigenvalue - value)))
        assert abs(np.vdot(edmd.modes[:, j], dmd.modes[:, i])) == pytest.approx(1.0, abs=1e-9)
    assert edmd.residual_pairs == "training" and edmd.residual.max() < 1e-8


def test_modes_amplitudes_and_eigenfunctions_reproduce_the_trajectory(real_system, trajectory):
    operator, _ = real_system(seed=13)
    states = trajectory(operator, np.random.default_rng(14).standard_normal(operator.shape[0]), 60)
    fit = fit_edmd(states, monomials(2), DT, rank=None)
    steps = np.arange(states.shape[1])
    model = fit.modes @ (fit.amplitude[:, None] * fit.eigenvalue[:, None] ** steps[None, :])
    # Williams et al. 2015, sec. 3.2: with the state in the dictionary and linear dynamics
    # the Koopman mode decomposition reproduces the trajectory exactly.
    np.testing.assert_allclose(model.real, states, atol=1e-8)
    np.testing.assert_allclose(reconstruct(fit, n_steps=60).real, states, atol=1e-8)
    # x = sum_i modes_i phi_i(x) on every snapshot (the Koopman mode expansion).
    np.testing.assert_allclose((fit.modes @ fit.eigenfunction).real, states, atol=1e-8)
    np.testing.assert_allclose(
        eigenfunctions(fit, states[:, :5]), fit.eigenfunction[:, :5], atol=1e-12
    )


def test_forecast_from_any_state_on_an_invariant_dictionary():
    x = np.random.default_rng(0).uniform(-1, 1, (2, 300))
    fit = fit_edmd(x, monomials(2), 1.0, next_states=JACOBIAN @ x)
    start = np.array([0.7, -0.4])
    expected = np.column_stack([np.linalg.matrix_power(JACOBIAN, n) @ start for n in range(1, 11)])
    np.testing.assert_allclose(forecast_edmd(fit, start, 10), expected, atol=1e-12)
    assert fit.split.scheme == "samples" and fit.residual_pairs == "held-out"
    np.testing.assert_allclose(fit.amplitude, fit.eigenfunction[:, 0])


def test_regression_way_back_reports_its_error():
    x = np.random.default_rng(1).uniform(-1, 1, (2, 400))
    fit = fit_edmd(
        x, rbf("gaussian", centres=12, seed=2), 1.0, next_states=JACOBIAN @ x, holdout=0.0
    )
    assert fit.way_back == "regression" and not fit.description.has_identity
    psi = fit.dictionary(x)
    miss = np.linalg.norm(x - fit.state_map @ psi) / np.linalg.norm(x)
    assert fit.state_projection_error == pytest.approx(miss, rel=1e-8)
    # Common practice: a dozen Gaussians reproduce a linear function on the square to a few %.
    assert 0 < fit.state_projection_error < 0.2


def test_many_short_trajectories():
    rng = np.random.default_rng(3)
    runs = []
    for _ in range(60):
        run = [rng.uniform(-1, 1, 2)]
        for _ in range(5):
            run.append(_slow_map(run[-1][:, None])[:, 0])
        runs.append(np.column_stack(run))
    mask = run_pair_mask([6] * 60)
    fit = fit_edmd(np.hstack(runs), monomials(2), 0.25, pair_mask=mask)
    assert fit.split.scheme == "runs"
    assert not np.any(np.isin(fit.split.holdout_pairs, np.flatnonzero(mask)))
    truth = np.array([0.0, -0.05, -0.1, -1.0])
    # Brunton et al. 2016: 0, mu, 2 mu, lambda are eigenvalues (invariant span of 1, x1, x2, x1^2).
    for value in truth:
        assert np.abs(fit.rate - value).min() < 1e-8
    assert fit.amplitude_snapshots == 6


def test_truncation_options_and_determinism():
    x = np.random.default_rng(4).uniform(-1, 1, (2, 500))
    y = _slow_map(x)
    full = fit_edmd(x, monomials(4), 0.25, next_states=y)
    kept = fit_edmd(x, monomials(4), 0.25, next_states=y, rank=8)
    energy = fit_edmd(x, monomials(4), 0.25, next_states=y, rank=0.99)
    assert full.rank == 15 and kept.rank == 8 and 1 <= energy.rank < 15
    again = fit_edmd(x, monomials(4), 0.25, next_states=y, rank=8)
    np.testing.assert_array_equal(kept.eigenvalue, again.eigenvalue)
    np.testing.assert_array_equal(kept.split.holdout_pairs, again.split.holdout_pairs)


def test_errors():
    x = np.random.default_rng(5).standard_normal((2, 50))
    with pytest.raises(ConfigError, match="memory budget"):
        fit_edmd(x, monomials(3), 1.0, memory_budget=1000)
    with pytest.raises(FitError, match="real state"):
        fit_edmd(x + 1j, monomials(1), 1.0)
    with pytest.raises(FitError, match="shape of states"):
        fit_edmd(x, monomials(1), 1.0, next_states=x[:, :10])
    with pytest.raises(FitError, match="pair_mask applies"):
        fit_edmd(x, monomials(1), 1.0, next_states=x, pair_mask=np.zeros(49, bool))
    with pytest.raises(FitError, match="one state"):
        forecast_edmd(fit_edmd(x, monomials(1), 1.0), [1.0], 3)
    with pytest.raises(FitError, match="names 2 variables"):
        fit_edmd(np.ones((3, 10)), Dictionary([monomials(1)], variables=["a", "b"]), 1.0)


def test_mode_normalisation():
    x = np.random.default_rng(6).uniform(-1, 1, (2, 200))
    fit = fit_edmd(x, monomials(2), 1.0, next_states=JACOBIAN @ x)
    nonzero = np.linalg.norm(fit.modes, axis=0) > 0
    np.testing.assert_allclose(
        fit.modes[:, nonzero], normalize_modes(fit.modes[:, nonzero]), atol=1e-14
    )
