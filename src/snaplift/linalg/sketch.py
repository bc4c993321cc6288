"""Single-pass randomized low-rank approximation of the snapshot matrix, with appends.

Tropp, Yurtsever, Udell, Cevher (2017), "Practical sketching algorithms for low-rank
matrix approximation", SIAM J. Matrix Anal. Appl. 38(4), 1454-1485: Algorithm 2 (range
sketch ``Y = A Omega`` and co-range sketch ``W = Psi A`` gathered in one read), Algorithm 4
(``Q = orth(Y)``, ``X = (Psi Q)^+ W``, ``A ~ Q X``) and Section 6 / Algorithm 7 (fixed-rank
truncation through the SVD of the small ``X``); the streaming setting and linear updates
are those of Tropp et al. (2019), SIAM J. Sci. Comput. 41(4), A2430-A2463.

Widths. For target rank ``r`` the default is ``k = 2 r + 1`` and ``l = 2 k + 1``: with the
co-range twice the range width the first factor of the error bound (Thm 4.3, 2017)
equals 2 for real data, and ``k = 2r + 1`` leaves room for the tail minimisation over
``rho < k - 1``. ``compress.sketch_widths`` overrides it; the benchmark reports the
accuracy and cost of both this choice and a cheaper ``k = r + 10, l = 2k + 1``.

Co-range map. ``compress.corange_map: sparse`` (the default) draws ``Psi`` as a sparse
sign matrix with ``zeta = min(l, 8)`` nonzeros per column (Tropp et al. 2019, Sec. 3.3),
``gaussian`` as a dense Gaussian one (the map of the 2017 error bound, Thm 4.3). The
sparse map costs ``zeta`` additions per entry of the archive instead of ``l``
multiply-adds, so the co-range width is almost free; its errors match the Gaussian map's
(measured: ``tests/linalg/test_sketch_maps.py`` and ``snaplift bench``). Both keep the
range map ``Omega`` Gaussian: the basis comes from the range sketch.

Because both sketches are linear in ``A`` and the test matrices are keyed by global
snapshot/row index, snapshots appended to an archive update the sketch state by reading
only the new ones (:func:`append_sketch`); the result equals a from-scratch run to rounding.
Coefficients and projection errors from a single pass are estimates (``kind="estimate"``).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from snaplift.archive.matrix import SnapshotMatrix
from snaplift.errors import ArchiveError
from snaplift.linalg._kernels import normalize_signs, solve_small
from snaplift.linalg._testmatrix import apply_left, cached_row_map, gaussian_map, row_map
from snaplift.linalg.randomized import LowRank
from snaplift.linalg.tsqr import orthonormal_basis
from snaplift.prepare import (
    Preparation,
    corrected_corange,
    corrected_sketch,
    finish_preparation,
    prepared_column_squares,
)

__all__ = ["SketchState", "default_sketch_widths", "finish_sketch", "sketch_reconstruction", "merge_sketches",
           "sketch_error_bound"]

#: codes of the co-range map kinds in the stored ``sketch/parameters``
_MAP_CODES = {"gaussian": 0, "sparse": 1}
#: rows of Psi generated at a time when the driver forms Psi Q (bounds its memory)
_DRIVER_ROWS = 1 << 15


def default_sketch_widths(rank: int, n: int | None = None, m: int | None = None) -> tuple[int, int]:
    """``(k, l) = (2r + 1, 2k + 1)`` (Tropp et al. 2017, Sec. 4.5), clipped to the matrix size.

    Example
    -------
    >>> default_sketch_widths(40)
    (81, 163)
    """
    k = 2 * int(rank) + 1
    l = 2 * k + 1
    if n is not None and m is not None:
        k = min(k, n, m)
        l = min(max(l, k), n)
    return k, l


def sketch_error_bound(singular_values: np.ndarray, k: int, l: int, *, complex_valued: bool = False) -> float:
    """Expected squared Frobenius error of the rank-``k`` sketch reconstruction ``Q X``.

    Tropp et al. (2017), Theorem 4.3: with ``alpha = 1`` (real) or ``0`` (complex) and
    ``f(s, t) = s / (t - s - alpha)``,
    ``E ||A - Q X||_F^2 <= (1 + f(k, l)) * min_{rho < k - alpha} (1 + f(rho, k)) * tail(rho)^2``
    where ``tail(rho)^2 = sum_{j > rho} sigma_j^2``.
    """
    alpha = 0 if complex_valued else 1
    s2 = np.asarray(singular_values, dtype=np.float64) ** 2
    tails = np.concatenate([np.cumsum(s2[::-1])[::-1], [0.0]])

    def f(s: int, t: int) -> float:
        return s / (t - s - alpha)

    best = min((1 + f(rho, k)) * tails[rho] for rho in range(0, k - alpha) if rho < tails.size)
    return float((1 + f(k, l)) * best)


@dataclass
class SketchState:
    """The linear sketches of the raw weighted data ``X_w`` and its statistics (store ``sketch/``).

    ``range_sketch`` = ``X_w Omega`` (n x k); ``corange_sketch[f]`` = ``(Psi_f X_f)^T``
    (m x l); ``row_sum`` (n,); ``squares[f, j]`` = ``||x_fj||^2``; ``snapshot_index`` the
    archive snapshots already folded in. Centring and scaling are applied only when the
    state is finished, so appends never need the old snapshots.
    """

    range_sketch: np.ndarray
    corange_sketch: np.ndarray
    row_sum: np.ndarray
    squares: np.ndarray
    snapshot_index: np.ndarray
    seed: int
    complex_valued: bool
    #: the co-range map (``compress.corange_map``); stores written before it existed are Gaussian
    corange_map: str = "gaussian"

    @property
    def widths(self) -> tuple[int, int]:
        return int(self.range_sketch.shape[1]), int(self.corange_sketch.shape[2])

    def to_arrays(self) -> dict[str, np.ndarray]:
        """Plain arrays for the result store's ``sketch/`` group (and checkpoints)."""
        return {"range_sketch": self.range_sketch, "corange_sketch": self.corange_sketch,
                "row_sum": self.row_sum, "squares": self.squares, "snapshot_index": self.snapshot_index,
                "parameters": np.array([self.seed, int(self.complex_valued), *self.widths,
                                        _MAP_CODES[self.corange_map]], dtype=np.int64)}

    @classmethod
    def from_arrays(cls, arrays: dict[str, np.ndarray]) -> SketchState:
        parameters = np.asarray(arrays["parameters"])
        code = int(parameters[4]) if parameters.size > 4 else _MAP_CODES["gaussian"]
        kinds = {value: key for key, value in _MAP_CODES.items()}
        if code not in kinds:
            raise ArchiveError(f"stored sketch: co-range map code {code} is not one of {sorted(kinds)}")
        return cls(np.asarray(arrays["range_sketch"]), np.asarray(arrays["corange_sketch"]),
                   np.asarray(arrays["row_sum"]), np.asarray(arrays["squares"]),
                   np.asarray(arrays["snapshot_index"], dtype=np.int64), int(parameters[0]), bool(parameters[1]),
                   kinds[code])

    @classmethod
    def from_stream(cls, arrays: dict[str, np.ndarray], n_fields: int, snapshot_index: np.ndarray,
                    seed: int, complex_valued: bool, corange_map: str = "gaussian") -> SketchState:
        corange = np.stack([arrays[f"corange_{f}"] for f in range(n_fields)])
        return cls(arrays["range"], corange, arrays["row_sum"], arrays["squares"],
                   np.asarray(snapshot_index, dtype=np.int64), int(seed), bool(complex_valued), str(corange_map))


def merge_sketches(old: SketchState, new: SketchState) -> SketchState:
    """The state of the old and new snapshots together (Tropp et al. 2019, Sec. 2.3: linear updates).

    ``new`` must come from the same seed and widths, the same rows (fields, mask,
    weights) and snapshots that all come after the old ones.
    """
    if (old.seed, old.complex_valued, old.widths, old.corange_map) != \
            (new.seed, new.complex_valued, new.widths, new.corange_map):
        raise ArchiveError(
            f"cannot append: the stored sketch has seed {old.seed}, widths {old.widths}, "
            f"complex {old.complex_valued}, co-range map {old.corange_map}; the new one has seed {new.seed}, "
            f"widths {new.widths}, complex {new.complex_valued}, co-range map {new.corange_map}"
        )
    if old.range_sketch.shape[0] != new.range_sketch.shape[0] or old.squares.shape[0] != new.squares.shape[0]:
        raise ArchiveError(
            f"cannot append: the stored sketch has {old.range_sketch.shape[0]} rows in {old.squares.shape[0]} "
            f"field(s), the new snapshots {new.range_sketch.shape[0]} rows in {new.squares.shape[0]}; "
            "fields, mask and weights must not change"
        )
    if new.snapshot_index.size and old.snapshot_index.size and new.snapshot_index[0] <= old.snapshot_index[-1]:
        raise ArchiveError(
            f"cannot append: new snapshots start at {int(new.snapshot_index[0])}, not after the last stored "
            f"snapshot {int(old.snapshot_index[-1])}"
        )
    return SketchState(old.range_sketch + new.range_sketch,
                       np.concatenate([old.corange_sketch, new.corange_sketch], axis=1),
                       old.row_sum + new.row_sum, np.concatenate([old.squares, new.squares], axis=1),
                       np.concatenate([old.snapshot_index, new.snapshot_index]), old.seed, old.complex_valued,
                       old.corange_map)


def _psi_products(matrix: SnapshotMatrix, q: np.ndarray, mean: np.ndarray | None, l: int, seed: int,
                  complex_valued: bool, row_blocks: list[list[tuple[int, int]]] | None, kind: str = "gaussian"
                  ) -> tuple[np.ndarray, list[np.ndarray] | None]:
    """``Psi Q`` (l x k) and, when centred, ``Psi_f mu_f`` per field, formed in the driver.

    Q already lives in prepared coordinates and Psi acts on rows, so ``Psi Q`` needs no
    correction. Psi is regenerated from its keys (the same numbers the workers used);
    with the plan's ``row_blocks`` the keys are the workers' own, so under threads the
    per-process cache already holds them.
    """
    psi_q = np.zeros((l, q.shape[1]), dtype=np.result_type(q, np.complex128 if complex_valued else np.float64))
    psi_mean: list[np.ndarray] | None = [] if mean is not None else None
    for index, field in enumerate(matrix.fields):
        part = np.zeros(l, dtype=psi_q.dtype) if mean is not None else None
        if row_blocks is not None:
            blocks = [(field.offset + r0, field.offset + r1) for r0, r1 in row_blocks[index]]
            generate = cached_row_map
        else:
            blocks = [(g0, min(g0 + _DRIVER_ROWS, field.stop)) for g0 in range(field.offset, field.stop, _DRIVER_ROWS)]
            generate = row_map
        for g0, g1 in blocks:
            psi_t = generate(g0, g1, l, seed=seed, complex_valued=complex_valued, kind=kind)
            psi_q += apply_left(psi_t, q[g0:g1])
            if part is not None:
                part += apply_left(psi_t, mean[g0:g1])
        if psi_mean is not None:
            psi_mean.append(part)
    return psi_q, psi_mean


def sketch_reconstruction(state: SketchState, matrix: SnapshotMatrix, *, center: bool,
                          scale: str | dict[str, float], row_blocks: list[list[tuple[int, int]]] | None = None
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
    preparation = finish_preparation(matrix, state.row_sum, list(state.squares), center=center, scale=scale)
    omega = gaussian_map(state.snapshot_index, k, seed=state.seed, complex_valued=state.complex_valued)
    # corrected_sketch returns a new array: it may be overwritten
    q = orthonormal_basis(corrected_sketch(state.range_sketch, preparation, omega), overwrite=True)
    psi_q, psi_mean = _psi_products(matrix, q, preparation.mean, l, state.seed, state.complex_valued,
                                     row_blocks, state.corange_map)
    w_t = corrected_corange(list(state.corange_sketch), preparation, psi_mean)  # (m, l) = (Psi A)^T
    return preparation, q, solve_small(psi_q, w_t.T)


def finish_sketch(state: SketchState, matrix: SnapshotMatrix, rank: int, *, center: bool,
                  scale: str | dict[str, float], row_blocks: list[list[tuple[int, int]]] | None = None
                  ) -> tuple[Preparation, LowRank]:
    """Centring/scaling from the statistics, corrected sketches, reconstruction, rank-r SVD.

    No read of the archive. The coefficients ``diag(s) V^H`` are those of the sketch
    reconstruction and the column norms are exact without centring and estimated with it,
    so :meth:`LowRank.projection_error` is an estimate (``projection_kind="estimate"``).

    References
    ----------
    Tropp, J. A., Yurtsever, A., Udell, M., Cevher, V. (2017). SIAM J. Matrix Anal. Appl.
    38(4), 1454-1485, Algorithms 4 and 7.
    """
    n, m = matrix.shape
    k, l = state.widths
    if rank > min(k, l):
        raise ArchiveError(f"compress.rank = {rank} exceeds the sketch widths ({k}, {l})")
    preparation, q, core = sketch_reconstruction(state, matrix, center=center, scale=scale, row_blocks=row_blocks)
    u_small, s, vh = np.linalg.svd(core, full_matrices=False)
    u_small, vh = normalize_signs(u_small[:, :rank], vh[:rank])
    basis = q @ u_small
    cross = None
    if preparation.mean is not None:
        # Re(mu_f^H a_fj) from the reconstruction a_j ~ Q core_j (an estimate, labelled so)
        cross = np.empty((len(matrix.fields), m))
        for index, field in enumerate(matrix.fields):
            mu = preparation.mean[field.offset:field.stop]
            cross[index] = np.real((mu.conj() @ q[field.offset:field.stop]) @ core)
    column_norm = np.sqrt(prepared_column_squares(preparation, state.squares, matrix.fields, cross))
    lowrank = LowRank(basis=basis, singular_value=s[:rank].astype(np.float64), vh=vh, column_norm=column_norm,
                      passes=1, projection_kind="estimate")
    return preparation, lowrank


def finish_info(state: SketchState) -> dict[str, Any]:
    k, l = state.widths
    return {"range_width": k, "corange_width": l, "corange_map": state.corange_map, "seed": state.seed,
            "snapshots": int(state.snapshot_index.size)}
