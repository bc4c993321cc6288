"""Small invented time-major archives with a known spectrum, for the compress tests."""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path
from typing import Any

import h5py
import numpy as np
import pytest

from snaplift.archive import open_archive, plan_tiles
from snaplift.archive.matrix import build_snapshot_matrix


def known_matrix(n: int, m: int, spectrum: np.ndarray, *, complex_valued: bool = False, seed: int = 0) -> np.ndarray:
    """``U diag(spectrum) V^H`` with random orthonormal U, V: singular values known exactly."""
    rng = np.random.default_rng(seed)

    def random(shape: tuple[int, int]) -> np.ndarray:
        x = rng.standard_normal(shape)
        return x + 1j * rng.standard_normal(shape) if complex_valued else x

    u, _ = np.linalg.qr(random((n, spectrum.size)))
    v, _ = np.linalg.qr(random((m, spectrum.size)))
    return (u * spectrum) @ v.conj().T


@pytest.fixture
def known() -> Callable[..., np.ndarray]:
    """:func:`known_matrix` (fixtures: test modules cannot import conftest under importlib mode)."""
    return known_matrix


@pytest.fixture
def archive(tmp_path: Path) -> Callable[..., Any]:
    """``archive(x, grid=(rows, cols), dtype=None, name='a.h5')`` -> (reader, x as stored, path).

    ``x`` is the (points x snapshots) matrix; it is stored time-major, one snapshot per
    chunk, as HDF5 (field ``u``).
    """

    def write(x: np.ndarray, *, grid: tuple[int, ...] | None = None, dtype: Any = None, name: str = "a.h5",
              chunk: int = 1) -> tuple[Any, np.ndarray, Path]:
        n, m = x.shape
        grid = grid or (n,)
        stored = x.T.reshape(m, *grid)
        if dtype is not None:
            stored = stored.astype(dtype)
        path = tmp_path / name
        with h5py.File(path, "w") as h5:
            h5.create_dataset("u", data=stored, chunks=(chunk, *grid))
            h5["t"] = 0.1 * np.arange(m)
        return open_archive(str(path)), stored.reshape(m, -1).T, path

    return write


@pytest.fixture
def snapshot_matrix() -> Callable[..., Any]:
    """``snapshot_matrix(reader, method, memory, snapshots=None, workers=1, **plan)`` -> (matrix, plan)."""

    def build(reader: Any, method: str, memory: int = 64 * 2**20, snapshots: np.ndarray | None = None,
              workers: int = 1, **settings: Any) -> tuple[Any, Any]:
        info = reader.describe()
        plan = plan_tiles(info, ["u"], memory_bytes=memory, workers=workers, method=method, **settings)
        index = np.arange(info.fields["u"].n_snapshots) if snapshots is None else np.asarray(snapshots)
        matrix = build_snapshot_matrix(reader, ["u"], snapshots=index, snapshot_block=1,
                                       snapshot_blocks=plan.snapshot_blocks)
        return matrix, plan

    return build
