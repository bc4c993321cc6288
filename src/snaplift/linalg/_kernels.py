"""Tiny pure numpy kernels used by the graph builders and tile tasks of :mod:`snaplift.linalg`.

They see one block at a time and know nothing about dask, files, schedulers or tiling.
Tiles arrive *snapshot-major*: ``raw`` is ``(snapshots, rows)``, the transpose of the
tile of ``X``; products are written with transposed operands so that no tile is copied
(BLAS takes the transpose flag for free).
"""

from __future__ import annotations

import numpy as np

__all__ = [
    "orthonormalize",
    "field_column_squares",
    "gaussian_block",
    "normalize_signs",
    "TEST_BLOCK_ROWS",
    "column_squares",
    "range_product",
    "adjoint_product",
    "qr_factor",
    "reduce_r_factors",
    "leaf_factors",
    "solve_small",
]

#: snapshots (or rows) per generated block of a random test matrix; part of the key, so fixed
TEST_BLOCK_ROWS = 256


def orthonormalize(y: np.ndarray) -> np.ndarray:
    """Orthonormal basis of the columns of a tall matrix (economic QR, Q only)."""
    q, _ = np.linalg.qr(y, mode="reduced")
    return q


def gaussian_block(seed: int, stream: int, block: int, width: int, complex_valued: bool) -> np.ndarray:
    """Rows ``block*TEST_BLOCK_ROWS ... +TEST_BLOCK_ROWS`` of a Gaussian test matrix.

    The key is (seed, stream, global block number), never a tile number, so any tiling of
    the same snapshots sees the same matrix (Tropp, Yurtsever, Udell, Cevher 2017 need
    the same property for appends).
    """
    rng = np.random.default_rng(np.random.SeedSequence([int(seed), int(stream), int(block)]))
    if complex_valued:
        real = rng.standard_normal((TEST_BLOCK_ROWS, width))
        imag = rng.standard_normal((TEST_BLOCK_ROWS, width))
        return (real + 1j * imag) / np.sqrt(2.0)
    return rng.standard_normal((TEST_BLOCK_ROWS, width))


def normalize_signs(u: np.ndarray, vh: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Make each right singular vector's largest-magnitude entry real and positive.

    The decision uses ``vh`` (small, in memory) so that the tall ``u`` can be corrected
    lazily; same idea as scikit-learn's ``svd_flip(u_based_decision=False)``.
    Returns ``(u * conj(phase), phase[:, None] * vh)`` so ``u @ diag(s) @ vh`` is unchanged.
    """
    index = np.argmax(np.abs(vh), axis=1)
    pivot = vh[np.arange(vh.shape[0]), index]
    phase = np.where(np.abs(pivot) > 0, np.conj(pivot) / np.maximum(np.abs(pivot), 1e-300), 1.0)
    if not np.iscomplexobj(vh) and not np.iscomplexobj(u):
        phase = np.real(phase)
    return u * np.conj(phase)[np.newaxis, :], phase[:, np.newaxis] * vh


def column_squares(raw: np.ndarray) -> np.ndarray:
    """``||x_j||^2`` of every snapshot of a snapshot-major tile, without a tile-sized temporary."""
    out = np.empty(raw.shape[0], dtype=np.float64)
    for j in range(raw.shape[0]):
        row = raw[j]
        out[j] = np.vdot(row, row).real
    return out


#: the squares of ``field_column_squares`` are taken over this many bytes of a tile at a time
SQUARES_BYTES = 256 * 1024


def field_column_squares(raw: np.ndarray, starts: np.ndarray, *, chunk: int | None = None) -> np.ndarray:
    """``||x_fj||^2`` per field ``f`` (its columns start at ``starts[f]``) and snapshot of a
    snapshot-major tile: ``(fields, snapshots)``, with temporaries of ``chunk`` snapshots
    (default: :data:`SQUARES_BYTES` of the tile, at least one snapshot, at most a
    sixteenth of the tile; the tile plan counts no tile-sized temporary here)."""
    if chunk is None:
        row_bytes = max(1, raw.shape[1] * raw.itemsize)
        chunk = max(1, min(SQUARES_BYTES // row_bytes, -(-raw.shape[0] // 16)))
    out = np.empty((len(starts), raw.shape[0]), dtype=np.float64)
    for j0 in range(0, raw.shape[0], chunk):
        part = raw[j0:j0 + chunk]
        squares = part.real * part.real + part.imag * part.imag if np.iscomplexobj(part) else part * part
        out[:, j0:j0 + chunk] = np.add.reduceat(squares, starts, axis=1).T
    return out


def range_product(raw: np.ndarray, right: np.ndarray) -> np.ndarray:
    """This tile's share of ``X @ right``: ``(rows, width)`` from ``raw`` = X_tile^T."""
    return raw.T @ right


def adjoint_product(raw: np.ndarray, basis_rows: np.ndarray) -> np.ndarray:
    """This tile's rows of ``X^H @ basis``: ``(snapshots, width)``; conjugates only small arrays."""
    if np.iscomplexobj(raw) or np.iscomplexobj(basis_rows):
        return np.conj(raw @ np.conj(basis_rows))
    return raw @ basis_rows


def qr_factor(a: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Householder QR (LAPACK geqrf via numpy) with ``R`` of shape ``(min(n, m), m)``."""
    q, r = np.linalg.qr(a, mode="reduced")
    return q, r


def reduce_r_factors(factors: list[np.ndarray]) -> tuple[np.ndarray, list[tuple[int, int, np.ndarray, int]]]:
    """Binary reduction tree of R factors (Demmel, Grigori, Hoemmen, Langou 2012, Alg. 1).

    ``factors`` are the leaves' R factors (each ``(r_i, m)``). Returns the root ``R`` and
    the tree: a list of ``(left, right, Q_node, split)`` records, one per inner node, in
    the order they were formed; nodes are numbered leaves first (0..L-1), then inner
    nodes L, L+1, ... ``split`` is the number of rows of ``Q_node`` that belong to the
    left child.
    """
    nodes: list[tuple[int, np.ndarray]] = list(enumerate(factors))
    tree: list[tuple[int, int, np.ndarray, int]] = []
    next_id = len(factors)
    while len(nodes) > 1:
        merged: list[tuple[int, np.ndarray]] = []
        for i in range(0, len(nodes) - 1, 2):
            (left, r_left), (right, r_right) = nodes[i], nodes[i + 1]
            q, r = qr_factor(np.concatenate([r_left, r_right], axis=0))
            tree.append((left, right, q, r_left.shape[0]))
            merged.append((next_id, r))
            next_id += 1
        if len(nodes) % 2:
            merged.append(nodes[-1])
        nodes = merged
    return nodes[0][1], tree


def leaf_factors(n_leaves: int, tree: list[tuple[int, int, np.ndarray, int]], top: np.ndarray) -> list[np.ndarray]:
    """Push ``top`` (rows of the root R x width) down the tree: ``Q_tree`` block of every leaf times ``top``.

    Leaf ``i``'s share of ``Q`` is then ``Q_i @ result[i]`` (the implicit product of the
    tree's Q factors; Demmel et al. 2012, Sec. 3).
    """
    if not tree:
        return [top]
    value: dict[int, np.ndarray] = {n_leaves + len(tree) - 1: top}
    for offset in range(len(tree) - 1, -1, -1):
        left, right, q, split = tree[offset]
        node = n_leaves + offset
        product = q @ value.pop(node)
        value[left], value[right] = product[:split], product[split:]
    return [value[i] for i in range(n_leaves)]


def solve_small(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Least-squares ``a^+ b`` through a QR of ``a`` (Tropp et al. 2017, Alg. 4 step 2)."""
    q, r = np.linalg.qr(a, mode="reduced")
    rhs = q.conj().T @ b
    try:
        return np.linalg.solve(r, rhs) if r.shape[0] == r.shape[1] else np.linalg.lstsq(r, rhs, rcond=None)[0]
    except np.linalg.LinAlgError:
        return np.linalg.lstsq(a, b, rcond=None)[0]
