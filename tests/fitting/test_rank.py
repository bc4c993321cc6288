"""Rank choice: number, energy fraction, optimal hard threshold (Gavish & Donoho 2014)."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import integrate, optimize

from snaplift.errors import FitError
from snaplift.fitting import (
    choose_rank,
    hard_threshold,
    threshold_coefficient_known_noise,
    threshold_coefficient_unknown_noise,
)


def _low_rank_plus_noise(strength, seed=0, shape=(200, 100), noise=1.0):
    rng = np.random.default_rng(seed)
    n, m = shape
    left, _ = np.linalg.qr(rng.standard_normal((n, len(strength))))
    right, _ = np.linalg.qr(rng.standard_normal((m, len(strength))))
    signal = left @ np.diag(strength) @ right.T
    return np.linalg.svd(signal + noise * rng.standard_normal(shape), compute_uv=False)


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_optimal_threshold_finds_rank_five(seed):
    values = _low_rank_plus_noise([500.0, 400.0, 300.0, 200.0, 100.0], seed=seed)
    # Gavish & Donoho 2014: a rank-5 signal well above the noise bulk is kept, the noise is not.
    assert choose_rank(values, method="optimal", shape=(200, 100)) == 5
    assert choose_rank(values, method="optimal", shape=(200, 100), noise=1.0) == 5


def test_optimal_threshold_drops_a_component_inside_the_noise_bulk():
    # The noise bulk edge is (1 + sqrt(beta)) sqrt(n) sigma ~ 24 (Marchenko-Pastur law); a
    # component of strength 5 is invisible, so Gavish & Donoho 2014 keep 4 of 5.
    values = _low_rank_plus_noise([500.0, 400.0, 300.0, 200.0, 5.0])
    assert choose_rank(values, method="optimal", shape=(200, 100)) == 4


def test_threshold_coefficients():
    # Gavish & Donoho 2014, title and eq. (11): lambda*(1) = 4/sqrt(3)
    assert threshold_coefficient_known_noise(1.0) == pytest.approx(4 / np.sqrt(3), rel=1e-14)
    # Gavish & Donoho 2014: omega(1) ~= 2.858 (from memory)
    assert threshold_coefficient_unknown_noise(1.0) == pytest.approx(2.858, abs=0.005)


@pytest.mark.parametrize("beta", [0.1, 0.25, 0.5, 0.75, 1.0])
def test_cubic_approximation_matches_exact_omega(beta):
    # Gavish & Donoho 2014: omega(beta) = lambda*(beta) / sqrt(mu_beta), mu_beta the median of
    # the Marchenko-Pastur law of ratio beta; computed here with scipy quad + brentq.
    low, high = (1 - np.sqrt(beta)) ** 2, (1 + np.sqrt(beta)) ** 2

    def density(t):
        return np.sqrt((high - t) * (t - low)) / (2 * np.pi * beta * t)

    median = optimize.brentq(lambda x: integrate.quad(density, low, x)[0] - 0.5, low, high)
    exact = threshold_coefficient_known_noise(beta) / np.sqrt(median)
    # tolerance 0.01: the paper's cubic is an approximation (common practice margin)
    assert threshold_coefficient_unknown_noise(beta) == pytest.approx(exact, abs=0.01)


def test_hard_threshold_known_noise_formula():
    values = np.ones(10)
    # Gavish & Donoho 2014: tau = lambda*(beta) sqrt(n) sigma, n the larger dimension
    expected = threshold_coefficient_known_noise(0.5) * np.sqrt(20) * 0.3
    assert hard_threshold(values, (10, 20), noise=0.3) == pytest.approx(expected, rel=1e-14)
    assert hard_threshold(values, (10, 20)) == pytest.approx(
        threshold_coefficient_unknown_noise(0.5)
    )


def test_energy_rule_against_hand_computation():
    values = [3.0, 2.0, 1.0]  # energies 9, 4, 1 of 14 (hand computation)
    assert choose_rank(values, energy=0.6) == 1  # 9/14 = 0.643
    assert choose_rank(values, energy=0.65) == 2  # 13/14 = 0.929
    assert choose_rank(values, energy=0.93) == 3
    assert choose_rank(values, energy=1.0) == 3
    assert choose_rank([1.0, 1.0], energy=0.5) == 1  # met exactly
    assert choose_rank(values, rank=2) == 2


def test_rank_is_deterministic():
    values = _low_rank_plus_noise([50.0, 40.0, 30.0], seed=4)
    first = [choose_rank(values, method="optimal", shape=(200, 100)) for _ in range(3)]
    assert first == [first[0]] * 3


@pytest.mark.parametrize(
    ("kwargs", "message"),
    [
        ({}, "exactly one rule"),
        ({"rank": 1, "energy": 0.5}, "exactly one rule"),
        ({"rank": 4}, "rank 4 is not available"),
        ({"rank": 0}, "rank 0 is not available"),
        ({"rank": 1.0}, "positive integer"),
        ({"energy": 0.0}, r"energy must be a fraction in \(0, 1\]"),
        ({"energy": 1.5}, r"energy must be a fraction in \(0, 1\]"),
        ({"method": "optimal"}, "needs shape"),
        ({"method": "optimal", "shape": (3, 3), "rank": 2}, "takes neither"),
        ({"method": "optimal", "shape": (10, 10)}, "needs all min"),
        ({"method": "optimal", "shape": (3, 0)}, "shape must be two positive"),
        ({"method": "energy", "rank": 2}, "takes"),
        ({"method": "median"}, "method must be one of"),
        ({"rank": 1, "noise": 1.0}, "noise= only applies"),
        ({"method": "optimal", "shape": (3, 3), "noise": -1.0}, "positive standard deviation"),
    ],
)
def test_bad_combinations(kwargs, message):
    with pytest.raises(FitError, match=message):
        choose_rank([3.0, 2.0, 1.0], **kwargs)


def test_bad_singular_values():
    with pytest.raises(FitError, match="non-increasing"):
        choose_rank([1.0, 2.0], rank=1)
    with pytest.raises(FitError, match=r"singular_values\[1\] is -1"):
        choose_rank([1.0, -1.0], rank=1)
    with pytest.raises(FitError, match="no singular value is above"):
        choose_rank([1.0, 1.0, 1.0], method="optimal", shape=(3, 3))
