"""Which stored arrays are fields: the rules in snaplift.archive._common.split_fields_and_variables."""

from __future__ import annotations

import h5py
import numpy as np
import pytest
import zarr

from snaplift.archive import open_archive
from snaplift.errors import ArchiveFormatError, FieldNotFoundError


def test_most_common_leading_length_without_a_time(tmp_path):
    path = tmp_path / "no_time.h5"
    with h5py.File(path, "w") as f:
        f["a"] = np.zeros((9, 4, 3))
        f["b/c"] = np.zeros((9, 2))
        f["grid_x"] = np.zeros((4, 3))  # leading length 4 is less common than 9
        f["probe"] = np.zeros(9)  # 1-D: a variable
    info = open_archive(path).describe()
    assert set(info.fields) == {"a", "b/c"}
    assert set(info.variables) == {"grid_x", "probe"}
    assert info.attrs["time_variable"] is None
    assert info.fields["b/c"].grid == (2,)


def test_cf_axis_beats_name(tmp_path):
    path = tmp_path / "axis.h5"
    with h5py.File(path, "w") as f:
        f["u"] = np.zeros((5, 3, 2))
        f["time"] = np.zeros(3)  # named like a time but of another length
        f["clock"] = np.arange(5.0)
        f["clock"].attrs["axis"] = "T"
    info = open_archive(path).describe()
    assert info.attrs["time_variable"] == "clock"
    assert list(info.fields) == ["u"]


def test_explicit_fields_and_time(tmp_path):
    path = tmp_path / "explicit.h5"
    with h5py.File(path, "w") as f:
        f["u"] = np.zeros((6, 3))
        f["v"] = np.zeros((6, 3))
        f["when"] = np.arange(6.0)
    reader = open_archive(path, fields=["u"], time="when")
    info = reader.describe()
    assert list(info.fields) == ["u"] and "v" in info.variables
    assert info.attrs["time_variable"] == "when"
    with pytest.raises(FieldNotFoundError, match="'w'"):
        open_archive(path, fields=["w"]).describe()
    with h5py.File(tmp_path / "bad.h5", "w") as f:
        f["u"] = np.zeros((6, 3))
        f["v"] = np.zeros(4)
    with pytest.raises(ArchiveFormatError, match="'v'.*4 values.*6 snapshots"):
        open_archive(tmp_path / "bad.h5", fields=["u"], time="v").describe()


def test_single_zarr_array_is_one_field(tmp_path):
    path = tmp_path / "vorticity.zarr"
    a = zarr.create_array(str(path), shape=(7, 4, 3), chunks=(2, 4, 3), dtype="f4")
    data = np.arange(84, dtype=np.float32).reshape(7, 4, 3)
    a[:] = data
    reader = open_archive(path)
    info = reader.describe()
    assert list(info.fields) == ["vorticity"]
    assert info.fields["vorticity"].chunks == (2, 4, 3)
    np.testing.assert_array_equal(reader.read_tile("vorticity", slice(2, 9), slice(1, 6)),
                                  data.reshape(7, -1).T[2:9, 1:6])
