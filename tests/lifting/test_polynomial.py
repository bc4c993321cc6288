"""Monomials, identity and Fourier terms."""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest

from snaplift.errors import ConfigError, FitError
from snaplift.lifting import fourier, identity, monomial_count, monomials


@pytest.mark.parametrize(("n_state", "degree"), [(1, 0), (1, 5), (2, 4), (2, 10), (3, 3), (5, 2)])
def test_monomial_count_is_the_binomial(n_state, degree):
    # Number of monomials of degree <= p in r variables: C(r + p, p) (stars and bars).
    part = monomials(degree)
    assert (
        part.size(n_state) == monomial_count(n_state, degree) == math.comb(n_state + degree, degree)
    )
    state = np.random.default_rng(0).standard_normal((n_state, 7))
    assert part(state).shape == (math.comb(n_state + degree, degree), 7)


def test_monomial_order_names_and_values():
    part = monomials(3)
    names = part.describe(["a", "b"]).names
    assert names == ("1", "a", "b", "a^2", "a*b", "b^2", "a^3", "a^2*b", "a*b^2", "b^3")
    state = np.array([[2.0, -1.5], [3.0, 0.5]])
    a, b = state
    expected = np.array([np.ones(2), a, b, a**2, a * b, b**2, a**3, a**2 * b, a * b**2, b**3])
    np.testing.assert_allclose(part(state), expected, rtol=1e-15)  # direct products (numpy)


def test_monomials_in_three_variables_match_itertools_exponents():
    state = np.random.default_rng(1).standard_normal((3, 5))
    lifted = monomials(3)(state)
    combos = [c for d in range(4) for c in itertools.combinations_with_replacement(range(3), d)]
    expected = np.array([np.prod(state[list(c)], axis=0) if c else np.ones(5) for c in combos])
    np.testing.assert_allclose(lifted, expected, rtol=1e-14)


def test_monomial_description_rows():
    description = monomials(2).describe(["x0", "x1", "x2"])
    assert description.constant_row == 0 and description.identity_rows == (1, 2, 3)
    assert description.has_constant and description.has_identity
    assert not monomials(0).describe(["x"]).has_identity


def test_identity_part():
    state = np.arange(6.0).reshape(2, 3)
    np.testing.assert_array_equal(identity()(state), state)
    assert identity().describe(["p", "q"]).identity_rows == (0, 1)


def test_fourier_values_and_order():
    state = np.array([[0.3, -1.2], [2.0, 0.1]])
    lifted = fourier(2)(state)
    x0, x1 = state
    expected = [
        np.sin(x0),
        np.cos(x0),
        np.sin(2 * x0),
        np.cos(2 * x0),
        np.sin(x1),
        np.cos(x1),
        np.sin(2 * x1),
        np.cos(2 * x1),
    ]
    np.testing.assert_allclose(lifted, expected, rtol=1e-15)
    description = fourier(2).describe(["x0", "x1"])
    assert description.names[:2] == ("sin(1*x0)", "cos(1*x0)")
    assert not description.has_constant and description.identity_rows == (None, None)


def test_fourier_scaled_to_the_data_range():
    state = np.array([[2.0, 4.0, 6.0]])
    part = fourier(1, scale=True)
    assert part.needs_fit
    with pytest.raises(FitError, match="fit"):
        part(state)
    fitted = part.fit(state)
    # u = (x - lo) / (hi - lo) in [0, 1]; argument pi u: cos goes 1, 0, -1.
    np.testing.assert_allclose(fitted(state)[1], [1.0, 0.0, -1.0], atol=1e-15)
    with pytest.raises(ConfigError, match="constant"):
        part.fit(np.ones((1, 3)))


def test_bad_options_are_config_errors():
    with pytest.raises(ConfigError, match="degree"):
        monomials(-1)
    with pytest.raises(ConfigError, match="harmonics"):
        fourier(0)
    with pytest.raises(FitError, match="2-D"):
        monomials(2)(np.ones(3))
    with pytest.raises(FitError, match="real"):
        monomials(2)(np.ones((2, 2), dtype=complex))
    with pytest.raises(FitError, match="finite"):
        monomials(1)(np.array([[1.0, np.nan]]))
