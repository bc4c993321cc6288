"""The store's large writes: chunk by chunk along the first axis, and handed to a background thread.

What is read back must equal what numpy holds (the reference: numpy slicing assignment on an
in-memory copy), whatever the chunking, the start or a partial last chunk; a chunk equal to
the fill value is stored like any other; a failed background write is raised in the caller.
"""

from __future__ import annotations

import threading
from pathlib import Path

import numpy as np
import pytest
import zarr

from snaplift.results.store import BackgroundWrites, StoreWriter, write_leading


def _array(tmp_path: Path, shape: tuple[int, ...], chunks: tuple[int, ...], dtype=np.complex128) -> zarr.Array:
    writer = StoreWriter(tmp_path / "r.zarr")
    dims = tuple(f"d{i}" for i in range(len(shape)))
    return writer.empty("modes", "u", shape, dtype, dims, chunks=chunks)


@pytest.mark.parametrize(("shape", "chunks", "start", "count"), [
    ((7, 5, 4), (1, 5, 4), 0, 7),      # one vector per chunk, all at once
    ((7, 5, 4), (1, 5, 4), 3, 4),      # the last four vectors
    ((7, 5, 4), (3, 5, 4), 3, 4),      # aligned start, partial last chunk at the end of the array
    ((7, 5, 4), (3, 5, 4), 0, 2),      # part of a chunk (zarr merges with what is there)
    ((7, 5, 4), (3, 5, 4), 1, 5),      # unaligned start: one zarr call
    ((7, 5, 4), (2, 5, 2), 2, 4),      # chunks split another axis: one zarr call
    ((9,), (4,), 4, 5),                # one dimension
])
def test_write_leading_equals_numpy_assignment(tmp_path: Path, shape, chunks, start, count) -> None:
    rng = np.random.default_rng(1)
    array = _array(tmp_path, shape, chunks)
    before = rng.standard_normal(shape) + 1j * rng.standard_normal(shape)
    array[...] = before
    values = rng.standard_normal((count, *shape[1:])) + 1j * rng.standard_normal((count, *shape[1:]))
    expected = before.copy()
    expected[start:start + count] = values  # reference: numpy slicing assignment
    write_leading(array, start, values)
    np.testing.assert_array_equal(array[...], expected)


def test_write_leading_takes_a_view_without_changing_it(tmp_path: Path) -> None:
    array = _array(tmp_path, (4, 6, 3), (1, 6, 3), np.float64)
    block = np.arange(2 * 6 * 3, dtype=np.float64).reshape(2, 6, 3)
    kept = block.copy()
    write_leading(array, 2, block[:, :, :])
    np.testing.assert_array_equal(block, kept)
    np.testing.assert_array_equal(array[2:], kept)


def test_a_chunk_equal_to_the_fill_value_is_stored(tmp_path: Path) -> None:
    array = _array(tmp_path, (3, 4, 4), (1, 4, 4))
    write_leading(array, 0, np.zeros((3, 4, 4), np.complex128))  # zero is the default fill value
    written = sorted(p.name for p in (tmp_path.glob("r.zarr.staging-*/modes/u/c/*")))
    assert written == ["0", "1", "2"]
    np.testing.assert_array_equal(array[...], np.zeros((3, 4, 4)))


def test_background_writes_all_land_in_order_of_submission(tmp_path: Path) -> None:
    array = _array(tmp_path, (6, 3, 2), (1, 3, 2), np.float64)
    expected = np.arange(36, dtype=np.float64).reshape(6, 3, 2)
    with BackgroundWrites() as background:
        for k0 in range(0, 6, 2):
            background.submit(write_leading, array, k0, expected[k0:k0 + 2].copy())
    np.testing.assert_array_equal(array[...], expected)


def test_background_write_error_is_raised_in_the_caller() -> None:
    calls: list[int] = []

    def fails(k: int) -> None:
        calls.append(k)
        if k == 1:
            raise OSError(28, "No space left on device")

    with pytest.raises(OSError, match="No space left"):
        with BackgroundWrites() as background:
            for k in range(4):
                background.submit(fails, k)
    # at most one write waits: the error stops the loop before every write was handed over
    assert calls[:2] == [0, 1] and len(calls) <= 3
    assert not [t for t in threading.enumerate() if t.name.startswith("snaplift-write")]


def test_background_writes_wait_for_the_last_one_when_the_caller_fails() -> None:
    done: list[int] = []
    release = threading.Event()

    def slow(k: int) -> None:
        release.wait(5)
        done.append(k)

    with pytest.raises(RuntimeError, match="caller"):
        with BackgroundWrites() as background:
            background.submit(slow, 0)
            release.set()
            raise RuntimeError("caller failed")
    assert done == [0]  # the write in progress finished before the block was left
