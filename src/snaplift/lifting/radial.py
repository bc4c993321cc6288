"""Radial basis functions of a small state, centred by k-means.

Centres: k-means of the samples (Lloyd 1982) started by k-means++ seeding (Arthur &
Vassilvitskii 2007) from ``numpy.random.default_rng(seed)``, so the same data and seed
give the same centres. Width ``w``: the median of the pairwise distances between the
centres (with a single centre, the median distance of the samples to it), so that each
function reaches about half-way to its typical neighbour; distances are Euclidean in the
state's own units.

- ``gaussian``: ``exp(-(r / w)^2)``;
- ``thin_plate``: ``(r / w)^2 log(r / w)`` (0 at r = 0), the thin-plate spline
  (Duchon 1977) with the width only fixing the scale.

No constant and no identity terms: add :func:`~snaplift.lifting.identity` for an exact
way back to the state.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np
from numpy.typing import ArrayLike

from snaplift.errors import ConfigError, FitError
from snaplift.lifting._base import Description, DictionaryPart, positive_int, state_matrix

__all__ = ["RadialBasis", "rbf", "kmeans"]

Kind = Literal["gaussian", "thin_plate"]

#: Lloyd iterations at most, and the relative centre movement counted as converged
MAX_ITERATIONS = 300
TOLERANCE = 1e-10
#: samples per block when distances to the centres are formed (bounds memory)
BLOCK = 8192


def _squared_distances(points: np.ndarray, centres: np.ndarray) -> np.ndarray:
    """(n_samples, k) squared distances; points (d, n), centres (d, k)."""
    out = np.empty((points.shape[1], centres.shape[1]))
    centre_norm = np.sum(centres**2, axis=0)
    for start in range(0, points.shape[1], BLOCK):
        block = points[:, start : start + BLOCK]
        value = np.sum(block**2, axis=0)[:, None] - 2.0 * block.T @ centres + centre_norm[None, :]
        out[start : start + BLOCK] = np.maximum(value, 0.0)
    return out


def kmeans(points: ArrayLike, k: int, seed: int = 0) -> np.ndarray:
    """Deterministic k-means centres (d, k) of the columns of ``points`` (d, n).

    k-means++ seeding (Arthur & Vassilvitskii 2007), then Lloyd iterations until the
    centres move less than ``1e-10`` of the data scale. An emptied cluster takes the
    sample farthest from its centre. Ties in the assignment go to the lowest centre index.

    References
    ----------
    Lloyd, S. P. (1982), "Least squares quantization in PCM", IEEE Trans. Inf. Theory 28(2).
    Arthur, D. & Vassilvitskii, S. (2007), "k-means++: the advantages of careful seeding",
    Proc. ACM-SIAM SODA, 1027-1035.

    Examples
    --------
    >>> x = np.array([[0.0, 0.1, 10.0, 10.1]])
    >>> np.sort(kmeans(x, 2, seed=0).ravel()).tolist()
    [0.05, 10.05]
    """
    data = state_matrix(points)
    count = positive_int(k, "number of centres")
    n = data.shape[1]
    distinct = np.unique(data, axis=1).shape[1]
    if distinct < count:
        raise FitError(
            f"k-means needs at least as many distinct samples as centres; got {distinct} "
            f"distinct samples for {count} centres: choose fewer centres"
        )
    rng = np.random.default_rng(seed)
    centres = np.empty((data.shape[0], count))
    centres[:, 0] = data[:, rng.integers(n)]
    nearest = _squared_distances(data, centres[:, :1])[:, 0]
    for j in range(1, count):
        total = nearest.sum()
        # Sample proportional to squared distance; cumulative search is exact and seeded.
        pick = int(np.searchsorted(np.cumsum(nearest), rng.random() * total, side="right"))
        pick = min(pick, n - 1)
        if nearest[pick] == 0.0:  # rounding landed on a sample already chosen
            pick = int(np.argmax(nearest))
        centres[:, j] = data[:, pick]
        nearest = np.minimum(nearest, _squared_distances(data, centres[:, j : j + 1])[:, 0])
    scale = max(float(np.abs(data).max()), 1.0)
    for _ in range(MAX_ITERATIONS):
        distance = _squared_distances(data, centres)
        label = np.argmin(distance, axis=1)
        updated = np.empty_like(centres)
        for j in range(count):
            members = label == j
            if members.any():
                updated[:, j] = data[:, members].mean(axis=1)
            else:
                far = int(np.argmax(distance[np.arange(n), label]))
                updated[:, j] = data[:, far]
                label[far] = j
        moved = float(np.abs(updated - centres).max())
        centres = updated
        if moved <= TOLERANCE * scale:
            break
    return centres


@dataclass(frozen=True)
class RadialBasis(DictionaryPart):
    """Radial basis functions around k-means centres (see the module docstring)."""

    function: Kind = "gaussian"
    count: int = 10
    seed: int = 0
    centres: tuple[tuple[float, ...], ...] | None = None  # (k, d) once fitted
    width: float | None = None
    kind = "rbf"

    def __post_init__(self) -> None:
        if self.function not in ("gaussian", "thin_plate"):
            raise ConfigError(f"rbf kind must be 'gaussian' or 'thin_plate'; got {self.function!r}")
        positive_int(self.count, "rbf centres")
        if isinstance(self.seed, bool) or not isinstance(self.seed, (int, np.integer)):
            raise ConfigError(f"rbf seed must be an integer; got {self.seed!r}")

    @property
    def needs_fit(self) -> bool:
        return self.centres is None

    def size(self, n_state: int) -> int:
        return self.count

    def fit(self, state: ArrayLike) -> RadialBasis:
        data = state_matrix(state)
        centres = kmeans(data, self.count, self.seed)
        if self.count > 1:
            gaps = np.sqrt(_squared_distances(centres, centres))
            width = float(np.median(gaps[np.triu_indices(self.count, 1)]))
        else:
            width = float(np.median(np.sqrt(_squared_distances(data, centres))))
        if not width > 0:
            raise FitError("rbf width is 0: the samples are all at the same point")
        return RadialBasis(
            self.function, self.count, self.seed, tuple(map(tuple, centres.T.tolist())), width
        )

    def describe(self, variables: Sequence[str]) -> Description:
        names = tuple(f"rbf{j}" for j in range(self.count))
        return Description(names, None, tuple(None for _ in variables))

    def _terms(self, state: np.ndarray, variables: Sequence[str]) -> np.ndarray:
        assert self.centres is not None and self.width is not None
        centres = np.array(self.centres).T
        if centres.shape[0] != state.shape[0]:
            raise FitError(
                f"rbf centres have {centres.shape[0]} variables; the state has {state.shape[0]}"
            )
        scaled = _squared_distances(state, centres).T / self.width**2  # (r / w)^2
        if self.function == "gaussian":
            return np.exp(-scaled)
        with np.errstate(divide="ignore", invalid="ignore"):
            value = 0.5 * scaled * np.log(scaled)  # (r/w)^2 log(r/w) = s log(s) / 2
        return np.where(scaled > 0, value, 0.0)

    def settings(self) -> dict[str, Any]:
        found: dict[str, Any] = {
            "kind": self.kind,
            "function": self.function,
            "centres": self.count,
            "seed": self.seed,
        }
        if self.centres is not None:
            found.update(centre_values=[list(c) for c in self.centres], width=self.width)
        return found


def rbf(kind: Kind = "gaussian", centres: int = 10, seed: int = 0) -> RadialBasis:
    """Gaussian or thin-plate radial basis functions around ``centres`` k-means centres.

    Parameters
    ----------
    kind : {"gaussian", "thin_plate"}
    centres : int
        Number of centres (= number of terms).
    seed : int
        Seed of the k-means++ start; same data and seed, same centres.

    Examples
    --------
    >>> x = np.random.default_rng(0).standard_normal((2, 200))
    >>> part = rbf("gaussian", centres=5, seed=1).fit(x)
    >>> part(x).shape
    (5, 200)
    """
    return RadialBasis(kind, centres, seed)
