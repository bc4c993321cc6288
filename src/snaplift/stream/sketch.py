"""Finishing a single-pass sketch: preparation, corrected sketches, reconstruction, rank-r SVD.

The read (:func:`snaplift.stream._passes.sketch_read`) leaves a
:class:`~snaplift.linalg.sketch.SketchState` of the raw weighted data; this module turns it
into the prepared matrix's low-rank factors without reading the archive again. It joins
what lives side by side one layer down: the statistics and their corrections
(:mod:`snaplift.prepare`), the field rows of the snapshot matrix (:mod:`snaplift.archive.matrix`)
and the array kernels (:mod:`snaplift.linalg.sketch`).

Tropp, Yurtsever, Udell, Cevher (2017), SIAM J. Matrix Anal. Appl. 38(4), 1454-1485:
Algorithms 4 (``Q = orth(Y)``, ``X = (Psi Q)^+ W``) and 7 (fixed-rank truncation).
"""

from __future__ import annotations

from typing import Any

import numpy as np

from snaplift.archive.matrix import SnapshotMatrix
from snaplift.errors import ArchiveError
from snaplift.linalg._testmatrix import gaussian_map
from snaplift.linalg.randomized import LowRank
from snaplift.linalg.sketch import (
    SketchState,
    exact_corange,
    exact_layout,
    psi_products,
    reconstruction_core,
    truncated_factors,
)
from snaplift.linalg.tsqr import orthonormal_basis
from snaplift.prepare import (
    Preparation,
    corrected_corange,
    corrected_sketch,
    finish_preparation,
    prepared_column_squares,
)

__all__ = ["finish_sketch", "sketch_reconstruction"]


def _exact_runs(matrix: SnapshotMatrix, exact: np.ndarray, start: np.ndarray) -> list[tuple[int, int, int]]:
    """Runs of adjacent kept fields as ``(column in exact_rows, global row start, stop)``."""
    runs: list[list[int]] = []
    for index, field in enumerate(matrix.fields):
        if not exact[index]:
            continue
        if runs and runs[-1][2] == field.offset:
            runs[-1][2] = field.stop
        else:
            runs.append([int(start[index]), int(field.offset), int(field.stop)])
    return [(a, b, c) for a, b, c in runs]


def sketch_reconstruction(state: SketchState, matrix: SnapshotMatrix, *, center: bool, scale: Any,
                          row_blocks: list[list[tuple[int, int]]] | None = None
                          ) -> tuple[Preparation, np.ndarray, np.ndarray]:
    """``A ~ Q X`` from the sketches (Tropp et al. 2017, Alg. 4), before rank truncation.

    Returns the preparation, ``Q`` (n x k, orthonormal) and ``X`` (k x m).
    """
    m = matrix.shape[1]
    if state.snapshot_index.size != m or not np.array_equal(state.snapshot_index, matrix.snapshot_index):
        raise ArchiveError(
            f"{matrix.reader.path}: the sketch holds {state.snapshot_index.size} snapshots but the snapshot "
            f"matrix has {m}; append the missing snapshots first"
        )
    k, l = state.widths
    exact, start = exact_layout([f.n_rows for f in matrix.fields], state.exact_limit)
    if state.corange_sketch.shape[0] != int(np.count_nonzero(~exact)) or state.exact().shape[1] != int(start[-1]):
        raise ArchiveError(
            f"{matrix.reader.path}: the sketch holds {state.corange_sketch.shape[0]} co-range sketches and "
            f"{state.exact().shape[1]} kept rows; the snapshot matrix's fields need {int(np.count_nonzero(~exact))} "
            f"and {int(start[-1])}; fields, mask and weights must not change"
        )
    preparation = finish_preparation(matrix, state.row_sum, list(state.squares), center=center, scale=scale)
    omega = gaussian_map(state.snapshot_index, k, seed=state.seed, complex_valued=state.complex_valued)
    # corrected_sketch returns a new array: it may be overwritten
    q = orthonormal_basis(corrected_sketch(state.range_sketch, preparation, omega), overwrite=True)
    sketched = [index for index in range(len(matrix.fields)) if not exact[index]]
    psi_q, psi_mean = psi_products(q, [(f.offset, f.stop) for f in matrix.fields], l, seed=state.seed,
                                   complex_valued=state.complex_valued, kind=state.corange_map,
                                   mean=preparation.mean, mean_fields=sketched, row_blocks=row_blocks)
    # (m, l) = (Psi A)^T: the sketched fields corrected by their statistics, the kept rows prepared and mapped
    w_t = corrected_corange(dict(zip(sketched, state.corange_sketch)), preparation,
                            psi_mean if preparation.mean is not None else None)
    kept = exact_corange(state.exact(), _exact_runs(matrix, exact, start), preparation.row_scale,
                         preparation.mean, l, seed=state.seed, complex_valued=state.complex_valued,
                         kind=state.corange_map)
    if kept is not None:
        w_t = kept if w_t is None else w_t + kept
    if w_t is None:
        raise ArchiveError(f"{matrix.reader.path}: the sketch holds no fields")
    return preparation, q, reconstruction_core(psi_q, w_t)


def finish_sketch(state: SketchState, matrix: SnapshotMatrix, rank: int, *, center: bool, scale: Any,
                  row_blocks: list[list[tuple[int, int]]] | None = None) -> tuple[Preparation, LowRank]:
    """Centring/scaling from the statistics, corrected sketches, reconstruction, rank-r SVD.

    No read of the archive. The coefficients ``diag(s) V^H`` are those of the sketch
    reconstruction and the column norms are exact without centring and estimated with it,
    so :meth:`LowRank.projection_error` is an estimate (``projection_kind="estimate"``).

    References
    ----------
    Tropp, J. A., Yurtsever, A., Udell, M., Cevher, V. (2017). SIAM J. Matrix Anal. Appl.
    38(4), 1454-1485, Algorithms 4 and 7.

    Example
    -------
    >>> preparation, lowrank = finish_sketch(state, matrix, 20, center=False, scale="rms")  # doctest: +SKIP
    """
    m = matrix.shape[1]
    k, l = state.widths
    if rank > min(k, l):
        raise ArchiveError(f"compress.rank = {rank} exceeds the sketch widths ({k}, {l})")
    preparation, q, core = sketch_reconstruction(state, matrix, center=center, scale=scale, row_blocks=row_blocks)
    basis, singular_value, vh = truncated_factors(q, core, rank)
    cross = None
    if preparation.mean is not None:
        # Re(mu_f^H a_fj) from the reconstruction a_j ~ Q core_j (an estimate, labelled so)
        cross = np.empty((len(matrix.fields), m))
        for index, field in enumerate(matrix.fields):
            mu = preparation.mean[field.offset:field.stop]
            cross[index] = np.real((mu.conj() @ q[field.offset:field.stop]) @ core)
    column_norm = np.sqrt(prepared_column_squares(preparation, state.squares, matrix.fields, cross))
    lowrank = LowRank(basis=basis, singular_value=singular_value, vh=vh, column_norm=column_norm,
                      passes=1, projection_kind="estimate")
    return preparation, lowrank
