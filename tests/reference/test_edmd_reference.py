"""EDMD against published worked examples: a linear map, a slow manifold, a pendulum."""

from __future__ import annotations

import numpy as np
import scipy.integrate
import scipy.optimize
import scipy.special

from snaplift.fitting import fit_dmd, fit_edmd, mode_ranking
from snaplift.lifting import Dictionary, monomials


def _match(estimate: np.ndarray, truth: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Index arrays pairing each true value with its closest estimate (one-to-one)."""
    distance = np.abs(np.asarray(estimate)[:, None] - np.asarray(truth)[None, :])
    rows, cols = scipy.optimize.linear_sum_assignment(distance)
    return rows[np.argsort(cols)], np.sort(cols)


def test_linear_map_monomials_give_products_of_eigenvalues():
    # Williams, Kevrekidis & Rowley 2015 (J. Nonlinear Sci. 25, sec. 4.1): for x' = J x the
    # Koopman eigenfunctions in a degree-4 polynomial space are products of the linear ones,
    # with eigenvalues 0.9^i 0.8^j, i + j <= 4 (15 of them for 2 variables).
    jacobian = np.array([[0.9, -0.1], [0.0, 0.8]])
    x = np.random.default_rng(0).uniform(-1.0, 1.0, (2, 400))
    fit = fit_edmd(x, monomials(4), 1.0, next_states=jacobian @ x)
    truth = np.array([0.9**i * 0.8**j for i in range(5) for j in range(5 - i)])
    assert fit.eigenvalue.size == truth.size == 15
    rows, cols = _match(fit.eigenvalue, truth)
    assert np.abs(fit.eigenvalue[rows] - truth[cols]).max() < 1e-10
    assert fit.way_back == "identity" and fit.state_projection_error < 1e-12


def _slow_manifold_pairs(dt: float, n: int, seed: int, noise: float = 0.0):
    """Exact flow map of x1' = mu x1, x2' = lam (x2 - x1^2) on uniform random states."""
    mu, lam = -0.05, -1.0
    b = lam / (lam - 2 * mu)
    rng = np.random.default_rng(seed)
    x = rng.uniform(-1.0, 1.0, (2, n))
    # Solution by variation of constants (Brunton, Brunton, Proctor & Kutz 2016, eq. 8).
    y = np.vstack(
        [
            x[0] * np.exp(mu * dt),
            b * x[0] ** 2 * np.exp(2 * mu * dt) + (x[1] - b * x[0] ** 2) * np.exp(lam * dt),
        ]
    )
    if noise:
        x = x + noise * rng.standard_normal(x.shape)
        y = y + noise * rng.standard_normal(y.shape)
    return x, y, mu, lam, b


def test_slow_manifold_eigenvalues_eigenfunction_and_residuals():
    # Brunton, Brunton, Proctor & Kutz 2016 (PLoS ONE 11(2) e0150171, sec. 2): the span of
    # {1, x1, x2, x1^2} is Koopman-invariant, with eigenvalues 0, mu, lambda, 2 mu and the
    # eigenfunction x2 - b x1^2, b = lambda / (lambda - 2 mu).
    dt = 0.1
    x, y, mu, lam, b = _slow_manifold_pairs(dt, 2000, seed=1)
    dictionary = Dictionary([monomials(2)], variables=["x1", "x2"])
    fit = fit_edmd(x, dictionary, dt, next_states=y)
    assert fit.description.names == ("1", "x1", "x2", "x1^2", "x1*x2", "x2^2")
    truth = np.array([0.0, mu, lam, 2 * mu])
    rows, cols = _match(fit.rate, truth)
    assert np.abs(fit.rate[rows] - truth[cols]).max() < 1e-6
    slow = rows[np.flatnonzero(truth[cols] == lam)[0]]
    g = fit.eigenfunction_coefficient[:, slow]
    expected = np.array([0.0, 0.0, 1.0, -b, 0.0, 0.0])
    g = g / g[2]
    assert np.abs(g - expected).max() < 1e-8
    # Colbrook & Townsend 2024 (CPAM; arXiv 2111.14889): residuals vanish on an invariant
    # subspace; the two eigenvalues from x1 x2 and x2^2 (not closed) are not eigenvalues.
    spurious = np.setdiff1d(np.arange(fit.eigenvalue.size), rows)
    assert spurious.size == 2
    assert fit.residual[rows].max() < 1e-8
    assert fit.residual[spurious].min() > 1e-2
    assert fit.trusted[rows].all() and not fit.trusted[spurious].any()


def _pendulum(theta0_degrees: float, dt: float, n: int) -> tuple[np.ndarray, float]:
    """Trajectory of theta'' = -sin(theta) (g / L = 1) from rest, and its exact period."""
    theta0 = np.deg2rad(theta0_degrees)
    # Abramowitz & Stegun 17.3 / DLMF 22.19: T = 4 sqrt(L / g) K(k), k = sin(theta0 / 2);
    # scipy.special.ellipk takes the parameter m = k^2.
    period = 4.0 * scipy.special.ellipk(np.sin(theta0 / 2) ** 2)
    t = dt * np.arange(n)
    solution = scipy.integrate.solve_ivp(
        lambda _, s: [s[1], -np.sin(s[0])],
        (0.0, t[-1]),
        [theta0, 0.0],
        t_eval=t,
        method="DOP853",
        rtol=1e-12,
        atol=1e-12,
    )
    return solution.y, float(period)


def test_pendulum_period_dmd_too_short_edmd_within_half_percent():
    states, period = _pendulum(160.0, dt=0.1, n=1200)
    dmd = fit_dmd(states, 0.1)
    dmd_period = dmd.period[mode_ranking(dmd, oscillating=True)[0]]
    # Fact of the trade: a linear model of a strongly nonlinear swing runs too fast.
    assert (period - dmd_period) / period >= 0.02
    errors = {}
    for degree, rank in ((3, None), (10, 22)):
        fit = fit_edmd(states, monomials(degree), 0.1, rank=rank)
        if degree == 10:
            assert fit.n_terms == 66 and fit.rank == 22
        fundamental = mode_ranking(fit, oscillating=True)[0]  # the tool's own choice
        assert fit.trusted[fundamental]
        errors[degree] = abs(fit.period[fundamental] - period) / period
    # Abramowitz & Stegun 17.3 (exact period above); tolerance from issue 4.
    assert errors[3] < 5e-3 and errors[10] < 5e-3, errors
