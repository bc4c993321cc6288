"""Issue 11, item 7: a run stays within compress.memory after the passes too (fit, modes, writing).

A wide archive (many points, few snapshots) at a budget just above the smallest the
planner accepts: the process's peak resident memory (Linux VmHWM) over the whole run,
including writing the basis and the modes, stays under ``compress.memory``.
"""

from __future__ import annotations

import json
import re
import subprocess
import sys
from pathlib import Path

import h5py
import numpy as np
import pytest
import yaml

_RUN = """
import json, sys
from snaplift.cli import app
try:
    app(sys.argv[1:], standalone_mode=False)
except SystemExit:
    pass
peak = [int(line.split()[1]) * 1024 for line in open("/proc/self/status") if line.startswith("VmHWM")][0]
print("PEAK", json.dumps(peak))
"""


def _wide(path: Path, n_points: int, m: int = 20) -> None:
    rng = np.random.default_rng(0)
    with h5py.File(path, "w") as h5:
        data = h5.create_dataset("u", shape=(m, n_points // 500, 500), chunks=(1, n_points // 500, 500), dtype="f8")
        for j in range(m):
            data[j] = rng.standard_normal((n_points // 500, 500))
        h5["t"] = 0.1 * np.arange(m)


def _run(folder: Path, method: str, memory: str) -> tuple[int, str, int | None]:
    workflow = folder / f"{method}.yaml"
    workflow.write_text(yaml.safe_dump({
        "archive": {"path": "wide.h5", "fields": ["u"], "time": "t"},
        "compress": {"method": method, "rank": 8, "oversample": 4, "power_iterations": 1, "memory": memory},
        "fit": {"rank": 4}, "output": {"path": f"{method}.zarr"}, "cluster": "threads"}))
    done = subprocess.run([sys.executable, "-c", _RUN, "run", str(workflow), "-q", "--overwrite"],
                          capture_output=True, text=True, cwd=folder, timeout=600)
    peak = re.search(r"PEAK (\d+)", done.stdout)
    return done.returncode, done.stderr, int(peak.group(1)) if peak else None


@pytest.mark.skipif(not Path("/proc/self/status").exists(), reason="needs Linux's VmHWM")
@pytest.mark.parametrize("method", ["randomized", pytest.param("sketch", marks=pytest.mark.slow)])
def test_whole_run_peak_stays_within_a_budget_near_the_smallest(tmp_path: Path, method: str) -> None:
    _wide(tmp_path / "wide.h5", 400_000)
    # the planner names the smallest budget it accepts for this archive and this process
    _, message, _ = _run(tmp_path, method, "200MiB")  # above the interpreter, below the tiles
    smallest = int(re.search(r"raise compress.memory to at least (\d+) bytes", message).group(1))
    budget = int(smallest * 1.04)  # just above it (the baseline moves by a few MiB between processes)
    code, stderr, peak = _run(tmp_path, method, str(budget // 2**10) + "KiB")
    assert code == 0 and peak is not None, stderr
    # the budget is the whole run's: compress.memory bounds the process tree (DEVELOPERS.md)
    assert peak <= budget, f"peak {peak / 2**20:.1f} MiB over the budget {budget / 2**20:.1f} MiB"
