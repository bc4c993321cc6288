"""Optimized DMD on unevenly sampled, noise-free damped oscillations (Askham & Kutz 2018)."""

from __future__ import annotations

import numpy as np

from snaplift.fitting import fit_optimized_dmd, normalize_modes, optimized_reconstruct


def test_uneven_samples_give_exact_rates_and_amplitudes():
    rng = np.random.default_rng(0)
    rates = np.array([-0.1 + 2.0j, -0.1 - 2.0j, -0.3 + 5.3j, -0.3 - 5.3j])  # invented
    shapes = rng.standard_normal((6, 2)) + 1j * rng.standard_normal((6, 2))
    modes = np.column_stack([shapes[:, 0], shapes[:, 0].conj(), shapes[:, 1], shapes[:, 1].conj()])
    amplitude = np.array([1.0 + 0.5j, 1.0 - 0.5j, 0.3 - 0.2j, 0.3 + 0.2j])
    times = np.sort(rng.uniform(0.0, 8.0, 120))  # random, uneven steps
    snapshots = (modes @ (amplitude[:, None] * np.exp(rates[:, None] * (times - times[0])))).real
    steps = np.diff(times)
    assert steps.max() > 5 * steps.min()  # the sampling really is uneven

    fit = fit_optimized_dmd(snapshots, times, rank=4)
    # Same normalisation for the true modes: amplitudes are then comparable one to one.
    unit = normalize_modes(modes)
    reference = np.argmax(np.abs(modes), axis=0)
    true_amplitude = amplitude * modes[reference, range(4)] / unit[reference, range(4)]
    for i in range(4):
        j = int(np.argmin(np.abs(fit.rate - rates[i])))
        # Askham & Kutz 2018 (SIAM J. Appl. Dyn. Syst. 17(1), sec. 3): variable projection
        # recovers exponentials exactly from noise-free data at arbitrary sample times.
        assert abs(fit.rate[j] - rates[i]) / abs(rates[i]) < 1e-8
        assert abs(fit.amplitude[j] - true_amplitude[i]) / abs(true_amplitude[i]) < 1e-8
    assert fit.relative_error < 1e-10
    later = np.array([9.0, 10.5])
    expected = (modes @ (amplitude[:, None] * np.exp(rates[:, None] * (later - times[0])))).real
    np.testing.assert_allclose(optimized_reconstruct(fit, later).real, expected, atol=1e-9)
