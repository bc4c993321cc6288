"""One conformance suite run against every reader (in the manner of zarr's StoreTests).

Each subclass writes the SAME invented reference data (``make_reference`` below) in
its format with the format's own writing library (h5py, netCDF4, zarr, numpy) and the
shared tests compare what the reader returns with plain numpy slicing of the
reference arrays (numpy is the reference library throughout).

The data are invented (smooth travelling waves over a small duct cross-section, the
demo scenario of cooling air past a heated fin) and small, so every format is written
and read in well under a second.
"""

from __future__ import annotations

import hashlib
import os
import pickle
import stat
from dataclasses import dataclass, field
from operator import methodcaller
from pathlib import Path

import h5py
import netCDF4
import numpy as np
import pytest
import zarr

from snaplift.archive import _handles, open_archive
from snaplift.archive.hdf5 import HDF5Reader
from snaplift.archive.npy import NpyReader
from snaplift.archive.series import SeriesReader
from snaplift.archive.zarrstore import ZarrReader
from snaplift.errors import ArchiveError, FieldNotFoundError

HOURS = "hours since 2000-01-01"

N_SNAPSHOTS = 12  # on purpose different from every grid length, so axes cannot be confused


@dataclass(frozen=True)
class Reference:
    """Invented reference archive content, snapshot axis first."""

    times: np.ndarray  # hours
    u: np.ndarray  # (12, 6, 5) float64, velocity on cell faces
    p: np.ndarray  # (12, 5, 4) float64, pressure on cell centres (staggered grid)
    temperature: np.ndarray  # (12, 6, 5) float32
    q: np.ndarray  # (12, 5, 4) complex128
    weights: np.ndarray  # (6, 5) float64 cell areas
    mask: np.ndarray  # (6, 5) bool


def make_reference() -> Reference:
    rng = np.random.default_rng(20240611)
    t = 100.0 + 0.25 * np.arange(N_SNAPSHOTS)
    y, x = np.meshgrid(np.arange(6), np.arange(5), indexing="ij")
    yp, xp = np.meshgrid(np.arange(5), np.arange(4), indexing="ij")
    u = np.stack([np.sin(0.7 * x - 0.3 * tj) + 0.1 * y for tj in t]) + 0.01 * rng.standard_normal(
        (N_SNAPSHOTS, 6, 5)
    )
    p = np.stack([np.cos(0.5 * xp + 0.2 * yp - 0.4 * tj) for tj in t])
    temperature = (300.0 + 5.0 * u).astype(np.float32)
    q = np.stack([np.exp(1j * (0.9 * xp - 0.6 * tj)) * (1 + 0.1 * yp) for tj in t])
    weights = 0.5 + rng.random((6, 5))
    mask = rng.random((6, 5)) > 0.2
    return Reference(t, u, p, temperature, q.astype(np.complex128), weights, mask)


@pytest.fixture(scope="session")
def reference() -> Reference:
    return make_reference()


@dataclass
class Written:
    """What a writer put on disk and what a reader must therefore report."""

    path: str
    reader_cls: type
    fields: dict[str, np.ndarray]  # decoded values, snapshot axis first
    stored: dict[str, np.dtype]
    chunks: dict[str, tuple[int, ...]]
    variables: dict[str, np.ndarray] = field(default_factory=dict)
    time_name: str | None = None
    float32_field: str | None = None
    complex_field: str | None = None


def _x(values: np.ndarray) -> np.ndarray:
    """The snapshot matrix of a field: grid flattened in C order, transposed."""
    return values.reshape(values.shape[0], -1).T


def _tile_cases(n_points: int, row: int) -> list[tuple[slice, slice]]:
    """(points, snapshots) ranges: whole, single value, across grid rows and chunks,
    within one row, ragged ends, past the end (numpy clips), empty."""
    return [
        (slice(None), slice(None)),
        (slice(0, 1), slice(0, 1)),
        (slice(3, n_points - 2), slice(3, 9)),
        (slice(row + 1, row + 3), slice(5, 12)),
        (slice(row - 1, 3 * row + 1), slice(0, 5)),
        (slice(n_points - 1, None), slice(11, None)),
        (slice(2, n_points + 50), slice(1, 100)),
        (slice(5, 5), slice(0, 3)),
    ]


class ReaderTests:
    """Subclasses implement ``write(directory, reference) -> Written``."""

    @staticmethod
    def write(directory: Path, ref: Reference) -> Written:  # pragma: no cover - abstract
        raise NotImplementedError

    @pytest.fixture(scope="class")
    @classmethod
    def written(cls, tmp_path_factory, reference) -> Written:
        directory = tmp_path_factory.mktemp(cls.__name__)
        return cls.write(directory, reference)

    @pytest.fixture()
    def reader(self, written):
        return open_archive(written.path)

    # -- describe ------------------------------------------------------------------
    def test_guess_picks_this_reader(self, written, reader):
        assert type(reader) is written.reader_cls

    def test_describe_fields(self, written, reader):
        info = reader.describe()
        assert set(info.fields) == set(written.fields)
        for name, values in written.fields.items():
            f = info.fields[name]
            assert f.shape == values.shape
            assert f.n_snapshots == N_SNAPSHOTS
            assert f.grid == values.shape[1:]
            assert f.stored_dtype == written.stored[name]
            assert f.dtype == (np.complex128 if values.dtype.kind == "c" else np.float64)
            assert f.chunks == written.chunks[name]
            assert f.nbytes == values.size * written.stored[name].itemsize
        assert info.size_bytes > 0
        assert info.attrs["time_variable"] == written.time_name

    def test_staggered_grids_have_their_own_shapes(self, written, reader):
        grids = {f.grid for f in reader.describe().fields.values()}
        expected = {v.shape[1:] for v in written.fields.values()}
        assert grids == expected

    # -- read_tile -----------------------------------------------------------------
    def test_read_tile_matches_numpy_slicing(self, written, reader):
        for name, values in written.fields.items():
            reference = _x(values)
            row = values.shape[-1]
            for points, snapshots in _tile_cases(reference.shape[0], row):
                tile = reader.read_tile(name, points, snapshots)
                expected = reference[points, snapshots]  # numpy slicing is the reference
                assert tile.shape == expected.shape, (name, points, snapshots)
                assert tile.flags.c_contiguous
                assert tile.dtype == (np.complex128 if values.dtype.kind == "c" else np.float64)
                np.testing.assert_array_equal(
                    tile, expected, err_msg=f"{name} {points} {snapshots}"
                )

    def test_float32_is_returned_as_float64(self, written, reader):
        if written.float32_field is None:
            pytest.skip("format written without a float32 field")
        name = written.float32_field
        assert written.stored[name] == np.float32
        tile = reader.read_tile(name, slice(0, 7), slice(2, 6))
        assert tile.dtype == np.float64
        # float32 -> float64 is exact (IEEE 754 widening), so equality is the check
        np.testing.assert_array_equal(tile, _x(written.fields[name]).astype(np.float64)[0:7, 2:6])

    def test_complex_is_returned_as_complex128(self, written, reader):
        if written.complex_field is None:
            pytest.skip("format has no complex data")
        tile = reader.read_tile(written.complex_field, slice(1, 9), slice(0, 4))
        assert tile.dtype == np.complex128
        np.testing.assert_array_equal(tile, _x(written.fields[written.complex_field])[1:9, 0:4])

    # -- variables -----------------------------------------------------------------
    def test_read_variable(self, written, reader):
        info = reader.describe()
        assert set(written.variables) <= set(info.variables)
        for name, expected in written.variables.items():
            value = reader.read_variable(name)
            assert value.shape == expected.shape, name
            np.testing.assert_array_equal(value, expected, err_msg=name)
            assert info.variables[name].shape == expected.shape

    def test_time_variable_is_float64(self, written, reader):
        if written.time_name is None:
            pytest.skip("format carries no times")
        times = reader.read_variable(written.time_name)
        assert times.dtype == np.float64
        np.testing.assert_array_equal(times, written.variables[written.time_name])

    # -- errors --------------------------------------------------------------------
    def test_unknown_field_names_it_and_lists_present(self, written, reader):
        with pytest.raises(FieldNotFoundError) as caught:
            reader.read_tile("no_such_field", slice(None), slice(0, 1))
        message = str(caught.value)
        assert "'no_such_field'" in message
        for name in written.fields:
            assert name in message
        assert "\n" not in message

    def test_unknown_variable(self, reader):
        with pytest.raises(FieldNotFoundError, match="no_such_variable"):
            reader.read_variable("no_such_variable")

    def test_slice_with_step_is_refused(self, written, reader):
        name = next(iter(written.fields))
        with pytest.raises(ArchiveError, match="step 1"):
            reader.read_tile(name, slice(0, 10, 2), slice(0, 2))

    # -- pickling and processes ----------------------------------------------------
    def test_pickle_after_reading(self, written, reader):
        name = next(iter(written.fields))
        before = reader.read_tile(name, slice(2, 11), slice(1, 7))
        clone = pickle.loads(pickle.dumps(reader))
        assert clone == reader
        np.testing.assert_array_equal(clone.read_tile(name, slice(2, 11), slice(1, 7)), before)

    def test_usable_in_spawned_process(self, written, reader, spawn_pool):
        reader.describe()  # state after use in the parent is what gets shipped
        assert spawn_pool.submit(os.getpid).result(timeout=120) != os.getpid()
        for name, values in written.fields.items():
            task = methodcaller("read_tile", name, slice(1, 13), slice(4, 10))
            tile = spawn_pool.submit(task, reader).result(timeout=120)
            np.testing.assert_array_equal(tile, _x(values)[1:13, 4:10])

    # -- read-only -----------------------------------------------------------------
    def test_never_opens_for_writing(self, tmp_path, reference):
        written = self.write(tmp_path, reference)
        files = sorted(p for p in tmp_path.rglob("*") if p.is_file())
        dirs = sorted(p for p in tmp_path.rglob("*") if p.is_dir())
        for p in files:
            p.chmod(stat.S_IRUSR | stat.S_IRGRP | stat.S_IROTH)
        for p in dirs:
            p.chmod(stat.S_IRUSR | stat.S_IXUSR | stat.S_IRGRP | stat.S_IXGRP)
        before = {p: (hashlib.sha256(p.read_bytes()).hexdigest(), p.stat().st_mtime_ns)
                  for p in files}
        try:
            reader = open_archive(written.path)
            for name, values in written.fields.items():
                np.testing.assert_array_equal(
                    reader.read_tile(name, slice(None), slice(None)), _x(values)
                )
            for name in written.variables:
                reader.read_variable(name)
            # what the cache holds for these files must be read-only handles
            # (chmod alone proves nothing when the tests run as root)
            for handle in _handles.cached_handles():
                if isinstance(handle, h5py.File) and handle.id.valid:
                    if str(tmp_path) in handle.filename:
                        assert handle.mode == "r"
                elif isinstance(handle, np.ndarray):
                    assert not handle.flags.writeable
                elif isinstance(handle, zarr.Group | zarr.Array):
                    assert handle.read_only
            after = sorted(p for p in tmp_path.rglob("*") if p.is_file())
            assert after == files, "reading created files"
            for p in files:
                assert (hashlib.sha256(p.read_bytes()).hexdigest(), p.stat().st_mtime_ns) \
                    == before[p], p
        finally:
            for p in dirs:
                p.chmod(stat.S_IRWXU)
            for p in files:
                p.chmod(stat.S_IRUSR | stat.S_IWUSR)


# --------------------------------------------------------------------------- writers
def _common_variables(ref: Reference) -> dict[str, np.ndarray]:
    return {"weights": ref.weights, "mask": ref.mask}


class TestHDF5(ReaderTests):
    @staticmethod
    def write(directory: Path, ref: Reference) -> Written:
        path = directory / "wake.h5"
        with h5py.File(path, "w") as f:
            f.create_dataset("u", data=ref.u, chunks=(4, 3, 5), compression="gzip")
            f.create_dataset("flow/p", data=ref.p, chunks=(5, 5, 4))
            f.create_dataset("temperature", data=ref.temperature)  # contiguous
            f.create_dataset("extra/q", data=ref.q, chunks=(3, 5, 4))
            f.create_dataset("t", data=ref.times)
            f.create_dataset("weights", data=ref.weights)
            f.create_dataset("mask", data=ref.mask)
        return Written(
            path=str(path),
            reader_cls=HDF5Reader,
            fields={"u": ref.u, "flow/p": ref.p, "temperature": ref.temperature,
                    "extra/q": ref.q},
            stored={"u": np.dtype("f8"), "flow/p": np.dtype("f8"),
                    "temperature": np.dtype("f4"), "extra/q": np.dtype("c16")},
            # contiguous storage reads any snapshot block: chunk of one snapshot
            chunks={"u": (4, 3, 5), "flow/p": (5, 5, 4), "temperature": (1, 6, 5),
                    "extra/q": (3, 5, 4)},
            variables={"t": ref.times, **_common_variables(ref)},
            time_name="t",
            float32_field="temperature",
            complex_field="extra/q",
        )


U_SCALE, U_OFFSET, U_FILL = 1.0e-4, 0.25, -32767
P_MISSING = -999.0


def _pack_u(ref: Reference) -> tuple[np.ndarray, np.ndarray]:
    """int16 packing of u and its decoded values (CF conventions 1.x, section 8.1)."""
    packed = np.round((ref.u - U_OFFSET) / U_SCALE).astype(np.int16)
    packed[0, 0, 0] = U_FILL
    packed[7, 5, 4] = U_FILL
    decoded = packed.astype(np.float64) * U_SCALE + U_OFFSET
    decoded[packed == U_FILL] = np.nan
    return packed, decoded


class TestNetCDF4(ReaderTests):
    @staticmethod
    def write(directory: Path, ref: Reference) -> Written:
        path = directory / "wake.nc"
        packed, u_decoded = _pack_u(ref)
        p = ref.p.copy()
        p[2, 1, 1] = P_MISSING
        p_decoded = p.copy()
        p_decoded[2, 1, 1] = np.nan
        with netCDF4.Dataset(path, "w", format="NETCDF4", auto_complex=True) as ds:
            ds.Conventions = "CF-1.8"
            ds.createDimension("time", None)
            for name, size in (("y", 6), ("x", 5), ("yp", 5), ("xp", 4)):
                ds.createDimension(name, size)
            t = ds.createVariable("time", "f8", ("time",))
            t.units = HOURS
            t.axis = "T"
            t[:] = ref.times
            x = ds.createVariable("x", "f8", ("x",))
            x[:] = 0.1 * np.arange(5)
            u = ds.createVariable("u", "i2", ("time", "y", "x"), fill_value=U_FILL,
                                  chunksizes=(4, 3, 5))
            u.scale_factor = U_SCALE
            u.add_offset = U_OFFSET
            u.units = "m s-1"
            u.set_auto_maskandscale(False)
            u[:] = packed
            pv = ds.createVariable("p", "f8", ("time", "yp", "xp"), chunksizes=(5, 5, 4))
            pv.missing_value = P_MISSING
            pv.set_auto_maskandscale(False)
            pv[:] = p
            temp = ds.createVariable("temperature", "f4", ("time", "y", "x"),
                                     chunksizes=(6, 6, 5))
            temp[:] = ref.temperature
            q = ds.createVariable("q", "c16", ("time", "yp", "xp"), chunksizes=(3, 5, 4))
            q[:] = ref.q
            ds.createVariable("weights", "f8", ("y", "x"))[:] = ref.weights
            ds.createVariable("mask", "i1", ("y", "x"))[:] = ref.mask.astype(np.int8)
        return Written(
            path=str(path),
            reader_cls=HDF5Reader,
            fields={"u": u_decoded, "p": p_decoded, "temperature": ref.temperature,
                    "q": ref.q},
            stored={"u": np.dtype("i2"), "p": np.dtype("f8"), "temperature": np.dtype("f4"),
                    "q": np.dtype("c16")},
            chunks={"u": (4, 3, 5), "p": (5, 5, 4), "temperature": (6, 6, 5),
                    "q": (3, 5, 4)},
            variables={"time": ref.times, "x": 0.1 * np.arange(5), "weights": ref.weights,
                       "mask": ref.mask.astype(np.int8)},
            time_name="time",
            float32_field="temperature",
            complex_field="q",
        )

    def test_netcdf_helpers_are_not_fields(self, written, reader):
        info = reader.describe()
        assert info.format == "netcdf4"
        # the dimension helpers y, yp, xp hold no data and are not listed; the
        # coordinate variable x (a dimension scale with values) is a variable
        assert "x" in info.variables and "x" not in info.fields
        assert not {"y", "yp", "xp"} & (set(info.variables) | set(info.fields))

    def test_time_unit_recorded(self, reader):
        attrs = reader.describe().variables["time"].attrs
        assert attrs["time_unit"] == "hours"
        assert attrs["time_origin"] == "2000-01-01"


def _write_zarr(path: Path, ref: Reference, zarr_format: int) -> zarr.Group:
    g = zarr.open_group(str(path), mode="w", zarr_format=zarr_format)
    g.attrs["title"] = "invented fin-in-duct data"
    if zarr_format == 3:
        u = g.create_array("u", shape=ref.u.shape, chunks=(2, 3, 5), shards=(4, 6, 5),
                           dtype="f8", dimension_names=("time", "y", "x"))
        t = g.create_array("t", shape=ref.times.shape, dtype="f8")
    else:
        u = g.create_array("u", shape=ref.u.shape, chunks=(4, 3, 5), dtype="f8")
        t = g.create_array("time", shape=ref.times.shape, dtype="f8")
        t.attrs["units"] = HOURS
    u[:] = ref.u
    t[:] = ref.times
    g.create_array("flow/p", shape=ref.p.shape, chunks=(5, 5, 4), dtype="f8")[:] = ref.p
    g.create_array("temperature", shape=ref.temperature.shape, chunks=(12, 6, 5),
                   dtype="f4")[:] = ref.temperature
    g.create_array("q", shape=ref.q.shape, chunks=(3, 5, 4), dtype="c16")[:] = ref.q
    g.create_array("weights", shape=(6, 5), dtype="f8")[:] = ref.weights
    g.create_array("mask", shape=(6, 5), dtype="bool")[:] = ref.mask
    return g


class TestZarrV2(ReaderTests):
    @staticmethod
    def write(directory: Path, ref: Reference) -> Written:
        path = directory / "wake_v2.zarr"
        _write_zarr(path, ref, 2)
        return Written(
            path=str(path),
            reader_cls=ZarrReader,
            fields={"u": ref.u, "flow/p": ref.p, "temperature": ref.temperature, "q": ref.q},
            stored={"u": np.dtype("f8"), "flow/p": np.dtype("f8"),
                    "temperature": np.dtype("f4"), "q": np.dtype("c16")},
            chunks={"u": (4, 3, 5), "flow/p": (5, 5, 4), "temperature": (12, 6, 5),
                    "q": (3, 5, 4)},
            variables={"time": ref.times, **_common_variables(ref)},
            time_name="time",
            float32_field="temperature",
            complex_field="q",
        )


class TestZarrV3(ReaderTests):
    @staticmethod
    def write(directory: Path, ref: Reference) -> Written:
        path = directory / "wake_v3.zarr"
        _write_zarr(path, ref, 3)
        return Written(
            path=str(path),
            reader_cls=ZarrReader,
            fields={"u": ref.u, "flow/p": ref.p, "temperature": ref.temperature, "q": ref.q},
            stored={"u": np.dtype("f8"), "flow/p": np.dtype("f8"),
                    "temperature": np.dtype("f4"), "q": np.dtype("c16")},
            chunks={"u": (2, 3, 5), "flow/p": (5, 5, 4), "temperature": (12, 6, 5),
                    "q": (3, 5, 4)},
            variables={"t": ref.times, **_common_variables(ref)},
            time_name="t",
            float32_field="temperature",
            complex_field="q",
        )

    def test_shards_reported(self, reader):
        f = reader.describe().fields["u"]
        assert f.attrs["shards"] == [4, 6, 5]
        assert f.attrs["dimension_names"] == ["time", "y", "x"]


class TestHDF5Series(ReaderTests):
    @staticmethod
    def write(directory: Path, ref: Reference) -> Written:
        for j in range(N_SNAPSHOTS):
            # frame_1 ... frame_12: plain string order (frame_1, frame_10, ...) is wrong
            with h5py.File(directory / f"frame_{j + 1}.h5", "w") as f:
                f.create_dataset("u", data=ref.u[j], chunks=(3, 5))
                f.create_dataset("p", data=ref.p[j])
                f.create_dataset("temperature", data=ref.temperature[j])
                f.create_dataset("q", data=ref.q[j])
                f.create_dataset("time", data=ref.times[j]).attrs["units"] = HOURS
                if j == 0:
                    f.create_dataset("weights", data=ref.weights)
                    f.create_dataset("mask", data=ref.mask)
        return Written(
            path=str(directory / "frame_*.h5"),
            reader_cls=SeriesReader,
            fields={"u": ref.u, "p": ref.p, "temperature": ref.temperature, "q": ref.q},
            stored={"u": np.dtype("f8"), "p": np.dtype("f8"), "temperature": np.dtype("f4"),
                    "q": np.dtype("c16")},
            chunks={"u": (1, 6, 5), "p": (1, 5, 4), "temperature": (1, 6, 5),
                    "q": (1, 5, 4)},
            variables={"time": ref.times, **_common_variables(ref)},
            time_name="time",
            float32_field="temperature",
            complex_field="q",
        )

    def test_files_listed_in_time_order(self, written, reader):
        files = [os.path.basename(f) for f in reader.describe().files]
        assert files == [f"frame_{j + 1}.h5" for j in range(N_SNAPSHOTS)]


class TestNpySeries(ReaderTests):
    @staticmethod
    def write(directory: Path, ref: Reference) -> Written:
        for j in range(N_SNAPSHOTS):
            np.save(directory / f"frame_{j + 1}.npy", ref.u[j])
        return Written(
            path=str(directory / "frame_*.npy"),
            reader_cls=SeriesReader,
            fields={"frame": ref.u},
            stored={"frame": np.dtype("f8")},
            chunks={"frame": (1, 6, 5)},
        )

    def test_natural_order_not_string_order(self, reader):
        files = [os.path.basename(f) for f in reader.describe().files]
        assert files == [f"frame_{j + 1}.npy" for j in range(N_SNAPSHOTS)]
        assert files != sorted(files)  # string order would put frame_10 second


class TestNpy(ReaderTests):
    @staticmethod
    def write(directory: Path, ref: Reference) -> Written:
        np.save(directory / "u.npy", ref.u)
        return Written(
            path=str(directory / "u.npy"),
            reader_cls=NpyReader,
            fields={"u": ref.u},
            stored={"u": np.dtype("f8")},
            chunks={"u": (1, 6, 5)},
        )


class TestNpyComplex(ReaderTests):
    @staticmethod
    def write(directory: Path, ref: Reference) -> Written:
        np.save(directory / "q.npy", ref.q)
        return Written(
            path=str(directory / "q.npy"),
            reader_cls=NpyReader,
            fields={"q": ref.q},
            stored={"q": np.dtype("c16")},
            chunks={"q": (1, 5, 4)},
            complex_field="q",
        )


class TestNpySeriesFloat32(ReaderTests):
    @staticmethod
    def write(directory: Path, ref: Reference) -> Written:
        for j in range(N_SNAPSHOTS):
            np.save(directory / f"T-{j + 1:d}.npy", ref.temperature[j])
        return Written(
            path=str(directory / "T-*.npy"),
            reader_cls=SeriesReader,
            fields={"T": ref.temperature},
            stored={"T": np.dtype("f4")},
            chunks={"T": (1, 6, 5)},
            float32_field="T",
        )
