"""snaplift export: XDMF + HDF5 read back with h5py and an XML parser; CF netCDF-4 with xarray and netCDF4."""

from __future__ import annotations

import subprocess
import sys
import xml.etree.ElementTree as ET
from pathlib import Path

import h5py
import netCDF4
import numpy as np
import pytest
import xarray as xr
import zarr
from typer.testing import CliRunner

from snaplift.cli import app
from snaplift.errors import ResultStoreError
from snaplift.results.export import FRAMES, export_netcdf, export_xdmf

runner = CliRunner()


def _store_arrays(store: Path) -> dict[str, np.ndarray]:
    # read straight with zarr (not through the export's own xarray path)
    root = zarr.open_group(str(store), mode="r")
    out = {f"modes/{name}": np.asarray(a[...]) for name, a in root["modes"].arrays()}
    out.update({f"spectrum/{name}": np.asarray(a[...]) for name, a in root["spectrum"].arrays()})
    return out


def _h5_item(xdmf: Path, item: ET.Element) -> np.ndarray:
    file_name, path = item.text.strip().split(":", 1)
    with h5py.File(xdmf.parent / file_name, "r") as h5:
        values = np.asarray(h5[path])
    assert values.shape == tuple(int(v) for v in item.get("Dimensions").split())
    return values


def test_xdmf_read_back(wave_stores: dict[str, Path], tmp_path: Path) -> None:
    store = wave_stores["rank6"]
    xdmf, heavy = export_xdmf(store, tmp_path / "modes.xdmf", leading=2)
    assert heavy == tmp_path / "modes.h5"
    stored = _store_arrays(store)
    # the complex amplitude b = |b| exp(i phase) (Jovanovic, Schmid & Nichols 2014)
    amplitude = stored["spectrum/amplitude"] * np.exp(1j * stored["spectrum/phase"])
    domain = ET.parse(xdmf).getroot().find("Domain")
    grids = {g.get("Name"): g for g in domain.findall("Grid")}
    assert {"u", "p", "w", "u_animation", "p_animation", "w_animation"} <= set(grids)
    expected_topology = {"u": ("2DRectMesh", "6 32"), "p": ("2DRectMesh", "1 32"), "w": ("3DRectMesh", "3 4 32")}
    for field, (kind, dims) in expected_topology.items():
        grid = grids[field]
        topology = grid.find("Topology")
        assert (topology.get("TopologyType"), topology.get("Dimensions")) == (kind, dims)
        vectors = [_h5_item(xdmf, item) for item in grid.find("Geometry").findall("DataItem")]
        np.testing.assert_array_equal(vectors[0], np.arange(32))  # VX first: index positions (no coordinates)
        modes = stored[f"modes/{field}"]
        attributes = {a.get("Name"): _h5_item(xdmf, a.find("DataItem")) for a in grid.findall("Attribute")}
        assert len(attributes) == 4 * modes.shape[0]
        for k in range(modes.shape[0]):
            shape = (amplitude[k] * modes[k]).reshape(attributes[f"mode{k}_real"].shape)
            np.testing.assert_allclose(attributes[f"mode{k}_real"], shape.real, rtol=0, atol=1e-14)
            np.testing.assert_allclose(attributes[f"mode{k}_imag"], shape.imag, rtol=0, atol=1e-14)
            np.testing.assert_allclose(attributes[f"mode{k}_magnitude"], np.abs(shape), rtol=1e-14)
            # phase and magnitude give the complex value back (polar form)
            np.testing.assert_allclose(attributes[f"mode{k}_magnitude"] * np.exp(1j * attributes[f"mode{k}_phase"]),
                                       shape, atol=1e-12)
    # animation: one period of the leading oscillating mode in FRAMES steps; frame 0 is the real
    # sum of the two leading modes of positive frequency (each of a conjugate pair: 2 Re)
    series = grids["p_animation"]
    assert series.get("CollectionType") == "Temporal"
    steps = series.findall("Grid")
    times = np.array([float(s.find("Time").get("Value")) for s in steps])
    frequency = stored["spectrum/frequency"]
    assert len(steps) == FRAMES
    np.testing.assert_allclose(times, np.arange(FRAMES) / FRAMES / frequency[0], rtol=1e-12)
    modes = stored["modes/p"]
    leading = [k for k in np.argsort(stored["spectrum/ranking"], kind="stable") if frequency[k] >= 0][:2]
    t = times[5]
    expected = sum(2 * np.real(amplitude[k] * modes[k] * np.exp(2j * np.pi * frequency[k] * t)) for k in leading)
    np.testing.assert_allclose(_h5_item(xdmf, steps[5].find("Attribute/DataItem"))[0], expected, atol=1e-12)


def test_netcdf_read_back(wave_stores: dict[str, Path], tmp_path: Path) -> None:
    store = wave_stores["rank6"]
    path = export_netcdf(store, tmp_path / "modes.nc")
    stored = _store_arrays(store)
    with xr.open_dataset(path, engine="netcdf4") as ds:
        for field in ("u", "p", "w"):
            complex_values = ds[f"{field}_real"].values + 1j * ds[f"{field}_imag"].values
            np.testing.assert_array_equal(complex_values, stored[f"modes/{field}"])
            assert ds[f"{field}_real"].dims[0] == "mode"
        np.testing.assert_array_equal(ds["eigenvalue_real"].values + 1j * ds["eigenvalue_imag"].values,
                                      stored["spectrum/eigenvalue"])
        np.testing.assert_array_equal(ds["frequency"].values, stored["spectrum/frequency"])
        assert ds.attrs["Conventions"].startswith("CF-")
    # the netCDF4 library itself: the file is netCDF-4, flags are integers with CF flag attributes
    with netCDF4.Dataset(path) as nc:
        assert nc.data_model == "NETCDF4"
        trusted = nc.variables["trusted"]
        assert trusted.dtype == np.int8 and list(trusted.flag_values) == [0, 1]
        np.testing.assert_array_equal(trusted[:], stored["spectrum/trusted"].astype(np.int8))
        np.testing.assert_array_equal(nc.variables["p_imag"][:], stored["modes/p"].imag)
        assert "imaginary part" in nc.variables["p_imag"].long_name


def test_export_command_and_foreign_files(wave_stores: dict[str, Path], tmp_path: Path) -> None:
    out = runner.invoke(app, ["export", str(wave_stores["rank4"]), "--format", "netcdf", "--out",
                              str(tmp_path / "a.nc")])
    assert out.exit_code == 0, out.output
    again = runner.invoke(app, ["export", str(wave_stores["rank4"]), "--format", "netcdf", "--out",
                                str(tmp_path / "a.nc")])
    assert again.exit_code == 0, again.output  # our own export is replaced
    foreign = tmp_path / "b.h5"
    with h5py.File(foreign, "w") as h5:
        h5["data"] = np.arange(3)
    with pytest.raises(ResultStoreError, match="was not written by snaplift export"):
        export_xdmf(wave_stores["rank4"], tmp_path / "b.xdmf")
    with h5py.File(foreign, "r") as h5:
        np.testing.assert_array_equal(h5["data"][...], np.arange(3))
    assert not (tmp_path / "b.xdmf").exists()
    bad = runner.invoke(app, ["export", str(wave_stores["rank4"]), "--format", "vtk"])
    assert bad.exit_code == 2 and "use xdmf or netcdf" in bad.output
    # once as a real process: the console entry point, one line on stderr, exit status 2
    process = subprocess.run([sys.executable, "-m", "snaplift.cli", "export", str(wave_stores["rank4"]),
                              "--format", "xdmf", "--out", str(tmp_path / "b.xdmf")],
                             capture_output=True, text=True, timeout=120, check=False)
    assert process.returncode == 2 and process.stderr.count("\n") == 1
    assert "was not written by snaplift export" in process.stderr
