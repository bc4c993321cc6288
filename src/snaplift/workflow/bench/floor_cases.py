"""The compression benchmark behind ``snaplift bench``: how fast is compress, next to reading?

One run on a synthetic time-major archive (invented data: ``X = U diag(sigma) V^T`` with
random orthonormal ``U``, ``V`` and ``sigma_j = 0.95^(j-1)`` for ``j <= 120``, so every
singular value is known; HDF5, float64, one snapshot per chunk, written block by block
in bounded memory) measures, in order:

- the raw chunk-by-chunk read of the archive;
- **the floor**: a hand-written numpy single pass that reads each chunk once and forms
  the two thin products ``X Omega`` and ``Psi X`` of width ``rank + 10`` (test matrices
  generated before the clock starts; the fastest of three schedules: serial with a
  threaded BLAS, a reader thread overlapping the arithmetic, one thread per core with
  its own accumulator; :mod:`snaplift.stream._floor`);
- each compress method through :func:`snaplift.stream.compress.compress` (matrix
  description, every pass, finishing), as a ratio to the floor, with passes, bytes read
  per archive byte, accuracy of the leading singular values, and peak resident memory of
  the whole process tree (psutil, sampled in a thread);
- ``dask.array.linalg.svd_compressed`` at the same rank with 0 and 1 power iterations;
- the sketch at ``m/2`` and ``m`` snapshots (is peak memory flat in the archive length?);
- a zarr v3 copy (no compressor, one snapshot per chunk, default async concurrency):
  read time against HDF5, and the sketch under threads and worker processes for each
  reader, which decides the default ``cluster``.

Timings are wall-clock on whatever else the machine is doing; they are reported, never
asserted (pass/fail tests never depend on wall time).
"""

from __future__ import annotations

import contextlib
import functools
import shutil
import tempfile
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from snaplift.stream._floor import floor_pass
from snaplift.workflow.bench.archive import (
    GRID,
    copy_to_zarr,
    drop_page_cache,
    raw_read,
    reader_read,
    warm,
    write_archive,
)
from snaplift.workflow.bench.memory import timed as _timed

__all__ = ["BenchSettings", "run_benchmark", "render_benchmark", "run_method", "run_svd_compressed"]


@dataclass(frozen=True)
class BenchSettings:
    size_bytes: int = 4 * 2**30
    rank: int = 40
    memory_bytes: int = 2 * 2**30
    workers: int = 2
    folder: str | None = None
    methods: tuple[str, ...] = ("sketch", "randomized")
    zarr: bool = True
    clusters: bool = True
    dask: bool = True
    keep: bool = False
    #: runs of each compress case and of svd_compressed; the fastest counts (the floor is
    #: always timed twice, before and after them), the largest peak memory is reported
    repeats: int = 1
    #: drop the page cache before every timed read (the archive read from the disk, as an
    #: archive larger than memory is) instead of warming it (Linux, root)
    cold: bool = False


def _best(runs: list[dict[str, Any]]) -> dict[str, Any]:
    """The fastest of repeated runs, with every run's time and the largest peak memory."""
    best = dict(min(runs, key=lambda f: f["seconds"]))
    best["all_seconds"] = [f["seconds"] for f in runs]
    best["peak_rss"] = max(f["peak_rss"] for f in runs)
    return best


def _accuracy(found: np.ndarray, sigma: np.ndarray, count: int) -> float:
    count = min(count, found.size)
    return float(np.max(np.abs(found[:count] - sigma[:count]) / sigma[:count]))


@contextlib.contextmanager
def _runner(kind: str, workers: int) -> Iterator[Any]:
    from snaplift.cluster import ClusterOptions, open_scheduler
    from snaplift.stream.loop import runner_for

    with open_scheduler(ClusterOptions(kind=kind, workers=workers)) as scheduler, runner_for(scheduler) as runner:
        yield runner


def run_method(path: Path, method: str, settings: BenchSettings, runner: Any, *, snapshots: int | None = None,
               sketch_widths: tuple[int, int] | None = None, power_iterations: int = 1,
               corange_map: str = "sparse", plan: Any = None) -> dict[str, Any]:
    """One compress run through the library, as the compress stage does it.

    ``plan``: a tile plan to use as it is (another runner's, to compare runners on the
    same tiles); the returned ``plan`` is the one used.

    As the workflow does, the tiles are planned in what the budget leaves once the
    processes' measured baseline is taken (:func:`snaplift.cluster.resident_memory`), so
    ``peak_rss`` (this process tree, sampled) is to be compared with ``settings.memory_bytes``.
    """
    from snaplift.archive import open_archive, plan_tiles
    from snaplift.archive.matrix import build_snapshot_matrix
    from snaplift.cluster import resident_memory
    from snaplift.stream.compress import CompressOptions, compress
    from snaplift.workflow.planning import baseline_modules

    reader = open_archive(str(path))
    info = reader.describe()
    m = info.fields["u"].n_snapshots if snapshots is None else snapshots

    given = plan

    def work() -> Any:
        if given is not None:
            return given, run(given)
        # the baseline a run measures: with the libraries its pass loads after the plan
        resident = resident_memory(getattr(runner, "client", None), workers=runner.workers,
                                   modules=baseline_modules(method))
        planned = plan_tiles(info, ["u"], memory_bytes=settings.memory_bytes, workers=runner.workers, method=method,
                             rank=settings.rank, power_iterations=power_iterations, sketch_widths=sketch_widths,
                             shared_memory=runner.kind == "threads", baseline_bytes=resident.reserve(),
                             baseline_label=resident.label, corange_map=corange_map)
        return planned, run(planned)

    def run(plan: Any) -> Any:
        matrix = build_snapshot_matrix(reader, ["u"], snapshots=np.arange(m), snapshot_block=1,
                                       snapshot_blocks=plan.snapshot_blocks)
        extra: dict[str, Any] = {"corange_map": corange_map} if method == "sketch" else {}
        options = CompressOptions(method=method, rank=settings.rank, power_iterations=power_iterations,
                                  sketch_widths=sketch_widths, scale="none", **extra)
        return compress(matrix, plan, options, runner=runner, in_flight=plan.in_flight)

    elapsed, (plan, result), memory = _timed(work)
    archive_bytes = m * info.fields["u"].n_points * 8
    return {"seconds": elapsed, "passes": result.passes, "bytes_ratio": result.bytes_read / archive_bytes,
            "singular_value": result.lowrank.singular_value, "peak_rss": memory.peak, "baseline_rss": memory.baseline,
            "plan_peak": plan.peak_bytes_estimate, "plan_baseline": plan.baseline_bytes, "block": plan.block,
            "tiles": plan.n_tiles, "plan": plan,
            "snapshots_per_tile": int(max(c1 - c0 for c0, c1 in plan.snapshot_blocks)),
            "bytes_between_processes": list(result.info.get("bytes_between_processes", [])),
            "range_accumulator_bytes": int(result.info.get("range_accumulator_bytes", 0)),
            "widths": (result.info["range_width"], result.info["corange_width"]), "kind": result.projection_kind}


def run_svd_compressed(path: Path, rank: int, power_iterations: int, block: int) -> dict[str, Any]:
    import dask
    import dask.array as da
    import h5py

    with h5py.File(path, "r") as h5:
        data = h5["u"]
        flat_shape = (data.shape[0], int(np.prod(data.shape[1:])))
        x = da.from_array(data, chunks=(block, *data.shape[1:]), lock=True).reshape(flat_shape)
        with dask.config.set(scheduler="threads"):
            elapsed, (u, s, v), memory = _timed(lambda: da.linalg.svd_compressed(
                x, k=rank, n_power_iter=power_iterations, seed=0, compute=True))
            s = np.asarray(s.compute() if hasattr(s, "compute") else s)
    return {"seconds": elapsed, "singular_value": s, "peak_rss": memory.peak, "passes": 2 + 2 * power_iterations}


def _zarr_settings() -> str:
    import zarr

    return (f"async concurrency {zarr.config.get('async.concurrency')}, "
            f"codec batch size {zarr.config.get('codec_pipeline.batch_size')}")


def _floor(path: Path, width: int, block: int, settle: Callable[[Path], None], *, cold: bool
           ) -> tuple[float, dict[str, float]]:
    """The floor's schedules, each from the same page-cache state.

    Warm: one call, which also checks that every schedule formed the same products. Cold:
    the page cache is dropped before each schedule (each is then its own call).
    """
    from snaplift.stream._floor import FLOOR_SCHEDULES

    if not cold:
        settle(path)
        return floor_pass(path, width, block)
    times: dict[str, float] = {}
    for schedule in FLOOR_SCHEDULES:
        settle(path)
        times.update(floor_pass(path, width, block, schedules=(schedule,))[1])
    return min(times.values()), times


def run_benchmark(settings: BenchSettings, progress: Callable[[str], None] | None = None) -> dict[str, Any]:
    """Run the whole benchmark once; returns a plain dict of figures (see :func:`render_benchmark`).

    Example
    -------
    >>> figures = run_benchmark(BenchSettings(size_bytes=2**28, zarr=False, clusters=False))  # doctest: +SKIP
    >>> figures["methods"]["sketch"]["ratio"]                                                # doctest: +SKIP
    1.4
    """
    say = progress or (lambda message: None)
    n = GRID[0] * GRID[1]
    m = max(8, int(settings.size_bytes // (8 * n)))
    folder = Path(settings.folder) if settings.folder else Path(tempfile.mkdtemp(prefix="snaplift-bench-"))
    folder.mkdir(parents=True, exist_ok=True)
    h5_path = folder / "bench.h5"
    out: dict[str, Any] = {"snapshots": m, "points": n, "archive_bytes": m * n * 8, "rank": settings.rank,
                           "memory_budget": settings.memory_bytes, "workers": settings.workers, "methods": {},
                           "repeats": max(1, settings.repeats)}
    try:
        say(f"writing {m * n * 8 / 2**30:.2f} GiB time-major HDF5 archive ({m} snapshots of {n} points)")
        start = time.perf_counter()
        sigma = write_archive(h5_path, m)
        out["write_seconds"] = time.perf_counter() - start
        out["page_cache"] = "cold" if settings.cold else "warm"

        def settle(path: Path) -> None:
            """Before a timed read: the page cache dropped (cold) or holding the archive (warm)."""
            drop_page_cache() if settings.cold else warm(path)

        settle(h5_path)  # issue 3 measures warm; --cold measures the disk
        out["raw_read_seconds"] = raw_read(h5_path, "hdf5")
        width = settings.rank + 10
        from snaplift.archive import open_archive, plan_tiles
        from snaplift.cluster import resident_memory
        from snaplift.workflow.planning import baseline_modules

        # the floor reads in the blocks the threaded sketch would plan
        resident = resident_memory(modules=baseline_modules("sketch"))
        block = plan_tiles(open_archive(str(h5_path)).describe(), ["u"], memory_bytes=settings.memory_bytes,
                           workers=settings.workers, method="sketch", rank=settings.rank, shared_memory=True,
                           baseline_bytes=resident.reserve(), baseline_label=resident.label).block
        say(f"floor: one pass forming two products of width {width} (blocks of {block} snapshots)")
        out["floor_seconds"], out["floor_schedules"] = _floor(h5_path, width, block, settle, cold=settings.cold)
        floor = out["floor_seconds"]
        out["floor_block"] = block
        cases: list[tuple[str, str, dict[str, Any]]] = []
        for method in settings.methods:
            if method == "sketch":
                cases.append(("sketch", "sketch", {}))
                # the Gaussian co-range map the 2017 bound is proved for, same widths
                cases.append(("sketch, gaussian co-range", "sketch", {"corange_map": "gaussian"}))
                k = settings.rank + 10
                cases.append(("sketch (k=r+10, l=2k+1)", "sketch", {"sketch_widths": (k, 2 * k + 1)}))
                # a wider co-range costs little with the sparse map (Tropp et al. 2019, Sec. 3.3)
                k = 2 * settings.rank + 1
                cases.append(("sketch (k=2r+1, l=4k+1)", "sketch", {"sketch_widths": (k, 4 * k + 1)}))
            elif method == "randomized":
                cases.append(("randomized q=1", "randomized", {"power_iterations": 1}))
                cases.append(("randomized q=0", "randomized", {"power_iterations": 0}))
            else:
                cases.append((method, method, {}))
        def scored(run: Callable[[], dict[str, Any]]) -> dict[str, Any]:
            # the fastest of the repeats, each from the same page-cache state, with its
            # accuracy; ratios are set once the floor is final
            runs = []
            for _ in range(max(1, settings.repeats)):
                settle(h5_path)
                runs.append(run())
            figures = _best(runs)
            figures["error_top10"] = _accuracy(figures["singular_value"], sigma, 10)
            figures["error_top_rank"] = _accuracy(figures["singular_value"], sigma, settings.rank)
            return figures

        with _runner("threads", settings.workers) as runner:
            for label, method, extra in cases:
                say(f"compress: {label} (threads)")
                out["methods"][label] = scored(
                    functools.partial(run_method, h5_path, method, settings, runner, **extra))
            say("peak memory of the sketch at m/2 and m snapshots")
            peaks: dict[str, int] = {"half": 0, "full": 0}
            for _ in range(max(1, settings.repeats)):  # the largest peak of the repeats, for both lengths
                for name, count in (("half", m // 2), ("full", m)):
                    settle(h5_path)
                    peaks[name] = max(peaks[name], run_method(h5_path, "sketch", settings, runner,
                                                              snapshots=count)["peak_rss"])
            out["memory_half"], out["memory_full"] = peaks["half"], peaks["full"]
        if settings.dask:
            out["svd_compressed"] = {}
            for q in (0, 1):
                say(f"dask.array.linalg.svd_compressed k={settings.rank} n_power_iter={q}")
                out["svd_compressed"][q] = scored(
                    functools.partial(run_svd_compressed, h5_path, settings.rank, q, block))
        # the floor once more, after the methods: on a shared machine the load changes during
        # a run, and the floor is the best the machine did (every ratio uses the lower one)
        say("floor again")
        again, again_schedules = _floor(h5_path, width, block, settle, cold=settings.cold)
        out["floor_seconds_first"], out["floor_seconds_again"] = out["floor_seconds"], again
        if again < floor:
            out["floor_seconds"], out["floor_schedules"], floor = again, again_schedules, again
        for figures in [*out["methods"].values(), *(out.get("svd_compressed") or {}).values()]:
            figures["ratio"] = figures["seconds"] / floor
        paths = {"hdf5": h5_path}
        if settings.zarr:
            zarr_path = folder / "bench.zarr"
            say("zarr v3 copy (no compressor, one snapshot per chunk)")
            copy_to_zarr(h5_path, zarr_path)
            raw_read(zarr_path, "zarr")  # untimed: zarr's own metadata caches
            settle(zarr_path)
            out["zarr_raw_read_seconds"] = raw_read(zarr_path, "zarr")
            settle(zarr_path)
            out["zarr_block_read_seconds"] = raw_read(zarr_path, "zarr", block=block)
            settle(h5_path)
            out["hdf5_block_read_seconds"] = raw_read(h5_path, "hdf5", block=block)
            # through the readers, as compress reads its tiles
            reader_read(zarr_path, block, settings.workers)  # untimed: chunk-file lists
            settle(zarr_path)
            out["zarr_tile_read_seconds"] = reader_read(zarr_path, block, settings.workers)
            reader_read(h5_path, block, settings.workers)
            settle(h5_path)
            out["hdf5_tile_read_seconds"] = reader_read(h5_path, block, settings.workers)
            out["zarr_settings"] = _zarr_settings()
            paths["zarr"] = zarr_path
        if settings.clusters:
            out["clusters"] = {}
            for kind in ("threads", "local"):
                with _runner(kind, settings.workers) as runner:
                    for fmt, path in paths.items():
                        say(f"sketch with {kind} on {fmt}")
                        settle(path)
                        figures = run_method(path, "sketch", settings, runner)
                        out["clusters"][f"{kind}/{fmt}"] = {"seconds": figures["seconds"],
                                                            "ratio": figures["seconds"] / floor,
                                                            "peak_rss": figures["peak_rss"]}
    finally:
        if not settings.keep and not settings.folder:
            shutil.rmtree(folder, ignore_errors=True)
    return out


def render_benchmark(figures: dict[str, Any]) -> str:
    """Plain text summary, ratios to the floor measured in the same run."""
    gib = 2.0**30
    floor = figures["floor_seconds"]
    lines = [
        f"archive: {figures['archive_bytes'] / gib:.2f} GiB time-major HDF5, {figures['snapshots']} snapshots x "
        f"{figures['points']} points, float64, one snapshot per chunk; rank {figures['rank']}, "
        f"budget {figures['memory_budget'] / gib:.2f} GiB, {figures['workers']} workers; page cache "
        + ("dropped before every timed read (the disk)" if figures.get("page_cache") == "cold"
           else "warm before every timed read"),
        f"raw chunk-by-chunk read: {figures['raw_read_seconds']:.2f} s "
        f"({figures['archive_bytes'] / figures['raw_read_seconds'] / gib:.2f} GiB/s)",
        f"floor (one pass, two products of width rank+10, blocks of {figures['floor_block']}): {floor:.2f} s "
        f"= {floor / figures['raw_read_seconds']:.1f}x the raw read (lower of "
        f"{figures.get('floor_seconds_first', floor):.2f} s before and "
        f"{figures.get('floor_seconds_again', floor):.2f} s "
        "after the methods); schedules "
        + ", ".join(f"{name} {seconds:.2f} s" for name, seconds in (figures.get("floor_schedules") or {}).items()),
        "",
        f"compress cases: the fastest of {figures.get('repeats', 1)} run(s) each",
        f"{'compress':28s} {'x floor':>8s} {'passes':>6s} {'read/arch':>9s} {'err top10':>10s} {'err top r':>10s} "
        f"{'peak RSS':>9s} {'plan':>9s}",
    ]
    for label, f in figures["methods"].items():
        lines.append(f"{label:28s} {f['ratio']:8.2f} {f['passes']:6d} {f['bytes_ratio']:9.3f} "
                     f"{f['error_top10']:10.2e} {f['error_top_rank']:10.2e} {f['peak_rss'] / gib:8.2f}G "
                     f"{f['plan_peak'] / gib:8.2f}G")
    for q, f in (figures.get("svd_compressed") or {}).items():
        lines.append(f"{'svd_compressed q=' + str(q):28s} {f['ratio']:8.2f} {f['passes']:6d} {'-':>9s} "
                     f"{f['error_top10']:10.2e} {f['error_top_rank']:10.2e} {f['peak_rss'] / gib:8.2f}G {'-':>9s}")
    if "memory_half" in figures:
        change = figures["memory_full"] / figures["memory_half"] - 1
        lines += ["", f"sketch peak RSS at m/2: {figures['memory_half'] / gib:.2f} GiB, at m: "
                      f"{figures['memory_full'] / gib:.2f} GiB ({100 * change:+.1f} %)"]
    if "zarr_raw_read_seconds" in figures:
        tiles = ""
        if "zarr_tile_read_seconds" in figures:
            tiles = (f", through the readers on {figures['workers']} threads (as compress reads) "
                     f"{figures['zarr_tile_read_seconds'] / figures['hdf5_tile_read_seconds']:.2f}x "
                     f"({figures['zarr_tile_read_seconds'] / figures['raw_read_seconds']:.2f}x h5py's "
                     "chunk-by-chunk read)")
        lines += [f"zarr/HDF5 read into a reused buffer: chunk by chunk "
                  f"{figures['zarr_raw_read_seconds'] / figures['raw_read_seconds']:.2f}x, "
                  f"in tiles of {figures['floor_block']} snapshots "
                  f"{figures['zarr_block_read_seconds'] / figures['hdf5_block_read_seconds']:.2f}x{tiles}",
                  "  (zarr v3, no compressor, one snapshot per chunk; "
                  f"{figures.get('zarr_settings', 'default settings')})"]
    for key, f in (figures.get("clusters") or {}).items():
        lines.append(f"sketch on {key:14s}: {f['seconds']:.2f} s ({f['ratio']:.2f}x floor), peak RSS "
                     f"{f['peak_rss'] / gib:.2f} GiB")
    return "\n".join(lines)
