"""Rates, frequencies, growth, periods, pairs and spectrum tables."""

from __future__ import annotations

from types import SimpleNamespace

import numpy as np
import pytest

from snaplift.errors import FitError
from snaplift.fitting import (
    conjugate_pairs,
    continuous_rate,
    frequency,
    growth,
    near_nyquist,
    period,
    spectrum_table,
)


def test_formulas_against_hand_values():
    dt, g, f = 0.01, -0.3, 12.5
    eigenvalue = np.exp((g + 2j * np.pi * f) * dt)  # lambda = exp(omega dt) by definition
    # hand values: omega = g + 2 pi i f, frequency f, growth g, period 1/f
    assert continuous_rate([eigenvalue], dt)[0] == pytest.approx(g + 2j * np.pi * f, rel=1e-12)
    assert frequency([eigenvalue], dt)[0] == pytest.approx(f, rel=1e-12)
    assert growth([eigenvalue], dt)[0] == pytest.approx(g, rel=1e-12)
    assert period([eigenvalue], dt)[0] == pytest.approx(0.08, rel=1e-12)
    assert frequency([np.conj(eigenvalue)], dt)[0] == pytest.approx(-f, rel=1e-12)
    assert period([np.conj(eigenvalue)], dt)[0] == pytest.approx(0.08, rel=1e-12)


def test_special_eigenvalues():
    dt = 0.5
    values = np.array([1.0, 0.5, -1.0, 0.0])
    rate = continuous_rate(values, dt)
    # hand values: log 1 = 0, log 0.5 = -ln 2, principal log(-1) = i pi, log 0 = -inf
    np.testing.assert_allclose(rate[:3], [0.0, -np.log(2) / dt, 1j * np.pi / dt], atol=1e-15)
    assert rate[3] == complex(-np.inf, 0.0)
    np.testing.assert_array_equal(period(values[:2], dt), [np.inf, np.inf])
    # -1 flips sign every step: frequency 1/(2 dt), the Nyquist frequency (Shannon)
    assert frequency([-1.0], dt)[0] == pytest.approx(1.0)
    np.testing.assert_array_equal(
        near_nyquist(frequency(values, dt), dt), [False, False, True, False]
    )
    np.testing.assert_array_equal(
        near_nyquist([0.89, 0.9, -0.95], 0.5, fraction=0.9), [False, True, True]
    )


def test_conjugate_pairs():
    values = np.array([1 + 2j, 0.5, 1 - 2j, 3j, 0.2 - 0.1j, 0.2 + 0.1j + 1e-12])
    # hand matching: (0, 2), (4, 5); 0.5 is real; 3j has no partner
    np.testing.assert_array_equal(conjugate_pairs(values), [2, -1, 0, -1, 5, 4])
    np.testing.assert_array_equal(conjugate_pairs(values, tol=0.0)[4:], [-1, -1])
    # two identical pairs: each index used once
    np.testing.assert_array_equal(conjugate_pairs([1j, 1j, -1j, -1j]), [2, 3, 0, 1])


def test_table_sorting_and_columns():
    fit = SimpleNamespace(
        eigenvalue=np.array([0.9, np.exp(-0.5j), np.exp(0.5j), 0.5 + 0j]),
        amplitude=np.array([1.0, 2.0 - 1e-14, 2.0, 3j]),
        dt=1.0,
    )
    table = spectrum_table(fit)
    # |b| descending; the tied pair is listed +f then -f
    np.testing.assert_array_equal(table["index"], [3, 2, 1, 0])
    np.testing.assert_array_equal(table["partner"], [-1, 1, 2, -1])
    np.testing.assert_allclose(table["amplitude"], [3.0, 2.0, 2.0, 1.0])
    np.testing.assert_allclose(table["phase"], [np.pi / 2, 0.0, 0.0, 0.0])
    assert set(table) == {
        "index",
        "eigenvalue",
        "rate",
        "frequency",
        "growth",
        "period",
        "amplitude",
        "phase",
        "partner",
        "near_nyquist",
    }
    by_frequency = spectrum_table(fit, sort="frequency")
    np.testing.assert_array_equal(by_frequency["index"], [3, 0, 2, 1])
    by_growth = spectrum_table(fit, sort="growth")
    np.testing.assert_array_equal(by_growth["index"], [2, 1, 0, 3])
    np.testing.assert_array_equal(spectrum_table(fit, sort="index")["index"], [0, 1, 2, 3])
    with pytest.raises(FitError, match="sort must be one of"):
        spectrum_table(fit, sort="size")  # type: ignore[arg-type]


def test_spectrum_errors():
    with pytest.raises(FitError, match="dt must be a positive"):
        continuous_rate([0.5], -1.0)
    with pytest.raises(FitError, match="fraction"):
        near_nyquist([0.1], 1.0, fraction=1.5)
    with pytest.raises(FitError, match=r"eigenvalue\[1\] is nan"):
        conjugate_pairs([1.0, np.nan])
