"""The store explains itself: time units -> Hz and 1/s, coordinates, CF units, peak amplitudes.

The archive is analytic: on a 9 x 13 grid, every 10 ms,

    T = 300 K + 5 K  exp(g t) cos(2 pi f t)       sin(pi x) sin(pi y)
    p =         40 Pa exp(g t) cos(2 pi f t + 0.3) sin(2 pi x)^2 sin(pi y)

with f = 7.5 Hz and g = -0.4 1/s: one conjugate pair with eigenvalues
exp((g +- 2 pi i f) dt) and the constant mode (handbook: the solution of a damped linear
oscillator). Each field's part of the pair has amplitude 5 K and 40 Pa at the first
snapshot (t = 0): max |sin(pi x) sin(pi y)| = 1 at the grid centre.
"""

from __future__ import annotations

from pathlib import Path

import h5py
import matplotlib
import numpy as np
import pandas as pd
import pytest
import xarray as xr
import yaml
import zarr

from snaplift.errors import ConfigError
from snaplift.results.store import read_group
from snaplift.workflow.runner import run_workflow

matplotlib.use("Agg")

FREQUENCY, GROWTH, STEP_S, COUNT = 7.5, -0.4, 0.01, 120
X = np.linspace(0.0, 1.0, 13)
Y = np.linspace(0.0, 1.0, 9)


def _fields() -> dict[str, np.ndarray]:
    t = STEP_S * np.arange(COUNT)[:, None, None]
    yy, xx = np.meshgrid(Y, X, indexing="ij")
    envelope = np.exp(GROWTH * t)
    temperature = 300.0 + 5.0 * envelope * np.cos(2 * np.pi * FREQUENCY * t) * np.sin(np.pi * xx) * np.sin(np.pi * yy)
    shape = np.sin(2 * np.pi * xx) ** 2 * np.sin(np.pi * yy)
    pressure = 40.0 * envelope * np.cos(2 * np.pi * FREQUENCY * t + 0.3) * shape
    return {"T": temperature, "p": pressure}


def _dataset(time: np.ndarray, time_attrs: dict) -> xr.Dataset:
    fields = _fields()
    return xr.Dataset(
        {"T": (("time", "y", "x"), fields["T"], {"units": "K", "long_name": "air temperature"}),
         "p": (("time", "y", "x"), fields["p"], {"units": "Pa", "long_name": "pressure fluctuation"})},
        coords={"time": ("time", time, time_attrs),
                "x": ("x", X, {"units": "m", "long_name": "streamwise position"}),
                "y": ("y", Y, {"units": "m", "long_name": "wall-normal position"})})


def _write_h5(path: Path, time: np.ndarray | None, time_attrs: dict) -> None:
    fields = _fields()
    with h5py.File(path, "w") as h5:
        if time is not None:
            h5["t"] = time
            h5["t"].attrs.update(time_attrs)
        for name, units in (("T", "K"), ("p", "Pa")):
            h5.create_dataset(name, data=fields[name], chunks=(1, 9, 13))
            h5[name].attrs["units"] = units


def _run(folder: Path, archive: dict, **extra) -> Path:
    data = {"archive": {"fields": ["T", "p"], **archive},
            "compress": {"method": "randomized", "rank": 3, "oversample": 5},
            "fit": {"rank": 3}, "output": {"path": "r.zarr"}, "cluster": "threads", **extra}
    path = folder / "w.yaml"
    path.write_text(yaml.safe_dump(data))
    return run_workflow(path).path


def _encodings(tmp_path: Path) -> dict[str, tuple[Path, dict]]:
    """The same snapshots with their times written seven ways."""
    out: dict[str, tuple[Path, dict]] = {}
    seconds = STEP_S * np.arange(COUNT)
    (tmp_path / "s").mkdir()
    _write_h5(tmp_path / "s" / "a.h5", seconds, {"units": "s"})
    out["seconds"] = (tmp_path / "s", {"path": "a.h5", "time": "t"})
    (tmp_path / "ms").mkdir()
    _write_h5(tmp_path / "ms" / "a.h5", 10.0 * np.arange(COUNT), {"time_unit": "ms"})
    out["ms attribute"] = (tmp_path / "ms", {"path": "a.h5", "time": "t"})
    dates = pd.date_range("2001-03-01", periods=COUNT, freq="10ms").values
    for label, units, dtype in (("milliseconds since", "milliseconds since 2001-01-01", "int64"),
                                ("days since", "days since 2001-03-01", "float64")):
        folder = tmp_path / label.replace(" ", "_")
        folder.mkdir()
        _dataset(dates, {}).to_netcdf(folder / "a.nc", engine="netcdf4",
                                      encoding={"time": {"units": units, "dtype": dtype}})
        out[label] = (folder, {"path": "a.nc"})
    # cftime dates of a 365-day calendar, as climate models write them (CF 1.x section 4.4.1)
    folder = tmp_path / "cftime"
    folder.mkdir()
    noleap = xr.date_range("2001-03-01", periods=COUNT, freq="10ms", calendar="noleap", use_cftime=True)
    _dataset(noleap, {}).to_netcdf(folder / "a.nc", engine="netcdf4",
                                   encoding={"time": {"units": "milliseconds since 2001-01-01", "dtype": "int64"}})
    out["cftime noleap"] = (folder, {"path": "a.nc"})
    (tmp_path / "z").mkdir()
    root = zarr.open_group(str(tmp_path / "z" / "a.zarr"), mode="w")
    root.create_array("t", shape=(COUNT,), dtype="datetime64[ms]")[:] = dates.astype("datetime64[ms]")
    for name, values in _fields().items():
        root.create_array(name, shape=values.shape, dtype="f8", chunks=(1, 9, 13))[:] = values
    out["zarr datetime64"] = (tmp_path / "z", {"path": "a.zarr"})
    (tmp_path / "step").mkdir()
    _write_h5(tmp_path / "step" / "a.h5", None, {})
    out["step in ms"] = (tmp_path / "step", {"path": "a.h5", "step": 10.0, "time_unit": "ms"})
    return out


ENCODINGS = ("seconds", "ms attribute", "milliseconds since", "days since", "cftime noleap", "zarr datetime64",
             "step in ms")


@pytest.fixture(scope="module")
def encodings(tmp_path_factory) -> dict[str, tuple[Path, dict]]:
    return _encodings(tmp_path_factory.mktemp("encodings"))


@pytest.fixture(scope="module")
def reference_frequencies(encodings) -> np.ndarray:
    folder, archive = encodings["seconds"]
    return np.sort(read_group(_run(folder, archive), "spectrum")["frequency"])


@pytest.mark.parametrize("label", ENCODINGS)
def test_same_snapshots_give_the_same_hz_whatever_the_time_encoding(label: str, encodings,
                                                                     reference_frequencies) -> None:
    folder, archive = encodings[label]
    store = _run(folder, archive)
    spectrum = read_group(store, "spectrum")
    attrs = xr.open_zarr(store, group="spectrum").attrs
    assert attrs["frequency_unit"] == "Hz" and attrs["growth_unit"] == "1/s"
    # the factor to seconds of the unit found (SI definitions, from memory: 1 day = 86400 s)
    expected = {"seconds": 1.0, "days since": 86400.0}.get(label, 1e-3)
    assert attrs["time_unit_seconds"] == pytest.approx(expected, rel=1e-15)
    # analytic: a damped cosine of 7.5 Hz and growth -0.4 1/s (the oscillator above)
    pair = np.abs(spectrum["frequency"]) > 1
    assert np.allclose(np.abs(spectrum["frequency"][pair]), FREQUENCY, rtol=1e-8)
    assert np.allclose(spectrum["growth"][pair], GROWTH, rtol=1e-6)
    np.testing.assert_allclose(np.sort(spectrum["frequency"]), reference_frequencies, rtol=1e-10, atol=1e-10)


def test_diagnostics_time_keeps_the_archive_values_and_units(encodings) -> None:
    folder, archive = encodings["ms attribute"]
    store = _run(folder, archive)
    diagnostics = xr.open_zarr(store, group="diagnostics")
    np.testing.assert_array_equal(diagnostics["time"].values, 10.0 * np.arange(COUNT))
    assert diagnostics["time"].attrs["units"] == "ms"
    assert "time" in diagnostics["projection_error"].coords


def test_archive_without_time_unit_warns_once_and_says_per_time_unit(tmp_path: Path) -> None:
    _write_h5(tmp_path / "a.h5", STEP_S * np.arange(COUNT), {})
    path = tmp_path / "w.yaml"
    path.write_text(yaml.safe_dump({"archive": {"path": "a.h5", "fields": ["T", "p"], "time": "t"},
                                    "compress": {"rank": 3, "oversample": 5}, "fit": {"rank": 3},
                                    "output": {"path": "r.zarr"}}))
    summary = run_workflow(path)
    unit_warnings = [w for w in summary.warnings if "time unit" in w]
    assert len(unit_warnings) == 1
    attrs = xr.open_zarr(summary.path, group="spectrum").attrs
    assert attrs["frequency_unit"] == "1/(time unit)" and "time_unit_seconds" not in attrs


def test_time_unit_that_contradicts_the_archive_is_refused(tmp_path: Path) -> None:
    _write_h5(tmp_path / "a.h5", STEP_S * np.arange(COUNT), {"units": "s"})
    with pytest.raises(ConfigError, match="time_unit"):
        _run(tmp_path, {"path": "a.h5", "time": "t", "time_unit": "ms"})


def test_peak_amplitudes_in_field_units_and_coordinates(encodings) -> None:
    folder, archive = encodings["milliseconds since"]
    store = _run(folder, archive)
    spectrum = xr.open_zarr(store, group="spectrum")
    pair = np.abs(spectrum["frequency"].values) > 1
    assert np.count_nonzero(pair) == 2
    # analytic amplitudes of the standing waves at t = 0 (module docstring)
    np.testing.assert_allclose(spectrum["peak_T"].values[pair], 5.0, rtol=1e-6)
    np.testing.assert_allclose(spectrum["peak_p"].values[pair], 40.0, rtol=1e-6)
    np.testing.assert_allclose(spectrum["peak_T"].values[~pair], 300.0, rtol=1e-6)  # the constant mode
    assert spectrum["peak_p"].attrs["units"] == "Pa" and spectrum["peak_T"].attrs["units"] == "K"
    modes = xr.open_zarr(store, group="modes")
    temperature = modes["T"]
    assert temperature.attrs["units"] == "K"
    np.testing.assert_array_equal(temperature["x"].values, X)
    np.testing.assert_array_equal(temperature["y"].values, Y)
    assert temperature["x"].attrs["units"] == "m"
    assert "frequency" in temperature.coords and modes["frequency"].attrs["units"] == "Hz"
    axes = temperature.isel(mode=int(np.flatnonzero(pair)[0])).real.plot().axes
    # xarray labels the axes from the coordinates' long_name and units
    assert axes.get_xlabel() == "streamwise position [m]" and axes.get_ylabel() == "wall-normal position [m]"
    assert axes.get_xlim() == (pytest.approx(X[0] - 0.5 * (X[1] - X[0])), pytest.approx(X[-1] + 0.5 * (X[1] - X[0])))
    # prepare/ holds no grid array here (no mask, weights or mean): no coordinate there
    np.testing.assert_array_equal(xr.open_zarr(store, group="basis")["x"].values, X)
    assert list(xr.open_zarr(store, group="prepare")["field"].values) == ["T", "p"]
    assert "time" in xr.open_zarr(store, group="basis")["coefficient"].coords
    root = zarr.open_group(str(store), mode="r")
    for path, _ in root.arrays():
        raise AssertionError(f"unexpected root array {path}")  # pragma: no cover
    for name, group in root.groups():
        for key, array in group.arrays():
            assert "units" in array.attrs and "long_name" in array.attrs, f"{name}/{key}"


def test_workflow_coords_name_the_coordinate_datasets(tmp_path: Path) -> None:
    _write_h5(tmp_path / "a.h5", STEP_S * np.arange(COUNT), {"units": "s"})
    with h5py.File(tmp_path / "a.h5", "a") as h5:
        h5["xc"] = X * 2
        h5["xc"].attrs["units"] = "cm"
        h5["yc"] = Y
    store = _run(tmp_path, {"path": "a.h5", "time": "t", "coords": {"x": "xc", "y": "yc"}})
    modes = xr.open_zarr(store, group="modes")
    np.testing.assert_array_equal(modes["x"].values, 2 * X)
    # yc declares no unit: none is written (CF), not "1", which would say dimensionless
    assert modes["x"].attrs["units"] == "cm" and "units" not in modes["y"].attrs
    with pytest.raises(ConfigError, match="coordinate dataset 'yc'.*needs \\(13,\\)"):
        _run(tmp_path, {"path": "a.h5", "time": "t", "coords": {"x": "yc"}}, output={"path": "r2.zarr"})


def test_spectrum_command_shows_the_peak_column_with_its_unit(encodings) -> None:
    from typer.testing import CliRunner

    from snaplift.cli import app

    folder, archive = encodings["seconds"]
    store = _run(folder, archive)
    result = CliRunner().invoke(app, ["spectrum", str(store), "--field", "p"])
    assert result.exit_code == 0, result.output
    assert "peak p [Pa]" in result.output and "frequency [Hz]" in result.output
    assert "7.5" in result.output
    missing = CliRunner().invoke(app, ["spectrum", str(store), "--field", "q"])
    assert missing.exit_code == 2 and "peak_q" in missing.output


def test_staggered_grids_keep_their_own_coordinates(tmp_path: Path) -> None:
    rng = np.random.default_rng(0)
    faces = np.linspace(-0.5, 12.5, 14)  # u on the cell faces, p at the centres X
    time = STEP_S * np.arange(40)
    ds = xr.Dataset(
        {"u": (("time", "y", "xf"), rng.standard_normal((40, 9, 14)), {"units": "m s-1"}),
         "p": (("time", "y", "x"), rng.standard_normal((40, 9, 13)), {"units": "Pa"})},
        coords={"time": ("time", time, {"units": "s"}), "x": ("x", X, {"units": "m"}),
                "xf": ("xf", faces, {"units": "m", "long_name": "face position"}), "y": ("y", Y, {"units": "m"})})
    ds.to_netcdf(tmp_path / "a.nc", engine="netcdf4")
    path = tmp_path / "w.yaml"
    path.write_text(yaml.safe_dump({"archive": {"path": "a.nc", "fields": ["u", "p"]},
                                    "compress": {"rank": 4, "oversample": 4}, "fit": {"rank": 4},
                                    "output": {"path": "r.zarr"}}))
    store = run_workflow(path).path
    modes = xr.open_zarr(store, group="modes")
    assert modes["u"].dims == ("mode", "u_y", "u_x") and modes["p"].dims == ("mode", "p_y", "p_x")
    np.testing.assert_array_equal(modes["u"]["u_x"].values, faces)
    np.testing.assert_array_equal(modes["p"]["p_x"].values, X)
    np.testing.assert_array_equal(modes["u"]["u_y"].values, Y)
    assert modes["u_x"].attrs["long_name"] == "face position" and modes["p"].attrs["units"] == "Pa"
