"""Residual and trust columns of the spectrum table."""

from __future__ import annotations

from types import SimpleNamespace

import numpy as np
import pytest

from snaplift.errors import FitError
from snaplift.fitting import fit_edmd, spectrum_table
from snaplift.lifting import monomials


def test_edmd_tables_carry_residuals_and_sort_by_them():
    x = np.random.default_rng(0).uniform(-1, 1, (2, 300))
    y = np.array([[0.9, -0.1], [0.0, 0.8]]) @ x
    fit = fit_edmd(x, monomials(2), 1.0, next_states=y)
    table = spectrum_table(fit)
    np.testing.assert_array_equal(table["residual"], fit.residual[table["index"]])
    np.testing.assert_array_equal(table["trusted"], fit.trusted[table["index"]])
    by_residual = spectrum_table(fit, sort="residual")
    assert np.all(np.diff(by_residual["residual"]) >= 0)


def test_explicit_columns_and_errors():
    fit = SimpleNamespace(eigenvalue=np.array([0.9, 0.5]), amplitude=np.array([1.0, 2.0]), dt=1.0)
    table = spectrum_table(fit, residual=[0.5, 0.001], trusted=[False, True], sort="residual")
    np.testing.assert_array_equal(table["index"], [1, 0])
    assert "residual" not in spectrum_table(fit)
    with pytest.raises(FitError, match="needs residuals"):
        spectrum_table(fit, sort="residual")
    with pytest.raises(FitError, match="one value per mode"):
        spectrum_table(fit, residual=[0.1])
