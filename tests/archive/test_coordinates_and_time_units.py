"""Readers report each grid axis's coordinate and the time unit (describe(), no values read)."""

from __future__ import annotations

from pathlib import Path

import h5py
import numpy as np
import pytest
import xarray as xr

from snaplift.archive import open_archive
from snaplift.archive._cf import time_unit_of


def _dataset() -> xr.Dataset:
    return xr.Dataset(
        {"T": (("time", "y", "x"), np.zeros((4, 3, 5)), {"units": "K"}),
         "q": (("time", "y", "n"), np.zeros((4, 3, 2)))},  # 'n' has no coordinate variable
        coords={"time": ("time", np.arange(4.0), {"units": "ms"}), "x": ("x", np.linspace(0, 1, 5)),
                "y": ("y", np.linspace(0, 2, 3))})


@pytest.mark.parametrize("suffix", [".nc", ".zarr"])
def test_dimension_coordinates_of_netcdf_and_zarr_written_by_xarray(tmp_path: Path, suffix: str) -> None:
    path = tmp_path / f"a{suffix}"
    if suffix == ".nc":
        _dataset().to_netcdf(path, engine="netcdf4")
    else:
        _dataset().to_zarr(path, consolidated=False)
    info = open_archive(str(path)).describe()
    assert info.fields["T"].coordinates == ("y", "x")
    assert info.fields["q"].coordinates == ("y", None)
    assert time_unit_of(info.variables["time"].attrs).seconds == 1e-3


def test_cf_coordinates_attribute_names_auxiliary_coordinates(tmp_path: Path) -> None:
    with h5py.File(tmp_path / "a.h5", "w") as h5:
        h5["t"] = np.arange(4.0)
        h5["u"] = np.zeros((4, 3, 5))
        h5["u"].attrs["coordinates"] = "xc yc"
        h5["xc"] = np.linspace(0, 1, 5)
        h5["yc"] = np.linspace(0, 1, 3)
        h5["w"] = np.zeros((4, 3, 3))
        h5["w"].attrs["coordinates"] = "yc"  # two axes of length 3: which one is ambiguous
    info = open_archive(str(tmp_path / "a.h5")).describe()
    assert info.fields["u"].coordinates == ("yc", "xc")
    assert info.fields["w"].coordinates == (None, None)


@pytest.mark.parametrize(
    "attrs, name, seconds",
    [
        ({"units": "s"}, "s", 1.0),
        ({"units": "milliseconds since 2001-01-01 00:00:00"}, "milliseconds since 2001-01-01 00:00:00", 1e-3),
        ({"units": "hours since 1970-01-01", "calendar": "noleap"}, "hours since 1970-01-01", 3600.0),
        ({"time_unit": "us"}, "us", 1e-6),
        ({"units": "days"}, "days", 86400.0),  # SI day (from memory: 86400 s)
        ({"units": "months since 2000-01-01"}, "months since 2000-01-01", None),
        ({}, None, None),
    ],
)
def test_time_unit_of(attrs: dict, name: str | None, seconds: float | None) -> None:
    unit = time_unit_of(attrs)
    if name is None:
        assert unit is None
        return
    assert unit is not None and unit.name == name and unit.seconds == seconds
