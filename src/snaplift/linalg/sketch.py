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

Kept rows. The per-field scales are known only after the read, so the co-range sketch is
kept per field (``Psi_f X_f``, m x l each). A field of at most ``l`` rows is kept whole
instead (its ``n_f x m`` raw values cost no more, :func:`exact_layout`) and ``Psi_f`` is
applied to it when the state is finished: the same sketch, exact in the state. The
lifted fields of a delay-embedded probe (one row each) then cost the lifted matrix, not
``l`` times it.

Because both sketches are linear in ``A`` and the test matrices are keyed by global
snapshot/row index, snapshots appended to an archive update the sketch state by reading
only the new ones (:func:`snaplift.stream.compress.sketch_append`); the result equals a
from-scratch run to rounding. Coefficients and projection errors from a single pass are
estimates (``kind="estimate"``). This module holds the kernels on arrays; the finish that
joins them with the preparation is :mod:`snaplift.stream.sketch`.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from snaplift.errors import ArchiveError
from snaplift.linalg._kernels import normalize_signs, solve_small
from snaplift.linalg._testmatrix import apply_corange, apply_left, cached_row_map, row_map

__all__ = ["SketchState", "default_sketch_widths", "merge_sketches", "sketch_error_bound", "exact_layout",
           "psi_products", "exact_corange", "reconstruction_core", "truncated_factors"]

#: codes of the co-range map kinds in the stored ``sketch/parameters``
_MAP_CODES = {"gaussian": 0, "sparse": 1}
#: rows of Psi generated at a time when the driver forms Psi Q (bounds its memory)
_DRIVER_ROWS = 1 << 15
#: kept values prepared at a time when the driver maps the kept rows (bounds its memory)
_EXACT_BLOCK_VALUES = 1 << 16


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


def exact_layout(field_rows: Sequence[int], limit: int) -> tuple[np.ndarray, np.ndarray]:
    """Which fields keep their raw rows instead of a co-range sketch, and where.

    A field of at most ``limit`` rows (the co-range width ``l``; 0 = none) is kept as its
    rows: ``n_f x m`` values instead of the ``l x m`` of ``Psi_f X_f``, exact, and the same
    sketch to rounding once ``Psi_f`` is applied at the finish. Returns ``(exact, start)``:
    ``exact[f]`` and the first column ``start[f]`` of field ``f`` in the state's
    ``exact_rows`` (``start[-1]`` = their total).

    Example
    -------
    >>> exact_layout([1, 500, 1, 1], 123)
    (array([ True, False,  True,  True]), array([0, 1, 1, 2, 3]))
    """
    rows = np.asarray(field_rows, dtype=np.int64)
    exact = (rows <= int(limit)) & (int(limit) > 0)
    start = np.concatenate([[0], np.cumsum(np.where(exact, rows, 0))]).astype(np.int64)
    return exact, start


@dataclass
class SketchState:
    """The linear sketches of the raw weighted data ``X_w`` and its statistics (store ``sketch/``).

    ``range_sketch`` = ``X_w Omega`` (n x k); ``corange_sketch[i]`` = ``(Psi_f X_f)^T``
    (m x l) of the ``i``-th field that has more than ``exact_limit`` rows; ``exact_rows``
    (m x rows) the raw rows ``X_f^T`` of the other fields side by side (:func:`exact_layout`:
    a field narrower than the co-range width costs less kept whole than sketched, e.g.
    every lifted field of a delay-embedded probe); ``row_sum`` (n,); ``squares[f, j]`` =
    ``||x_fj||^2``; ``snapshot_index`` the archive snapshots already folded in. Centring and
    scaling are applied only when the state is finished, so appends never need the old
    snapshots.
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
    #: raw rows of the fields of at most ``exact_limit`` rows (m x their rows)
    exact_rows: np.ndarray | None = None
    #: fields of at most this many rows are kept exactly; 0 (stores written before) = none
    exact_limit: int = 0

    @property
    def widths(self) -> tuple[int, int]:
        return int(self.range_sketch.shape[1]), int(self.corange_sketch.shape[2])

    def exact(self) -> np.ndarray:
        m = int(self.snapshot_index.size)
        if self.exact_rows is None:
            return np.zeros((m, 0), dtype=self.range_sketch.dtype)
        return self.exact_rows

    def to_arrays(self) -> dict[str, np.ndarray]:
        """Plain arrays for the result store's ``sketch/`` group (and checkpoints)."""
        return {"range_sketch": self.range_sketch, "corange_sketch": self.corange_sketch,
                "exact_rows": self.exact(),
                "row_sum": self.row_sum, "squares": self.squares, "snapshot_index": self.snapshot_index,
                "parameters": np.array([self.seed, int(self.complex_valued), *self.widths,
                                        _MAP_CODES[self.corange_map], int(self.exact_limit)], dtype=np.int64)}

    @classmethod
    def from_arrays(cls, arrays: dict[str, np.ndarray]) -> SketchState:
        parameters = np.asarray(arrays["parameters"])
        code = int(parameters[4]) if parameters.size > 4 else _MAP_CODES["gaussian"]
        kinds = {value: key for key, value in _MAP_CODES.items()}
        if code not in kinds:
            raise ArchiveError(f"stored sketch: co-range map code {code} is not one of {sorted(kinds)}")
        limit = int(parameters[5]) if parameters.size > 5 else 0
        exact = np.asarray(arrays["exact_rows"]) if "exact_rows" in arrays else None
        return cls(np.asarray(arrays["range_sketch"]), np.asarray(arrays["corange_sketch"]),
                   np.asarray(arrays["row_sum"]), np.asarray(arrays["squares"]),
                   np.asarray(arrays["snapshot_index"], dtype=np.int64), int(parameters[0]), bool(parameters[1]),
                   kinds[code], exact, limit)

    @classmethod
    def from_stream(cls, arrays: dict[str, np.ndarray], field_rows: Sequence[int], snapshot_index: np.ndarray,
                    seed: int, complex_valued: bool, corange_map: str = "gaussian", *, corange_width: int,
                    exact_limit: int = 0) -> SketchState:
        """The state from the accumulators of one read (``corange_<f>`` of the sketched
        fields, ``exact`` of the others: :func:`snaplift.stream._passes.sketch_read`)."""
        exact, start = exact_layout(field_rows, exact_limit)
        m = int(np.asarray(snapshot_index).size)
        dtype = arrays["range"].dtype
        sketched = [arrays[f"corange_{f}"] for f in range(len(field_rows)) if not exact[f]]
        corange = np.stack(sketched) if sketched else np.zeros((0, m, int(corange_width)), dtype=dtype)
        rows = arrays["exact"] if "exact" in arrays else np.zeros((m, int(start[-1])), dtype=dtype)
        return cls(arrays["range"], corange, arrays["row_sum"], arrays["squares"],
                   np.asarray(snapshot_index, dtype=np.int64), int(seed), bool(complex_valued), str(corange_map),
                   rows, int(exact_limit))


def merge_sketches(old: SketchState, new: SketchState) -> SketchState:
    """The state of the old and new snapshots together (Tropp et al. 2019, Sec. 2.3: linear updates).

    ``new`` must come from the same seed and widths, the same rows (fields, mask,
    weights) and snapshots that all come after the old ones. Kept raw rows are joined
    like the co-range sketches (both are snapshot-major).
    """
    if (old.seed, old.complex_valued, old.widths, old.corange_map, old.exact_limit) != \
            (new.seed, new.complex_valued, new.widths, new.corange_map, new.exact_limit):
        raise ArchiveError(
            f"cannot append: the stored sketch has seed {old.seed}, widths {old.widths}, "
            f"complex {old.complex_valued}, fields of up to {old.exact_limit} rows kept whole, co-range map "
            f"{old.corange_map}; the new one has seed {new.seed}, widths {new.widths}, complex {new.complex_valued}, "
            f"fields of up to {new.exact_limit} rows kept whole, co-range map {new.corange_map}"
        )
    if old.range_sketch.shape[0] != new.range_sketch.shape[0] or old.squares.shape[0] != new.squares.shape[0] \
            or old.corange_sketch.shape[0] != new.corange_sketch.shape[0] \
            or old.exact().shape[1] != new.exact().shape[1]:
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
                       old.corange_map, np.concatenate([old.exact(), new.exact()], axis=0), old.exact_limit)


def psi_products(q: np.ndarray, field_bounds: Sequence[tuple[int, int]], l: int, *, seed: int,
                 complex_valued: bool, kind: str = "gaussian", mean: np.ndarray | None = None,
                 mean_fields: Sequence[int] = (), row_blocks: Sequence[Sequence[tuple[int, int]]] | None = None
                 ) -> tuple[np.ndarray, dict[int, np.ndarray]]:
    """``Psi Q`` (l x k) and, with ``mean``, ``Psi_f mu_f`` (l,) of the fields ``mean_fields``.

    ``field_bounds`` are the global rows ``(offset, stop)`` of every field. Q already lives
    in prepared coordinates and Psi acts on rows, so ``Psi Q`` needs no correction. Psi is
    regenerated from its keys (the same numbers the tile tasks used); with ``row_blocks``
    (each field's planned blocks of its own rows) the keys are the tasks' own, so under
    threads the per-process cache already holds them.
    """
    psi_q = np.zeros((l, q.shape[1]), dtype=np.result_type(q, np.complex128 if complex_valued else np.float64))
    wanted = set(int(f) for f in mean_fields) if mean is not None else set()
    psi_mean: dict[int, np.ndarray] = {}
    for index, (offset, stop) in enumerate(field_bounds):
        if row_blocks is not None:
            blocks = [(offset + r0, offset + r1) for r0, r1 in row_blocks[index]]
            generate = cached_row_map
        else:
            blocks = [(g0, min(g0 + _DRIVER_ROWS, stop)) for g0 in range(offset, stop, _DRIVER_ROWS)]
            generate = row_map
        part = np.zeros(l, dtype=psi_q.dtype) if index in wanted else None
        for g0, g1 in blocks:
            psi_t = generate(g0, g1, l, seed=seed, complex_valued=complex_valued, kind=kind)
            psi_q += apply_left(psi_t, q[g0:g1])
            if part is not None and mean is not None:
                part += apply_left(psi_t, mean[g0:g1])
        if part is not None:
            psi_mean[index] = part
    return psi_q, psi_mean


def exact_corange(exact_rows: np.ndarray, bounds: Sequence[tuple[int, int, int]], row_scale: np.ndarray,
                  mean: np.ndarray | None, l: int, *, seed: int, complex_valued: bool, kind: str = "gaussian"
                  ) -> np.ndarray | None:
    """``(Psi_E A_E)^T`` (m x l) of the rows kept exactly, prepared: ``A_E = S (X_E - mu_E 1^T)``.

    ``bounds`` are ``(column in exact_rows, global row start, global row stop)`` of each
    run of kept rows. The same numbers as sketching those rows in the read (Tropp et al.
    2017, Alg. 2: ``W = Psi A``, linear in ``A``), formed once all statistics are known.
    """
    m = exact_rows.shape[0]
    total: np.ndarray | None = None
    for column, g0, g1 in bounds:
        for r0 in range(g0, g1, _DRIVER_ROWS):
            r1 = min(r0 + _DRIVER_ROWS, g1)
            psi_t = row_map(r0, r1, l, seed=seed, complex_valued=complex_valued, kind=kind)
            # a few snapshots at a time: the prepared copy stays small beside the kept rows
            step = max(1, _EXACT_BLOCK_VALUES // (r1 - r0))
            for j0 in range(0, m, step):
                block = exact_rows[j0:j0 + step, column + r0 - g0:column + r1 - g0]
                block = block - mean[np.newaxis, r0:r1] if mean is not None else block
                part = apply_corange(np.ascontiguousarray(block * row_scale[np.newaxis, r0:r1]), psi_t)
                if total is None:
                    total = np.zeros((m, l), dtype=part.dtype)
                total[j0:j0 + step] += part
    return total


def reconstruction_core(psi_q: np.ndarray, corange_t: np.ndarray) -> np.ndarray:
    """``X = (Psi Q)^+ W`` (k x m) from ``Psi Q`` and ``W^T`` (Tropp et al. 2017, Alg. 4)."""
    return solve_small(psi_q, corange_t.T)


def truncated_factors(q: np.ndarray, core: np.ndarray, rank: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Rank-``rank`` SVD of ``Q X``: ``(basis, singular values, V^H)`` with normalised signs
    (Tropp et al. 2017, Alg. 7)."""
    u_small, s, vh = np.linalg.svd(core, full_matrices=False)
    u_small, vh = normalize_signs(u_small[:, :rank], vh[:rank])
    return q @ u_small, s[:rank].astype(np.float64), vh


def finish_info(state: SketchState) -> dict[str, Any]:
    k, l = state.widths
    return {"range_width": k, "corange_width": l, "corange_map": state.corange_map, "seed": state.seed,
            "snapshots": int(state.snapshot_index.size), "exact_limit": int(state.exact_limit)}
