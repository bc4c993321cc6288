"""Tall-skinny QR with a reduction tree of R factors, in memory, on dask, and over an archive.

Demmel, Grigori, Hoemmen, Langou (2012), "Communication-optimal parallel and sequential
QR and LU factorizations", SIAM J. Sci. Comput. 34(1), A206-A239, Sec. 3 (TSQR): every
row block is factored by Householder QR, the R factors are stacked pairwise and factored
again up a binary tree, and Q is the product of the leaves' Q factors and the tree's,
applied implicitly. Q keeps orthonormal columns to machine precision whatever the
condition number (unlike Cholesky QR or the normal equations, which square it).

Over an archive (:func:`snaplift.stream._method_passes.tsqr_compress`) a leaf is one row block x *all* selected
snapshots, so this method suits archives with few snapshots; on time-major archives its
tiles are partial-chunk reads (the planner says so and counts the bytes). Two passes:
R factors, then the basis ``U = Q U_R`` by recomputing each leaf (cheaper than storing Q,
which is as large as the archive); the second pass checks each leaf's R is reproduced.
Coefficients ``S V^H`` and column norms (``||R e_j||``) are exact.
"""

from __future__ import annotations

import sys
from concurrent.futures import ThreadPoolExecutor
from typing import Any

import numpy as np

from snaplift.linalg._blas import blas_threads
from snaplift.linalg._kernels import leaf_factors, qr_factor, reduce_r_factors
from snaplift.units import usable_cores

__all__ = ["tsqr", "orthonormal_basis", "CHOLESKY_QR_TOLERANCE"]

#: how far from the identity (largest entry of ``G - I``) the Gram matrix of a Cholesky QR
#: step's input may be for its output to be kept: the step is then a Cholesky QR of a
#: matrix of condition <= sqrt((1 + t) / (1 - t)), whose loss of orthogonality is a small
#: multiple of the unit roundoff (Yamamoto, Nakatsukasa, Yanagisawa, Fukaya 2015). The
#: value is common practice, not taken from the paper.
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
    # a dask array exists only once dask.array was imported (importing it just to ask
    # costs ~0.3 s of startup, with the pandas and xarray it pulls in)
    da = sys.modules.get("dask.array")
    if da is not None and isinstance(a, da.Array):
        return _tsqr_dask(a)
    a = np.asarray(a)
    n, m = a.shape
    blocks = _row_blocks(n, m, block_rows)
    # leaves are independent and LAPACK releases the GIL: factor them on a few threads,
    # each with a single-threaded BLAS (threads calling a threaded BLAS oversubscribe)
    with blas_threads(1), ThreadPoolExecutor(min(4, usable_cores())) as pool:
        leaves = list(pool.map(lambda rows: qr_factor(a[rows[0]:rows[1]]), blocks))
        r, tree = reduce_r_factors([leaf[1] for leaf in leaves])
        factors = leaf_factors(len(leaves), tree, np.eye(r.shape[0], dtype=r.dtype))
        q = np.empty((n, r.shape[0]), dtype=np.result_type(a, r))

        def place(item: tuple[tuple[int, int], tuple[np.ndarray, np.ndarray], np.ndarray]) -> None:
            (r0, r1), (q_leaf, _), factor = item
            q[r0:r1] = q_leaf @ factor

        list(pool.map(place, zip(blocks, leaves, factors)))
    return q, r


def orthonormal_basis(a: np.ndarray, *, overwrite: bool = False) -> np.ndarray:
    """Orthonormal columns spanning those of a tall ``a`` (``n x m``, ``n >= 2 m``): ``Q`` of ``a = Q R``.

    Cholesky QR steps ``G = a^H a`` (BLAS ``syrk``/``herk``), ``G = R^H R`` (Cholesky),
    ``a <- a R^-1`` (``trsm``), repeated: CholeskyQR2 (Fukaya, Nakatsukasa, Yanagisawa,
    Yamamoto 2014). Each step reads ``a`` once in BLAS-3 kernels on all cores, about twice
    as fast as the Householder tree of :func:`tsqr` on a range sketch. One step squares
    the condition number, so a step's result is kept only once its Gram matrix was
    within :data:`CHOLESKY_QR_TOLERANCE` of the identity (that step then restores
    orthogonality to rounding, Yamamoto, Nakatsukasa, Yanagisawa, Fukaya 2015); up to
    three steps are tried. When the first Cholesky breaks down (condition above ~1e8) the
    first step is shifted by ``11 (n m + m (m + 1)) u ||a||_F^2`` (shifted CholeskyQR3,
    Fukaya, Kannan, Nakatsukasa, Yamamoto, Yanagisawa 2020; the constant from memory, with
    the Frobenius norm bounding the 2-norm). If all that fails (condition near 1/u, rank
    deficiency) the Householder :func:`tsqr` is used. Either way ``Q^H Q = I`` to rounding;
    ``Q`` may differ from :func:`tsqr`'s by column signs. Row- or column-major ``a`` is
    read in place; ``Q`` has the same layout. With ``overwrite`` the caller gives up ``a``:
    the first step solves in its memory (no new array of its size; on a machine that maps
    memory on first use a fresh one costs more than the solve), and ``a`` is garbage after.
    Meant for the driver between passes: scipy's BLAS wrappers it calls hold the GIL, so it
    does not belong inside tile tasks that run beside others.

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
    if not (a.flags.c_contiguous or a.flags.f_contiguous):
        a = np.ascontiguousarray(a)
    if a.size <= SMALL_BLAS_VALUES:
        # a few milliseconds of work: one BLAS thread (a thread pool spinning up and waiting
        # costs more, up to 10x on a shared machine: measured 10 ms against 130-190 ms for
        # a 18750 x 50 Gram matrix with another job on the cores)
        with blas_threads(1):
            return _orthonormal(a, overwrite)
    return _orthonormal(a, overwrite)


#: arrays up to this many values get one BLAS thread in :func:`orthonormal_basis`
SMALL_BLAS_VALUES = 1 << 21


def _orthonormal(a: np.ndarray, overwrite: bool) -> np.ndarray:
    q, broke_down, last = _cholesky_qr(a, shifted=False, overwrite=overwrite)
    if q is None and broke_down:  # a broke-down first step solved nothing: ``a`` is intact
        q, _, last = _cholesky_qr(a, shifted=True, overwrite=overwrite)
    if q is not None:
        return q
    # the last finite iterate spans a's columns to rounding (a backward-stable solve), so
    # Householder on it is Householder on ``a`` (and ``a`` itself when nothing was solved)
    return tsqr(last)[0]


def _cholesky_qr(a: np.ndarray, *, shifted: bool, overwrite: bool
                 ) -> tuple[np.ndarray | None, bool, np.ndarray]:
    """Up to three Cholesky QR steps (the first shifted if asked).

    Returns ``(Q or None, the first step broke down, the last finite iterate)``.
    """
    n, m = a.shape
    q = a
    for step in range(3):
        gram = _gram(q)
        if gram is None:
            return None, step == 0, q
        converged = step > 0 and float(np.max(np.abs(gram - np.eye(m)))) <= CHOLESKY_QR_TOLERANCE
        if step == 0 and shifted:
            gram[np.diag_indices_from(gram)] += (11.0 * (n * m + m * (m + 1)) * np.finfo(np.float64).eps
                                                 * float(np.real(np.trace(gram))))
        solved = _cholesky_solve(q, gram, overwrite=overwrite or step > 0)  # step > 0: our own iterate
        if solved is None:
            return None, step == 0, q
        q = solved
        if converged:
            return q, False, q
    return None, False, q


#: rows of each partial Gram matrix in :func:`_gram`: a fixed split, so the sums (and the
#: bits of the result) do not depend on how many cores there are
GRAM_CHUNK_ROWS = 16384


def _gram(a: np.ndarray) -> np.ndarray | None:
    """``a^H a`` for a row- or column-major ``a``, read in place; None if not finite.

    A small ``a`` (up to :data:`SMALL_BLAS_VALUES` values) is one BLAS ``syrk``. A larger
    one is summed over fixed blocks of :data:`GRAM_CHUNK_ROWS` rows, in block order, each block's
    ``b^H b`` one numpy ``matmul`` with one BLAS thread, the blocks spread over the cores
    by a thread pool (numpy releases the GIL in BLAS). A multi-threaded BLAS ``syrk`` of
    the whole tall-skinny matrix (n x k, k ~ 100) splits only the small k x k result
    between its threads, which then wait on each other: on a loaded 2-core machine it
    took 0.7-3 s against 0.1 s with one thread (measured, 262144 x 81), 5.2 s of a
    sketch run's 6.3 s finish.
    """
    if a.size <= SMALL_BLAS_VALUES:  # milliseconds of work (one BLAS thread, orthonormal_basis)
        return _gram_syrk(a)
    n = a.shape[0]
    blocks = [(r0, min(n, r0 + GRAM_CHUNK_ROWS)) for r0 in range(0, n, GRAM_CHUNK_ROWS)]

    def part(rows: tuple[int, int]) -> np.ndarray:
        b = a[rows[0]:rows[1]]
        return np.matmul(b.conj().T, b)

    workers = min(usable_cores(), len(blocks))
    with blas_threads(1):
        if workers > 1:
            with ThreadPoolExecutor(workers) as pool:
                parts = list(pool.map(part, blocks))
        else:
            parts = [part(rows) for rows in blocks]
    total = parts[0]
    for value in parts[1:]:  # a fixed order of summation
        total += value
    # exactly Hermitian, from the upper triangle (as a BLAS syrk/herk would leave it)
    gram = np.triu(total) + np.triu(total, 1).conj().T
    if np.iscomplexobj(gram):  # a real diagonal, as herk leaves it
        gram[np.diag_indices_from(gram)] = gram.diagonal().real
    return gram if np.all(np.isfinite(gram)) else None


def _gram_syrk(a: np.ndarray) -> np.ndarray | None:
    """``a^H a`` by one BLAS ``syrk``/``herk`` call, for a small ``a`` (see :func:`_gram`)."""
    from scipy.linalg import blas

    complex_valued = np.iscomplexobj(a)
    rank_update = blas.zherk if complex_valued else blas.dsyrk
    if a.flags.f_contiguous:  # trans=1 (real) / 2 (complex): C = a^H a
        upper = rank_update(1.0, a, trans=2 if complex_valued else 1, lower=0)
        conjugate = False
    else:  # a^T is column-major: C = a^T conj(a^T)^H = conj(a^H a)
        upper = rank_update(1.0, a.T, trans=0, lower=0)
        conjugate = complex_valued
    gram = np.triu(upper) + np.triu(upper, 1).conj().T
    if conjugate:
        gram = gram.conj()
    return gram if np.all(np.isfinite(gram)) else None


def _cholesky_solve(a: np.ndarray, gram: np.ndarray, *, overwrite: bool = False) -> np.ndarray | None:
    """``a R^-1`` with ``gram = R^H R`` (Cholesky); None on breakdown, with ``a`` untouched.

    With ``overwrite`` the solve runs in ``a``'s memory (a fresh array of this size costs
    more to map than the solve itself on a machine whose memory is mapped on first use).
    A factor whose diagonal spans more than 1/u is a breakdown: its solve could overflow.
    """
    from scipy.linalg import blas

    try:
        r = np.linalg.cholesky(gram).conj().T  # upper triangular
    except np.linalg.LinAlgError:
        return None
    diagonal = np.abs(np.diag(r))
    if not np.all(np.isfinite(r)) or diagonal.min() <= np.finfo(np.float64).eps * diagonal.max():
        return None
    solve = blas.ztrsm if np.iscomplexobj(a) or np.iscomplexobj(r) else blas.dtrsm
    r = r.astype(a.dtype, copy=False)
    if a.flags.f_contiguous:  # X R = a: a right solve on a
        q = solve(1.0, r, a, side=1, lower=0, overwrite_b=int(overwrite))
    else:  # X R = a  <=>  R^T X^T = a^T: a left solve on the column-major a^T
        q = solve(1.0, r, a.T, side=0, lower=0, trans_a=1, overwrite_b=int(overwrite)).T
    if not np.all(np.isfinite(q)):
        if overwrite:  # cannot happen with the diagonal bounded above; never return garbage
            raise FloatingPointError(f"Cholesky QR of a {a.shape[0]} x {a.shape[1]} matrix overflowed in place")
        return None
    return q


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


#: stacked leaf R factors up to this size are reduced by one QR (a flat tree)
FLAT_TREE_BYTES = 32 * 2**20


def _flat_tree(leaves: list[np.ndarray]) -> tuple[np.ndarray, Any]:
    """A one-level reduction tree: ``[R_1; ...; R_L] = Q R``; leaf ``i``'s factor is its
    rows of ``Q`` times the top (Demmel et al. 2012 allow any tree shape)."""
    q, root = qr_factor(np.concatenate(leaves, axis=0))
    bounds = np.cumsum([0] + [leaf.shape[0] for leaf in leaves])

    def factors(top: np.ndarray) -> list[np.ndarray]:
        product = q @ top
        return [product[bounds[i]:bounds[i + 1]] for i in range(len(leaves))]

    return root, factors


def _binary_tree_factors(count: int, tree: list[Any]) -> Any:
    def factors(top: np.ndarray) -> list[np.ndarray]:
        return leaf_factors(count, tree, top)

    return factors
