"""Issue 11, item 7: a run stays within compress.memory after the passes too (fit, modes, writing).

A wide archive (many points, few snapshots) at a budget just above the smallest the
planner accepts: the process's peak resident memory (Linux VmHWM) over the whole run,
including writing the basis and the modes, stays under ``compress.memory``.
"""

from __future__ import annotations

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
    code = app(sys.argv[1:], standalone_mode=False) or 0  # click returns the exit status here
except SystemExit as error:
    code = error.code or 0
peak = [int(line.split()[1]) * 1024 for line in open("/proc/self/status") if line.startswith("VmHWM")][0]
print("PEAK", json.dumps(peak))
sys.exit(code)
"""


def _wide(path: Path, n_points: int, m: int = 48) -> None:
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
        "compress": {"method": method, "rank": 40, "oversample": 4, "power_iterations": 1, "memory": memory},
        "fit": {"rank": 10}, "output": {"path": f"{method}.zarr", "report": False}, "cluster": "threads"}))
    done = subprocess.run([sys.executable, "-c", _RUN, "run", str(workflow), "-q", "--overwrite"],
                          capture_output=True, text=True, cwd=folder, timeout=600)
    peak = re.search(r"PEAK (\d+)", done.stdout)
    return done.returncode, done.stderr, int(peak.group(1)) if peak else None


@pytest.mark.skipif(not Path("/proc/self/status").exists(), reason="needs Linux's VmHWM")
@pytest.mark.parametrize("method", ["randomized", pytest.param("sketch", marks=pytest.mark.slow)])
def test_whole_run_peak_stays_within_a_budget_near_the_smallest(tmp_path: Path, method: str) -> None:
    # a rank-40 basis of 200,000 points: the finishing phase (basis and modes written) is
    # as large as the passes' accumulators, so holding it twice shows
    _wide(tmp_path / "wide.h5", 200_000)
    # the planner names the smallest budget it accepts for this archive and this process
    _, message, _ = _run(tmp_path, method, "200MiB")  # above the interpreter, below the tiles
    smallest = int(re.search(r"raise compress.memory to at least (\d+) bytes", message).group(1))
    # just above it (the interpreter's baseline moves by a few MiB between processes);
    # measured before issue 11's fixes: 494 MiB peak for a 471 MiB budget (the modes
    # multiplied the real basis by complex coefficients through a complex copy of it, and
    # the basis was computed with every chunk's temporaries); after: 348-392 MiB
    budget = int(smallest * 1.04)
    code, stderr, peak = _run(tmp_path, method, str(budget // 2**10) + "KiB")
    assert code == 0 and peak is not None and not stderr.strip(), stderr
    # the budget is the whole run's: compress.memory bounds the process tree (DEVELOPERS.md);
    # the report, drawn after the commit, is outside the plan (README) and switched off here
    assert peak <= budget, f"peak {peak / 2**20:.1f} MiB over the budget {budget / 2**20:.1f} MiB"


# cluster: local runs tiles in worker processes: the whole process tree counts. A thread of
# the run sums psutil's RSS over this process and all its children every few milliseconds
# and keeps the largest sum. A sampler can miss a short peak but never invents one, so the
# check cannot fail spuriously; it may pass a brief excess between two samples.
_TREE_RUN = """
import json, sys, threading, time
import psutil


def watch(peak):
    me = psutil.Process()
    while True:
        total = 0
        try:
            for process in [me, *me.children(recursive=True)]:
                try:
                    total += process.memory_info().rss
                except psutil.Error:
                    pass
        except psutil.Error:
            pass
        peak[0] = max(peak[0], total)
        time.sleep(0.002)


def main():
    from snaplift.cli import app

    peak = [0]
    threading.Thread(target=watch, args=(peak,), daemon=True).start()
    try:
        code = app(sys.argv[1:], standalone_mode=False) or 0
    except SystemExit as error:
        code = error.code or 0
    print("PEAK", json.dumps(peak[0]))
    sys.exit(code)


if __name__ == "__main__":  # worker processes are spawned: they import this module, not run it
    main()
"""


def _run_local(folder: Path, memory: str) -> tuple[int, str, int | None]:
    workflow = folder / "local.yaml"
    workflow.write_text(yaml.safe_dump({
        "archive": {"path": "wide.h5", "fields": ["u"], "time": "t"},
        "compress": {"method": "randomized", "rank": 40, "oversample": 4, "power_iterations": 1, "memory": memory},
        "fit": {"rank": 10}, "output": {"path": "local.zarr", "report": False},
        "cluster": {"kind": "local", "workers": 2, "threads_per_worker": 1}}))
    script = folder / "tree_run.py"
    script.write_text(_TREE_RUN)
    done = subprocess.run([sys.executable, str(script), "run", str(workflow), "-q", "--overwrite"],
                          capture_output=True, text=True, cwd=folder, timeout=900)
    peak = re.search(r"PEAK (\d+)", done.stdout)
    return done.returncode, done.stderr, int(peak.group(1)) if peak else None


@pytest.mark.slow
def test_local_cluster_process_tree_stays_within_a_budget_near_the_smallest(tmp_path: Path) -> None:
    pytest.importorskip("psutil")
    _wide(tmp_path / "wide.h5", 200_000)
    # the planner names the smallest budget for 2 worker processes and this one
    _, message, _ = _run_local(tmp_path, "450MiB")
    smallest = int(re.search(r"raise compress.memory to at least (\d+) bytes", message).group(1))
    # measured before issue 11's fixes (the planner's smallest then, 511 MiB, + 4 %): 611-681 MiB
    # over the process tree for a 531 MiB budget (each adjoint pass's operand stayed in
    # every worker; the workers' slots and their collection were not planned); after:
    # 609-622 MiB for 671 MiB. 6 % above the smallest: three processes' baselines move.
    budget = int(smallest * 1.06)
    code, stderr, peak = _run_local(tmp_path, str(budget // 2**10) + "KiB")
    assert code == 0 and peak is not None, stderr[-2000:]
    assert peak <= budget, f"peak {peak / 2**20:.1f} MiB over the budget {budget / 2**20:.1f} MiB"
