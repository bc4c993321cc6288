"""Forward-backward and total-least-squares DMD operators."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.linalg

from snaplift.errors import FitError
from snaplift.fitting import fit_dmd, forward_backward_operator, total_least_squares_operator

DT = 0.1


@pytest.mark.parametrize("method", ["forward-backward", "total-least-squares"])
def test_noise_free_data_give_the_exact_eigenvalues(method, real_system, trajectory, match_error):
    operator, truth = real_system(seed=3)
    start = np.random.default_rng(4).standard_normal(operator.shape[0])
    fit = fit_dmd(trajectory(operator, start, 40), DT, debias=method)
    # Dawson et al. 2016 / Hemati et al. 2017: without noise both reduce to exact DMD
    # (Tu et al. 2014, Thm. 1), whose eigenvalues are those of A.
    assert match_error(fit.eigenvalue, truth) < 1e-9
    assert fit.mode_type == "projected" and np.isrealobj(fit.operator)
    residual = operator @ fit.modes - fit.modes * fit.eigenvalue[None, :]
    assert np.abs(residual).max() < 1e-8


@pytest.mark.parametrize("method", ["forward-backward", "total-least-squares"])
def test_affine_fit_with_debiasing(method, real_system, trajectory, match_error):
    operator, truth = real_system(seed=5)
    rng = np.random.default_rng(6)
    states = trajectory(operator, rng.standard_normal(operator.shape[0]), 40)
    centred = states + 3.0 * rng.standard_normal(operator.shape[0])[:, None]
    centred = centred - centred.mean(axis=1, keepdims=True)
    fit = fit_dmd(centred, DT, affine=True, debias=method)
    # Hirsh et al. 2020: the affine term keeps eigenvalues exact for centred data.
    assert match_error(fit.eigenvalue, truth) < 1e-8


def test_forward_backward_keeps_frequencies_above_half_nyquist():
    value = 0.97 * np.exp(2.6j)  # angle > pi / 2: the principal square root of A^2 fails
    a = np.array([[value.real, -value.imag], [value.imag, value.real]])
    x = np.random.default_rng(0).standard_normal((2, 30))
    ours = np.linalg.eigvals(forward_backward_operator(x, a @ x))
    assert np.abs(np.sort_complex(ours) - np.sort_complex([value, np.conj(value)])).max() < 1e-12
    # scipy's principal root (the reference) lands on the other branch, -lambda.
    principal = np.linalg.eigvals(scipy.linalg.sqrtm(a @ a))
    assert (
        np.abs(np.sort_complex(principal) - np.sort_complex([-value, -np.conj(value)])).max() < 1e-8
    )


def test_total_least_squares_is_symmetric_in_the_noise():
    # Hemati et al. 2017: TLS treats X and Y alike, so swapping them inverts the operator.
    rng = np.random.default_rng(1)
    a = np.array([[0.9, -0.3], [0.3, 0.9]])
    x = rng.standard_normal((2, 200))
    y = a @ x + 0.05 * rng.standard_normal((2, 200))
    x = x + 0.05 * rng.standard_normal((2, 200))
    forward = total_least_squares_operator(x, y)
    backward = total_least_squares_operator(y, x)
    np.testing.assert_allclose(forward @ backward, np.eye(2), atol=1e-10)


def test_bad_debias_option_and_rank_deficient_data():
    data = np.random.default_rng(2).standard_normal((3, 20))
    with pytest.raises(FitError, match="debias must be one of"):
        fit_dmd(data, DT, debias="tls")
    x = np.vstack([np.ones(5), np.arange(5.0)])
    with pytest.raises(FitError, match="rank"):
        forward_backward_operator(x, np.zeros((2, 5)))
