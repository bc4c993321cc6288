"""Amplitudes per run."""

from __future__ import annotations

import numpy as np
import pytest

from snaplift.errors import FitError
from snaplift.fitting import (
    fit_dmd,
    fit_edmd,
    run_amplitude_table,
    run_amplitudes,
    run_lengths_from_mask,
    run_pair_mask,
)
from snaplift.lifting import monomials


def test_run_lengths_invert_the_pair_mask():
    for lengths in ([5], [3, 4, 1, 6], [1, 1]):
        np.testing.assert_array_equal(
            run_lengths_from_mask(run_pair_mask(lengths), sum(lengths)), lengths
        )


def test_each_run_gets_the_modal_coordinates_of_its_start(real_system, trajectory):
    operator, _ = real_system(seed=41)
    rng = np.random.default_rng(42)
    starts = [rng.standard_normal(operator.shape[0]) for _ in range(3)]
    lengths = [30, 25, 20]
    data = np.hstack([trajectory(operator, s, n) for s, n in zip(starts, lengths, strict=True)])
    fit = fit_dmd(data, 0.1, pair_mask=run_pair_mask(lengths))
    table = run_amplitude_table(fit, data, run_lengths=lengths)
    assert table["amplitude"].shape == (3, fit.eigenvalue.size)
    np.testing.assert_array_equal(table["run_start"], [0, 30, 55])
    # Exact data: amplitudes solve modes @ a = x_0 of each run (linear algebra, numpy).
    for run, start in enumerate(starts):
        expected = np.linalg.solve(fit.modes, start.astype(complex))
        np.testing.assert_allclose(table["amplitude"][run], expected, rtol=1e-7, atol=1e-9)
    np.testing.assert_allclose(table["amplitude"][0], fit.amplitude, rtol=1e-7)
    again = run_amplitudes(fit, data, pair_mask=run_pair_mask(lengths))
    np.testing.assert_allclose(again, table["amplitude"])


def test_edmd_amplitudes_per_run():
    rng = np.random.default_rng(43)
    a = np.array([[0.9, -0.1], [0.0, 0.8]])
    starts = [rng.uniform(-1, 1, 2) for _ in range(6)]
    runs = [np.column_stack([np.linalg.matrix_power(a, j) @ s for j in range(12)]) for s in starts]
    data = np.hstack(runs)
    fit = fit_edmd(data, monomials(2), 1.0, pair_mask=run_pair_mask([12] * 6))
    amplitude = run_amplitudes(fit, data, run_lengths=[12] * 6)
    for run, block in enumerate(runs):
        steps = np.arange(12)
        model = fit.modes @ (amplitude[run][:, None] * fit.eigenvalue[:, None] ** steps[None, :])
        np.testing.assert_allclose(model.real, block, atol=1e-8)


def test_errors(real_system, trajectory):
    operator, _ = real_system(seed=44)
    data = trajectory(operator, np.ones(operator.shape[0]), 20)
    fit = fit_dmd(data, 0.1)
    with pytest.raises(FitError, match="add up"):
        run_amplitudes(fit, data, run_lengths=[10, 5])
    with pytest.raises(FitError, match="not both"):
        run_amplitudes(fit, data, run_lengths=[20], pair_mask=np.zeros(19, bool))
    with pytest.raises(FitError, match="rows"):
        run_amplitudes(fit, data[:2], run_lengths=[20])
