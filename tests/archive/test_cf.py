"""CF decoding against hand-computed values.

Source: CF conventions 1.x, section 8.1 "Packed data" (unpacked = packed * scale_factor
+ add_offset) and section 2.5.1 "Missing data" (_FillValue / missing_value are compared
with the packed values); section 4.4 for "<unit> since <origin>" time units.
"""

from __future__ import annotations

import h5py
import netCDF4
import numpy as np
import pytest
import zarr

from snaplift.archive import open_archive
from snaplift.archive._cf import Decoding, decode, decoding_from_attrs, parse_time_units

PACKED = np.array([[0, 1, -32767, 100, -100]] * 3, dtype=np.int16)  # 3 snapshots x 5 points
# hand-computed: 0*0.01+20, 1*0.01+20, fill, 100*0.01+20, -100*0.01+20
UNPACKED = np.array([20.0, 20.01, np.nan, 21.0, 19.0])


def test_decode_hand_computed():
    decoding = Decoding(scale_factor=0.01, add_offset=20.0, fill_values=(-32767,))
    out = decode(PACKED[0], decoding)
    assert out.dtype == np.float64
    np.testing.assert_allclose(out, UNPACKED, rtol=1e-14)  # CF 1.x section 8.1


def test_missing_value_list_and_float_fill():
    attrs = {"missing_value": [-1, -2]}
    out = decode(np.array([-1, -2, 3], dtype=np.int32), decoding_from_attrs(attrs, np.dtype("i4")))
    np.testing.assert_array_equal(out, [np.nan, np.nan, 3.0])  # CF 1.x section 2.5.1
    # the netCDF default float fill 9.9692099683868690e+36 (from memory: NC_FILL_FLOAT)
    # must match in float32 although the attribute arrives as a python float
    raw = np.array([9.9692099683868690e36, 1.5], dtype=np.float32)
    attrs = {"_FillValue": float(np.float32(9.9692099683868690e36))}
    out = decode(raw, decoding_from_attrs(attrs, raw.dtype))
    np.testing.assert_array_equal(out, [np.nan, 1.5])


def _expected_field() -> np.ndarray:
    """Snapshot matrix (points x snapshots) of the packed field after decoding."""
    return np.tile(UNPACKED, (3, 1)).T


def test_hdf5_attrs_decoded(tmp_path):
    path = tmp_path / "packed.h5"
    with h5py.File(path, "w") as f:
        ds = f.create_dataset("u", data=PACKED.reshape(3, 1, 5))
        ds.attrs["scale_factor"] = np.float64(0.01)
        ds.attrs["add_offset"] = np.float64(20.0)
        ds.attrs["_FillValue"] = np.int16(-32767)
    tile = open_archive(path).read_tile("u", slice(None), slice(None))
    np.testing.assert_allclose(tile, _expected_field(), rtol=1e-14)


def test_zarr_attrs_decoded(tmp_path):
    path = tmp_path / "packed.zarr"
    g = zarr.open_group(str(path), mode="w", zarr_format=3)
    a = g.create_array("u", shape=(3, 1, 5), dtype="i2")
    a[:] = PACKED.reshape(3, 1, 5)
    a.attrs.update({"scale_factor": 0.01, "add_offset": 20.0, "_FillValue": -32767})
    tile = open_archive(path).read_tile("u", slice(None), slice(None))
    np.testing.assert_allclose(tile, _expected_field(), rtol=1e-14)


def test_netcdf_matches_netcdf4_library(tmp_path):
    """Cross-check against the netCDF4 library's own mask-and-scale (reference library)."""
    path = tmp_path / "packed.nc"
    rng = np.random.default_rng(3)
    values = 15.0 + 10.0 * rng.random((6, 4, 3))
    with netCDF4.Dataset(path, "w") as ds:
        ds.createDimension("time", None)
        ds.createDimension("y", 4)
        ds.createDimension("x", 3)
        v = ds.createVariable("T", "i2", ("time", "y", "x"), fill_value=-32767)
        v.scale_factor = 0.002
        v.add_offset = 15.0
        v[:] = np.ma.masked_where(values > 24.0, values)  # netCDF4 packs and fills
    with netCDF4.Dataset(path) as ds:
        reference = ds["T"][:].astype(np.float64).filled(np.nan)
    assert np.isnan(reference).any()
    tile = open_archive(path).read_tile("T", slice(None), slice(None))
    np.testing.assert_allclose(tile, reference.reshape(6, -1).T, rtol=1e-14)


@pytest.mark.parametrize(
    ("units", "expected"),
    [
        ("seconds since 2000-01-01", ("seconds", "2000-01-01")),
        ("hours since 2000-01-01 00:00:00", ("hours", "2000-01-01 00:00:00")),
        ("days since 1970-01-01", ("days", "1970-01-01")),
        ("s since 0", ("seconds", "0")),
        ("m s-1", None),
        ("fortnights since 1900-01-01", None),
    ],
)
def test_parse_time_units(units, expected):
    assert parse_time_units(units) == expected  # CF 1.x section 4.4


def test_time_units_values_kept_in_their_unit(tmp_path):
    path = tmp_path / "times.nc"
    with netCDF4.Dataset(path, "w") as ds:
        ds.createDimension("time", 4)
        ds.createDimension("x", 2)
        t = ds.createVariable("time", "i4", ("time",))
        t.units = "days since 1970-01-01"
        t[:] = [0, 1, 2, 4]
        ds.createVariable("h", "f8", ("time", "x"))[:] = 0.0
    reader = open_archive(path)
    info = reader.describe()
    assert info.attrs["time_variable"] == "time"
    assert info.variables["time"].attrs["time_unit"] == "days"
    times = reader.read_variable("time")
    assert times.dtype == np.float64
    np.testing.assert_array_equal(times, [0.0, 1.0, 2.0, 4.0])  # counts of days, as stored
