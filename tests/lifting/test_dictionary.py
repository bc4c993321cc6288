"""Composition of parts: order, duplicates, size before data, memory budget, fitting."""

from __future__ import annotations

import json
import math
import pickle

import numpy as np
import pytest

from snaplift.errors import ConfigError, FitError
from snaplift.lifting import Dictionary, expressions, fourier, identity, monomials, rbf


def test_parts_concatenate_in_order_and_duplicates_are_dropped():
    dictionary = Dictionary(
        [
            monomials(1),
            identity(),
            expressions({"one": "2 - 1", "sq": "x**2", "again": "y"}),
            fourier(1),
        ],
        variables=["x", "y"],
    )
    description = dictionary.describe(2)
    # The second constant and the repeated identities of x and y are dropped.
    assert description.names == (
        "1",
        "x",
        "y",
        "sq",
        "sin(1*x)",
        "cos(1*x)",
        "sin(1*y)",
        "cos(1*y)",
    )
    assert description.constant_row == 0 and description.identity_rows == (1, 2)
    state = np.array([[0.5, -2.0], [1.0, 3.0]])
    x, y = state
    expected = [np.ones(2), x, y, x**2, np.sin(x), np.cos(x), np.sin(y), np.cos(y)]
    np.testing.assert_allclose(dictionary(state), expected, rtol=1e-15)


def test_lifted_size_is_known_before_any_data():
    assert Dictionary([monomials(10)]).lifted_size(2) == 66 == math.comb(12, 10)
    dictionary = Dictionary([monomials(2), rbf(centres=15), fourier(3)])
    assert dictionary.needs_fit
    # C(3 + 2, 2) + 15 + 2 * 3 * 3, computed without fitting the rbf centres.
    assert dictionary.lifted_size(3) == 10 + 15 + 18


def test_memory_budget_names_the_numbers_and_a_way_out():
    dictionary = Dictionary([monomials(4)])
    terms = math.comb(20 + 4, 4)  # 10626
    assert dictionary.check_budget(20, 1000, 10**9) == terms * 1000 * 16
    with pytest.raises(ConfigError) as caught:
        dictionary.check_budget(20, 100_000, 2 * 1024**3)
    message = str(caught.value)
    assert f"{terms} terms x 100000 samples x 16 bytes" in message
    assert "2.0 GiB" in message
    # Degree 3 gives C(23, 3) = 1771 terms: 2.6 GiB, too much; degree 2: 231 terms fits.
    assert "lower the monomial degree to 2 (231 terms)" in message
    # 11 coefficients: C(15, 4) = 1365 terms x 1e5 x 16 = 2.03 GiB, still too much;
    # 10: C(14, 4) = 1001 terms, 1.5 GiB, fits.
    assert "use at most 10 coefficients (state variables) (1001 terms)" in message
    with pytest.raises(ConfigError, match="positive"):
        dictionary.check_budget(2, 10, 0)


def test_fit_returns_a_deterministic_fitted_copy():
    state = np.random.default_rng(0).standard_normal((2, 300))
    dictionary = Dictionary(
        [identity(), rbf("gaussian", centres=6, seed=4), fourier(2, scale=True)]
    )
    with pytest.raises(FitError, match="not been fitted"):
        dictionary(state)
    first, second = dictionary.fit(state), dictionary.fit(state)
    assert dictionary.needs_fit and not first.needs_fit
    assert first == second and hash(first) == hash(second)
    np.testing.assert_array_equal(first(state), second(state))
    assert first(state).shape == (first.lifted_size(2), 300) == (2 + 6 + 8, 300)
    settings = json.loads(json.dumps(first.settings()))  # JSON-friendly for the store
    assert [part["kind"] for part in settings["parts"]] == ["identity", "rbf", "fourier"]
    assert len(settings["parts"][1]["centre_values"]) == 6
    clone = pickle.loads(pickle.dumps(first))  # ships to workers in a task graph
    np.testing.assert_array_equal(clone(state), first(state))


def test_variable_names_must_match_the_state():
    dictionary = Dictionary([monomials(1)], variables=["a", "b"])
    with pytest.raises(FitError, match="names 2 variables"):
        dictionary(np.ones((3, 4)))
    with pytest.raises(ConfigError, match="expected a dictionary part"):
        Dictionary([monomials(1), "fourier"])
    with pytest.raises(ConfigError, match="at least one part"):
        Dictionary([])
    assert Dictionary([Dictionary([monomials(1)]), identity()]).lifted_size(2) == 3
