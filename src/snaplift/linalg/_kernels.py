"""Tiny pure numpy kernels used by the graph builders of :mod:`snaplift.linalg`.

They see one block at a time and know nothing about dask, files or tiling.
"""

from __future__ import annotations

import numpy as np

__all__ = ["orthonormalize", "gaussian_block", "normalize_signs", "TEST_BLOCK_ROWS"]

#: snapshots per generated block of a random test matrix; part of the key, so fixed
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
