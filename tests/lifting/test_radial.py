"""k-means centres and radial basis functions."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.cluster.vq
import scipy.spatial.distance

from snaplift.errors import ConfigError, FitError
from snaplift.lifting import kmeans, rbf


def _blobs(seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    centres = np.array([[0.0, 0.0], [5.0, 0.0], [0.0, 5.0], [5.0, 5.0]]).T
    rng = np.random.default_rng(seed)
    points = np.hstack([c[:, None] + 0.3 * rng.standard_normal((2, 50)) for c in centres.T])
    return points, centres


def _sorted_columns(array: np.ndarray) -> np.ndarray:
    return array[:, np.lexsort(array[::-1])]


def test_kmeans_agrees_with_scipy_on_separated_clusters():
    points, _ = _blobs()
    ours = kmeans(points, 4, seed=3)
    # Reference library: scipy.cluster.vq.kmeans2 finds the same (global) optimum here.
    theirs, _ = scipy.cluster.vq.kmeans2(points.T, 4, minit="++", seed=5)
    np.testing.assert_allclose(_sorted_columns(ours), _sorted_columns(theirs.T), atol=1e-10)


def test_kmeans_is_deterministic_for_a_seed():
    points = np.random.default_rng(1).standard_normal((3, 300))
    np.testing.assert_array_equal(kmeans(points, 7, seed=11), kmeans(points, 7, seed=11))


def test_kmeans_needs_enough_distinct_samples():
    with pytest.raises(FitError, match="distinct"):
        kmeans(np.ones((2, 10)), 2)


def test_gaussian_values_and_median_width():
    points, _ = _blobs(2)
    part = rbf("gaussian", centres=4, seed=0).fit(points)
    centres = np.array(part.centres).T
    # Width: median pairwise distance between centres (scipy.spatial.distance.pdist).
    assert part.width == pytest.approx(
        np.median(scipy.spatial.distance.pdist(centres.T)), rel=1e-12
    )
    distance = scipy.spatial.distance.cdist(centres.T, points.T)
    np.testing.assert_allclose(part(points), np.exp(-((distance / part.width) ** 2)), rtol=1e-10)


def test_thin_plate_values():
    points = np.random.default_rng(4).standard_normal((2, 40))
    part = rbf("thin_plate", centres=3, seed=0).fit(points)
    centres = np.array(part.centres).T
    ratio = scipy.spatial.distance.cdist(centres.T, points.T) / part.width
    # Thin-plate spline r^2 log r (Duchon 1977), r in units of the width.
    np.testing.assert_allclose(part(points), ratio**2 * np.log(ratio), rtol=1e-9, atol=1e-14)
    assert np.abs(part(centres).diagonal()).max() < 1e-12  # r log r -> 0 at the centre


def test_rbf_needs_fit_and_checks_options():
    with pytest.raises(FitError, match="fit"):
        rbf()(np.ones((2, 5)))
    with pytest.raises(ConfigError, match="kind"):
        rbf("cubic")
    with pytest.raises(ConfigError, match="centres"):
        rbf(centres=0)
    assert rbf(centres=6).size(3) == 6
    assert rbf().describe(["a", "b"]).identity_rows == (None, None)
