"""The benchmark machinery on a tiny archive (figures only; no timing is asserted)."""

from __future__ import annotations

import numpy as np
import pytest
from typer.testing import CliRunner

from snaplift.cli import app
from snaplift.workflow.bench import BenchSettings, render_benchmark, run_benchmark, spectrum


def test_tiny_benchmark_reports_every_figure(tmp_path):
    # the budget holds this process too (compress.memory bounds the whole process tree)
    settings = BenchSettings(size_bytes=40 * 2**20, rank=8, memory_bytes=2 * 2**30, folder=str(tmp_path),
                             zarr=False, clusters=False, dask=False)
    figures = run_benchmark(settings)
    assert figures["snapshots"] == 20 and figures["archive_bytes"] == 20 * 512 * 512 * 8
    randomized = figures["methods"]["randomized q=1"]
    # the archive's singular values are 0.95^j by construction; with 18 of 20 columns sketched
    # and q = 1 the error factor is ~(sigma_19 / sigma_9)^3 ~ 0.2 of the tail (Halko et al.
    # 2011, Cor. 10.10): a few per cent at most
    assert randomized["error_top10"] < 5e-2 and randomized["passes"] == 4
    assert figures["methods"]["sketch"]["bytes_ratio"] == 1.0
    assert np.isclose(spectrum()[0], 1.0)
    text = render_benchmark(figures)
    assert "floor" in text and "sketch" in text and "m/2" in text


def test_bench_command_dry_run_says_what_it_writes(tmp_path):
    result = CliRunner().invoke(app, ["bench", "--size", "1GiB", "--folder", str(tmp_path), "--dry-run"])
    assert result.exit_code == 0
    assert "1.00 GiB HDF5 archive" in result.output and str(tmp_path) in result.output
    assert not list(tmp_path.iterdir())
    bad = CliRunner().invoke(app, ["bench", "--methods", "fast"])
    assert bad.exit_code == 2 and "allowed are randomized, sketch, tsqr" in bad.output


def test_process_tree_memory_sees_a_brief_peak_without_sampling():
    from snaplift.workflow.bench import ProcessTreeMemory

    with ProcessTreeMemory() as memory:
        block = np.ones(256 * 2**20 // 8)  # 256 MiB touched, then freed at once
        del block
    if memory.sampled:
        pytest.skip("no resettable high-water mark here (/proc/PID/clear_refs is Linux's)")
    # the kernel's per-process high-water mark (proc(5), VmHWM) keeps the peak after the free
    assert memory.peak - memory.baseline >= 250 * 2**20
    assert memory.peak < memory.baseline + 400 * 2**20


def test_cold_benchmark_drops_the_page_cache_or_says_why(tmp_path):
    import os

    from snaplift.errors import ConfigError

    settings = BenchSettings(size_bytes=20 * 2**20, rank=4, memory_bytes=2 * 2**30, folder=str(tmp_path),
                             methods=("sketch",), zarr=False, clusters=False, dask=False, cold=True)
    if os.name != "posix" or os.geteuid() != 0:
        with pytest.raises(ConfigError, match=r"--cold needs to drop the page cache"):
            run_benchmark(settings)
        return
    figures = run_benchmark(settings)
    assert figures["page_cache"] == "cold" and figures["methods"]["sketch"]["bytes_ratio"] == 1.0
    assert set(figures["floor_schedules"]) == {"serial", "prefetch", "workers"}
    assert "dropped before every timed read" in render_benchmark(figures)
