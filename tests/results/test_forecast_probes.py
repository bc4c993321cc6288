"""`snaplift forecast` of a probe store: the probes are named and their forecast values shown."""

from __future__ import annotations

import re
from pathlib import Path

import h5py
import numpy as np
import yaml
from typer.testing import CliRunner

from snaplift.cli import app
from snaplift.workflow.runner import run_workflow

runner = CliRunner()


def _signal(t: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    # two probes behind the fin (invented): shedding at 3 Hz with a 7 Hz harmonic
    return np.sin(2 * np.pi * 3 * t) + 0.3 * np.sin(2 * np.pi * 7 * t), np.cos(2 * np.pi * 3 * t)


def test_forecast_of_probes_names_them_and_prints_their_values(tmp_path: Path) -> None:
    t = 0.01 * np.arange(600)
    x, y = _signal(t)
    with h5py.File(tmp_path / "p.h5", "w") as h5:
        h5["t"] = t
        h5["t"].attrs["units"] = "s"
        h5["x"], h5["y"] = x, y
        h5["x"].attrs["units"] = h5["y"].attrs["units"] = "m s-1"
    workflow = {"archive": {"path": "p.h5", "fields": ["x", "y"], "time": "t"},
                "lift": [{"kind": "delays", "count": 20, "spacing": 1}], "compress": {"method": "tsqr", "rank": 8},
                "fit": {"method": "dmd"}, "output": {"path": "p.zarr", "report": False}, "cluster": "threads"}
    (tmp_path / "p.yaml").write_text(yaml.safe_dump(workflow))
    store = run_workflow(tmp_path / "p.yaml").path
    result = runner.invoke(app, ["forecast", str(store), "--steps", "30"], env={"COLUMNS": "160"})
    assert result.exit_code == 0, result.output
    assert re.search(r"forecast of x, y from snapshot \d+", result.output), result.output
    assert "x [m s-1]" in result.output and "y [m s-1]" in result.output
    rows = [line for line in result.output.splitlines() if re.match(r"^\W*\d+\W+\d", line)]
    assert len(rows) == 12
    for line in rows:
        step, time, value_x, value_y = (float(v) for v in re.findall(r"-?\d+(?:\.\d+)?(?:e[-+]\d+)?", line)[:4])
        # two frequencies are four eigenvalues, well inside rank 8 of a 20-delay window: the forecast
        # is the analytic signal (to the 6 digits printed)
        expected_x, expected_y = _signal(np.array(time))
        assert abs(value_x - expected_x) < 1e-5 and abs(value_y - expected_y) < 1e-5, line
