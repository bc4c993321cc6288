"""The fast paths compress relies on: tile reads, reused tile buffers, test matrices, slots, floor.

Every check compares with a plain reference outside the fast path: h5py/zarr slicing of
the same invented data, numpy products, or the block-by-block definition of the test
matrices.
"""

from __future__ import annotations

import threading

import h5py
import numpy as np
import pytest

from snaplift.archive import _handles, open_archive
from snaplift.archive.hdf5 import _storage
from snaplift.archive.matrix import build_snapshot_matrix, read_snapshot_block
from snaplift.errors import ArchiveError
from snaplift.linalg import _testmatrix
from snaplift.linalg._kernels import TEST_BLOCK_ROWS, gaussian_block
from snaplift.stream import _slots
from snaplift.stream._floor import FLOOR_SCHEDULES, floor_pass


def _write(path, data, **options):
    """Snapshots written last to first, so chunks lie in the file in reverse order."""
    with h5py.File(path, "w") as h5:
        dtype = options.pop("dtype", data.dtype)
        u = h5.create_dataset("u", shape=data.shape, dtype=dtype, **options)
        for j in range(data.shape[0] - 1, -1, -1):
            u[j] = data[j]
        h5["t"] = np.arange(data.shape[0], dtype=np.float64)


LAYOUTS = {
    "one snapshot per chunk": {"chunks": (1, 6, 5)},
    "three snapshots per chunk": {"chunks": (3, 6, 5)},
    "contiguous": {},
    "chunks cut the grid": {"chunks": (2, 3, 5)},
    "compressed": {"chunks": (2, 6, 5), "compression": "gzip"},
    "float32": {"chunks": (1, 6, 5), "dtype": "f4"},
    "big-endian": {"chunks": (1, 6, 5), "dtype": ">f8"},
}
#: layouts whose snapshots are read as plain bytes (the others go through h5py)
PLAIN = {"one snapshot per chunk", "three snapshots per chunk", "contiguous", "float32", "chunks cut the grid"}


def _check_tiles(reader, reference: np.ndarray) -> None:
    """Tiles of 11 snapshots (whole, partial, crossing chunks; a row range) equal the reference."""
    matrix = build_snapshot_matrix(reader, ["u"], snapshots=np.arange(11), snapshot_block=4)
    field = matrix.fields[0]
    for s0, s1 in [(0, 4), (4, 8), (8, 11), (2, 7), (10, 11)]:
        tile = read_snapshot_block(reader, field, np.arange(s0, s1))
        np.testing.assert_array_equal(tile, reference[s0:s1].reshape(s1 - s0, -1))
    part = read_snapshot_block(reader, field, np.arange(3, 9), rows=(7, 22))
    np.testing.assert_array_equal(part, reference[3:9].reshape(6, -1)[:, 7:22])


@pytest.mark.parametrize("layout", sorted(LAYOUTS))
def test_tile_reads_equal_h5py_slicing(tmp_path, layout):
    data = np.random.default_rng(1).standard_normal((11, 6, 5))
    path = tmp_path / "tiles.h5"
    _write(path, data, **dict(LAYOUTS[layout]))
    with h5py.File(path, "r") as h5:
        reference = h5["u"][...].astype(np.float64)  # h5py as the reference
        assert (_storage(h5["u"]) is not None) == (layout in PLAIN)
    reader = open_archive(str(path))
    _check_tiles(reader, reference)


def test_unwritten_chunks_are_read_through_h5py(tmp_path):
    path = tmp_path / "sparse.h5"
    with h5py.File(path, "w") as h5:
        u = h5.create_dataset("u", shape=(6, 4, 4), chunks=(1, 4, 4), dtype="f8", fillvalue=2.5)
        u[1] = 1.0  # the other chunks are never written: they read as the fill value
        h5["t"] = np.arange(6.0)
    with h5py.File(path, "r") as h5:
        assert _storage(h5["u"]) is None
    reader = open_archive(str(path))
    matrix = build_snapshot_matrix(reader, ["u"], snapshots=np.arange(6), snapshot_block=6)
    tile = read_snapshot_block(reader, matrix.fields[0], np.arange(6))
    expected = np.full((6, 16), 2.5)
    expected[1] = 1.0
    np.testing.assert_array_equal(tile, expected)


def _in_thread(function):
    box = []
    worker = threading.Thread(target=lambda: box.append(function()))
    worker.start()
    worker.join()
    return box[0]


def test_tile_buffers_are_reused_only_when_nothing_refers_to_them():
    shape = (4, _handles.TILE_BUFFER_MIN_BYTES // 32)

    def scenario():
        _handles.release_tile_buffers()
        address = []
        first = _handles.tile_buffer(shape, np.float64)
        address.append(first.__array_interface__["data"][0])
        view = first[1:, 3:]
        del first
        second = _handles.tile_buffer(shape, np.float64)  # a view is alive: new memory
        address.append(second.__array_interface__["data"][0])
        del view, second
        third = _handles.tile_buffer(shape, np.float64)  # nothing alive: the last block again
        address.append(third.__array_interface__["data"][0])
        return address

    first, second, third = _in_thread(scenario)
    assert first != second and third == second
    # the main thread keeps nothing: two live requests never share memory
    a = _handles.tile_buffer(shape, np.float64)
    b = _handles.tile_buffer(shape, np.float64)
    assert not np.shares_memory(a, b)


def _definition(index, width, seed, complex_valued, stream=0):
    """The test matrix row by row from its generated blocks (module docstring of _testmatrix)."""
    index = np.asarray(index)
    out = np.empty((index.size, width), dtype=complex if complex_valued else float)
    for position, value in enumerate(index):
        block = int(value) // TEST_BLOCK_ROWS
        out[position] = gaussian_block(seed, stream, block, width, complex_valued)[int(value) - block * TEST_BLOCK_ROWS]
    return out


@pytest.mark.parametrize("complex_valued", [False, True])
def test_gaussian_map_matches_its_block_definition(complex_valued):
    rng = np.random.default_rng(2)
    selections = [np.arange(5, 900), np.arange(0, TEST_BLOCK_ROWS), np.array([300]),
                  np.sort(rng.choice(5000, 300, replace=False)), rng.permutation(3000)[:200], np.array([7, 7, 3, 900])]
    for index in selections:
        np.testing.assert_array_equal(_testmatrix.gaussian_map(index, 5, seed=4, complex_valued=complex_valued),
                                      _definition(index, 5, 4, complex_valued))
    # a large range is generated by several threads: same numbers
    big = _testmatrix.row_map(100, 100 + 200 * TEST_BLOCK_ROWS, 3, seed=1, complex_valued=complex_valued)
    np.testing.assert_array_equal(big[::997], _definition(np.arange(100, 100 + 200 * TEST_BLOCK_ROWS)[::997], 3, 1,
                                                          complex_valued, stream=1))


@pytest.mark.parametrize("complex_valued", [False, True])
def test_slots_sum_row_blocks_like_numpy(complex_valued):
    rng = np.random.default_rng(3)
    x = rng.standard_normal((50, 30)) + (1j * rng.standard_normal((50, 30)) if complex_valued else 0)
    omega = rng.standard_normal((30, 7)) + (1j * rng.standard_normal((30, 7)) if complex_valued else 0)
    tile = 0
    for r0, r1 in [(0, 20), (20, 50)]:
        for c0, c1 in [(0, 10), (10, 30)]:
            raw = np.ascontiguousarray(x[r0:r1, c0:c1].T)  # snapshot-major, as tiles arrive
            if tile == 3:
                raw = np.asfortranarray(raw)
            _slots.add_range_product("io-test", "range", (50, 7), tile, (r0, r1), raw, omega[c0:c1])
            tile += 1
    ((value, tiles),) = _slots.collect("io-test", "range").values()
    assert tiles == [0, 1, 2, 3]
    np.testing.assert_allclose(value, x @ omega, rtol=0, atol=1e-12)  # numpy as the reference


@pytest.mark.parametrize("order", ["C", "F"])
@pytest.mark.parametrize("complex_valued", [False, True])
def test_range_products_are_summed_chunk_by_chunk_like_numpy(monkeypatch, complex_valued, order):
    # rows not a multiple of the chunk: the last chunk is short (7 + 7 + 6 of 20 rows)
    monkeypatch.setattr(_slots, "GEMM_CHUNK_ROWS", 7)
    rng = np.random.default_rng(5)
    raw = rng.standard_normal((9, 20)) + (1j * rng.standard_normal((9, 20)) if complex_valued else 0)
    right = rng.standard_normal((9, 4))
    out = np.asarray(rng.standard_normal((20, 4)), dtype=np.result_type(raw, right), order=order)
    expected = out + raw.T @ right  # numpy as the reference (no conjugation: X_tile @ Omega)
    _slots._gemm_into(out, raw, right)
    np.testing.assert_allclose(out, expected, rtol=0, atol=1e-13)


def test_floor_schedules_form_the_same_products(tmp_path):
    data = np.random.default_rng(4).standard_normal((9, 8, 8))
    path = tmp_path / "floor.h5"
    _write(path, data, chunks=(1, 8, 8))
    best, each = floor_pass(path, 5, 4)
    assert set(each) == set(FLOOR_SCHEDULES) and best == min(each.values())
    with pytest.raises(ValueError, match="unknown floor schedule"):
        floor_pass(path, 5, 4, schedules=("serial", "fastest"))


ZARR_LAYOUTS = {
    "v3 one snapshot per chunk": {"zarr_format": 3, "chunks": (1, 6, 5), "compressors": None},
    "v3 three snapshots per chunk": {"zarr_format": 3, "chunks": (3, 6, 5), "compressors": None},
    "v2 two snapshots per chunk": {"zarr_format": 2, "chunks": (2, 6, 5), "compressors": None},
    "v3 compressed": {"zarr_format": 3, "chunks": (2, 6, 5)},
    "v3 chunks cut the grid": {"zarr_format": 3, "chunks": (2, 3, 5), "compressors": None},
}
ZARR_PLAIN = {"v3 one snapshot per chunk", "v3 three snapshots per chunk", "v2 two snapshots per chunk",
              "v3 chunks cut the grid"}


@pytest.mark.parametrize("layout", sorted(ZARR_LAYOUTS))
def test_zarr_tile_reads_equal_zarr_slicing(tmp_path, layout):
    import zarr

    from snaplift.archive.zarrstore import _chunk_files

    data = np.random.default_rng(5).standard_normal((11, 6, 5))
    path = str(tmp_path / "tiles.zarr")
    options = dict(ZARR_LAYOUTS[layout])
    group = zarr.open_group(path, mode="w", zarr_format=options.pop("zarr_format"))
    group.create_array("t", data=np.arange(11.0))
    group.create_array("u", shape=data.shape, dtype="f8", **options)[...] = data
    stored = zarr.open_group(path, mode="r")["u"]
    reference = np.asarray(stored[...])  # zarr as the reference
    assert (_chunk_files(stored) is not None) == (layout in ZARR_PLAIN)
    reader = open_archive(path)
    _check_tiles(reader, reference)


def test_zarr_unwritten_chunks_read_as_the_fill_value(tmp_path):
    import zarr

    from snaplift.archive.zarrstore import _chunk_files

    path = str(tmp_path / "sparse.zarr")
    group = zarr.open_group(path, mode="w")
    group.create_array("t", data=np.arange(6.0))
    u = group.create_array("u", shape=(6, 4, 4), chunks=(1, 4, 4), dtype="f8", fill_value=2.5, compressors=None)
    u[1] = 1.0
    assert _chunk_files(zarr.open_group(path, mode="r")["u"]) is None
    # issue 11: by default an unwritten chunk is an error naming it, not silently the fill value
    strict = open_archive(path)
    strict_matrix = build_snapshot_matrix(strict, ["u"], snapshots=np.arange(6), snapshot_block=6)
    with pytest.raises(ArchiveError, match=r"array 'u' chunk \[0, 0, 0\].*missing"):
        read_snapshot_block(strict, strict_matrix.fields[0], np.arange(6))
    reader = open_archive(path, missing_chunks="fill")
    matrix = build_snapshot_matrix(reader, ["u"], snapshots=np.arange(6), snapshot_block=6)
    expected = np.full((6, 16), 2.5)
    expected[1] = 1.0
    np.testing.assert_array_equal(read_snapshot_block(reader, matrix.fields[0], np.arange(6)), expected)


def test_blocks_of_ended_threads_are_dropped():
    shape = (4, _handles.TILE_BUFFER_MIN_BYTES // 32)
    _handles.release_tile_buffers()
    _in_thread(lambda: _handles.tile_buffer(shape, np.float64))
    assert len(_handles._buffers) == 1  # kept for its thread
    _in_thread(lambda: _handles.tile_buffer(shape, np.float64))  # the first thread has ended
    assert len(_handles._buffers) == 1
    _handles.release_tile_buffers()
    assert not _handles._buffers


def test_sketch_row_sums_are_summed_in_the_slots_not_returned(tmp_path, monkeypatch):
    # two tile threads with slots: no tile returns its full-height row sums (issue 16: only
    # per-worker accumulators leave a worker); the sums collected from the slots give the
    # temporal mean numpy gives (numpy as the reference)
    from snaplift.stream import _tasks
    from snaplift.stream.compress import CompressOptions, compress
    from snaplift.stream.loop import ThreadRunner

    data = np.random.default_rng(8).standard_normal((12, 6, 5))
    path = tmp_path / "sums.h5"
    _write(path, data, chunks=(1, 6, 5))
    matrix = build_snapshot_matrix(open_archive(str(path)), ["u"], snapshots=np.arange(12), snapshot_block=3)
    returned = []
    original = _tasks.sketch_task

    def watched(*args):
        out = original(*args)
        returned.append(out["row_sum"])
        return out

    monkeypatch.setattr("snaplift.stream._passes.sketch_task", watched)
    with ThreadRunner(2) as runner:
        result = compress(matrix, None, CompressOptions(method="sketch", rank=3, center=True, scale="none"),
                          runner=runner)
    assert len(returned) == 4 and all(value is None for value in returned)
    np.testing.assert_allclose(result.preparation.mean, data.reshape(12, -1).mean(axis=0), rtol=0, atol=1e-14)
