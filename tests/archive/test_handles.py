"""The per-process handle cache: read-only, bounded, fork-aware, refreshed on change."""

from __future__ import annotations

import os

import h5py
import numpy as np

from snaplift.archive import _handles


def test_hdf5_handle_is_read_only_with_a_large_chunk_cache(tmp_path):
    path = tmp_path / "a.h5"
    with h5py.File(path, "w") as f:
        f.create_dataset("u", data=np.zeros((2, 2)))
    handle = _handles.hdf5_file(str(path))
    assert handle.mode == "r"
    assert _handles.hdf5_file(str(path)) is handle  # reused
    nbytes = handle.id.get_access_plist().get_cache()[2]
    assert nbytes == _handles.HDF5_CHUNK_CACHE_BYTES == 64 * 2**20


def test_cache_is_bounded(tmp_path, monkeypatch):
    monkeypatch.setattr(_handles, "MAX_HANDLES", 3)
    _handles.clear()
    for j in range(5):
        np.save(tmp_path / f"f{j}.npy", np.zeros(3))
        _handles.npy_array(str(tmp_path / f"f{j}.npy"))
    assert _handles.cached_handle_count() == 3


def test_new_process_id_starts_empty(tmp_path, monkeypatch):
    path = tmp_path / "b.npy"
    np.save(path, np.arange(3.0))
    first = _handles.npy_array(str(path))
    assert _handles.cached_handle_count() >= 1
    real = os.getpid()
    monkeypatch.setattr(os, "getpid", lambda: real + 100000)  # as seen by a forked child
    assert _handles.cached_handle_count() == 0
    assert _handles.npy_array(str(path)) is not first


def test_changed_file_is_reopened(tmp_path):
    path = tmp_path / "c.npy"
    np.save(path, np.zeros(3))
    assert _handles.npy_array(str(path)).shape == (3,)
    np.save(path, np.ones(5))
    fresh = _handles.npy_array(str(path))
    np.testing.assert_array_equal(fresh, np.ones(5))
    assert not fresh.flags.writeable
