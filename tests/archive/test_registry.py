"""Choosing a reader: glob -> series, magic bytes before suffix, clear one-line errors."""

from __future__ import annotations

import h5py
import netCDF4
import numpy as np
import pytest
import zarr

from snaplift.archive import Reader, available_readers, open_archive, register_reader
from snaplift.archive._registry import HDF5_SIGNATURE, NUMPY_MAGIC, sniff_format
from snaplift.archive.hdf5 import HDF5Reader
from snaplift.archive.npy import NpyReader
from snaplift.archive.series import SeriesReader
from snaplift.archive.zarrstore import ZarrReader
from snaplift.errors import ArchiveError, ArchiveFormatError, SnapliftError


def _hdf5(path):
    with h5py.File(path, "w") as f:
        f.create_dataset("u", data=np.zeros((4, 3, 2)))
    return path


def test_signatures_are_the_published_ones():
    # HDF5 file format specification, superblock signature; NEP 1 .npy magic string
    assert HDF5_SIGNATURE == bytes([0x89, 0x48, 0x44, 0x46, 0x0D, 0x0A, 0x1A, 0x0A])
    assert NUMPY_MAGIC == b"\x93NUMPY"


def test_all_builtin_readers_registered():
    readers = available_readers()
    assert list(readers) == ["hdf5", "zarr", "npy", "series"]
    assert readers["hdf5"] is HDF5Reader and readers["series"] is SeriesReader


def test_magic_bytes_win_over_misleading_suffix(tmp_path):
    hdf5_named_npy = _hdf5(tmp_path / "looks_like.npy")
    npy_named_h5 = tmp_path / "looks_like.h5"
    with open(npy_named_h5, "wb") as handle:
        np.save(handle, np.zeros((4, 3)))
    assert sniff_format(str(hdf5_named_npy)) == "hdf5"
    assert type(open_archive(hdf5_named_npy)) is HDF5Reader
    assert type(open_archive(npy_named_h5)) is NpyReader
    assert open_archive(npy_named_h5).describe().fields["looks_like"].shape == (4, 3)


def test_zarr_directory_recognised_by_metadata_not_name(tmp_path):
    for fmt in (2, 3):
        path = tmp_path / f"store_v{fmt}.data"  # no .zarr suffix
        zarr.open_group(str(path), mode="w", zarr_format=fmt).create_array(
            "u", shape=(4, 3, 2), dtype="f8"
        )
        assert type(open_archive(path)) is ZarrReader


def test_suffix_decides_when_content_says_nothing(tmp_path):
    path = tmp_path / "empty.h5"
    path.write_bytes(b"")
    reader = open_archive(path)
    assert type(reader) is HDF5Reader
    with pytest.raises(ArchiveFormatError, match="empty.h5"):
        reader.describe()


def test_glob_goes_to_series(tmp_path):
    assert type(open_archive(str(tmp_path / "frame_*.npy"))) is SeriesReader
    with pytest.raises(ArchiveError, match="no files match"):
        open_archive(str(tmp_path / "frame_*.npy")).describe()


def test_missing_path_is_named(tmp_path):
    missing = tmp_path / "nowhere.h5"
    with pytest.raises(ArchiveError, match="nowhere.h5") as caught:
        open_archive(missing)
    assert "\n" not in str(caught.value)


def test_unrecognised_file_lists_formats_tried(tmp_path):
    path = tmp_path / "notes.txt"
    path.write_text("not an archive\n")
    with pytest.raises(ArchiveFormatError) as caught:
        open_archive(path)
    message = str(caught.value)
    assert "notes.txt" in message and "hdf5, zarr, npy, series" in message
    assert "\n" not in message


def test_netcdf3_is_refused_with_a_hint(tmp_path):
    path = tmp_path / "classic.nc"
    with netCDF4.Dataset(path, "w", format="NETCDF3_CLASSIC") as ds:
        ds.createDimension("x", 3)
        ds.createVariable("v", "f8", ("x",))[:] = 1.0
    assert sniff_format(str(path)) == "netcdf3"
    with pytest.raises(ArchiveFormatError, match="netCDF-3"):
        open_archive(path)


def test_explicit_format_and_alias(tmp_path):
    path = _hdf5(tmp_path / "data.bin")
    assert type(open_archive(path, format="netcdf4")) is HDF5Reader
    with pytest.raises(ArchiveFormatError, match="formats available"):
        open_archive(path, format="grib")


def test_explicit_options_reach_the_reader(tmp_path):
    path = _hdf5(tmp_path / "d.h5")
    reader = open_archive(path, fields=["u"])
    assert reader.fields == ("u",)
    npy = tmp_path / "a.npy"
    np.save(npy, np.zeros((3, 2)))
    assert list(open_archive(npy, fields=["pressure"]).describe().fields) == ["pressure"]
    with pytest.raises(ArchiveError, match="option 'time' does not apply to npy"):
        open_archive(npy, time="t")


def test_register_reader_rules():
    with pytest.raises(ArchiveError):
        register_reader(int)  # type: ignore[arg-type]

    class Impostor(Reader):
        format_name = "hdf5"

        @classmethod
        def guess_can_open(cls, path):
            return False

        def describe(self):  # pragma: no cover - never called
            raise NotImplementedError

        def read_tile(self, field, points, snapshots):  # pragma: no cover
            raise NotImplementedError

        def read_variable(self, name):  # pragma: no cover
            raise NotImplementedError

    with pytest.raises(ArchiveError, match="already registered"):
        register_reader(Impostor)
    assert register_reader(HDF5Reader) is HDF5Reader  # re-registering is harmless
    assert issubclass(ArchiveError, SnapliftError)
