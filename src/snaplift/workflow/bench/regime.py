"""Whole commands in the read-bound regime: ``snaplift bench --read-limit ... --cache-limit ...``.

On the invented archive of :mod:`.archive` (known singular values), for each chunk layout,
every command is run whole, as a user runs it, and timed as a multiple of one read of the
archive (``dd``) under the same conditions:

- capped (``--read-limit``, ``--cache-limit``; :mod:`.commands`): ``dd``, ``snaplift run``
  with the sketch (one pass) and randomized ``q = 1``, dask's ``svd_compressed`` with
  ``q = 0`` and ``q = 1`` (compress only); the accuracy of the leading singular values; the
  read bandwidth the compress stage achieved as a fraction of the cap; the sketch run's
  stages as shares of the whole run (from the stage records the run commits), the report's
  figures timed on their own line;
- cold (``--cold``, uncapped): the page cache dropped, the compress pass's read rate
  against ``dd`` with 8 MiB requests on the same file;
- warm: the sketch's compress with threads and with worker processes (``cluster: local``),
  with the bytes the workers sent out per pass; the warm arithmetic rate feeds the cost
  model (:mod:`.model`), whose prediction is checked against the capped measurement;
  threads and worker processes run the same tile plan (:mod:`.workers`).

Before the capped commands the package's own modules are byte-compiled
(:func:`compile_package`), as an install leaves them: ``slowfs-run`` warms the Python
installation, and an editable tree without bytecode would add a compile to every startup.
"""

from __future__ import annotations

import compileall
import datetime as _dt
import json
import shutil
import sys
import tempfile
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from snaplift.units import parse_bytes
from snaplift.workflow.bench.archive import (
    GRID,
    copy_to_zarr,
    drop_page_cache,
    layout_label,
    reader_read,
    warm,
    write_archive,
)
from snaplift.workflow.bench.commands import Cap, run_command
from snaplift.workflow.bench.model import CostModel, predict, relative_gap
from snaplift.workflow.bench.workers import compare_workers_fresh

__all__ = ["RegimeSettings", "run_regimes", "stage_shares", "workflow_text"]

DEFAULT_LAYOUTS: tuple[tuple[int, int], ...] = ((1, 1), (32, 1))


@dataclass(frozen=True)
class RegimeSettings:
    size_bytes: int = 2 * 2**30
    rank: int = 40
    workers: int = 2
    layouts: tuple[tuple[int, int], ...] = DEFAULT_LAYOUTS
    cap: Cap | None = None
    cold: bool = False
    dask: bool = True
    clusters: bool = True
    folder: str | None = None
    keep: bool = False
    memory: str = "2GiB"
    #: turns of threads and worker processes in the warm comparison (the fastest of each is compared)
    repeats: int = 2


def workflow_text(archive: Path, store: Path, method: str, rank: int, workers: int, memory: str,
                  cluster: str = "threads") -> str:
    """The run's workflow: the archive as it is (no weights, no scaling), so the stored singular
    values are the archive's own."""
    extra = ", power_iterations: 1" if method == "randomized" else ""
    return (f"archive: {{path: {archive}, fields: [u], time: t}}\n"
            "prepare: {center: false, scale: none}\n"
            f"compress: {{method: {method}, rank: {rank}, seed: 0, memory: {memory}{extra}}}\n"
            f"fit: {{method: dmd, rank: {min(20, rank)}}}\n"
            f"output: {{path: {store}, report: false}}\n"
            f"cluster: {{kind: {cluster}, workers: {workers}}}\n")


def _epoch(text: str) -> float:
    return _dt.datetime.fromisoformat(text).timestamp()


def stage_shares(attrs: dict[str, Any], started: float, whole: float, ended: float | None = None
                 ) -> dict[str, float]:
    """Seconds of each part of a run from its committed stage records (``started``/``finished``).

    ``startup`` counts from the command's start (``started``, epoch seconds) to the end of
    the scan stage (imports, scan, fingerprint sampling); ``store`` is what follows the
    modes stage until the command ended (``ended``, epoch seconds, when the caller saw it
    end; else ``started + whole``, which also counts the time before the start mark): the
    report record, the commit, the exit; ``between`` the gaps between stages.
    """
    stages = attrs.get("stages", {})
    seconds: dict[str, float] = {}
    scan_end = _epoch(stages["scan"]["finished"])
    seconds["startup"] = scan_end - started
    last = scan_end
    between = 0.0
    for name in ("compress", "fit", "modes"):
        record = stages.get(name, {})
        if "started" not in record:
            seconds[name] = 0.0
            continue
        begin, end = _epoch(record["started"]), _epoch(record["finished"])
        between += max(0.0, begin - last)
        seconds[name] = end - begin
        last = end
    seconds["between"] = between
    seconds["store"] = max(0.0, (ended if ended is not None else started + whole) - last)
    return seconds


def _accuracy(found: np.ndarray, sigma: np.ndarray, count: int = 10) -> float:
    count = min(count, found.size, sigma.size)
    return float(np.max(np.abs(found[:count] - sigma[:count]) / sigma[:count]))


def _run_store(store: Path) -> tuple[dict[str, Any], np.ndarray]:
    from snaplift.results.store import open_result, store_array  # zarr only when a run was timed

    root = open_result(store)
    return dict(root.attrs), np.asarray(store_array(root, "basis/singular_value")[...])


def _snaplift(*args: str) -> list[str]:
    # the console script's entry point (``snaplift = snaplift.cli:main``), as a user runs it:
    # ``app()`` alone ends in the interpreter's teardown, 0.2-0.7 s of the timed command
    # that the installed ``snaplift`` skips (cli.main)
    return [sys.executable, "-c", "from snaplift.cli import main; main()", *args]


def _whole_run(folder: Path, archive: Path, method: str, settings: RegimeSettings, sigma: np.ndarray,
               cap: Cap | None, cold: bool) -> dict[str, Any]:
    store = folder / f"run-{method}.zarr"
    workflow = folder / f"run-{method}.yaml"
    workflow.write_text(workflow_text(archive, store, method, settings.rank, settings.workers, settings.memory))
    run = run_command(_snaplift("run", str(workflow), "--overwrite", "--quiet"), folder=folder, cap=cap, cold=cold)
    attrs, found = _run_store(store)
    compress = attrs["stages"]["compress"]
    stages = stage_shares(attrs, run.started, run.seconds, run.ended) if run.started is not None else {}
    return {"seconds": run.seconds, "passes": int(compress.get("passes", 0)), "error_top10": _accuracy(found, sigma),
            "bytes_read": int(compress.get("bytes_read", 0)), "stages": stages, "store": str(store)}


def _dask(folder: Path, archive: Path, rank: int, q: int, sigma: np.ndarray, cap: Cap | None) -> dict[str, Any]:
    argv = [sys.executable, "-m", "snaplift.workflow.bench.dask_svd", str(archive), str(rank), str(q)]
    run = run_command(argv, folder=folder, cap=cap, cold=False)
    line = next(line for line in reversed(run.output.splitlines()) if line.startswith("{"))
    found = np.asarray(json.loads(line)["singular_value"])
    return {"seconds": run.seconds, "passes": 2 + 2 * q, "error_top10": _accuracy(found, sigma)}


def _capped(folder: Path, archive: Path, settings: RegimeSettings, sigma: np.ndarray, say: Callable[[str], None],
            *, report: bool) -> dict[str, Any]:
    cap = settings.cap
    assert cap is not None
    out: dict[str, Any] = {}
    say("  one read (dd, 8 MiB requests)")
    out["read"] = run_command(["dd", f"if={archive}", "of=/dev/null", "bs=8M"], folder=folder, cap=cap,
                              cold=False).seconds
    say("  snaplift run, sketch")
    out["sketch"] = _whole_run(folder, archive, "sketch", settings, sigma, cap, False)
    say("  snaplift run, randomized q=1")
    out["randomized"] = _whole_run(folder, archive, "randomized", settings, sigma, cap, False)
    if settings.dask:
        for q in (0, 1):
            say(f"  dask svd_compressed q={q}")
            out[f"svd_compressed q={q}"] = _dask(folder, archive, settings.rank, q, sigma, cap)
    if report:
        say("  snaplift report (the figures)")
        out["report_seconds"] = run_command(_snaplift("report", out["sketch"]["store"]), folder=folder, cap=cap,
                                            cold=False).seconds
    return out


def _cold(folder: Path, archive: Path, settings: RegimeSettings, say: Callable[[str], None]) -> dict[str, Any]:
    """Cold, uncapped: ``dd`` with 8 MiB requests, the sketch's compress pass (the library's
    compress, threads, no store written) and the same tiles read alone through the readers,
    each after dropping the page cache; then the compress pass again warm.

    The cold pass runs at the slower of its reads and its arithmetic: the reads alone show
    what the readers reach against ``dd``, the warm pass what the arithmetic allows.
    """
    from snaplift.workflow.bench.floor_cases import BenchSettings, _runner, run_method

    say("  cold, uncapped: dd with 8 MiB requests, the sketch's compress pass, its tiles read alone (HDF5, and an "
        "uncompressed zarr copy with the same chunks); the pass warm")
    dd = run_command(["dd", f"if={archive}", "of=/dev/null", "bs=8M"], folder=folder, cap=None, cold=True).seconds
    size = archive.stat().st_size
    bench = BenchSettings(rank=settings.rank, memory_bytes=parse_bytes(settings.memory), workers=settings.workers)
    with _runner("threads", settings.workers) as runner:
        drop_page_cache()
        figures = run_method(archive, "sketch", bench, runner)
        drop_page_cache()
        reads = reader_read(archive, figures["snapshots_per_tile"], settings.workers)
        warm_figures = run_method(archive, "sketch", bench, runner, plan=figures["plan"])
    # the same chunks as an uncompressed zarr array, its tiles read alone, cold
    copy = folder / "bench-copy.zarr"
    copy_to_zarr(archive, copy, same_chunks=True)
    try:
        drop_page_cache()
        zarr_reads = reader_read(copy, figures["snapshots_per_tile"], settings.workers)
    finally:
        shutil.rmtree(copy, ignore_errors=True)
    return {"dd_rate": size / dd, "compress_rate": figures["bytes_ratio"] * size / figures["seconds"],
            "compress_seconds": figures["seconds"], "reads_rate": size / reads, "reads_seconds": reads,
            "zarr_reads_rate": size / zarr_reads, "tile_snapshots": figures["snapshots_per_tile"],
            "warm_rate": warm_figures["bytes_ratio"] * size / warm_figures["seconds"]}


def compile_package() -> bool:
    """Byte-compile snaplift's own modules (``__pycache__`` beside them), as an install does.

    ``slowfs-run`` warms the Python installation so that imports are not what is measured;
    an editable install (the source tree on the path) under ``PYTHONDONTWRITEBYTECODE`` has
    no cached bytecode, and every command would compile the whole package again (1-3 s of
    its startup on a loaded 2-core machine, measured). False when the folder is read-only.
    """
    import snaplift

    try:
        return bool(compileall.compile_dir(str(Path(snaplift.__file__).parent), quiet=2))
    except OSError:
        return False


def run_regimes(settings: RegimeSettings, progress: Callable[[str], None] | None = None) -> dict[str, Any]:
    """Every section for every layout; a plain dict of figures (see :func:`.render_regime.render_regimes`)."""
    say = progress or (lambda message: None)
    if settings.cap is not None and not compile_package():
        say("could not byte-compile snaplift's modules: each command's startup includes compiling them")
    n = GRID[0] * GRID[1]
    m = max(8, int(settings.size_bytes // (8 * n)))
    base = (Path(settings.folder) if settings.folder else Path(tempfile.mkdtemp(prefix="snaplift-bench-"))).resolve()
    base.mkdir(parents=True, exist_ok=True)
    cap = settings.cap
    out: dict[str, Any] = {"snapshots": m, "points": n, "archive_bytes": m * n * 8, "rank": settings.rank,
                           "workers": settings.workers, "layouts": {},
                           "read_limit": cap.read_limit if cap else None,
                           "cache_limit": cap.cache_limit if cap else None}
    try:
        for index, layout in enumerate(settings.layouts):
            label = layout_label(layout)
            folder = base / f"layout-{layout[0]}x{layout[1]}"
            folder.mkdir(exist_ok=True)
            archive = folder / "bench.h5"
            say(f"{label}: writing {m * n * 8 / 2**30:.2f} GiB time-major HDF5 archive ({m} snapshots of {n} points)")
            sigma = write_archive(archive, m, layout=layout)
            figures: dict[str, Any] = {}
            if cap is not None:
                figures["capped"] = _capped(folder, archive, settings, sigma, say, report=index == 0)
            if settings.cold:
                figures["cold"] = _cold(folder, archive, settings, say)
            if settings.clusters or cap is not None:
                say("  warm: the sketch's compress with threads" + (" and worker processes" if settings.clusters
                                                                     else ""))
                warm(archive)
                figures["workers"] = compare_workers_fresh(archive, settings.rank, settings.workers,
                                                           parse_bytes(settings.memory), processes=settings.clusters,
                                                           repeats=settings.repeats)
            if cap is not None:
                figures["model"] = _model_check(figures, out, cap)
            out["layouts"][label] = figures
            if not settings.keep:
                shutil.rmtree(folder, ignore_errors=True)
    finally:
        if not settings.keep and not settings.folder:
            shutil.rmtree(base, ignore_errors=True)
    return out


def _model_check(figures: dict[str, Any], out: dict[str, Any], cap: Cap) -> dict[str, Any]:
    """The cost model with this machine's measured rates, against the capped sketch run."""
    sketch = figures["capped"]["sketch"]
    threads = figures["workers"]["threads"]
    arithmetic = threads["seconds"] / (out["archive_bytes"] / 2**30)
    bandwidth = float(parse_bytes(cap.read_limit.removesuffix("/s")))
    stages = sketch["stages"]
    fixed = sum(v for k, v in stages.items() if k != "compress")
    width = threads["widths"]
    result: dict[str, Any] = {"arithmetic_seconds_per_gib": arithmetic, "read_bandwidth": bandwidth,
                              "measured_compress": stages.get("compress", 0.0), "measured_whole": sketch["seconds"],
                              "fixed_seconds": fixed}
    for overlapped in (True, False):
        p = predict(CostModel(arithmetic, bandwidth, overlapped=overlapped), out["archive_bytes"],
                    points=out["points"], snapshots=out["snapshots"], range_width=width[0], corange_width=width[1],
                    fixed_seconds=fixed)
        key = "overlapped" if overlapped else "in_turn"
        result[key] = {"compress": p.compress_seconds, "whole": p.whole_seconds,
                       "gap_compress": relative_gap(p.compress_seconds, result["measured_compress"]),
                       "gap_whole": relative_gap(p.whole_seconds, sketch["seconds"])}
    # on paper: 1 TB on 32 nodes at 1 GB/s each, this machine's arithmetic per node
    scale = predict(CostModel(arithmetic, 1e9), 1e12, nodes=32, points=out["points"],
                    snapshots=int(1e12 // (8 * out["points"])), range_width=width[0], corange_width=width[1])
    result["terabyte"] = {"read": scale.read_seconds, "arithmetic": scale.arithmetic_seconds,
                          "network_bytes": scale.network_bytes, "network": scale.network_seconds,
                          "compress": scale.compress_seconds}
    return result
