"""Optimal amplitudes (Jovanovic, Schmid & Nichols 2014)."""

from __future__ import annotations

import numpy as np
import pytest

from snaplift.errors import FitError
from snaplift.fitting import fit_dmd, optimal_amplitudes, reconstruction_error


def _normalised(modes: np.ndarray) -> np.ndarray:
    """Unit norm, largest-magnitude entry real positive (written out independently)."""
    out = modes / np.linalg.norm(modes, axis=0)
    pivot = out[np.argmax(np.abs(out), axis=0), np.arange(out.shape[1])]
    return out * (np.abs(pivot) / pivot)


def _modal_data(seed: int, n_state: int, n_snapshots: int):
    rng = np.random.default_rng(seed)
    eigenvalue = np.array(
        [0.98 * np.exp(0.2j), 0.9 * np.exp(-0.9j), 0.85, 0.95 * np.exp(2.5j), -0.6]
    )
    modes = _normalised(rng.standard_normal((n_state, 5)) + 1j * rng.standard_normal((n_state, 5)))
    amplitude = rng.standard_normal(5) + 1j * rng.standard_normal(5)
    powers = eigenvalue[:, None] ** np.arange(n_snapshots)[None, :]
    return modes @ (amplitude[:, None] * powers), modes, eigenvalue, amplitude


def test_fit_recovers_generating_amplitudes():
    data, modes, eigenvalue, amplitude = _modal_data(seed=0, n_state=8, n_snapshots=60)
    fit = fit_dmd(data, 0.1)
    assert fit.rank == 5
    order = [int(np.argmin(np.abs(fit.eigenvalue - value))) for value in eigenvalue]
    np.testing.assert_allclose(fit.eigenvalue[order], eigenvalue, atol=1e-10)  # Tu et al. 2014
    np.testing.assert_allclose(fit.modes[:, order], modes, atol=1e-10)
    # Jovanovic, Schmid & Nichols 2014: data = Phi diag(b) V exactly, so the optimum is b.
    np.testing.assert_allclose(fit.amplitude[order], amplitude, atol=1e-10)
    assert reconstruction_error(fit, data).max() < 1e-10


def test_normal_equations_match_a_direct_least_squares():
    data, modes, eigenvalue, _ = _modal_data(seed=1, n_state=6, n_snapshots=23)
    noisy = data + 0.05 * np.random.default_rng(2).standard_normal(data.shape)
    got = optimal_amplitudes(modes, eigenvalue, noisy, block_size=7)  # several blocks
    # reference: numpy.linalg.lstsq on vec(Phi diag(b) V) = sum_k b_k kron(v_k, phi_k)
    powers = eigenvalue[:, None] ** np.arange(noisy.shape[1])[None, :]
    design = np.stack([np.kron(powers[k], modes[:, k]) for k in range(5)], axis=1)
    expected, *_ = np.linalg.lstsq(design, noisy.T.reshape(-1), rcond=None)
    np.testing.assert_allclose(got, expected, rtol=1e-9, atol=1e-12)


def test_growing_mode_does_not_overflow():
    # A mode growing by 1.5 per step reaches 1.5**3000 ~ 1e528 (overflow) at the end;
    # the row-scaled Vandermonde keeps everything finite (common practice).
    n_snapshots = 3000
    steps = np.arange(n_snapshots)
    data = np.vstack([0.99**steps, np.cos(0.3 * steps) * 0.97**steps])
    modes = np.eye(2, dtype=complex)
    got = optimal_amplitudes(modes, np.array([0.99, 1.5]), data)
    assert np.all(np.isfinite(got))
    assert got[0] == pytest.approx(1.0, abs=1e-12)  # first row is exactly 0.99**j (by construction)
    assert got[1] == 0.0  # underflows: its weight is below 1e-528 (by construction)


def test_amplitude_errors():
    with pytest.raises(FitError, match="snapshots must have 2 rows"):
        optimal_amplitudes(np.eye(2), [0.5, 0.5], np.ones((3, 4)))
    with pytest.raises(FitError, match="eigenvalue must have length 2"):
        optimal_amplitudes(np.eye(2), [0.5], np.ones((2, 4)))
    with pytest.raises(FitError, match="block_size"):
        optimal_amplitudes(np.eye(2), [0.5, 0.4], np.ones((2, 4)), block_size=0)
