"""Timed benchmark of compress (issue 3 targets). Not run by default: pytest -m benchmark -s.

Size from SNAPLIFT_BENCH_SIZE (default 4GiB), runs per case from SNAPLIFT_BENCH_REPEATS
(default 2). Prints the figures; asserts nothing about time (timed figures live in
benchmarks, never in pass/fail tests).
"""

from __future__ import annotations

import os

import pytest

from snaplift.units import parse_bytes
from snaplift.workflow.bench import BenchSettings, render_benchmark, run_benchmark

pytestmark = pytest.mark.benchmark


def test_compress_benchmark(tmp_path, capsys):
    size = parse_bytes(os.environ.get("SNAPLIFT_BENCH_SIZE", "4GiB"))
    repeats = int(os.environ.get("SNAPLIFT_BENCH_REPEATS", "2"))  # as `snaplift bench`: the fastest of 2
    figures = run_benchmark(BenchSettings(size_bytes=size, folder=str(tmp_path), repeats=repeats), progress=print)
    with capsys.disabled():
        print("\n" + render_benchmark(figures))
    assert figures["methods"]["sketch"]["passes"] == 1
