"""Residuals of eigenpairs (Colbrook & Townsend 2024, CPAM; arXiv 2111.14889)."""

from __future__ import annotations

import numpy as np

from snaplift.fitting import fit_edmd
from snaplift.lifting import Dictionary, expressions, monomials

MU, LAM = -0.05, -1.0
B = LAM / (LAM - 2 * MU)


def _flow(x: np.ndarray, dt: float) -> np.ndarray:
    # Exact solution of x1' = mu x1, x2' = lam (x2 - x1^2) (Brunton et al. 2016, PLoS ONE).
    return np.vstack(
        [
            x[0] * np.exp(MU * dt),
            B * x[0] ** 2 * np.exp(2 * MU * dt) + (x[1] - B * x[0] ** 2) * np.exp(LAM * dt),
        ]
    )


def test_invariant_dictionaries_have_vanishing_residuals():
    rng = np.random.default_rng(2)
    x = rng.uniform(-1.0, 1.0, (2, 1000))
    # {1, x1, x2, x1^2} is invariant (Brunton et al. 2016); residuals are then zero up to
    # rounding for every eigenpair (Colbrook & Townsend 2024, sec. 4).
    closed = Dictionary([monomials(1), expressions({"x1^2": "x1**2"})], variables=["x1", "x2"])
    fit = fit_edmd(x, closed, 0.1, next_states=_flow(x, 0.1))
    assert fit.eigenvalue.size == 4
    assert fit.residual.max() < 1e-8 and fit.trusted.all()
    # Polynomials of degree <= 4 are invariant under a linear map (Williams et al. 2015).
    jacobian = np.array([[0.9, -0.1], [0.0, 0.8]])
    linear = fit_edmd(x, monomials(4), 1.0, next_states=jacobian @ x)
    assert linear.residual.max() < 1e-8


def test_spurious_eigenvalues_have_much_larger_residuals_on_noisy_data():
    dt, noise = 0.5, 1e-3
    rng = np.random.default_rng(3)
    x = rng.uniform(-1.0, 1.0, (2, 2000))
    y = _flow(x, dt)
    x = x + noise * rng.standard_normal(x.shape)
    y = y + noise * rng.standard_normal(y.shape)
    fit = fit_edmd(x, monomials(2), dt, next_states=y)
    truth = np.array([0.0, MU, 2 * MU, LAM])
    true_index = [int(np.argmin(np.abs(fit.rate - value))) for value in truth]
    assert len(set(true_index)) == 4
    spurious = np.setdiff1d(np.arange(fit.eigenvalue.size), true_index)
    # Colbrook & Townsend 2024 (sec. 4): spurious eigenvalues of EDMD have residuals that do
    # not shrink with the noise, unlike those of true eigenpairs.
    assert fit.residual[spurious].min() >= 10 * fit.residual[true_index].max()
    assert fit.trusted[true_index].all() and not fit.trusted[spurious].any()
