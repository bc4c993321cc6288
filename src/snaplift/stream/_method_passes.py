"""The pass sequences of the randomized SVD and of TSQR over an archive (stream layer).

Each function drives its passes through the tile loop (``passes.read`` with the
tasks of :mod:`snaplift.stream._tasks`, folding results into a resumable
:class:`~snaplift.stream.loop.StreamState`) and finishes with the array kernels of
:mod:`snaplift.linalg.randomized` and :mod:`snaplift.linalg.tsqr`.

- :func:`randomized_compress`: Halko, Martinsson & Tropp (2011), SIAM Review 53(2),
  Algorithms 4.3/4.4 and 5.1: ``2 + 2q`` passes.
- :func:`tsqr_compress`: Demmel, Grigori, Hoemmen & Langou (2012), "Communication-optimal
  parallel and sequential QR and LU factorizations", SIAM J. Sci. Comput. 34(1): 2 passes.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from snaplift.archive.matrix import SnapshotMatrix
from snaplift.compress_methods import check_rank
from snaplift.linalg._kernels import normalize_signs, reduce_r_factors
from snaplift.linalg._testmatrix import gaussian_map
from snaplift.linalg.randomized import LowRank
from snaplift.linalg.tsqr import FLAT_TREE_BYTES, _binary_tree_factors, _flat_tree, orthonormal_basis
from snaplift.prepare import corrected_sketch, finish_preparation
from snaplift.stream._passes import _zeros, preparing_of, product_read, sketch_read
from snaplift.stream._tasks import tsqr_leaf_task, tsqr_task

__all__ = ["randomized_compress", "tsqr_compress"]


def randomized_compress(passes: Any, matrix: Any, jobs: list[Any], state: Any, *, rank: int, oversample: int,
                        power_iterations: int, seed: int, center: bool, scale: Any,
                        first_read: Any = None) -> tuple[Any, LowRank]:
    """Randomized SVD of the prepared snapshot matrix over the archive: ``2 + 2q`` streamed passes.

    Pass 0 reads ``Y = X_w Omega`` with the statistics (corrected to ``A Omega``
    afterwards); each power iteration is one pass for ``A^H Q`` and one for ``A Z``
    (each factor re-orthonormalised, Halko et al. 2011, Alg. 4.4); the last pass gives
    ``B^H = A^H Q`` and the exact column norms of ``A``. Every pass resumes from
    ``state`` (a :class:`~snaplift.stream.loop.StreamState`).

    Returns ``(Preparation, LowRank)``; the basis is in memory (n x rank).
    """
    n, m = matrix.shape
    check_rank(rank, n, m)
    width = min(rank + oversample, n, m)
    complex_valued = np.issubdtype(matrix.dtype, np.complexfloating)
    if state.pass_number == 0:
        sketch_read(passes, matrix, jobs, state, width, 0)
    preparation = finish_preparation(matrix, state.arrays["row_sum"], list(state.arrays["squares"]),
                                     center=center, scale=scale)
    if state.pass_number == 0:
        omega = gaussian_map(matrix.snapshot_index, width, seed=seed, complex_valued=complex_valued)
        state.arrays["q"] = orthonormal_basis(corrected_sketch(state.arrays.pop("range"), preparation, omega),
                                                  overwrite=True)
        passes.end_pass(state)
    preparing = passes.runner.share(preparing_of(preparation))
    for iteration in range(power_iterations):
        first = 1 + 2 * iteration
        if state.pass_number == first:
            product_read(passes, matrix, jobs, state, preparing, state.arrays["q"], "adjoint", name="adjoint",
                         norms=False)
            state.arrays["z"] = np.linalg.qr(state.arrays.pop("adjoint"))[0]
            state.arrays.pop("adjoint_norm_squares", None)  # from a checkpoint of an older run
            state.arrays.pop("q")  # the range pass makes the next one: n x k fewer during it
            passes.end_pass(state)
        if state.pass_number == first + 1:
            product_read(passes, matrix, jobs, state, preparing, state.arrays["z"], "range", name="range")
            state.arrays["q"] = orthonormal_basis(state.arrays.pop("range"), overwrite=True)
            state.arrays.pop("z", None)
            passes.end_pass(state)
    final = 1 + 2 * power_iterations
    if state.pass_number == final:
        product_read(passes, matrix, jobs, state, preparing, state.arrays["q"], "adjoint", name="projection")
        passes.end_pass(state)
    b = np.asarray(state.arrays["projection"]).conj().T  # B = Q^H A (width x m)
    u_small, s, vh = np.linalg.svd(b, full_matrices=False)
    u_small, vh = normalize_signs(u_small[:, :rank], vh[:rank])
    lowrank = LowRank(basis=state.arrays["q"] @ u_small, singular_value=s[:rank].astype(np.float64), vh=vh,
                      column_norm=np.sqrt(np.asarray(state.arrays["projection_norm_squares"], dtype=np.float64)),
                      passes=2 + 2 * power_iterations, projection_kind="exact")
    return preparation, lowrank


def tsqr_compress(passes: Any, matrix: SnapshotMatrix, jobs: list[Any], state: Any, *, rank: int, center: bool,
                  scale: str | dict[str, float]) -> tuple[Any, Any]:
    """Exact truncated SVD of the prepared snapshot matrix by TSQR over the archive (2 passes).

    ``jobs`` must each hold one row block with *all* selected snapshots. Returns
    ``(Preparation, LowRank)``. Centring is exact inside each leaf (it has every
    snapshot of its rows); the per-field scales, known only after the first pass, scale
    the leaves' R factors before the tree is reduced (``R(s X) = s R(X)`` for ``s > 0``).
    """
    n, m = matrix.shape
    fields = matrix.fields
    for job in jobs:
        if job.tile.columns != (0, m):
            raise ValueError("tsqr_compress needs tiles holding every selected snapshot")
    # one leaf per field and row block: a tile of several fields (lifted ones) holds one each
    leaves = [(f, job.tile.rows[0] if job.tile.span == 1 else 0) for job in jobs
              for f in range(job.tile.field, job.tile.field + job.tile.span)]
    if state.pass_number == 0:
        row_sum = _zeros(state, "row_sum", (n,), matrix.dtype)
        squares = _zeros(state, "squares", (len(fields), m), np.float64)

        def fold(tile: Any, result: dict[str, Any]) -> None:
            g0, g1 = tile.global_rows(passes.source)
            row_sum[g0:g1] += result["row_sum"]
            squares[tile.field:tile.field + tile.span] += np.reshape(result["squares"], (tile.span, -1))
            if tile.span > 1:
                for f, r in enumerate(result["r"], start=tile.field):
                    state.arrays[f"r_{f}_0"] = r
            else:
                state.arrays[f"r_{tile.field}_{tile.rows[0]}"] = result["r"]

        passes.read(tsqr_task, (bool(center),), jobs, fold, state)
        passes.end_pass(state)
    preparation = finish_preparation(matrix, state.arrays["row_sum"], list(state.arrays["squares"]),
                                     center=center, scale=scale)
    raw_r = [state.arrays[f"r_{f}_{r0}"] for f, r0 in leaves]
    scaled = [r / preparation.field_scale[fields[f].name] for r, (f, _) in zip(raw_r, leaves)]
    if sum(r.shape[0] for r in scaled) * m * np.dtype(matrix.dtype).itemsize <= FLAT_TREE_BYTES:
        # a flat tree: the stacked leaves are small (e.g. many lifted fields of few points),
        # one QR of them instead of a binary tree of as many QRs as leaves
        root, factors_of = _flat_tree(scaled)
    else:
        root, tree = reduce_r_factors(scaled)
        factors_of = _binary_tree_factors(len(leaves), tree)
    u_r, s, vh = np.linalg.svd(root, full_matrices=False)
    rank = min(rank, s.size)
    u_r, vh = normalize_signs(u_r[:, :rank], vh[:rank])
    factors = factors_of(u_r)
    if state.pass_number == 1:
        basis = _zeros(state, "basis", (n, rank), np.result_type(matrix.dtype, u_r.dtype))
        items = []
        position = 0
        for job in jobs:
            count = job.tile.span
            if count > 1:
                item = (job.tile, raw_r[position:position + count], factors[position:position + count])
            else:
                item = (job.tile, raw_r[position], factors[position])
            items.append(type(job)(job.id, item, job.nbytes))
            position += count

        def fold_basis(item: Any, result: dict[str, Any]) -> None:
            g0, g1 = item[0].global_rows(passes.source)
            basis[g0:g1] = result["basis"]

        passes.read(tsqr_leaf_task, (bool(center),), items, fold_basis, state)
        passes.end_pass(state)
    column_norm = np.linalg.norm(root, axis=0)  # A = Q R with orthonormal Q: ||a_j|| = ||R e_j||
    lowrank = LowRank(basis=state.arrays["basis"], singular_value=s[:rank].astype(np.float64), vh=vh,
                      column_norm=column_norm, passes=2, projection_kind="exact")
    return preparation, lowrank
