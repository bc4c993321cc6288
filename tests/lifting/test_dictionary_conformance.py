"""One conformance suite for the dictionary parts (snaplift.lifting).

Every state dictionary part (monomials, Fourier, RBF, expressions, identity) and the
field observables (pointwise terms, delays) are held to the same contract, parametrised
over :data:`PARTS` and :data:`FIELD_LIFTS`: the lifted shape is the size announced before
any data, there is one name per feature, the values equal a direct numpy formula of the
definition (written out here independently of the implementation), the same data and
seed give the same features, and bad settings or bad states are refused with a one-line
error. References: the definitions in each part's docstring; the monomial count
``C(n + d, d)`` (stars and bars, any combinatorics text, math.comb); the Lloyd fixed point
of k-means (Lloyd 1982: every centre is the mean of the samples nearest to it); numpy
slicing for the Hankel (delay) stacking.
"""

from __future__ import annotations

import itertools
import math
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
import pytest

from snaplift.errors import ConfigError, FitError, SnapliftError
from snaplift.lifting import (
    Dictionary,
    DictionaryPart,
    FieldLift,
    expressions,
    fourier,
    hankel,
    identity,
    monomials,
    pointwise_size,
    pointwise_terms,
    rbf,
)

N_STATE, N_SAMPLES = 3, 60


def _state(seed: int = 0) -> np.ndarray:
    return np.random.default_rng(seed).uniform(-1.5, 2.0, (N_STATE, N_SAMPLES))


def _monomials_direct(x: np.ndarray, degree: int) -> np.ndarray:
    # every product x_i1 * ... * x_ik with i1 <= ... <= ik, k = 0 .. degree, by degree
    return np.array([np.prod(x[list(combo)], axis=0) if combo else np.ones(x.shape[1])
                     for k in range(degree + 1) for combo in itertools.combinations_with_replacement(range(len(x)), k)])


def _fourier_direct(x: np.ndarray, harmonics: int, low: np.ndarray | None = None,
                    high: np.ndarray | None = None) -> np.ndarray:
    a = x if low is None or high is None else np.pi * (x - low[:, None]) / (high[:, None] - low[:, None])
    return np.array([f(k * a[i]) for i in range(len(x)) for k in range(1, harmonics + 1) for f in (np.sin, np.cos)])


def _rbf_direct(x: np.ndarray, centres: np.ndarray, width: float, kind: str) -> np.ndarray:
    r = np.sqrt(((x[:, None, :] - centres[:, :, None]) ** 2).sum(axis=0)) / width  # (k, samples)
    if kind == "gaussian":
        return np.exp(-(r**2))
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(r > 0, r**2 * np.log(r), 0.0)  # thin plate spline r^2 log r


def _fitted_rbf(part: DictionaryPart, x: np.ndarray) -> np.ndarray:
    centres = np.array(part.centres).T  # type: ignore[attr-defined]
    return _rbf_direct(x, centres, float(part.width), part.function)  # type: ignore[attr-defined]


def _fitted_fourier(part: DictionaryPart, x: np.ndarray) -> np.ndarray:
    low = None if part.low is None else np.array(part.low)  # type: ignore[attr-defined]
    high = None if part.high is None else np.array(part.high)  # type: ignore[attr-defined]
    return _fourier_direct(x, part.harmonics, low, high)  # type: ignore[attr-defined]


@dataclass(frozen=True)
class Case:
    part: DictionaryPart
    #: the features from the definition, given the fitted part and the state
    direct: Callable[[DictionaryPart, np.ndarray], np.ndarray]


PARTS = {
    "identity": Case(identity(), lambda part, x: x),
    "monomials-0": Case(monomials(0), lambda part, x: np.ones((1, x.shape[1]))),
    "monomials-3": Case(monomials(3), lambda part, x: _monomials_direct(x, 3)),
    "fourier": Case(fourier(2), _fitted_fourier),
    "fourier-scaled": Case(fourier(3, scale=True), _fitted_fourier),
    "rbf-gaussian": Case(rbf("gaussian", centres=5, seed=2), _fitted_rbf),
    "rbf-thin-plate": Case(rbf("thin_plate", centres=4, seed=1), _fitted_rbf),
    "expressions": Case(expressions({"energy": "0.5*x1**2 - cos(x0)", "mix": "x0*x2 + exp(-x1**2)", "one": "1",
                                     "x2": "x2"}),
                        lambda part, x: np.array([0.5 * x[1] ** 2 - np.cos(x[0]), x[0] * x[2] + np.exp(-x[1] ** 2),
                                                  np.ones(x.shape[1]), x[2]])),
}


def _fitted(part: DictionaryPart, x: np.ndarray) -> DictionaryPart:
    return part.fit(x) if part.needs_fit else part


@pytest.mark.parametrize("name", PARTS)
def test_part_shape_names_and_size_agree(name: str) -> None:
    x = _state()
    part = _fitted(PARTS[name].part, x)
    features = part(x)
    variables = [f"x{i}" for i in range(N_STATE)]
    description = part.describe(variables)
    # the size is known before any data, and there is one name per feature
    assert features.shape == (PARTS[name].part.size(N_STATE), N_SAMPLES) == (description.n_terms, N_SAMPLES)
    assert len(set(description.names)) == description.n_terms
    assert features.dtype == np.float64
    # constant and identity rows say what they hold
    if description.constant_row is not None:
        np.testing.assert_array_equal(features[description.constant_row], 1.0)
    for variable, row in enumerate(description.identity_rows):
        if row is not None:
            np.testing.assert_array_equal(features[row], x[variable])
    # one-part dictionary: the same names and features
    dictionary = Dictionary([PARTS[name].part], variables=variables).fit(x)
    assert dictionary.lifted_size(N_STATE) == description.n_terms
    np.testing.assert_array_equal(dictionary(x), features)


@pytest.mark.parametrize("name", PARTS)
def test_part_matches_the_direct_formula(name: str) -> None:
    x, other = _state(), _state(seed=1)
    part = _fitted(PARTS[name].part, x)
    # on the fitting data and on new states (data-dependent parameters stay fixed)
    for state in (x, other):
        np.testing.assert_allclose(part(state), PARTS[name].direct(part, state), rtol=1e-12, atol=1e-12)


def test_monomial_count_is_the_binomial_coefficient() -> None:
    # stars and bars: C(n + d, d) monomials of total degree <= d in n variables
    for n, degree in itertools.product(range(1, 5), range(5)):
        assert monomials(degree).size(n) == math.comb(n + degree, degree)


@pytest.mark.parametrize("name", [n for n in PARTS if PARTS[n].part.needs_fit])
def test_data_dependent_part_is_deterministic_with_its_seed(name: str) -> None:
    x = _state()
    first, second = PARTS[name].part.fit(x), PARTS[name].part.fit(x.copy())
    assert first.settings() == second.settings()
    np.testing.assert_array_equal(first(x), second(x))
    with pytest.raises(FitError) as error:
        PARTS[name].part(x)  # not fitted: refused, not guessed
    assert "\n" not in str(error.value)


@pytest.mark.parametrize("seed", [0, 3])
def test_rbf_centres_are_a_lloyd_fixed_point(seed: int) -> None:
    # Lloyd (1982): at convergence each centre is the mean of the samples nearest to it
    x = np.hstack([_state(seed=5) + 4.0, _state(seed=6) - 4.0])
    part = rbf("gaussian", centres=4, seed=seed).fit(x)
    centres = np.array(part.centres).T
    nearest = np.argmin(((x[:, None, :] - centres[:, :, None]) ** 2).sum(axis=0), axis=0)
    for k in range(centres.shape[1]):
        np.testing.assert_allclose(centres[:, k], x[:, nearest == k].mean(axis=1), atol=1e-9)


BAD_SETTINGS: dict[str, Callable[[], object]] = {
    "monomials-negative": lambda: monomials(-1),
    "monomials-not-int": lambda: monomials(1.5),  # type: ignore[arg-type]
    "fourier-zero": lambda: fourier(0),
    "fourier-scale-text": lambda: fourier(1, scale="yes"),  # type: ignore[arg-type]
    "rbf-kind": lambda: rbf("cubic"),  # type: ignore[arg-type]
    "rbf-no-centres": lambda: rbf(centres=0),
    "expressions-call": lambda: expressions({"bad": "__import__('os')"}),
    "expressions-syntax": lambda: expressions({"bad": "x0 +* 2"}),
    "dictionary-empty": lambda: Dictionary([]),
    "dictionary-not-a-part": lambda: Dictionary(["monomials"]),  # type: ignore[list-item]
    "pointwise-unknown": lambda: pointwise_terms(np.ones((2, 3)), ["tan"]),
    "delays-zero": lambda: hankel(np.ones((2, 5)), count=0),
    "delays-too-long": lambda: hankel(np.ones((2, 5)), count=4, spacing=2),
    "field-lift-spacing": lambda: FieldLift(delays=2, spacing=0),
}


@pytest.mark.parametrize("name", BAD_SETTINGS)
def test_bad_settings_are_a_one_line_config_error(name: str) -> None:
    with pytest.raises(ConfigError) as error:
        BAD_SETTINGS[name]()
    assert str(error.value) and "\n" not in str(error.value)


BAD_STATES = {
    "one-dimensional": np.ones(4),
    "not-finite": np.array([[0.0, np.nan], [1.0, 2.0], [3.0, 4.0]]),
    "complex": np.ones((3, 4)) * (1 + 1j),
    "no-variables": np.ones((0, 4)),
}


@pytest.mark.parametrize("state", BAD_STATES)
@pytest.mark.parametrize("name", PARTS)
def test_bad_states_are_refused_in_one_line(name: str, state: str) -> None:
    part = _fitted(PARTS[name].part, _state())
    with pytest.raises(SnapliftError) as error:
        part(BAD_STATES[state])
    assert "\n" not in str(error.value)
    if state == "not-finite":
        assert "state[0, 1]" in str(error.value)  # names the index


# field observables, fused into the archive read: pointwise functions and delays
FIELD_LIFTS = {
    "pointwise": FieldLift(terms=("x", "square", "cube", "abs", "sin", "cos")),
    "delays": FieldLift(delays=3, spacing=2),
    "pointwise-delays": FieldLift(terms=("x", "square"), delays=2, spacing=1),
}
DIRECT_POINTWISE: dict[str, Callable[[np.ndarray], np.ndarray]] = {
    "x": lambda v: v, "square": lambda v: v * v, "cube": lambda v: v**3, "abs": np.abs, "sin": np.sin, "cos": np.cos}


@pytest.mark.parametrize("name", FIELD_LIFTS)
def test_field_lift_names_match_features_and_direct_formula(name: str) -> None:
    lift = FIELD_LIFTS[name]
    x = _state()  # 3 points x 60 snapshots of one field "u"
    runs = np.array([25, 35])
    names = [f.name for f in lift.lifted(["u"])]
    assert len(names) == len(set(names)) == len(lift.terms) * lift.delays
    # the pointwise terms: one block per function, rows = pointwise_size
    terms = pointwise_terms(x, lift.terms)
    assert terms.shape == (pointwise_size(N_STATE, lift.terms), N_SAMPLES)
    direct = np.vstack([DIRECT_POINTWISE[t](x) for t in lift.terms])
    np.testing.assert_allclose(terms, direct, rtol=1e-15, atol=0)
    # the delays: block b of lifted column j of a run is x_{j + b s}, no window crosses runs
    stacked = hankel(terms, lift.delays, lift.spacing, run_lengths=runs)
    span = (lift.delays - 1) * lift.spacing
    expected = np.hstack([np.vstack([terms[:, start + b * lift.spacing:start + length - span + b * lift.spacing]
                                     for b in range(lift.delays)])
                          for start, length in ((0, 25), (25, 35))])
    np.testing.assert_array_equal(stacked, expected)
    assert stacked.shape[0] == len(names) * N_STATE


def test_pointwise_terms_keep_complex_values() -> None:
    # complex fields: the same functions on complex entries (numpy's complex sin, cos, abs)
    z = _state() + 1j * _state(seed=2)
    np.testing.assert_allclose(pointwise_terms(z, ["square", "sin", "abs"]),
                               np.vstack([z * z, np.sin(z), np.abs(z).astype(complex)]), rtol=1e-14)
