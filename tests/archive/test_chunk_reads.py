"""Positioned reads of chunks that split the grid (issue 16: space-split chunks were read
one synchronous chunk at a time through the library).

Every tile is compared with the array's own library reading the same box (h5py and
zarr slicing are the references); the chunk layouts include edge chunks, chunks cut in
the last axis (short runs, read through the staging buffer), 4-D arrays and chunks
stored out of order in the file.
"""

from __future__ import annotations

import h5py
import numpy as np
import pytest

from snaplift.archive import _chunk_reads, _handles, open_archive
from snaplift.archive.hdf5 import _Dataset, _storage
from snaplift.errors import ArchiveError

#: (array shape, chunk shape); chunks (4, 2, 5) and (3, 4, 4) leave partial edge chunks
LAYOUTS = {
    "split in the first grid axis": ((23, 6, 5), (8, 3, 5)),
    "split in the last grid axis": ((23, 6, 5), (4, 6, 2)),
    "edge chunks": ((23, 6, 5), (3, 4, 4)),
    "one snapshot per chunk": ((23, 6, 5), (1, 6, 5)),
    "4-D grid": ((13, 4, 6, 5), (5, 2, 6, 5)),
    "probe": ((23,), (5,)),
}

BOXES_3D = [
    np.s_[:, :, :], np.s_[2:17, :, :], np.s_[5:6, :, :], np.s_[0:9, 3:6, :], np.s_[4:20, 1:5, :],
    np.s_[1:22, 0:3, 2:5], np.s_[7:8, 5:6, 4:5],
]


def _boxes(shape):
    if len(shape) == 1:
        return [np.s_[:], np.s_[3:17], np.s_[22:23]]
    if len(shape) == 4:
        return [np.s_[:, :, :, :], np.s_[2:11, 2:4, :, :], np.s_[0:13, 1:3, 2:5, 0:5], np.s_[4:5, 0:4, 0:6, 1:2]]
    return BOXES_3D


def _write_hdf5(path, shape, chunks, reverse=True):
    data = np.random.default_rng(7).standard_normal(shape)
    with h5py.File(path, "w") as h5:
        u = h5.create_dataset("u", shape=shape, chunks=chunks, dtype="f8")
        starts = range(0, shape[0], chunks[0])
        for j in (reversed(starts) if reverse else starts):  # reverse: chunks out of order in the file
            u[j:j + chunks[0]] = data[j:j + chunks[0]]
    return data


@pytest.fixture(params=["straight into the tile", "short runs"])
def runs(request, monkeypatch):
    """Read every run straight into the tile, or take every run of a chunk cut across the grid
    as short (zarr: through a small staging buffer; HDF5: by HDF5, rows of chunks hinted ahead)."""
    monkeypatch.setattr(_chunk_reads, "MIN_RUN_BYTES", 0 if request.param.startswith("straight") else 2**40)
    monkeypatch.setattr(_chunk_reads, "STAGE_BYTES", 400)
    monkeypatch.setattr(_chunk_reads, "MAX_STAGED_EXCESS", 1e9)  # every box positioned: the reads under test
    monkeypatch.setattr(_handles, "REQUEST_BYTES", 304)  # many requests per tile
    monkeypatch.setattr(_handles, "READ_AHEAD_BYTES", 1000)
    return request.param


@pytest.mark.parametrize("layout", sorted(LAYOUTS))
def test_hdf5_boxes_equal_h5py(tmp_path, layout, runs):
    shape, chunks = LAYOUTS[layout]
    path = tmp_path / "a.h5"
    _write_hdf5(path, shape, chunks)
    with h5py.File(path, "r") as h5:
        dataset = h5["u"]
        assert _storage(dataset) is not None
        wrapped = _Dataset(dataset, str(path))
        for box in _boxes(shape):
            _handles.clear()
            # h5py's own slicing is the reference
            np.testing.assert_array_equal(wrapped[box], dataset[box], err_msg=f"{layout} {box}")
            assert not np.shares_memory(wrapped[box], dataset[box])


@pytest.mark.parametrize("layout", sorted(LAYOUTS))
@pytest.mark.parametrize("zarr_format", [2, 3])
def test_zarr_boxes_equal_zarr(tmp_path, layout, zarr_format, runs):
    import zarr

    from snaplift.archive.zarrstore import _Array, _chunk_files

    shape, chunks = LAYOUTS[layout]
    data = np.random.default_rng(8).standard_normal(shape)
    path = str(tmp_path / "a.zarr")
    group = zarr.open_group(path, mode="w", zarr_format=zarr_format)
    group.create_array("u", shape=shape, chunks=chunks, dtype="f8", compressors=None)[...] = data
    stored = zarr.open_group(path, mode="r")["u"]
    assert _chunk_files(stored) is not None
    wrapped = _Array(stored, path)
    for box in _boxes(shape):
        # zarr's own slicing is the reference
        np.testing.assert_array_equal(wrapped[box], np.asarray(stored[box]), err_msg=f"{layout} {box}")


def _parts(path, box):
    with h5py.File(path, "r") as h5:
        storage = _storage(h5["u"])
        shape = tuple(b - a for a, b in box)
        return _chunk_reads._parts(np.empty(shape), storage.layout, box, storage.locate)


def test_space_split_chunks_are_read_in_whole_runs(tmp_path):
    # the bench's space-split layout, small: chunks of 8 snapshots of a quarter of the grid.
    # Written in time order, each chunk's part of one snapshot is a run of its own in the
    # tile (the next quarter follows in the tile only after the other snapshots), and
    # every part is read straight into the tile
    path = tmp_path / "split.h5"
    _write_hdf5(path, (32, 64, 512), (8, 16, 512), reverse=False)
    parts = _parts(path, ((0, 16), (0, 64), (0, 512)))
    run = 16 * 512 * 8  # bytes of a chunk's quarter of one snapshot (64 KiB)
    # chunk (0, 3)'s part of snapshot 7 ends where chunk (1, 0)'s part of snapshot 8 starts,
    # in the file and in the tile: those two join, the other 62 parts are runs of their own
    assert len(parts) == 16 * 4 - 1 and sorted({p.nbytes for p in parts}) == [run, 2 * run]
    assert all(p.target is not None for p in parts)
    assert sum(p.nbytes for p in parts) == 16 * 64 * 512 * 8  # the box's bytes, no more


def test_chunks_adjacent_in_file_and_tile_join(tmp_path):
    # whole-snapshot chunks written in time order lie one after another: one run
    path = tmp_path / "forward.h5"
    _write_hdf5(path, (23, 6, 5), (3, 6, 5), reverse=False)
    assert len(_parts(path, ((2, 17), (0, 6), (0, 5)))) == 1
    reverse = tmp_path / "reverse.h5"
    _write_hdf5(reverse, (23, 6, 5), (3, 6, 5), reverse=True)
    # written last to first: the 6 chunks touched (snapshots 2..16) are 6 runs
    assert len(_parts(reverse, ((2, 17), (0, 6), (0, 5)))) == 6


def test_a_box_wasting_staged_bytes_goes_to_the_library(tmp_path, monkeypatch):
    # one column of chunks cut finely in the last axis: a staged read would read the whole
    # span of each row to use one value in two; the library reads only what is needed
    monkeypatch.setattr(_chunk_reads, "MIN_RUN_BYTES", 2**40)
    path = tmp_path / "fine.h5"
    _write_hdf5(path, (4, 6, 8), (2, 6, 8))
    assert _parts(path, ((0, 4), (0, 6), (0, 4))) is None  # rows of 8 values, 4 used
    assert _parts(path, ((0, 4), (0, 3), (0, 8))) is not None  # whole rows: nothing wasted
    with h5py.File(path, "r") as h5:
        np.testing.assert_array_equal(_Dataset(h5["u"], str(path))[0:4, 0:6, 0:4], h5["u"][0:4, 0:6, 0:4])


def test_whole_tiles_of_a_space_split_archive(tmp_path):
    # the reader's tiles (points x snapshots) of a space-split archive, against h5py
    path = tmp_path / "split.h5"
    data = _write_hdf5(path, (20, 8, 6), (4, 2, 6))
    with h5py.File(path, "a") as h5:
        h5["t"] = np.arange(20.0)
    reader = open_archive(str(path))
    tile = reader.read_tile("u", slice(0, 48), slice(3, 15))
    np.testing.assert_array_equal(tile, data[3:15].reshape(12, -1).T)


def test_zarr_chunk_file_of_another_size_is_read_by_zarr(tmp_path, monkeypatch):
    # a chunk file larger than its chunk is not plain bytes of it: zarr decides
    import zarr

    from snaplift.archive.zarrstore import _Array, _chunk_files

    path = str(tmp_path / "a.zarr")
    group = zarr.open_group(path, mode="w", zarr_format=3)
    data = np.arange(4 * 6 * 5, dtype="f8").reshape(4, 6, 5)
    group.create_array("u", shape=data.shape, chunks=(2, 3, 5), dtype="f8", compressors=None)[...] = data
    stored = zarr.open_group(path, mode="r")["u"]
    files = _chunk_files(stored)
    chunk = files.path((1, 1, 0))
    with open(chunk, "ab") as handle:
        handle.write(b"\0" * 8)
    seen = []
    monkeypatch.setattr(stored, "get_basic_selection",
                        lambda *a, **k: seen.append(1) or type(stored).get_basic_selection(stored, *a, **k))
    with pytest.raises(ArchiveError, match="damaged or truncated"):  # zarr itself finds the chunk damaged
        _Array(stored, path)[0:4, 0:6, 0:5]
    assert seen  # the library was asked, not the positioned reads


def test_truncated_zarr_chunk_names_the_file(tmp_path):
    import zarr

    from snaplift.archive.zarrstore import _Array, _chunk_files

    path = str(tmp_path / "a.zarr")
    group = zarr.open_group(path, mode="w", zarr_format=2)
    group.create_array("u", shape=(4, 6, 5), chunks=(2, 3, 5), dtype="f8", compressors=None)[...] = 1.0
    stored = zarr.open_group(path, mode="r")["u"]
    chunk = _chunk_files(stored).path((1, 0, 0))
    with open(chunk, "r+b") as handle:
        handle.truncate(16)
    with pytest.raises(ArchiveError, match=r"zarr chunk file .*1\.0\.0 is truncated: 16 of 240 bytes"):
        _Array(stored, path)[0:4, 0:6, 0:5]


def test_rows_of_chunks_hinted_ahead_of_a_library_read(tmp_path):
    # chunks written in time order: each row of chunks along time is one byte range of the
    # file, the row's chunks one after another (h5py allocates them as written)
    path = tmp_path / "fine.h5"
    _write_hdf5(path, (20, 6, 8), (4, 3, 4), reverse=False)
    with h5py.File(path, "r") as h5:
        storage = _storage(h5["u"])
        rows = _chunk_reads.chunk_rows(storage.layout, ((2, 11), (0, 6), (0, 8)), storage.locate)
        chunk = 4 * 3 * 4 * 8
        assert [(t0, t1) for t0, t1, _ in rows] == [(2, 4), (4, 8), (8, 11)]
        for t0, _, ranges in rows:
            row = t0 // 4
            assert ranges == [("", int(storage.offsets[row, 0, 0]), 4 * chunk)]
            assert int(storage.offsets[row, 1, 1]) == int(storage.offsets[row, 0, 0]) + 3 * chunk
