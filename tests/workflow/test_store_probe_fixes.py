"""Archives a user makes that the first tests of the self-explaining store did not cover.

The archive is analytic, every 10 ms (handbook: a damped linear oscillator and the
standing / travelling waves built from it), with f = 7.5 Hz and g = -0.4 1/s:

    T = 300 K + 5 K exp(g t) cos(pi x) cos(2 pi f t)        on (y, x)   standing wave
    p =        40 Pa exp(g t) cos(pi x - 2 pi f t)           on (y, x)   travelling wave
    w =       2.5 m/s exp(g t) cos(pi x) cos(pi z) sin(2 pi f t)  on (z, y, x)

with x = 0 on the grid, so each field's peak at t = 0 is its amplitude: the conjugate
pair reads 5 K, 40 Pa and 2.5 m/s.
"""

from __future__ import annotations

from pathlib import Path

import h5py
import numpy as np
import pytest
import xarray as xr
import yaml

from snaplift.errors import ConfigError, FieldNotFoundError
from snaplift.workflow.runner import run_workflow

FREQUENCY, GROWTH, STEP_S, COUNT = 7.5, -0.4, 0.01, 80
X = np.linspace(0.0, 2.0, 12)
Y = np.linspace(0.0, 1.0, 5)
Z = np.linspace(0.0, 1.0, 3)
AMPLITUDES = {"T": 5.0, "p": 40.0, "w": 2.5}


def _fields(count: int = COUNT) -> dict[str, np.ndarray]:
    t = STEP_S * np.arange(count)[:, None, None]
    envelope, omega = np.exp(GROWTH * t), 2 * np.pi * FREQUENCY
    ones = np.ones((1, Y.size, 1))
    temperature = 300.0 + 5.0 * envelope * np.cos(np.pi * X) * np.cos(omega * t) * ones
    pressure = 40.0 * envelope * np.cos(np.pi * X - omega * t) * ones
    w = (2.5 * envelope[..., None] * np.cos(np.pi * X) * np.cos(np.pi * Z)[:, None, None]
         * np.sin(omega * t[..., None]) * np.ones((1, 1, Y.size, 1)))
    return {"T": temperature, "p": pressure, "w": w}


def _write_h5(path: Path) -> None:
    with h5py.File(path, "w") as h5:
        h5["t"] = STEP_S * np.arange(COUNT)
        h5["t"].attrs["units"] = "s"
        for name, values in _fields().items():
            h5.create_dataset(name, data=values, chunks=(1, *values.shape[1:]))
            h5[name].attrs["units"] = {"T": "K", "p": "Pa", "w": "m s-1"}[name]
        h5["cell_area"] = np.full((Y.size, X.size), 0.02)
        solid = np.zeros((Y.size, X.size), bool)
        solid[2, 5:7] = True
        h5["solid"] = solid


def _run(folder: Path, archive: dict, name: str = "w.yaml", **extra) -> Path:
    data = {"archive": {"path": "a.h5", "time": "t", **archive},
            "compress": {"method": "randomized", "rank": 4, "oversample": 4},
            "fit": {"rank": 3}, "output": {"path": "r.zarr"}, "cluster": "threads", **extra}
    path = folder / name
    path.write_text(yaml.safe_dump(data))
    return run_workflow(path).path


def _pair(spectrum: xr.Dataset) -> np.ndarray:
    pair = np.abs(np.abs(spectrum["frequency"].values) - FREQUENCY) < 0.5
    assert np.count_nonzero(pair) == 2
    return pair


def test_weights_and_mask_per_field_let_2d_and_3d_fields_share_a_run(tmp_path: Path) -> None:
    _write_h5(tmp_path / "a.h5")
    store = _run(tmp_path, {"fields": ["T", "p", "w"], "weights": {"T": "cell_area", "p": "cell_area"},
                            "mask": {"T": "solid", "p": "solid"}})
    spectrum = xr.open_zarr(store, group="spectrum")
    pair = _pair(spectrum)
    for name, amplitude in AMPLITUDES.items():
        # analytic amplitude at t = 0 (module docstring)
        np.testing.assert_allclose(spectrum[f"peak_{name}"].values[pair], amplitude, rtol=1e-6)
    # the damped oscillator's frequency and growth (module docstring)
    np.testing.assert_allclose(np.abs(spectrum["frequency"].values[pair]), FREQUENCY, rtol=1e-8)
    np.testing.assert_allclose(spectrum["growth"].values[pair], GROWTH, rtol=1e-6)
    prepare = xr.open_zarr(store, group="prepare")
    assert {"weights_T", "weights_p", "mask_T", "mask_p"} <= set(prepare.data_vars)
    assert "weights_w" not in prepare and "mask_w" not in prepare
    modes = xr.open_zarr(store, group="modes")
    assert np.isnan(modes["T"].isel(mode=0).values[2, 5:7]).all()
    assert not np.isnan(modes["w"].values).any()


def test_weights_mapping_names_fields_of_the_workflow(tmp_path: Path) -> None:
    _write_h5(tmp_path / "a.h5")
    with pytest.raises(ConfigError, match="weights key 'q' is not one of the fields"):
        _run(tmp_path, {"fields": ["T", "p"], "weights": {"q": "cell_area"}})


def test_series_time_in_a_root_attribute_takes_its_unit_from_a_root_attribute(tmp_path: Path) -> None:
    fields = _fields()
    (tmp_path / "snaps").mkdir()
    for j in range(COUNT):
        with h5py.File(tmp_path / "snaps" / f"snap_{j}.h5", "w") as h5:
            for name in ("T", "p"):
                h5[name] = fields[name][j]
            h5.attrs["time"] = 10.0 * j
            h5.attrs["time_units"] = "ms"
    store = _run(tmp_path, {"path": "snaps/snap_*.h5", "fields": ["T", "p"], "time": None})
    spectrum = xr.open_zarr(store, group="spectrum")
    assert spectrum.attrs["frequency_unit"] == "Hz" and spectrum.attrs["time_unit_seconds"] == 1e-3
    # 10 ms steps of the damped oscillator of the module docstring: 7.5 Hz, -0.4 1/s
    pair = _pair(spectrum)
    np.testing.assert_allclose(np.abs(spectrum["frequency"].values[pair]), FREQUENCY, rtol=1e-8)
    np.testing.assert_allclose(spectrum["growth"].values[pair], GROWTH, rtol=1e-6)
    assert xr.open_zarr(store, group="diagnostics")["time"].attrs["units"] == "ms"


def test_a_store_of_an_older_layout_than_needed_is_recomputed_not_reused(tmp_path: Path, monkeypatch) -> None:
    from snaplift.results import store as result_store

    _write_h5(tmp_path / "a.h5")
    archive = {"fields": ["T", "p"]}
    needed = result_store.needed_layout(None)
    # an older snaplift: same workflow, a layout older than this archive's store needs
    monkeypatch.setattr(result_store, "needed_layout", lambda metadata: needed - 1)
    monkeypatch.setattr("snaplift.results.staging.STORE_VERSION", needed - 1)
    _run(tmp_path, archive)
    monkeypatch.undo()
    path = tmp_path / "w.yaml"
    summary = run_workflow(path)
    assert {name: record["status"] for name, record in summary.stages.items()} == {
        "scan": "computed", "compress": "computed", "fit": "computed", "modes": "computed", "report": "computed"}
    assert any(f"layout {needed - 1}" in w and "recomputed" in w for w in summary.warnings)
    assert xr.open_zarr(summary.path).attrs["snaplift_store_version"] == result_store.STORE_VERSION
    # the same layout again: everything but scan is reused, and no layout warning
    again = run_workflow(path)
    assert again.stages["compress"]["status"] == "reused" and again.stages["fit"]["status"] == "reused"
    assert not any("layout" in w for w in again.warnings)


def test_a_layout_3_store_without_positions_is_reused_after_an_upgrade(tmp_path: Path, monkeypatch) -> None:
    # layout 4 only adds point positions and probe places: a store of an archive with neither
    # is the same in layout 3, so an upgrade does not recompute it from the archive
    from snaplift.results import store as result_store

    _write_h5(tmp_path / "a.h5")
    monkeypatch.setattr("snaplift.results.staging.STORE_VERSION", 3)
    _run(tmp_path, {"fields": ["T", "p"]})
    monkeypatch.undo()
    assert xr.open_zarr(tmp_path / "r.zarr").attrs["snaplift_store_version"] == 3
    again = run_workflow(tmp_path / "w.yaml")
    assert again.stages["compress"]["status"] == "reused" and again.stages["modes"]["status"] == "reused"
    assert not any("layout" in w for w in again.warnings)
    assert xr.open_zarr(again.path).attrs["snaplift_store_version"] == result_store.STORE_VERSION


def test_a_layout_3_store_of_scattered_points_is_recomputed_for_their_positions(tmp_path: Path,
                                                                                  monkeypatch) -> None:
    # a field on scattered points (CF coordinates naming 1-D position datasets): layout 3 kept
    # no positions, so its store is recomputed once and then holds them
    rng = np.random.default_rng(4)
    t = 0.05 * np.arange(60)
    px, py = rng.uniform(0, 0.5, 30), rng.uniform(0, 0.1, 30)
    with h5py.File(tmp_path / "a.h5", "w") as h5:
        h5["time"] = t
        h5["px"], h5["py"] = px, py
        h5["px"].attrs["axis"], h5["py"].attrs["axis"] = "X", "Y"
        h5["T"] = 300.0 + np.cos(2 * np.pi * 0.7 * t[:, None] - 12.0 * px[None, :])
        h5["T"].attrs["coordinates"] = "px py"
    archive = {"fields": ["T"], "time": "time"}
    monkeypatch.setattr("snaplift.results.staging.STORE_VERSION", 3)
    monkeypatch.setattr("snaplift.results.store.needed_layout", lambda metadata: 3)
    _run(tmp_path, archive)
    monkeypatch.undo()
    again = run_workflow(tmp_path / "w.yaml")
    assert again.stages["compress"]["status"] == "computed"
    assert any("layout 3" in w and "point positions" in w and "recomputed" in w for w in again.warnings)
    modes = xr.open_zarr(again.path, group="modes")
    np.testing.assert_array_equal(modes["position_x"].values, px)


def test_field_not_found_lists_candidate_fields_not_weights_or_masks(tmp_path: Path) -> None:
    _write_h5(tmp_path / "a.h5")
    # the archive holds T, p, w (snapshot, ...) and cell_area, solid (y, x): only the first are fields
    with pytest.raises(FieldNotFoundError, match=r"archive field 'q' not found in .*a\.h5; fields present: T, p, w$"):
        _run(tmp_path, {"fields": ["T", "q"], "weights": "cell_area", "mask": "solid"})


def test_a_field_without_units_is_not_called_dimensionless(tmp_path: Path) -> None:
    np.save(tmp_path / "p.npy", _fields()["p"])
    archive = {"path": "p.npy", "fields": ["p"], "step": 10.0, "time_unit": "ms", "time": None}
    summary_store = _run(tmp_path, archive, fit={"rank": 2})
    spectrum = xr.open_zarr(summary_store, group="spectrum")
    # no unit anywhere: unknown, so no CF units attribute (CF 1.x section 3.1), never "1"
    assert "units" not in spectrum["peak_p"].attrs
    assert "units" not in xr.open_zarr(summary_store, group="modes")["p"].attrs
    # archive.units gives it; the travelling wave of 40 Pa reads 40 Pa (module docstring)
    store = _run(tmp_path, {**archive, "units": {"p": "Pa"}}, name="w2.yaml", fit={"rank": 2},
                 output={"path": "r2.zarr"})
    spectrum = xr.open_zarr(store, group="spectrum")
    assert spectrum["peak_p"].attrs["units"] == "Pa"
    assert xr.open_zarr(store, group="modes")["p"].attrs["units"] == "Pa"
    np.testing.assert_allclose(spectrum["peak_p"].values[_pair(spectrum)], 40.0, rtol=1e-6)


def test_archive_units_that_contradict_the_archive_are_refused(tmp_path: Path) -> None:
    _write_h5(tmp_path / "a.h5")
    with pytest.raises(ConfigError, match="archive.units gives field 'p' the unit 'bar' but .* declares 'Pa'"):
        _run(tmp_path, {"fields": ["T", "p"], "units": {"p": "bar"}})


@pytest.mark.parametrize(("units", "seconds"), [("msec", 1e-3), ("msec since 2000-01-01", 1e-3), ("usec", 1e-6),
                                                ("\u03bcs", 1e-6), ("nsec", 1e-9)])
def test_time_unit_spellings_with_sec_and_greek_mu_convert(units: str, seconds: float) -> None:
    from snaplift.archive._cf import time_unit_of

    # SI prefixes (from memory: milli 1e-3, micro 1e-6, nano 1e-9); UDUNITS accepts them on "sec"
    assert time_unit_of({"units": units}).seconds == seconds


def test_scan_of_several_runs_sums_their_time_spans(tmp_path: Path) -> None:
    from snaplift.archive import open_archive
    from snaplift.archive.scan import scan_archive

    for name, count in (("a.h5", 30), ("b.h5", 20)):
        with h5py.File(tmp_path / name, "w") as h5:
            h5["t"] = 10.0 * np.arange(count)  # each run restarts at 0 ms
            h5["t"].attrs["units"] = "ms"
            h5.create_dataset("p", data=np.zeros((count, 3)))
    report = scan_archive(open_archive([str(tmp_path / "a.h5"), str(tmp_path / "b.h5")]), fields=["p"])
    # 29 and 19 steps of 10 ms (arithmetic), not the last time minus the first (190 ms)
    assert report.run_lengths == (30, 20) and report.time_span == pytest.approx(290.0 + 190.0)
