"""`snaplift scan` on an archive of probes: reported as probes, with a delay window and its cost."""

from __future__ import annotations

import json

import h5py
import numpy as np
from typer.testing import CliRunner

from snaplift.archive.probes import suggest_delays
from snaplift.cli import app

DT = 0.02


def _probes(path, n=3000):
    t = DT * np.arange(n)
    # periods 2.5 s and 0.4 s (invented sensor signals), plus a slow linear drift
    x = np.cos(2 * np.pi * t / 2.5) + 0.3 * np.sin(2 * np.pi * t / 0.4) + 0.01 * t
    y = 0.5 * np.sin(2 * np.pi * t / 0.4 + 1.0)
    with h5py.File(path, "w") as h5:
        h5["x"], h5["y"], h5["t"] = x, y, t
    return t, x, y


def test_window_spans_the_longest_period(tmp_path):
    t, x, y = _probes(tmp_path / "p.h5")
    suggestion = suggest_delays({"x": x, "y": y}, DT, t.size)
    # the periodogram's longest period is 2.5 s (the bin nearest 1 / 2.5 Hz on a 60 s
    # record, resolution 1/60 Hz): from the signals' definition above
    assert abs(suggestion.longest_period - 2.5) < 2.5 * 0.05 and suggestion.probe == "x"
    # a window of (count - 1) dt covers that period (common practice: one whole slowest cycle)
    assert suggestion.window >= suggestion.longest_period > suggestion.window - DT
    only_fast = suggest_delays({"y": y}, DT, t.size)
    assert abs(only_fast.longest_period - 0.4) < 0.4 * 0.05


def test_scan_reports_probes_with_delays_and_memory(tmp_path):
    t, _, _ = _probes(tmp_path / "p.h5")
    result = CliRunner().invoke(app, ["scan", str(tmp_path / "p.h5"), "--time", "t", "--json", "--method", "tsqr",
                                      "--rank", "10"])
    assert result.exit_code == 0, result.output
    report = json.loads(result.output)
    assert [f["name"] for f in report["fields"]] == ["x", "y"]
    probes = report["probes"]
    count = probes["delays"]["count"]
    assert probes["probes"] == ["x", "y"] and (count - 1) * DT >= probes["longest_period"]
    columns = t.size - (count - 1)
    # the lifted matrix: 2 probes x count copies rows, the windows that fit as columns, float64
    assert probes["lifted_rows"] == 2 * count and probes["lifted_columns"] == columns
    assert probes["lifted_bytes"] == 8 * 2 * count * columns
    assert probes["plan"]["peak_bytes_estimate"] <= probes["plan"]["memory_bytes"]
    table = CliRunner().invoke(app, ["scan", str(tmp_path / "p.h5"), "--time", "t"])
    assert table.exit_code == 0 and "suggested lift" in table.output and f"count: {count}" in table.output


def test_grid_archives_are_not_probes(tmp_path):
    with h5py.File(tmp_path / "g.h5", "w") as h5:
        h5["u"] = np.random.default_rng(0).standard_normal((40, 6, 5))
        h5["t"] = np.arange(40.0)
    result = CliRunner().invoke(app, ["scan", str(tmp_path / "g.h5"), "--time", "t", "--json"])
    assert result.exit_code == 0, result.output
    assert json.loads(result.output)["probes"] is None


def test_probes_without_times_get_a_window_in_snapshots(tmp_path):
    """No time variable and no step: the window is counted in snapshots (a step of 1)."""
    t, _, _ = _probes(tmp_path / "p.h5")
    with h5py.File(tmp_path / "p.h5", "a") as h5:
        del h5["t"]
    result = CliRunner().invoke(app, ["scan", str(tmp_path / "p.h5"), "--json"])
    assert result.exit_code == 0, result.output
    probes = json.loads(result.output)["probes"]
    # the slowest period is 2.5 s = 125 snapshots of DT (from the signals' definition above)
    assert abs(probes["longest_period"] - 2.5 / DT) < 0.05 * 2.5 / DT
    assert probes["window_unit"] == "snapshots" and probes["window"] >= probes["longest_period"]
    table = CliRunner().invoke(app, ["scan", str(tmp_path / "p.h5")])
    assert table.exit_code == 0 and "snapshots: spans the longest period" in table.output
