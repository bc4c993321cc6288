"""Tall-skinny QR with a reduction tree of R factors, in memory, on dask, and over an archive.

Demmel, Grigori, Hoemmen, Langou (2012), "Communication-optimal parallel and sequential
QR and LU factorizations", SIAM J. Sci. Comput. 34(1), A206-A239, Sec. 3 (TSQR): every
row block is factored by Householder QR, the R factors are stacked pairwise and factored
again up a binary tree, and Q is the product of the leaves' Q factors and the tree's,
applied implicitly. Q keeps orthonormal columns to machine precision whatever the
condition number (unlike Cholesky QR or the normal equations, which square it).

Over an archive (:func:`tsqr_compress`) a leaf is one row block x *all* selected
snapshots, so this method suits archives with few snapshots; on time-major archives its
tiles are partial-chunk reads (the planner says so and counts the bytes). Two passes:
R factors, then the basis ``U = Q U_R`` by recomputing each leaf (cheaper than storing Q,
which is as large as the archive); the second pass checks each leaf's R is reproduced.
Coefficients ``S V^H`` and column norms (``||R e_j||``) are exact.
"""

from __future__ import annotations

import os
from concurrent.futures import ThreadPoolExecutor
from typing import Any

import numpy as np

from snaplift.archive.matrix import SnapshotMatrix
from snaplift.linalg._blas import blas_threads
from snaplift.linalg._kernels import leaf_factors, normalize_signs, qr_factor, reduce_r_factors

__all__ = ["tsqr", "tsqr_compress", "orthonormal_basis", "CHOLESKY_QR_TOLERANCE"]

#: how far from the identity the Gram matrix of the first Cholesky QR step's ``Q`` may be
#: for the second step to give orthonormal columns (it is then a Cholesky QR of a matrix of
#: condition <= sqrt((1 + t) / (1 - t)), whose loss of orthogonality is a small multiple
#: of the unit roundoff; Yamamoto, Nakatsukasa, Yanagisawa, Fukaya 2015, Thm 3.3); beyond
#: it, Householder TSQR. The value is common practice, not taken from the paper.
CHOLESKY_QR_TOLERANCE = 1e-2


def _row_blocks(n: int, m: int, block_rows: int | None) -> list[tuple[int, int]]:
    rows = int(block_rows) if block_rows else max(4096, 2 * m)
    rows = max(rows, 1)
    return [(r0, min(r0 + rows, n)) for r0 in range(0, n, rows)] or [(0, 0)]


def tsqr(a: Any, *, block_rows: int | None = None) -> tuple[Any, np.ndarray]:
    """QR of a tall matrix by a reduction tree: ``a = Q @ R``, ``Q^H Q = I``.

    Parameters
    ----------
    a
        ``(n, m)`` numpy array, or a dask array with one column chunk (then ``Q`` is a lazy
        dask array and the leaves are its row chunks).
    block_rows
        Rows per leaf for numpy input (default ``max(4096, 2 m)``).

    Returns
    -------
    Q, R
        ``Q`` ``(n, min(n, m))``, ``R`` ``(min(n, m), m)`` upper triangular.

    References
    ----------
    Demmel, J., Grigori, L., Hoemmen, M., Langou, J. (2012). SIAM J. Sci. Comput. 34(1).

    Example
    -------
    >>> a = np.random.default_rng(0).standard_normal((10000, 5))
    >>> q, r = tsqr(a, block_rows=1000)
    >>> bool(np.allclose(q @ r, a)), bool(np.allclose(q.T @ q, np.eye(5)))
    (True, True)
    """
    try:
        import dask.array as da
    except ImportError:  # pragma: no cover - dask is a dependency
        da = None
    if da is not None and isinstance(a, da.Array):
        return _tsqr_dask(a)
    a = np.asarray(a)
    n, m = a.shape
    blocks = _row_blocks(n, m, block_rows)
    # leaves are independent and LAPACK releases the GIL: factor them on a few threads,
    # each with a single-threaded BLAS (threads calling a threaded BLAS oversubscribe)
    with blas_threads(1), ThreadPoolExecutor(max(1, min(4, os.cpu_count() or 1))) as pool:
        leaves = list(pool.map(lambda rows: qr_factor(a[rows[0]:rows[1]]), blocks))
        r, tree = reduce_r_factors([leaf[1] for leaf in leaves])
        factors = leaf_factors(len(leaves), tree, np.eye(r.shape[0], dtype=r.dtype))
        q = np.empty((n, r.shape[0]), dtype=np.result_type(a, r))

        def place(item: tuple[tuple[int, int], tuple[np.ndarray, np.ndarray], np.ndarray]) -> None:
            (r0, r1), (q_leaf, _), factor = item
            q[r0:r1] = q_leaf @ factor

        list(pool.map(place, zip(blocks, leaves, factors)))
    return q, r


def orthonormal_basis(a: np.ndarray) -> np.ndarray:
    """Orthonormal columns spanning those of a tall ``a`` (``n x m``, ``n >= m``): ``Q`` of ``a = Q R``.

    CholeskyQR2 (Fukaya, Nakatsukasa, Yanagisawa, Yamamoto 2014, "CholeskyQR2: a simple
    and communication-avoiding algorithm for computing a tall-skinny QR factorization"):
    twice ``G = a^H a`` (BLAS ``syrk``/``herk``), ``G = R^H R`` (Cholesky), ``a <- a R^-1``
    (``trsm``). Two reads of ``a`` in BLAS-3 kernels on all cores, about twice as fast as
    the Householder tree of :func:`tsqr` on a range sketch. Cholesky QR squares the
    condition number, so the result is used only when the second Gram matrix is within
    :data:`CHOLESKY_QR_TOLERANCE` of the identity (then the second step restores
    orthogonality to rounding, Yamamoto et al. 2015); otherwise (condition above ~1e7,
    rank deficiency, a Cholesky breakdown) the Householder :func:`tsqr` is used. Either
    way ``Q^H Q = I`` to rounding; ``Q`` may differ from :func:`tsqr`'s by column signs.

    Example
    -------
    >>> a = np.random.default_rng(0).standard_normal((10000, 5))
    >>> q = orthonormal_basis(a)
    >>> bool(np.allclose(q.T @ q, np.eye(5))), bool(np.allclose(q @ (q.T @ a), a))
    (True, True)
    """
    a = np.asarray(a)
    n, m = a.shape
    if m == 0 or n < 2 * m or a.dtype not in (np.float64, np.complex128):
        return tsqr(a)[0]
    first = _cholesky_qr_step(a)
    if first is None:
        return tsqr(a)[0]
    second = _cholesky_qr_step(first[0], identity_tolerance=CHOLESKY_QR_TOLERANCE)
    if second is None:
        return tsqr(a)[0]
    return second[0]


def _cholesky_qr_step(a: np.ndarray, identity_tolerance: float | None = None) -> tuple[np.ndarray, np.ndarray] | None:
    """One Cholesky QR step ``(a R^-1, R)``; None on breakdown or a Gram matrix too far from I."""
    from scipy.linalg import blas

    complex_valued = np.iscomplexobj(a)
    rank_update = blas.zherk if complex_valued else blas.dsyrk
    solve = blas.ztrsm if complex_valued else blas.dtrsm
    # a^T is column-major (m x n) for a C-ordered a, so BLAS reads a in place: upper triangle
    # of a^T conj(a^T)^H... = conj(a^H a) for complex data, a^T a for real
    if not a.flags.c_contiguous:
        a = np.ascontiguousarray(a)
    upper = rank_update(1.0, a.T, trans=0, lower=0)
    gram = np.triu(upper) + np.triu(upper, 1).conj().T
    if complex_valued:
        gram = gram.conj()
    if not np.all(np.isfinite(gram)):
        return None
    if identity_tolerance is not None and np.max(np.abs(gram - np.eye(gram.shape[0]))) > identity_tolerance:
        return None
    try:
        r = np.linalg.cholesky(gram).conj().T  # gram = R^H R, R upper triangular
    except np.linalg.LinAlgError:
        return None
    if not np.all(np.isfinite(r)) or np.min(np.abs(np.diag(r))) <= 0:
        return None
    # X R = a  <=>  R^T X^T = a^T: a left solve on the column-major a^T, no copy of a
    x_t = solve(1.0, r, a.T, side=0, lower=0, trans_a=1)
    q = x_t.T
    if not np.all(np.isfinite(q)):
        return None
    return q, r


def _tsqr_dask(a: Any) -> tuple[Any, np.ndarray]:
    import dask
    import dask.array as da

    if a.numblocks[1] != 1:
        raise ValueError(f"tsqr needs one column chunk; the array has column chunks {a.chunks[1]}")
    blocks = [block for block in a.to_delayed()[:, 0]]
    r_factors = dask.compute(*[dask.delayed(lambda x: qr_factor(x)[1], pure=True)(b) for b in blocks])
    r, tree = reduce_r_factors(list(r_factors))
    factors = leaf_factors(len(blocks), tree, np.eye(r.shape[0], dtype=r.dtype))
    dtype = np.result_type(a.dtype, r.dtype)
    pieces = [da.from_delayed(dask.delayed(lambda x, f: qr_factor(x)[0] @ f, pure=True)(b, factor),
                              shape=(rows, r.shape[0]), dtype=dtype)
              for b, factor, rows in zip(blocks, factors, a.chunks[0])]
    return da.concatenate(pieces, axis=0), r


def tsqr_compress(run: Any, matrix: SnapshotMatrix, jobs: list[Any], state: Any, *, rank: int, center: bool,
                  scale: str | dict[str, float]) -> tuple[Any, Any]:
    """Exact truncated SVD of the prepared snapshot matrix by TSQR over the archive (2 passes).

    ``jobs`` must each hold one row block with *all* selected snapshots. Returns
    ``(Preparation, LowRank)``. Centring is exact inside each leaf (it has every
    snapshot of its rows); the per-field scales, known only after the first pass, scale
    the leaves' R factors before the tree is reduced (``R(s X) = s R(X)`` for ``s > 0``).
    """
    from snaplift.linalg._passes import _zeros
    from snaplift.linalg._tasks import tsqr_leaf_task, tsqr_task
    from snaplift.linalg.randomized import LowRank
    from snaplift.prepare import finish_preparation

    n, m = matrix.shape
    fields = matrix.fields
    for job in jobs:
        if job.tile.columns != (0, m):
            raise ValueError("tsqr_compress needs tiles holding every selected snapshot")
    if state.pass_number == 0:
        row_sum = _zeros(state, "row_sum", (n,), matrix.dtype)
        squares = _zeros(state, "squares", (len(fields), m), np.float64)

        def fold(tile: Any, result: dict[str, Any]) -> None:
            g0 = fields[tile.field].offset + tile.rows[0]
            row_sum[g0:g0 + tile.rows[1] - tile.rows[0]] += result["row_sum"]
            squares[tile.field] += result["squares"]
            state.arrays[f"r_{tile.field}_{tile.rows[0]}"] = result["r"]

        run.run(tsqr_task, (bool(center),), jobs, fold, state)
        run.end_pass(state)
    preparation = finish_preparation(matrix, state.arrays["row_sum"], list(state.arrays["squares"]),
                                     center=center, scale=scale)
    raw_r = [state.arrays[f"r_{job.tile.field}_{job.tile.rows[0]}"] for job in jobs]
    scaled = [r / preparation.field_scale[fields[job.tile.field].name] for r, job in zip(raw_r, jobs)]
    root, tree = reduce_r_factors(scaled)
    u_r, s, vh = np.linalg.svd(root, full_matrices=False)
    rank = min(rank, s.size)
    u_r, vh = normalize_signs(u_r[:, :rank], vh[:rank])
    factors = leaf_factors(len(jobs), tree, u_r)
    if state.pass_number == 1:
        basis = _zeros(state, "basis", (n, rank), np.result_type(matrix.dtype, u_r.dtype))
        items = [type(job)(job.id, (job.tile, r, factor), job.nbytes) for job, r, factor in zip(jobs, raw_r, factors)]

        def fold_basis(item: Any, result: dict[str, Any]) -> None:
            tile = item[0]
            g0 = fields[tile.field].offset + tile.rows[0]
            basis[g0:g0 + tile.rows[1] - tile.rows[0]] = result["basis"]

        run.run(tsqr_leaf_task, (bool(center),), items, fold_basis, state)
        run.end_pass(state)
    column_norm = np.linalg.norm(root, axis=0)  # A = Q R with orthonormal Q: ||a_j|| = ||R e_j||
    lowrank = LowRank(basis=state.arrays["basis"], singular_value=s[:rank].astype(np.float64), vh=vh,
                      column_norm=column_norm, passes=2, projection_kind="exact")
    return preparation, lowrank
