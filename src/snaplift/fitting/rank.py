"""How many singular values to keep: a number, an energy fraction, or the optimal hard threshold.

The optimal hard threshold is that of Gavish & Donoho (2014), "The optimal hard threshold
for singular values is 4/sqrt(3)", IEEE Trans. Inf. Theory 60(8), 5040-5053.
"""

from __future__ import annotations

import numbers
import operator
from typing import Literal

import numpy as np
from numpy.typing import ArrayLike

from snaplift.errors import FitError

__all__ = [
    "choose_rank",
    "hard_threshold",
    "threshold_coefficient_known_noise",
    "threshold_coefficient_unknown_noise",
]

RankMethod = Literal["number", "energy", "optimal"]


def threshold_coefficient_known_noise(beta: float) -> float:
    """lambda*(beta) of Gavish & Donoho (2014), eq. (11): threshold / (sqrt(n) sigma).

    ``lambda*(beta) = sqrt(2 (beta + 1) + 8 beta / ((beta + 1) + sqrt(beta^2 + 14 beta + 1)))``
    with ``beta = min(n, m) / max(n, m)``; ``lambda*(1) = 4 / sqrt(3)``.
    """
    beta = _aspect_ratio(beta)
    return float(
        np.sqrt(
            2.0 * (beta + 1.0) + 8.0 * beta / ((beta + 1.0) + np.sqrt(beta**2 + 14.0 * beta + 1.0))
        )
    )


def threshold_coefficient_unknown_noise(beta: float) -> float:
    """omega(beta) of Gavish & Donoho (2014): threshold / median singular value.

    Their cubic approximation ``0.56 beta^3 - 0.95 beta^2 + 1.82 beta + 1.43``
    (``omega(1) ~= 2.858`` in the paper).
    """
    beta = _aspect_ratio(beta)
    return 0.56 * beta**3 - 0.95 * beta**2 + 1.82 * beta + 1.43


def hard_threshold(
    singular_values: ArrayLike,
    shape: tuple[int, int],
    *,
    noise: float | None = None,
) -> float:
    """Optimal hard threshold tau for the singular values of an ``n x m`` noisy matrix.

    Parameters
    ----------
    singular_values : array_like, shape (k,)
        Singular values in non-increasing order. For unknown noise these must be all
        ``min(n, m)`` of them, because the noise level is estimated from their median.
    shape : (int, int)
        Shape ``(n, m)`` of the matrix the singular values belong to.
    noise : float, optional
        Standard deviation of the white noise per entry, if known. Then
        ``tau = lambda*(beta) sqrt(max(n, m)) noise``; otherwise
        ``tau = omega(beta) median(singular_values)``.

    Returns
    -------
    float
        Keep the singular values strictly larger than tau.

    References
    ----------
    Gavish, M. & Donoho, D. L. (2014), "The optimal hard threshold for singular values is
    4/sqrt(3)", IEEE Trans. Inf. Theory 60(8), 5040-5053.

    Examples
    --------
    >>> hard_threshold([10.0, 1.0, 1.0], (3, 3), noise=None) > 1.0
    True
    """
    values = _singular_values(singular_values)
    n, m = _shape(shape)
    beta = min(n, m) / max(n, m)
    if noise is not None:
        if isinstance(noise, bool) or not isinstance(noise, numbers.Real) or not noise > 0:
            raise FitError(f"noise must be a positive standard deviation; got {noise!r}")
        return threshold_coefficient_known_noise(beta) * np.sqrt(max(n, m)) * float(noise)
    if values.size != min(n, m):
        raise FitError(
            f"the optimal hard threshold with unknown noise needs all min(n, m) = {min(n, m)} "
            f"singular values of the {n} x {m} matrix (it uses their median); got {values.size}. "
            "Pass noise= if the noise level is known, or choose the rank by number or energy"
        )
    return threshold_coefficient_unknown_noise(beta) * float(np.median(values))


def choose_rank(
    singular_values: ArrayLike,
    *,
    rank: int | None = None,
    energy: float | None = None,
    shape: tuple[int, int] | None = None,
    method: RankMethod | None = None,
    noise: float | None = None,
) -> int:
    """Number of singular values to keep.

    Exactly one rule applies; ``method`` may name it, otherwise it follows from which of
    ``rank`` / ``energy`` is given:

    - ``"number"``: ``rank`` itself, checked against the number available;
    - ``"energy"``: the smallest r with ``sum(s[:r]**2) >= energy * sum(s**2)``;
    - ``"optimal"``: the count of singular values above the optimal hard threshold of
      Gavish & Donoho (2014) (see :func:`hard_threshold`; needs ``shape``).

    Parameters
    ----------
    singular_values : array_like, shape (k,)
        Non-negative, non-increasing singular values.
    rank : int, optional
        Rank to keep (rule ``"number"``).
    energy : float, optional
        Fraction of the total ``sum(s**2)`` to keep, in (0, 1] (rule ``"energy"``).
    shape : (int, int), optional
        Shape of the matrix, required by rule ``"optimal"``.
    method : {"number", "energy", "optimal"}, optional
        The rule; inferred from ``rank`` / ``energy`` when omitted.
    noise : float, optional
        Known noise standard deviation for rule ``"optimal"``.

    Returns
    -------
    int
        The rank, at least 1.

    Raises
    ------
    FitError
        For a missing or contradictory rule, out-of-range values, or no singular value
        above the threshold.

    References
    ----------
    Gavish, M. & Donoho, D. L. (2014), "The optimal hard threshold for singular values is
    4/sqrt(3)", IEEE Trans. Inf. Theory 60(8), 5040-5053.

    Examples
    --------
    >>> choose_rank([3.0, 2.0, 1.0], energy=0.9)
    2
    >>> choose_rank([3.0, 2.0, 1.0], rank=1)
    1
    """
    values = _singular_values(singular_values)
    rule = _resolve_method(method, rank=rank, energy=energy, shape=shape, noise=noise)
    if rule == "number":
        if isinstance(rank, bool) or not isinstance(rank, numbers.Integral):
            raise FitError(f"rank must be a positive integer; got {rank!r}")
        if not 1 <= int(rank) <= values.size:
            raise FitError(
                f"rank {rank} is not available: choose 1 <= rank <= {values.size} "
                "(the number of singular values)"
            )
        return int(rank)
    if rule == "energy":
        if isinstance(energy, bool) or not isinstance(energy, numbers.Real) or not 0 < energy <= 1:
            raise FitError(f"energy must be a fraction in (0, 1]; got {energy!r}")
        cumulative = np.cumsum(values**2)
        total = cumulative[-1]
        if total == 0:
            raise FitError("all singular values are zero; no rank captures any energy")
        # A few ulps of slack so that a fraction met exactly is not missed by rounding.
        reached = cumulative >= float(energy) * total * (1.0 - 8.0 * np.finfo(float).eps)
        return int(np.argmax(reached)) + 1
    assert shape is not None  # _resolve_method checked it
    tau = hard_threshold(values, shape, noise=noise)
    kept = int(np.count_nonzero(values > tau))
    if kept == 0:
        raise FitError(
            f"no singular value is above the optimal hard threshold {tau:.6g} (largest "
            f"{values[0]:.6g}); the data look like noise at this size: choose the rank by number"
        )
    return kept


def _resolve_method(
    method: str | None,
    *,
    rank: object,
    energy: object,
    shape: object,
    noise: object,
) -> str:
    given = [name for name, value in (("rank", rank), ("energy", energy)) if value is not None]
    if method is None:
        if len(given) != 1:
            raise FitError(
                "choose_rank needs exactly one rule: rank=N, energy=FRACTION or "
                f"method='optimal' with shape=(n, m); got {given or 'none'}"
            )
        method = "number" if given == ["rank"] else "energy"
    if method not in ("number", "energy", "optimal"):
        raise FitError(f"method must be one of 'number', 'energy', 'optimal'; got {method!r}")
    wanted = {"number": ["rank"], "energy": ["energy"], "optimal": []}[method]
    if given != wanted:
        raise FitError(
            f"method {method!r} takes {wanted or 'neither rank nor energy'}; got {given or 'none'}"
        )
    if method == "optimal" and shape is None:
        raise FitError(
            "method 'optimal' needs shape=(n, m) of the matrix the singular values belong to"
        )
    if method != "optimal" and noise is not None:
        raise FitError(f"noise= only applies to method 'optimal'; got method {method!r}")
    return method


def _singular_values(values: ArrayLike) -> np.ndarray:
    array = np.asarray(values)
    if array.ndim != 1 or array.size == 0:
        raise FitError(f"singular_values must be a non-empty 1-D array; got shape {array.shape}")
    if np.iscomplexobj(array) or not np.issubdtype(array.dtype, np.number):
        raise FitError(f"singular_values must be real numbers; got dtype {array.dtype}")
    array = array.astype(np.float64)
    bad = np.flatnonzero(~np.isfinite(array) | (array < 0))
    if bad.size:
        raise FitError(
            f"singular_values[{bad[0]}] is {array[bad[0]]}; singular values are finite and >= 0"
        )
    rising = np.flatnonzero(np.diff(array) > 0)
    if rising.size:
        i = rising[0]
        raise FitError(
            f"singular_values must be non-increasing; singular_values[{i + 1}] = {array[i + 1]} "
            f"> singular_values[{i}] = {array[i]}"
        )
    return array


def _shape(shape: object) -> tuple[int, int]:
    try:
        sizes = [operator.index(v) for v in shape]  # type: ignore[attr-defined]
    except TypeError:
        sizes = []
    flags = [isinstance(v, bool) for v in shape] if sizes else []  # type: ignore[attr-defined]
    if len(sizes) != 2 or any(flags) or min(sizes) < 1:
        raise FitError(f"shape must be two positive integers (n, m); got {shape!r}")
    return sizes[0], sizes[1]


def _aspect_ratio(beta: float) -> float:
    value = float(beta)
    if not 0 < value <= 1:
        raise FitError(f"aspect ratio beta = min(n, m) / max(n, m) must be in (0, 1]; got {beta!r}")
    return value
