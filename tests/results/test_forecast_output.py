"""snaplift forecast: fields on their grids, in xarray, against an analytic archive."""

from __future__ import annotations

import shutil
import sys
import warnings
from pathlib import Path

import numpy as np
import pytest
import xarray as xr
import yaml
import zarr
from typer.testing import CliRunner

from snaplift.cli import app
from snaplift.errors import ArchiveError, ResultStoreError
from snaplift.results.forecast_output import forecast_dataset, write_forecast
from snaplift.workflow.runner import run_workflow

runner = CliRunner()
sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
from conftest import DT, FITTED, N_SNAPSHOTS, NX, wave_values  # noqa: E402


def _exact(first: int, steps: int) -> np.ndarray:
    # the closed-form travelling waves (tests/conftest.py) at snapshots first .. first + steps
    return wave_values(DT * np.arange(first, first + steps + 1), np.arange(NX, dtype=np.float64))


def test_forecast_beyond_the_fit_matches_the_waves(wave_stores: dict[str, Path]) -> None:
    # fitted on snapshots 0..59; from snapshot 59 the forecast runs into the 40 archive snapshots the
    # fit never saw, and beyond the archive; the growing and decaying waves are a linear system, so
    # DMD continues them exactly (Schmid 2010): analytic solution to 1e-8 of its largest value
    steps = 50
    ds = forecast_dataset(wave_stores["rank6"], -1, steps, compare=True)
    exact = _exact(FITTED - 1, steps)
    scale = np.abs(exact).max()
    np.testing.assert_allclose(ds["p"].values, 0.5 * exact, rtol=0, atol=1e-8 * scale)
    np.testing.assert_allclose(ds["u"].values, np.repeat(exact[:, None, :], 6, axis=1), rtol=0, atol=1e-8 * scale)
    np.testing.assert_allclose(ds["w"].values, np.broadcast_to(2 * exact[:, None, None, :], ds["w"].shape),
                               rtol=0, atol=2e-8 * scale)
    np.testing.assert_allclose(ds["time"].values, DT * np.arange(FITTED - 1, FITTED + steps), rtol=1e-12)
    assert ds["u"].dims == ("step", "u_y", "u_x") and ds["w"].dims[0] == "step"
    # the archive holds snapshots up to 99: steps 0..40 overlap it, 41..50 do not
    overlap = np.arange(FITTED - 1, N_SNAPSHOTS)
    np.testing.assert_array_equal(ds["archive_snapshot"].values[: overlap.size], overlap)
    assert np.all(ds["archive_snapshot"].values[overlap.size:] == -1)
    for name in ("p", "u", "w"):
        error = ds[f"error_{name}"].values
        assert np.all(error[: overlap.size] < 1e-8), name  # relative error against the archive
        assert np.all(np.isnan(error[overlap.size:]))
    assert "valid only near the data" in ds.attrs["caution"]


def test_forecast_written_and_read_back_by_xarray(wave_stores: dict[str, Path], tmp_path: Path) -> None:
    ds = forecast_dataset(wave_stores["rank6"], 10, 5)
    path = write_forecast(ds, tmp_path / "f.zarr")
    back = xr.open_zarr(path).load()
    np.testing.assert_array_equal(back["p"].values, ds["p"].values)
    np.testing.assert_array_equal(back["time"].values, ds["time"].values)
    np.testing.assert_allclose(back["p"].values, 0.5 * _exact(10, 5), atol=1e-8)
    assert "engineering judgement" in back.attrs["caution"]
    write_forecast(ds, path)  # our own forecast is replaced
    foreign = tmp_path / "other.zarr"
    foreign.mkdir()
    (foreign / "data.txt").write_text("keep me")
    with pytest.raises(ResultStoreError, match="not a forecast written by snaplift"):
        write_forecast(ds, foreign)
    assert (foreign / "data.txt").read_text() == "keep me"


def test_forecast_command(wave_stores: dict[str, Path], tmp_path: Path) -> None:
    out = runner.invoke(app, ["forecast", str(wave_stores["rank6"]), "--from", "59", "--steps", "45", "--compare",
                              "--out", str(tmp_path / "f.zarr")])
    assert out.exit_code == 0, out.output
    assert "error against the archive" in out.output
    assert "steps 41..45 lie beyond the archive" in out.output
    assert "caution:" in out.output and "valid only near the data" in out.output
    back = xr.open_zarr(tmp_path / "f.zarr")
    assert float(back["error_u"].max()) < 1e-8
    bad = runner.invoke(app, ["forecast", str(wave_stores["rank6"]), "--from", "60", "--steps", "3"])
    assert bad.exit_code == 2 and "snapshot must be a column index in -60..59" in bad.output
    # a forecast that cannot fit in memory is refused before any of it is computed
    huge = runner.invoke(app, ["forecast", str(wave_stores["rank6"]), "--steps", str(10**12)])
    assert huge.exit_code == 2 and "forecast fewer steps at a time" in huge.output


def test_compare_needs_the_archive(wave_stores: dict[str, Path], tmp_path: Path) -> None:
    store = tmp_path / "copy.zarr"
    shutil.copytree(wave_stores["rank4"], store)
    root = zarr.open_group(str(store), mode="r+")
    root.attrs["archive"] = str(tmp_path / "gone.h5")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        zarr.consolidate_metadata(str(store))
    with pytest.raises(ArchiveError, match="gone.h5.*is not there any more"):
        forecast_dataset(store, 0, 3, compare=True)


def test_compare_on_an_archive_of_two_runs(wave_stores: dict[str, Path], tmp_path: Path) -> None:
    # two runs (one file each, relative paths in the workflow): the forecast from the first
    # run's start overlaps only that run's snapshots, never the next run's
    for name in ("one.h5", "two.h5"):
        shutil.copy(wave_stores["archive"], tmp_path / name)
    workflow = {"archive": {"path": ["one.h5", "two.h5"], "fields": ["p"], "time": "t"},
                "compress": {"method": "tsqr", "rank": 6}, "output": {"path": "runs.zarr"}, "cluster": "threads"}
    (tmp_path / "runs.yaml").write_text(yaml.safe_dump(workflow))
    store = run_workflow(tmp_path / "runs.yaml").path
    ds = forecast_dataset(store, 0, N_SNAPSHOTS + 5, compare=True)
    snapshots = ds["archive_snapshot"].values
    np.testing.assert_array_equal(snapshots[:N_SNAPSHOTS], np.arange(N_SNAPSHOTS))
    assert np.all(snapshots[N_SNAPSHOTS:] == -1)
    assert np.nanmax(ds["error_p"].values) < 1e-8  # the waves again (tests/conftest.py)


def test_compare_error_of_a_standing_wave_through_zero(tmp_path: Path) -> None:
    # p = 40 Pa sin(2 pi 2 Hz t) cos(pi x / L): zero over the whole grid every 0.25 s, beside
    # u = cos(2 pi 2 Hz t) sin(pi x / L). DMD of rank 2 is exact (Schmid 2010), so the error must
    # stay at round-off at every step; a ratio to each step's own norm of p would blow up where
    # p passes through zero
    import h5py

    t = 0.05 * np.arange(40)
    x = np.linspace(0.0, 0.3, 12)
    p = 40.0 * np.sin(2 * np.pi * 2.0 * t)[:, None] * np.cos(np.pi * x / 0.3)[None, :]
    with h5py.File(tmp_path / "a.h5", "w") as h5:
        h5["t"] = t
        h5["t"].attrs["units"] = "s"
        h5.create_dataset("p", data=p, chunks=(1, 12))
        h5.create_dataset("u", data=np.cos(2 * np.pi * 2.0 * t)[:, None] * np.sin(np.pi * x / 0.3)[None, :],
                          chunks=(1, 12))
    workflow = {"archive": {"path": "a.h5", "fields": ["p", "u"], "time": "t"},
                "compress": {"method": "tsqr", "rank": 2}, "fit": {"rank": 2}, "output": {"path": "r.zarr"},
                "cluster": "threads"}
    (tmp_path / "w.yaml").write_text(yaml.safe_dump(workflow))
    store = run_workflow(tmp_path / "w.yaml").path
    ds = forecast_dataset(store, 0, 39, compare=True)
    assert np.all(ds["archive_snapshot"].values == np.arange(40))
    assert np.max(ds["error_p"].values) < 1e-10
    np.testing.assert_allclose(ds["p"].values, p, rtol=0, atol=1e-9)  # the closed form above
    shown = runner.invoke(app, ["forecast", str(store), "--steps", "5", "--compare"])
    assert shown.exit_code == 0 and "time [s]" in shown.output  # the archive's time unit on the column


def test_compare_at_uneven_times(tmp_path: Path) -> None:
    # optimized DMD (Askham & Kutz 2018) on snapshots at uneven times: step s of dt is not
    # snapshot j + s, so the comparison evaluates the model at each snapshot's own time; the
    # data are an exact growing travelling wave (2 Hz, 0.1 1/s) over 300 K, so the error is round-off
    import h5py

    rng = np.random.default_rng(5)
    t = np.concatenate([[0.0], np.cumsum(0.05 * (0.6 + 0.8 * rng.random(39)))])
    x = np.linspace(0.0, 0.3, 12, endpoint=False)
    values = 300.0 + 5.0 * np.exp(0.1 * t)[:, None] * np.cos(2 * np.pi * x[None, :] / 0.3 - 4 * np.pi * t[:, None])
    with h5py.File(tmp_path / "a.h5", "w") as h5:
        h5["t"] = t
        h5["t"].attrs["units"] = "s"
        h5.create_dataset("T", data=values, chunks=(1, 12))
    workflow = {"archive": {"path": "a.h5", "fields": ["T"], "time": "t"}, "compress": {"method": "tsqr", "rank": 3},
                "fit": {"method": "optimized", "rank": 3}, "output": {"path": "r.zarr"}, "cluster": "threads"}
    (tmp_path / "w.yaml").write_text(yaml.safe_dump(workflow))
    store = run_workflow(tmp_path / "w.yaml").path
    ds = forecast_dataset(store, 5, 20, compare=True)
    np.testing.assert_allclose(ds["archive_time"].values, t[5:26], rtol=0, atol=1e-12)
    assert np.max(ds["error_T"].values) < 1e-8
    shown = runner.invoke(app, ["forecast", str(store), "--from", "5", "--steps", "20", "--compare"])
    assert shown.exit_code == 0 and "archive time" in shown.output


def test_forecast_gives_the_archive_fields_not_the_lifted_ones(tmp_path: Path) -> None:
    # T = 300 K + 5 K cos(kx - 2 pi 2 Hz t) lifted by T_square: T^2 holds the mean, the wave and its
    # second harmonic (cos^2 = (1 + cos 2a) / 2), five eigenvalues in all, so rank 5 is exact
    import h5py

    t = 0.05 * np.arange(40)
    x = np.linspace(0.0, 0.3, 12, endpoint=False)
    values = 300.0 + 5.0 * np.cos(2 * np.pi * x[None, :] / 0.3 - 4 * np.pi * t[:, None])
    with h5py.File(tmp_path / "a.h5", "w") as h5:
        h5["t"] = t
        h5.create_dataset("T", data=values, chunks=(1, 12))
    workflow = {"archive": {"path": "a.h5", "fields": ["T"], "time": "t"}, "compress": {"method": "tsqr", "rank": 5},
                "lift": [{"kind": "pointwise", "terms": ["x", "square"], "fields": ["T"]}],
                "fit": {"rank": 5}, "output": {"path": "r.zarr"}, "cluster": "threads"}
    (tmp_path / "w.yaml").write_text(yaml.safe_dump(workflow))
    store = run_workflow(tmp_path / "w.yaml").path
    ds = forecast_dataset(store, 3, 30, compare=True)
    assert [name for name in ds.data_vars if "step" in ds[name].dims and ds[name].ndim > 1] == ["T"]
    np.testing.assert_allclose(ds["T"].values, values[3:34], rtol=0, atol=1e-8)  # the closed form above
    assert np.max(ds["error_T"].values) < 1e-10
