"""Stores that explain themselves (grid coordinates, units, time unit) and stores that do not
read the same way; where the store carries coordinates and units, every output uses them."""

from __future__ import annotations

import dataclasses
import shutil
import warnings
import xml.etree.ElementTree as ET
from pathlib import Path

import h5py
import numpy as np
import pytest
import xarray as xr
import zarr

from snaplift.report.page import render_report
from snaplift.results.export import export_netcdf, export_xdmf
from snaplift.results.forecast_output import forecast_dataset
from snaplift.results.reading import _from_zarr, field_axes, open_group, open_store

X_COORDINATE = 0.05 * np.arange(32)  # grid spacing 5 cm


def _annotate(store: Path) -> None:
    """Add what a self-describing store carries: coordinates named like the dimensions, CF
    units and long names, a per-mode frequency coordinate, the time unit."""
    root = zarr.open_group(str(store), mode="r+")
    modes = root["modes"]
    for name in ("u_x", "p_x", "w_x"):
        array = modes.create_array(name, shape=(32,), dtype="float64", dimension_names=(name,), fill_value=None,
                                   overwrite=True, attributes={"units": "m", "long_name": "streamwise position"})
        array[...] = X_COORDINATE
    frequency = modes.create_array("frequency", shape=root["spectrum/frequency"].shape, dtype="float64",
                                   dimension_names=("mode",), fill_value=None, attributes={"units": "Hz"},
                                   overwrite=True)
    frequency[...] = root["spectrum/frequency"][...]
    for name in ("u", "p", "w"):
        modes[name].attrs.update({"units": "m/s", "long_name": f"velocity {name}", "coordinates": "frequency"})
    root["spectrum"].attrs.update({"time_unit": "s", "frequency_unit": "Hz", "growth_unit": "1/s",
                                   "time_unit_seconds": 1.0})
    root["diagnostics/time"].attrs.update({"units": "s", "long_name": "time"})
    peak = root["spectrum"].create_array("peak_u", shape=root["spectrum/frequency"].shape, dtype="float64",
                                         dimension_names=("mode",), fill_value=None, attributes={"units": "m/s"},
                                         overwrite=True)
    peak[...] = 1.0
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        zarr.consolidate_metadata(str(store))


@pytest.fixture()
def annotated(wave_stores: dict[str, Path], tmp_path: Path) -> Path:
    store = tmp_path / "annotated.zarr"
    shutil.copytree(wave_stores["rank6"], store, ignore=shutil.ignore_patterns("*.report"))
    _annotate(store)
    return store


def test_plain_store_falls_back_to_index_positions(wave_stores: dict[str, Path]) -> None:
    view = open_store(wave_stores["rank6"])
    assert sorted(view.fields) == ["p", "u", "w"]
    axes = field_axes(view.modes, "u")
    assert [a.dim for a in axes] == ["u_y", "u_x"] and all(a.is_index for a in axes)
    np.testing.assert_array_equal(axes[1].values, np.arange(32))
    # the archive gives no units: the field has none (not "1", which would say dimensionless)
    # and the spectrum is per time unit
    assert view.field_units("u") == "" and view.frequency_unit == "1/(time unit)"
    # a store written before spectrum/peak_<field> existed: |amplitude| x max |mode|
    # (what the forecast multiplies)
    view = dataclasses.replace(view, spectrum=view.spectrum.drop_vars(["peak_p", "peak_u", "peak_w"]))
    peak = view.peak_amplitude("p")
    expected = np.abs(view.spectrum["amplitude"].values) * np.abs(view.modes["p"].values).max(axis=1)
    np.testing.assert_allclose(peak, expected, rtol=1e-14)


def test_annotated_store_uses_coordinates_and_units(annotated: Path, tmp_path: Path) -> None:
    view = open_store(annotated)
    assert sorted(view.fields) == ["p", "u", "w"]  # the per-mode frequency is not a field
    axes = field_axes(view.modes, "u")
    assert not axes[1].is_index and axes[1].title == "streamwise position [m]"
    np.testing.assert_array_equal(axes[1].values, X_COORDINATE)
    assert (view.frequency_unit, view.growth_unit, view.time_unit) == ("Hz", "1/s", "s")
    np.testing.assert_array_equal(view.peak_amplitude("u"), 1.0)
    # forecast: the coordinates and units travel with the fields
    ds = forecast_dataset(annotated, 0, 3)
    np.testing.assert_array_equal(ds["u_x"].values, X_COORDINATE)
    assert ds["u"].attrs["units"] == "m/s" and ds["time"].attrs["units"] == "s"
    # netCDF: coordinate variables with their units (read back by xarray)
    with xr.open_dataset(export_netcdf(annotated, tmp_path / "a.nc")) as nc:
        np.testing.assert_array_equal(nc["u_x"].values, X_COORDINATE)
        assert nc["u_x"].attrs["units"] == "m" and nc["u_real"].attrs["units"] == "m/s"
        assert "frequency" in nc and "frequency_real" not in nc
    # XDMF: the mesh is on the physical coordinates
    xdmf, heavy = export_xdmf(annotated, tmp_path / "a.xdmf", leading=1)
    vx = ET.parse(xdmf).getroot().find("Domain/Grid[@Name='u']/Geometry/DataItem").text.split(":")[1]
    with h5py.File(heavy, "r") as h5:
        np.testing.assert_array_equal(h5[vx][...], X_COORDINATE)
    # report: the axis and colour-bar labels name the coordinate and the units
    summary = render_report(annotated, tmp_path / "report")
    assert "modes_u" in summary.figures and "frequency [Hz]" in summary.index.read_text()


def test_groups_read_by_hand_equal_xarray(wave_stores: dict[str, Path]) -> None:
    # the fall-back for a group xarray cannot decode (complex arrays) builds the same dataset
    root = zarr.open_group(str(wave_stores["rank6"]), mode="r")
    for group in ("modes", "spectrum", "diagnostics"):
        by_hand, by_xarray = _from_zarr(root[group]), open_group(wave_stores["rank6"], group)
        assert set(by_hand.data_vars) == set(by_xarray.data_vars)
        for name in by_xarray.data_vars:
            np.testing.assert_array_equal(by_hand[name].values, by_xarray[name].values)
            assert by_hand[name].dims == by_xarray[name].dims
    assert np.iscomplexobj(open_group(wave_stores["rank6"], "modes")["u"].values)


def test_complex_amplitudes_rebuild_the_first_snapshot(wave_stores: dict[str, Path]) -> None:
    # x_0 = sum_k b_k mode_k with b_k = amplitude_k exp(i phase_k) (Jovanovic, Schmid & Nichols 2014);
    # the fit is exact on the waves, so this is the archive's first snapshot (tests/conftest.py)
    view = open_store(wave_stores["rank6"])
    first = np.tensordot(view.complex_amplitude, view.modes["p"].values, axes=(0, 0))
    with h5py.File(wave_stores["archive"], "r") as h5:
        np.testing.assert_allclose(first.real, h5["p"][0], atol=1e-10)
    np.testing.assert_allclose(first.imag, 0.0, atol=1e-10)


def test_field_names_from_a_netcdf_archive_written_by_xarray(tmp_path: Path) -> None:
    # a CF netCDF-4 file written by xarray (times as datetimes, fields with units and long names):
    # the report titles a field by its own long name, not by the store's "mode shape of ..."
    import yaml

    from snaplift.workflow.runner import run_workflow

    t = 0.05 * np.arange(30)
    x = np.linspace(0.0, 0.3, 10)
    wave = 300.0 + 5.0 * np.cos(2 * np.pi * x[None, :] / 0.3 - 4 * np.pi * t[:, None])
    times = np.datetime64("2001-01-01") + (1000 * t).round().astype("timedelta64[ms]")
    xr.Dataset({"T": (("time", "x"), wave, {"units": "K", "long_name": "air temperature"})},
               coords={"time": times, "x": ("x", x, {"units": "m", "long_name": "streamwise position"})}
               ).to_netcdf(tmp_path / "a.nc", engine="netcdf4")
    workflow = {"archive": {"path": "a.nc", "fields": ["T"]}, "compress": {"method": "tsqr", "rank": 3},
                "fit": {"rank": 3}, "output": {"path": "r.zarr"}, "cluster": "threads"}
    (tmp_path / "w.yaml").write_text(yaml.safe_dump(workflow))
    view = open_store(run_workflow(tmp_path / "w.yaml").path)
    assert view.field_name("T") == "air temperature" and view.field_units("T") == "K"
    assert [a.title for a in field_axes(view.modes, "T")] == ["streamwise position [m]"]
    # 2 Hz in the archive's milliseconds, shown in Hz (the wave's own frequency)
    assert sorted(abs(f) for f in view.spectrum["frequency"].values) == pytest.approx([0.0, 2.0, 2.0], abs=1e-9)


def test_the_light_view_reads_what_xarray_reads(wave_stores):
    # the report reads the store straight from zarr (no xarray import); xarray, the reference,
    # must see the same variables, dimensions, coordinates, attributes and values
    import numpy as np

    full, light = open_store(wave_stores["rank6"]), open_store(wave_stores["rank6"], light=True)
    assert light.fields == full.fields
    for group in ("spectrum", "modes", "diagnostics", "basis", "prepare", "operator"):
        reference, ours = getattr(full, group), getattr(light, group)
        assert list(ours.data_vars) == list(map(str, reference.data_vars)), group
        assert sorted(ours.coords) == sorted(map(str, reference.coords)), group
        assert ours.sizes == dict(reference.sizes) and ours.attrs == dict(reference.attrs), group
        for name in reference.variables:
            assert ours[str(name)].dims == tuple(reference[name].dims), (group, name)
            assert ours[str(name)].attrs == dict(reference[name].attrs), (group, name)
            if reference[name].dtype.kind in "fcib":
                np.testing.assert_array_equal(ours[str(name)].values, reference[name].values)
    k = light.spectrum.sizes["mode"] - 1  # one mode of a 2-D field, as the mode figure reads it
    np.testing.assert_array_equal(light.modes["u"].isel(mode=k).values, full.modes["u"].isel(mode=k).values)
    assert [a.dim for a in field_axes(light.modes, "u")] == [a.dim for a in field_axes(full.modes, "u")]
