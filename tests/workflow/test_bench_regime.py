"""The read-bound bench's plumbing: finding slowfs-run, the one-line refusal, the stage shares,
the cost model's arithmetic (by hand), every section of the text; no timing is asserted."""

from __future__ import annotations

import datetime as dt
import stat
import sys
from pathlib import Path

import numpy as np
import pytest
from typer.testing import CliRunner

from snaplift.cli import app
from snaplift.workflow.bench.archive import GRID, parse_layout, write_archive
from snaplift.workflow.bench.commands import START_MARK, Cap, find_slowfs_run, run_command, slowfs_missing
from snaplift.workflow.bench.model import CostModel, predict, relative_gap
from snaplift.workflow.bench.regime import RegimeSettings, run_regimes, stage_shares
from snaplift.workflow.bench.render_regime import render_regimes


def _tool(path: Path, body: str) -> Path:
    path.write_text("#!/usr/bin/env bash\n" + body)
    path.chmod(path.stat().st_mode | stat.S_IEXEC)
    return path


def test_slowfs_run_is_found_by_env_var_then_shipped_then_on_path(tmp_path):
    given = _tool(tmp_path / "mine", "exit 0\n")
    assert find_slowfs_run({"SNAPLIFT_SLOWFS_RUN": str(given)}) == given
    assert find_slowfs_run({"SNAPLIFT_SLOWFS_RUN": str(tmp_path / "absent")}) is None
    # the copy snaplift ships beside the bench's commands module
    shipped = find_slowfs_run({"PATH": ""})
    assert shipped is not None and shipped.name == "slowfs-run" and shipped.parent.name == "bench"
    assert "--read-limit" in shipped.read_text()
    # a module without a copy beside it: PATH, else nothing
    elsewhere = tmp_path / "elsewhere" / "module.py"
    bin_dir = tmp_path / "bin"
    bin_dir.mkdir()
    on_path = _tool(bin_dir / "slowfs-run", "exit 0\n")
    assert find_slowfs_run({"PATH": str(bin_dir)}, source=elsewhere) == on_path
    assert find_slowfs_run({"PATH": ""}, source=elsewhere) is None


def test_the_refusal_names_what_is_missing(tmp_path):
    tool = _tool(tmp_path / "slowfs-run", "exit 0\n")
    assert "Linux" in slowfs_missing(tool, platform="darwin")
    assert "slowfs-run tool" in slowfs_missing(None, platform="linux")
    assert "root" in slowfs_missing(tool, platform="linux", euid=1000)
    empty = tmp_path / "cgroup"
    empty.mkdir()
    assert "cgroup controllers" in slowfs_missing(tool, platform="linux", euid=0, cgroup=empty)
    (empty / "cgroup.controllers").write_text("cpu io memory pids\n")  # cgroup v2 with io + memory
    assert slowfs_missing(tool, platform="linux", euid=0, cgroup=empty) is None


def test_bench_refuses_in_one_line_without_slowfs(tmp_path, monkeypatch):
    monkeypatch.setenv("SNAPLIFT_SLOWFS_RUN", str(tmp_path / "no-such-tool"))
    result = CliRunner().invoke(app, ["bench", "--size", "64MiB", "--read-limit", "200MB/s",
                                      "--folder", str(tmp_path / "b")])
    assert result.exit_code != 0
    lines = [line for line in result.output.splitlines() if line.strip()]
    assert len(lines) == 1 and "--read-limit/--cache-limit need" in lines[0] and "Traceback" not in result.output
    assert not (tmp_path / "b").exists()  # refused before writing anything
    bad = CliRunner().invoke(app, ["bench", "--read-limit", "fast", "--dry-run"])
    assert bad.exit_code != 0 and len([x for x in bad.output.splitlines() if x.strip()]) == 1
    with pytest.raises(ValueError, match="SNAPSHOTSxPIECES"):
        parse_layout("8y4")
    assert parse_layout("8x4") == (8, 4) and parse_layout("32") == (32, 1)


def test_cost_model_arithmetic_by_hand():
    # 2 GiB on one node at 200 MB/s: 2 * 1073741824 / 2e8 = 10.737 s of reading; arithmetic
    # 1.5 s/GiB * 2 GiB = 3 s; overlapped the pass is the larger, in turn the sum (hand-computed)
    p = predict(CostModel(1.5, 2e8), 2 * 2**30, points=262144, snapshots=1024, range_width=81, corange_width=163)
    assert p.read_seconds == pytest.approx(10.737418, rel=1e-6)
    assert p.arithmetic_seconds == pytest.approx(3.0)
    assert p.compress_seconds == pytest.approx(10.737418, rel=1e-6)
    assert p.network_seconds == 0.0  # one node: nothing crosses a network
    q = predict(CostModel(1.5, 2e8, overlapped=False), 2 * 2**30, passes=4, points=262144, snapshots=1024,
                range_width=81, corange_width=163, fixed_seconds=2.0)
    assert q.compress_seconds == pytest.approx(4 * 13.737418, rel=1e-6) and q.whole_seconds == pytest.approx(
        4 * 13.737418 + 2.0, rel=1e-6)
    # 1 TB on 32 nodes at 1 GB/s: 31.25 GB per node = 31.25 s of reading; bytes over the
    # network per pass 32 * 8 * 262144 * 81 + 8 * 163 * 476837 = 5,435,817,984 + 621,795,448
    t = predict(CostModel(1.0, 1e9, network_bandwidth=1.25e9), 1e12, nodes=32, points=262144, snapshots=476837,
                range_width=81, corange_width=163)
    assert t.read_seconds == pytest.approx(31.25)
    assert t.arithmetic_seconds == pytest.approx(31.25e9 / 2**30)  # 29.10 s
    assert t.network_bytes == 5_435_817_984 + 621_795_448
    assert t.network_seconds == pytest.approx(6_057_613_432 / 1.25e9)
    assert t.compress_seconds == pytest.approx(31.25 + 6_057_613_432 / 1.25e9)
    assert relative_gap(13.0, 10.0) == pytest.approx(0.3)


def _stage_records() -> tuple[dt.datetime, dict]:
    """A run's committed stage records: scan 1-1.5 s, compress 1.6-11.6, fit 12-12.3, modes 12.3-13."""
    t0 = dt.datetime(2026, 1, 1, tzinfo=dt.UTC)

    def at(seconds: float) -> str:
        return (t0 + dt.timedelta(seconds=seconds)).isoformat()

    return t0, {"stages": {"scan": {"started": at(1.0), "finished": at(1.5)},
                           "compress": {"started": at(1.6), "finished": at(11.6)},
                           "fit": {"started": at(12.0), "finished": at(12.3)},
                           "modes": {"started": at(12.3), "finished": at(13.0)}}}


def test_stage_shares_from_the_committed_records():
    t0, attrs = _stage_records()
    shares = stage_shares(attrs, t0.timestamp(), 14.0)
    # hand-computed: startup 0 -> 1.5, compress 10, fit 0.3, modes 0.7, gaps 0.1 + 0.4, store 13 -> 14
    assert shares["startup"] == pytest.approx(1.5) and shares["compress"] == pytest.approx(10.0)
    assert shares["fit"] == pytest.approx(0.3) and shares["modes"] == pytest.approx(0.7)
    assert shares["between"] == pytest.approx(0.5) and shares["store"] == pytest.approx(1.0)
    assert sum(shares.values()) == pytest.approx(14.0)


def test_chunk_layouts_of_the_archive(tmp_path):
    import h5py

    sigma = write_archive(tmp_path / "a.h5", 12, layout=(8, 4))
    with h5py.File(tmp_path / "a.h5", "r") as h5:
        assert h5["u"].chunks == (8, GRID[0] // 4, GRID[1])
        x = h5["u"][...].reshape(12, -1)
    # singular values known by construction (X = V diag(sigma) U^T with orthonormal U, V)
    assert np.allclose(np.linalg.svd(x, compute_uv=False), sigma[:12], rtol=1e-10)
    with pytest.raises(ValueError, match="pieces"):
        write_archive(tmp_path / "b.h5", 4, layout=(1, 3))


def test_capped_commands_warm_a_development_install_of_snaplift(tmp_path):
    # slowfs-run re-warms the Python installation after dropping the page cache; snaplift's
    # modules, when installed in development mode, live outside it and are named in
    # SLOWFS_WARM (the shipped slowfs-run reads it), as an installed copy would be warm
    import snaplift

    fake = tmp_path / "slowfs-run"
    fake.write_text(f"#!{sys.executable}\n"
                    "import os, subprocess, sys\n"
                    "print('warm=' + os.environ.get('SLOWFS_WARM', ''))\n"
                    "print('slowfs-run: 0.01 s, exit 0')\n")
    fake.chmod(fake.stat().st_mode | stat.S_IEXEC)
    run = run_command(["true"], folder=tmp_path, cap=Cap("200MB/s", "2.5GiB", fake), cold=False)
    package = Path(snaplift.__file__).resolve().parent
    warmed = next(line for line in run.output.splitlines() if line.startswith("warm=")).removeprefix("warm=")
    if package.is_relative_to(Path(sys.prefix).resolve()):
        assert str(package) not in warmed.split(":")  # installed: warm with the environment already
    else:
        assert str(package) in warmed.split(":")
    assert "SLOWFS_WARM" in (Path(__file__).parents[2] / "src/snaplift/workflow/bench/slowfs-run").read_text()


@pytest.mark.slow
def test_every_section_prints_on_a_tiny_archive(tmp_path):
    # a stand-in for slowfs-run with the same interface and last line (no cgroup, no root):
    # the plumbing, not the regime, is under test here
    fake = tmp_path / "slowfs-run"
    fake.write_text(f"#!{sys.executable}\n"
                    "import subprocess, sys, time\n"
                    "argv = sys.argv[sys.argv.index('--') + 1:]\n"
                    "start = time.time(); rc = subprocess.call(argv)\n"
                    "print(f'slowfs-run: {time.time() - start:.2f} s, exit {rc}'); sys.exit(rc)\n")
    fake.chmod(fake.stat().st_mode | stat.S_IEXEC)
    settings = RegimeSettings(size_bytes=24 * 8 * GRID[0] * GRID[1], rank=4, workers=1, layouts=((1, 1), (8, 4)),
                              cap=Cap("200MB/s", "2.5GiB", fake), clusters=False, folder=str(tmp_path / "b"))
    figures = run_regimes(settings)
    text = render_regimes(figures)
    for needle in ("1 per chunk", "8 per chunk, 1/4 of space", "one read of the archive", "snaplift run, sketch",
                   "randomized q=1", "svd_compressed q=0", "svd_compressed q=1", "of the cap", "startup",
                   "compress", "modes", "report figures", "threads", "cost model", "1 TB on 32 nodes"):
        assert needle in text, needle
    layout = figures["layouts"]["1 per chunk"]["capped"]
    assert layout["sketch"]["passes"] == 1 and layout["randomized"]["passes"] == 4
    # all singular values of the 24-snapshot archive are known; randomized q=1 with 14 of 24
    # columns sketched is accurate to a few per cent (Halko et al. 2011, Cor. 10.10)
    assert layout["randomized"]["error_top10"] < 5e-2


@pytest.mark.slow
def test_worker_comparison_uses_one_plan_and_the_engines_byte_count(tmp_path):
    # a local cluster of two worker processes, then threads on the very same tiles; the
    # bytes are the engine's count per pass, bounded by (workers + 1) range accumulators
    # (issue 16's bound); the threaded run's singular values are the reference (numpy's
    # SVD of the same archive checks both in the sketch tests; here: same plan, same sketch)
    from snaplift.workflow.bench.workers import compare_workers_fresh

    archive = tmp_path / "bench.h5"
    write_archive(archive, 48)
    # in a fresh interpreter, as a run starts (its plan measures that process, not the bench's)
    out = compare_workers_fresh(archive, rank=4, workers=2, memory_bytes=2 * 2**30, repeats=2)
    threads, local = out["threads"], out["local"]
    # two turns each; the fastest of each is compared (as the bench's other compress cases)
    assert len(threads["runs"]) == len(local["runs"]) == 2
    assert threads["seconds"] == min(threads["runs"]) and local["seconds"] == min(local["runs"])
    assert threads["same_plan"] and threads["tiles"] == local["tiles"]
    assert threads["snapshots_per_tile"] == local["snapshots_per_tile"]
    assert len(local["bytes_per_pass"]) == local["passes"] == 1
    assert 0 < local["bytes_per_pass"][0] <= 3 * local["range_accumulator_bytes"]
    assert local["ratio"] == pytest.approx(local["seconds"] / threads["seconds"])
    # CPU of the process tree (psutil): both sides did work; the ratio is theirs
    assert threads["cpu_seconds"] > 0 and local["cpu_seconds"] > 0
    assert local["cpu_ratio"] == pytest.approx(local["cpu_seconds"] / threads["cpu_seconds"])
    text = render_regimes({"archive_bytes": 48 * GRID[0] * GRID[1] * 8, "snapshots": 48,
                           "points": GRID[0] * GRID[1], "rank": 4, "workers": 2,
                           "layouts": {"1 per chunk": {"workers": out}}})
    assert "same tiles" in text and "range accumulators of" in text and "CPU of the process tree" in text
    assert "fastest of 2" in text and "every run (s): worker processes" in text


def test_a_failed_worker_comparison_is_one_line_naming_the_archive(tmp_path):
    from snaplift.workflow.bench.workers import compare_workers_fresh

    missing = tmp_path / "missing.h5"
    with pytest.raises(RuntimeError, match=r"worker comparison on .*missing\.h5 failed \(exit \d+\)") as raised:
        compare_workers_fresh(missing, rank=4, workers=2, memory_bytes=2**30, processes=False)
    assert "\n" not in str(raised.value)


def test_the_capped_bench_byte_compiles_the_package_first():
    # an installed package carries its bytecode (common practice: pip compiles on install);
    # the bench gives an editable tree the same, so startup is not a compile of the package
    import importlib.util

    import snaplift
    from snaplift.workflow.bench.regime import compile_package

    cached = Path(importlib.util.cache_from_source(str(Path(snaplift.__file__).parent / "cli.py")))
    cached.unlink(missing_ok=True)
    assert compile_package() is True
    assert cached.is_file()


def test_store_share_ends_when_the_command_was_seen_to_end():
    # the command's end as the bench saw it (epoch) bounds the store share; without it,
    # start mark + whole (which also counts what ran before the mark)
    t0, attrs = _stage_records()
    # hand-computed: modes end at 13.0, the command seen to end at 13.2 -> store 0.2
    shares = stage_shares(attrs, t0.timestamp(), 14.0, ended=t0.timestamp() + 13.2)
    assert shares["store"] == pytest.approx(0.2) and shares["startup"] == pytest.approx(1.5)


def test_start_mark_is_printed_before_the_command_runs(tmp_path):
    # the mark comes from a bare interpreter, then the command itself runs (its output follows)
    run = run_command([sys.executable, "-c", "print('the command')"], folder=tmp_path, cap=None, cold=False)
    assert run.started is not None and run.ended is not None
    assert run.started <= run.ended
    lines = run.output.splitlines()
    assert lines[0].startswith(START_MARK) and lines[-1] == "the command"


def test_cold_section_shows_reads_alone_and_the_warm_arithmetic():
    # hand-made figures: the rendered ratios are the figures' own quotients
    figures = {"archive_bytes": 2 * 2**30, "snapshots": 1024, "points": 262144, "rank": 40, "workers": 2,
               "layouts": {"8 per chunk": {"cold": {"dd_rate": 2.0e9, "compress_rate": 0.8e9, "compress_seconds": 2.7,
                                                    "reads_rate": 1.6e9, "reads_seconds": 1.3, "tile_snapshots": 64,
                                                    "zarr_reads_rate": 1.5e9,
                                                    "warm_rate": 0.85e9}}}}
    text = render_regimes(figures)
    assert "the sketch's compress pass read at 800 MB/s = 0.40x dd" in text
    assert "its tiles (64 snapshots) read alone through the readers, cold: 1600 MB/s = 0.80x dd" in text
    assert "(the same chunks in uncompressed zarr: 1500 MB/s = 0.75x dd)" in text
    assert "the pass warm (its arithmetic): 850 MB/s" in text
