"""Tile reads touch only the rows they need, and layouts follow a growing archive."""

from __future__ import annotations

import h5py
import numpy as np
import pytest

from snaplift.archive import _handles, open_archive
from snaplift.archive._common import grid_box


@pytest.mark.parametrize(
    ("grid", "start", "stop", "box", "offset"),
    [
        # hand-worked: grid (6, 5), flat 7..9 is row 1, columns 2..3
        ((6, 5), 7, 9, (slice(1, 2), slice(2, 4)), 0),
        # flat 3..12 spans rows 0..2 -> whole rows 0..2, start at offset 3
        ((6, 5), 3, 12, (slice(0, 3), slice(0, 5)), 3),
        # 3-D: flat 21..23 of (4, 3, 5) lies in plane 1 (15..29), row 1 (20..24), cols 1..2
        ((4, 3, 5), 21, 23, (slice(1, 2), slice(1, 2), slice(1, 3)), 0),
        # crossing planes: 14..16 -> planes 0..1 whole
        ((4, 3, 5), 14, 16, (slice(0, 2), slice(0, 3), slice(0, 5)), 14),
        ((7,), 2, 5, (slice(2, 5),), 0),
    ],
)
def test_grid_box(grid, start, stop, box, offset):
    assert grid_box(grid, start, stop) == (box, offset)
    # the box holds the range: numpy flattening is the reference
    full = np.arange(int(np.prod(grid))).reshape(grid)
    np.testing.assert_array_equal(full[box].ravel()[offset : offset + stop - start],
                                  np.arange(start, stop))


class _Recorder:
    """Stands in for a stored array and records each selection requested."""

    def __init__(self, data):
        self.data = data
        self.selections = []

    def __getitem__(self, selection):
        self.selections.append(selection)
        return self.data[selection]


def test_hdf5_read_asks_only_for_needed_rows_and_snapshots(tmp_path, monkeypatch):
    data = np.arange(12 * 6 * 5, dtype=np.float64).reshape(12, 6, 5)
    path = tmp_path / "r.h5"
    with h5py.File(path, "w") as f:
        f.create_dataset("u", data=data, chunks=(4, 3, 5))
    reader = open_archive(path)
    recorder = _Recorder(data)
    monkeypatch.setattr(type(reader), "_array", lambda self, root, key: recorder)
    tile = reader.read_tile("u", slice(7, 13), slice(3, 5))
    assert recorder.selections == [(slice(3, 5), slice(1, 3), slice(0, 5))]
    np.testing.assert_array_equal(tile, data.reshape(12, -1).T[7:13, 3:5])


def test_growing_hdf5_file_is_described_afresh(tmp_path):
    path = tmp_path / "g.h5"
    with h5py.File(path, "w") as f:
        f.create_dataset("u", data=np.zeros((4, 3, 2)), maxshape=(None, 3, 2), chunks=(1, 3, 2))
    reader = open_archive(path)
    assert reader.describe().fields["u"].n_snapshots == 4
    # HDF5 refuses a writer in a process that holds the file open read-only, so this
    # process lets go of the file first (in practice the writer is another process);
    # the cached layout is left alone: the file's new size/mtime must invalidate it
    _handles.hdf5_file(str(path)).close()
    with h5py.File(path, "a") as f:
        f["u"].resize((6, 3, 2))
        f["u"][4:] = 1.0
    assert reader.describe().fields["u"].n_snapshots == 6
    np.testing.assert_array_equal(reader.read_tile("u", slice(0, 1), slice(None))[0],
                                  [0, 0, 0, 0, 1, 1])


def test_growing_series_is_described_afresh(tmp_path):
    for j in range(3):
        np.save(tmp_path / f"s_{j}.npy", np.full(4, float(j)))
    reader = open_archive(str(tmp_path / "s_*.npy"))
    assert reader.describe().fields["s"].n_snapshots == 3
    np.save(tmp_path / "s_3.npy", np.full(4, 3.0))
    assert reader.describe().fields["s"].n_snapshots == 4
    np.testing.assert_array_equal(reader.read_tile("s", slice(0, 1), slice(None))[0],
                                  [0.0, 1.0, 2.0, 3.0])


@pytest.mark.parametrize("order", ["forward", "reverse"])
def test_positioned_hdf5_reads_equal_h5py(tmp_path, monkeypatch, order):
    # chunks written in reverse lie in the file in reverse: no run joins them; forward they join
    rng = np.random.default_rng(3)
    data = rng.standard_normal((23, 6, 5))
    path = tmp_path / f"{order}.h5"
    with h5py.File(path, "w") as f:
        f["t"] = np.arange(23.0)
        u = f.create_dataset("u", shape=data.shape, dtype="f8", chunks=(3, 6, 5))
        blocks = range(0, 23, 3)
        for j in (reversed(blocks) if order == "reverse" else blocks):
            u[j:j + 3] = data[j:j + 3]
    # small requests and read-ahead windows so that one tile takes many of them
    monkeypatch.setattr(_handles, "REQUEST_BYTES", 200)
    monkeypatch.setattr(_handles, "READ_AHEAD_BYTES", 500)
    reader = open_archive(path)
    for s0, s1 in [(0, 23), (2, 17), (5, 6)]:
        tile = reader.read_tile("u", slice(0, 30), slice(s0, s1))
        with h5py.File(path, "r") as f:  # h5py is the reference
            expected = f["u"][s0:s1].reshape(s1 - s0, -1).T
        np.testing.assert_array_equal(tile, expected)
