"""The demo end to end: `snaplift demo` as a real subprocess, then checks on its result store."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import h5py
import numpy as np
import pytest
import scipy.signal
import xarray as xr

from snaplift.results.store import read_group


@pytest.fixture(scope="module")
def demo_run(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    cache = tmp_path_factory.mktemp("cache")
    env = {**os.environ, "SNAPLIFT_CACHE": str(cache)}
    completed = subprocess.run(
        [sys.executable, "-m", "snaplift.cli", "demo", "--size", "small"],
        capture_output=True, text=True, env=env, timeout=600,
    )
    assert completed.returncode == 0, completed.stderr
    archive = next((cache / "demo").glob("fin-duct-small*.h5"))
    store = next((cache / "demo" / "results").glob("fin-duct-small*.zarr"))
    return {"archive": archive, "store": store, "stdout": completed.stdout}


def test_demo_prints_spectrum_and_result_path(demo_run: dict[str, Path]) -> None:
    out = demo_run["stdout"]
    assert "spectrum of" in out and "frequency" in out
    assert str(demo_run["store"]) in out.replace("\n", "")


def test_demo_store_reads_back_with_xarray(demo_run: dict[str, Path]) -> None:
    spectrum = xr.open_zarr(demo_run["store"], group="spectrum")  # reference reader: xarray
    assert spectrum.sizes["mode"] > 2
    modes = xr.open_zarr(demo_run["store"], group="modes")
    assert set(modes.data_vars) == {"u", "v", "T"}
    with h5py.File(demo_run["archive"], "r") as archive:
        solid = archive["solid"][...]
    # masked (solid) points are NaN in every mode, fluid points are finite
    assert np.isnan(modes["u"].values[:, solid]).all()
    assert np.isfinite(modes["u"].values[:, ~solid]).all()


def test_dominant_dmd_frequency_matches_probe_fft(demo_run: dict[str, Path]) -> None:
    with h5py.File(demo_run["archive"], "r") as archive:
        t = archive["t"][...]
        solid = archive["solid"][...]
        rows, cols = np.nonzero(solid)
        height = rows.max() - rows.min() + 1
        probe = (min(rows.max() + height // 2, solid.shape[0] - 2), min(cols.max() + 2 * height, solid.shape[1] - 2))
        signal = archive["v"][:, probe[0], probe[1]].astype(np.float64)
    dt = float(np.median(np.diff(t)))
    # reference: scipy.signal periodogram of a probe in the wake; bin width 1 / (m dt)
    frequencies, power = scipy.signal.periodogram(signal - signal.mean(), fs=1.0 / dt)
    peak = frequencies[np.argmax(power)]
    bin_width = 1.0 / (signal.size * dt)
    spectrum = read_group(demo_run["store"], "spectrum")
    oscillating = spectrum["frequency"] > 0.5 * bin_width
    strongest = np.argmax(np.where(oscillating, spectrum["amplitude"], -np.inf))
    assert abs(spectrum["frequency"][strongest] - peak) <= bin_width
