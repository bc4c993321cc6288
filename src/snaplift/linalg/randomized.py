"""Randomized SVD: over an archive in a bounded streaming loop, or of a lazy dask array.

Halko, Martinsson & Tropp (2011), "Finding structure with randomness: probabilistic
algorithms for constructing approximate matrix decompositions", SIAM Review 53(2),
Algorithms 4.3/4.4 (randomized range finder with QR-stabilised subspace iteration) and
Algorithm 5.1 (direct SVD of the small projected matrix).

Passes over the data: one for the range sketch, two per power iteration, one for the
projection ``B = Q^H A``: ``2 + 2q`` in all. :func:`snaplift.stream._method_passes.randomized_compress` streams the
archive tile by tile (the statistics for centring and scaling come from the first read,
whose sketch is corrected afterwards; later passes centre and scale inside each tile);
:func:`randomized_svd` does the same on a dask array that fits a task graph.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np

from snaplift.compress_methods import check_rank
from snaplift.linalg._kernels import normalize_signs
from snaplift.linalg._testmatrix import gaussian_map

if TYPE_CHECKING:  # dask.array (and the xarray/pandas it pulls in) costs ~0.5 s to import
    import dask.array as da

__all__ = ["LowRank", "randomized_svd", "gaussian_map"]

ComputeFn = Callable[..., Sequence[Any]]
PersistFn = Callable[..., Sequence[Any]]


@dataclass(frozen=True)
class LowRank:
    """``A ~= basis @ diag(singular_value) @ vh`` with ``coefficient = diag(s) @ vh``.

    ``basis`` is ``(n, rank)``: a numpy array from the streaming methods, a lazy dask
    array from :func:`randomized_svd`. ``column_norm`` is the norm of every column of A,
    so the energy the basis misses per snapshot is known without another read.
    ``projection_kind`` says whether coefficients and column norms are ``"exact"`` or
    single-pass ``"estimate"`` s (sketch without a check pass).
    """

    basis: Any
    singular_value: np.ndarray
    vh: np.ndarray
    column_norm: np.ndarray
    passes: int
    projection_kind: str = "exact"

    @property
    def coefficient(self) -> np.ndarray:
        return self.singular_value[:, np.newaxis] * self.vh

    @property
    def rank(self) -> int:
        return int(self.singular_value.size)

    def projection_error(self) -> np.ndarray:
        """Relative norm of each column of A outside span(basis) (see ``projection_kind``)."""
        captured = np.sum(np.abs(self.coefficient) ** 2, axis=0)
        total = self.column_norm**2
        missed = np.sqrt(np.clip(total - captured, 0.0, None))
        return np.divide(missed, self.column_norm, out=np.zeros_like(missed), where=self.column_norm > 0)


def _orth(y: da.Array) -> da.Array:
    import dask.array as da

    if y.numblocks[1] != 1:
        y = y.rechunk({1: -1})
    q, _ = da.linalg.qr(y)
    return q


def _small(array: np.ndarray, chunks: tuple[tuple[int, ...], ...]) -> da.Array:
    import dask.array as da

    return da.from_array(array, chunks=chunks)


def randomized_svd(
    matrix: da.Array,
    rank: int,
    *,
    oversample: int = 10,
    power_iterations: int = 1,
    seed: int = 0,
    snapshot_index: np.ndarray | None = None,
    range_sketch: da.Array | np.ndarray | None = None,
    compute: ComputeFn | None = None,
    persist: PersistFn | None = None,
) -> LowRank:
    """Randomized truncated SVD of a lazy (n x m) dask array, complex-safe.

    Parameters
    ----------
    matrix
        The prepared snapshot matrix (points x snapshots), lazy.
    rank
        Number of singular triplets kept.
    oversample
        Extra sketch columns; Halko et al. (2011, Sec. 4.2) recommend 5-10.
    power_iterations
        Subspace iterations ``q``, each QR-stabilised (Halko et al. 2011, Alg. 4.4).
    seed
        Seed of the test matrix; same seed, same result.
    snapshot_index
        Global snapshot number of each column (keys the test matrix; default 0..m-1).
    range_sketch
        ``matrix @ gaussian_map(snapshot_index, rank + oversample, seed=seed, ...)``, when
        the caller computed it in a pass of its own.
    compute, persist
        Supplied by the workflow runner, which owns the scheduler.

    Returns
    -------
    LowRank
        Lazy basis, singular values, right vectors with normalised phases, exact column
        norms and the number of passes over ``matrix``.

    References
    ----------
    Halko, N., Martinsson, P.-G., Tropp, J. A. (2011). SIAM Review 53(2), 217-288.

    Example
    -------
    >>> x = da.random.default_rng(0).standard_normal((500, 60), chunks=(100, 20))
    >>> result = randomized_svd(x, 5, seed=1)
    >>> result.singular_value.shape
    (5,)
    """
    import dask
    import dask.array as da

    compute = compute or dask.compute
    persist = persist or dask.persist
    n, m = matrix.shape
    width = min(rank + oversample, n, m)
    check_rank(rank, n, m)
    complex_valued = np.issubdtype(matrix.dtype, np.complexfloating)
    column_chunks = matrix.chunks[1]
    passes = 0
    if snapshot_index is None:
        snapshot_index = np.arange(m)
    if range_sketch is None:
        omega = gaussian_map(snapshot_index, width, seed=seed, complex_valued=complex_valued)
        range_sketch = matrix @ _small(omega, (column_chunks, (width,)))
        passes += 1
    y = range_sketch if isinstance(range_sketch, da.Array) else da.from_array(
        range_sketch, chunks=(matrix.chunks[0], (width,))
    )
    (q,) = persist(_orth(y.rechunk((matrix.chunks[0], (width,)))))
    for _ in range(power_iterations):
        (z,) = persist(_orth(matrix.conj().T @ q))
        passes += 1
        (q,) = persist(_orth(matrix @ z.rechunk((column_chunks, (width,)))))
        passes += 1
    # B^H = A^H Q (m x width); the column norms of A come from the same read
    b_conj, column_norm_sq = compute(matrix.conj().T @ q, (abs(matrix) ** 2).sum(axis=0))
    passes += 1
    b = np.asarray(b_conj).conj().T
    u_small, s, vh = np.linalg.svd(b, full_matrices=False)
    u_small, vh = u_small[:, :rank], vh[:rank]
    u_small, vh = normalize_signs(u_small, vh)
    basis = q @ da.from_array(u_small, chunks=(q.chunks[1], (rank,)))
    return LowRank(
        basis=basis,
        singular_value=s[:rank].astype(np.float64),
        vh=vh,
        column_norm=np.sqrt(np.asarray(column_norm_sq, dtype=np.float64)),
        passes=passes,
    )
