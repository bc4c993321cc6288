"""Timed figures for lifted and small problems (issue 15). Not run by default:

    pytest -m benchmark -s tests/benchmarks/test_small_problems.py

Prints ratios measured within one run (the machine may be shared, so absolute times move
from run to run; each case is the fastest of SNAPLIFT_BENCH_REPEATS runs, default 3) and
asserts nothing about time (timed figures live in benchmarks, never in pass/fail tests).

- probes: two sensor signals of an oscillator on its limit cycle (an invented van der Pol
  oscillator, 4000 snapshots, 64 KB), each compress method without lifting and with
  ``lift: delays`` of 60 copies (the lifted matrix 120 x 3941);
- in memory: compress of invented time-major archives of several sizes, through the
  in-memory path and through streamed tiles (``compress.in_memory: never``), the basis of
  :data:`snaplift.archive.plan.IN_MEMORY_LIMIT`;
- startup: ``snaplift run`` of the probe archive as a subprocess, without the report, with it
  (the report helper) and with it drawn in the run's process, and the import times of
  ``snaplift.cli``, the runner and the report page;
- demo: the default demo workflow's time inside compress, fit and modes against the rest.
"""

from __future__ import annotations

import datetime
import os
import shutil
import subprocess
import sys
import time
from pathlib import Path

import h5py
import numpy as np
import pytest
import yaml

pytestmark = pytest.mark.benchmark

REPEATS = int(os.environ.get("SNAPLIFT_BENCH_REPEATS", "3"))


def _van_der_pol(path: Path, snapshots: int = 4000, dt: float = 0.05) -> None:
    from scipy.integrate import solve_ivp

    def rate(_t, z):
        return [z[1], (1 - z[0] ** 2) * z[1] - z[0]]

    times = 100 + dt * np.arange(snapshots)  # past the transient: on the limit cycle
    solution = solve_ivp(rate, (0, times[-1]), [2.0, 0.0], t_eval=times, rtol=1e-10, atol=1e-10)
    with h5py.File(path, "w") as h5:
        h5["x"], h5["y"] = solution.y[0], solution.y[1]
        h5.attrs["dt"] = dt


def _workflow(folder: Path, name: str, *, report: bool = True, **sections) -> Path:
    data = {"archive": {"path": "probes.h5", "fields": ["x", "y"], "step": 0.05},
            "output": {"path": f"{name}.zarr", "report": report}, "cluster": "threads", **sections}
    path = folder / f"{name}.yaml"
    path.write_text(yaml.safe_dump(data))
    return path


def _seconds(record: dict) -> float:
    return (datetime.datetime.fromisoformat(record["finished"])
            - datetime.datetime.fromisoformat(record["started"])).total_seconds()


def _run(path: Path) -> tuple[float, dict]:
    from snaplift.workflow.runner import run_workflow

    shutil.rmtree(path.parent / (path.stem + ".zarr"), ignore_errors=True)
    start = time.perf_counter()
    summary = run_workflow(path)
    return time.perf_counter() - start, summary.stages


def _fastest(path: Path) -> tuple[float, dict]:
    return min((_run(path) for _ in range(REPEATS)), key=lambda item: item[0])


def test_probes_lifted_against_unlifted(tmp_path, capsys):
    _van_der_pol(tmp_path / "probes.h5")
    _run(_workflow(tmp_path, "warm", compress={"method": "tsqr", "rank": 2}))  # imports, page cache
    lines = []
    for method in ("tsqr", "randomized", "sketch"):
        # the subprocess runs draw no report: its matplotlib seconds would hide the difference
        plain_path = _workflow(tmp_path, f"{method}-plain", compress={"method": method, "rank": 2}, report=False)
        lifted_path = _workflow(tmp_path, f"{method}-lifted", compress={"method": method, "rank": 30},
                                lift=[{"kind": "delays", "count": 60, "spacing": 1}], report=False)
        plain, _ = _fastest(plain_path)
        lifted, stages = _fastest(lifted_path)
        plain_cli, lifted_cli = _fastest_cli(plain_path), _fastest_cli(lifted_path)
        lines.append(f"{method:10s} in process: unlifted {plain:5.2f} s, 60 delays {lifted:5.2f} s, ratio "
                     f"{lifted / plain:5.2f} (lifted compress stage {_seconds(stages['compress']):4.2f} s);   "
                     f"snaplift run (no report): {plain_cli:5.2f} s, {lifted_cli:5.2f} s, "
                     f"ratio {lifted_cli / plain_cli:4.2f}")
    with capsys.disabled():
        print("\nprobes (2 x 4000), fastest of", REPEATS, "runs:\n" + "\n".join(lines))


def _fastest_cli(path: Path) -> float:
    command = [str(Path(sys.executable).parent / "snaplift"), "run", str(path), "--quiet"]
    runs = []
    for _ in range(REPEATS):
        shutil.rmtree(path.parent / (path.stem + ".zarr"), ignore_errors=True)
        start = time.perf_counter()
        subprocess.run(command, check=True, capture_output=True)
        runs.append(time.perf_counter() - start)
    return min(runs)


def _archive(path: Path, points: int, snapshots: int) -> None:
    rng = np.random.default_rng(5)
    modes = rng.standard_normal((points, 12))
    signals = np.cos(np.outer(np.arange(snapshots), 0.05 + 0.1 * np.arange(12)))
    with h5py.File(path, "w") as h5:
        h5.create_dataset("u", data=(signals @ modes.T) + 1e-3 * rng.standard_normal((snapshots, points)),
                          chunks=(1, points))
        h5["t"] = 0.1 * np.arange(snapshots)


@pytest.mark.parametrize("method", ["randomized", "sketch", "tsqr"])
def test_in_memory_against_streamed_tiles(tmp_path, capsys, method):
    lines = []
    for megabytes in (4, 16, 64, 256):
        snapshots = 400
        points = megabytes * 2**20 // (8 * snapshots)
        folder = tmp_path / f"{megabytes}"
        folder.mkdir()
        _archive(folder / "a.h5", points, snapshots)
        times = {}
        for mode in ("auto", "never"):
            data = {"archive": {"path": "a.h5", "fields": ["u"], "time": "t"},
                    "compress": {"method": method, "rank": 20, "in_memory": mode, "memory": "3GiB"},
                    "fit": {"rank": 10}, "output": {"path": f"{mode}.zarr"}, "cluster": "threads"}
            path = folder / f"{mode}.yaml"
            path.write_text(yaml.safe_dump(data))
            _, stages = _run(path)  # warm the page cache
            times[mode] = min(_seconds(_run(path)[1]["compress"]) for _ in range(REPEATS))
        lines.append(f"{megabytes:4d} MiB ({points} x {snapshots})  in memory {times['auto']:6.2f} s   "
                     f"streamed {times['never']:6.2f} s   ratio {times['auto'] / times['never']:5.2f}")
        shutil.rmtree(folder)
    with capsys.disabled():
        print(f"\ncompress {method}, in memory against streamed tiles (threads, 2 workers):\n" + "\n".join(lines))


def test_startup_and_a_64_kb_run(tmp_path, capsys):
    """``snaplift run`` of the 64 KB probe archive as a user runs it (a subprocess, start-up and
    exit included): without the report, with it (drawn by the report helper beside the run,
    :mod:`snaplift.report.helper`) and with it drawn in the run's own process
    (``SNAPLIFT_REPORT_HELPER=0``, as ``snaplift report`` draws it, and as a run draws it when
    the machine has no idle core); fastest of REPEATS each, interleaved, with the load average
    before and after (the target, 1.5 s with the report, is for a quiet machine)."""
    _van_der_pol(tmp_path / "probes.h5")
    report_path = _workflow(tmp_path, "cli", compress={"method": "randomized", "rank": 2})
    path = _workflow(tmp_path, "cli-plain", compress={"method": "randomized", "rank": 2}, report=False)
    executable = str(Path(sys.executable).parent / "snaplift")
    subprocess.run([executable, "run", str(path), "--quiet"], check=True, capture_output=True)  # warm the file caches
    helper_off = {**os.environ, "SNAPLIFT_REPORT_HELPER": "0"}
    helper_on = {**os.environ, "SNAPLIFT_REPORT_HELPER": "1"}  # whatever the load (a run decides by it)
    cases = {"no report": (path, helper_on), "report (helper)": (report_path, helper_on),
             "report (in process)": (report_path, helper_off)}
    times: dict[str, list[float]] = {name: [] for name in cases}
    load_before = os.getloadavg()
    for _ in range(REPEATS):
        for name, (workflow, env) in cases.items():
            folder = tmp_path / f"{workflow.stem}.zarr"
            shutil.rmtree(folder, ignore_errors=True)
            shutil.rmtree(folder.with_name(folder.name + ".report"), ignore_errors=True)
            start = time.perf_counter()
            subprocess.run([executable, "run", str(workflow), "--quiet"], check=True, capture_output=True, env=env)
            times[name].append(time.perf_counter() - start)
    load_after = os.getloadavg()
    imports = {}
    for module in ("snaplift.cli", "snaplift.workflow.runner", "snaplift.report.page"):
        runs = []
        for _ in range(REPEATS):
            start = time.perf_counter()
            subprocess.run([sys.executable, "-c", f"import {module}"], check=True)
            runs.append(time.perf_counter() - start)
        imports[module] = min(runs)
    with capsys.disabled():
        print(f"\nsnaplift run on a 64 KB archive (subprocess, start-up and exit included), fastest of {REPEATS}; "
              f"load average {load_before[0]:.2f} before, {load_after[0]:.2f} after:")
        for name, runs in times.items():
            print(f"  {name:20s} {min(runs):5.2f} s   (runs: {', '.join(f'{r:.2f}' for r in runs)})")
        print("  python -c 'import M': " + ", ".join(f"{m} {t:.2f} s" for m, t in imports.items()))


def test_demo_time_outside_compress_fit_modes(tmp_path, capsys):
    from snaplift.demo.run import run_demo

    run_demo(size="default", folder=tmp_path / "warm", progress=lambda *a, **k: None)  # archive cached
    best = None
    for _ in range(REPEATS):
        shutil.rmtree(tmp_path / "demo", ignore_errors=True)
        start = time.perf_counter()
        summary, _ = run_demo(size="default", folder=tmp_path / "demo", progress=lambda *a, **k: None)
        total = time.perf_counter() - start
        inside = sum(_seconds(summary.stages[name]) for name in ("compress", "fit", "modes"))
        if best is None or total < best[0]:
            best = (total, inside)
    total, inside = best
    with capsys.disabled():
        print(f"\ndemo (default size, in process): {total:.2f} s, compress + fit + modes {inside:.2f} s, "
              f"outside {total - inside:.2f} s ({(total - inside) / total:.0%})")
