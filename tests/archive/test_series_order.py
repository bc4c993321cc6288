"""Ordering of per-snapshot files: by time value, else natural number order."""

from __future__ import annotations

import os
import pickle
from operator import methodcaller

import h5py
import numpy as np
import pytest

from snaplift.archive import open_archive
from snaplift.archive._common import natural_key
from snaplift.archive.series import common_stem
from snaplift.errors import ArchiveFormatError


def test_natural_key_orders_numbers_as_numbers():
    names = ["frame_10.h5", "frame_2.h5", "frame_1.h5", "Frame_3.h5", "frame_1b.h5"]
    # expected order written out by hand: digit runs compare as integers
    assert sorted(names, key=natural_key) == [
        "frame_1.h5", "frame_1b.h5", "frame_2.h5", "Frame_3.h5", "frame_10.h5"
    ]
    assert sorted(["run2/f_1", "run10/f_1", "run2/f_10", "run2/f_9"], key=natural_key) == [
        "run2/f_1", "run2/f_9", "run2/f_10", "run10/f_1"
    ]


def test_common_stem():
    assert common_stem(["a/frame_1.npy", "a/frame_22.npy"]) == "frame"
    assert common_stem(["a/u-001.npy", "a/u-002.npy"]) == "u"
    assert common_stem(["a/u_1.npy", "a/v_2.npy"]) == "x"


def test_npy_series_in_natural_order(tmp_path):
    for j in (1, 2, 10, 11, 3):
        np.save(tmp_path / f"snap{j}.npy", np.full((2, 2), float(j)))
    reader = open_archive(str(tmp_path / "snap*.npy"))
    tile = reader.read_tile("snap", slice(0, 1), slice(None))
    np.testing.assert_array_equal(tile[0], [1.0, 2.0, 3.0, 10.0, 11.0])


def _write(path, value, time=None, attr_time=None, extra=None):
    with h5py.File(path, "w") as f:
        f.create_dataset("u", data=np.full((3, 2), value))
        if time is not None:
            f.create_dataset("time", data=time)
        if attr_time is not None:
            f.attrs["t"] = attr_time
        for key, data in (extra or {}).items():
            f.create_dataset(key, data=data)


def test_time_value_beats_file_names(tmp_path):
    # names in natural order a_1..a_4 but times say a_3, a_1, a_4, a_2
    times = {1: 0.2, 2: 0.4, 3: 0.1, 4: 0.3}
    for j, t in times.items():
        _write(tmp_path / f"a_{j}.h5", value=float(j), time=t)
    reader = open_archive(str(tmp_path / "a_*.h5"))
    info = reader.describe()
    assert info.attrs["order"] == "time"
    assert [os.path.basename(f) for f in info.files] == ["a_3.h5", "a_1.h5", "a_4.h5", "a_2.h5"]
    np.testing.assert_array_equal(reader.read_tile("u", slice(0, 1), slice(None))[0],
                                  [3.0, 1.0, 4.0, 2.0])
    np.testing.assert_array_equal(reader.read_variable("time"), [0.1, 0.2, 0.3, 0.4])


def test_time_from_root_attribute(tmp_path):
    for j, t in enumerate([5.0, 3.0, 4.0]):
        _write(tmp_path / f"b{j}.h5", value=float(j), attr_time=t)
    reader = open_archive(str(tmp_path / "b*.h5"))
    np.testing.assert_array_equal(reader.read_variable("t"), [3.0, 4.0, 5.0])
    np.testing.assert_array_equal(reader.read_tile("u", slice(0, 1), slice(None))[0],
                                  [1.0, 2.0, 0.0])


def test_file_without_time_is_named(tmp_path):
    _write(tmp_path / "c_1.h5", 1.0, time=0.0)
    _write(tmp_path / "c_2.h5", 2.0)
    with pytest.raises(ArchiveFormatError, match="c_2.h5"):
        open_archive(str(tmp_path / "c_*.h5")).describe()


def test_static_datasets_of_first_file_are_variables(tmp_path):
    _write(tmp_path / "d_1.h5", 1.0, extra={"area": np.ones((3, 2))})
    _write(tmp_path / "d_2.h5", 2.0)
    _write(tmp_path / "d_3.h5", 3.0)
    info = open_archive(str(tmp_path / "d_*.h5")).describe()
    assert list(info.fields) == ["u"]
    assert "area" in info.variables
    assert info.attrs["order"] == "natural"


def test_mismatched_grid_is_named(tmp_path):
    _write(tmp_path / "e_1.h5", 1.0)
    with h5py.File(tmp_path / "e_2.h5", "w") as f:
        f.create_dataset("u", data=np.zeros((4, 2)))
    with pytest.raises(ArchiveFormatError, match=r"e_2\.h5.*\(4, 2\)"):
        open_archive(str(tmp_path / "e_*.h5")).describe()


def test_pickled_series_is_small_and_keeps_time_order_in_a_worker(tmp_path, spawn_pool):
    rng = np.random.default_rng(11)
    times = rng.permutation(40) * 0.5  # time order differs from name order
    for j, t in enumerate(times):
        _write(tmp_path / f"w_{j}.h5", value=float(j), time=t)
    reader = open_archive(str(tmp_path / "w_*.h5"))
    expected = reader.read_tile("u", slice(0, 2), slice(None))
    payload = pickle.dumps(reader)
    assert b"w_7.h5" not in payload  # the file list is not shipped with every task
    assert len(payload) < 4000
    tile = spawn_pool.submit(methodcaller("read_tile", "u", slice(0, 2), slice(None)),
                             reader).result(timeout=120)
    np.testing.assert_array_equal(tile, expected)
    np.testing.assert_array_equal(expected[0], np.argsort(times, kind="stable"))
    worker_times = spawn_pool.submit(methodcaller("read_variable", "time"), reader).result(120)
    np.testing.assert_array_equal(worker_times, np.sort(times))


def test_worker_notices_a_changed_series(tmp_path):
    for j in range(3):
        _write(tmp_path / f"z_{j}.h5", value=float(j), time=float(j))
    reader = open_archive(str(tmp_path / "z_*.h5"))
    reader.describe()
    payload = pickle.dumps(reader)
    _write(tmp_path / "z_3.h5", value=3.0, time=3.0)
    from snaplift.archive import _handles

    _handles.clear()  # as in a fresh worker process
    clone = pickle.loads(payload)
    with pytest.raises(ArchiveFormatError, match="changed since it was described"):
        clone.read_tile("u", slice(0, 1), slice(0, 1))
