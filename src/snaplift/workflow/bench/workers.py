"""The sketch's compress with threads and with worker processes on one tile plan, and the bytes between them.

Both runs use the same tiles: the plan is made once for the worker processes (whose
memory plan counts each process's baseline, so its tiles are the smaller ones) and
given as it is to the threaded run, so the ratio compares the runners, not two plans.
Both ratios compare warm runners: the worker processes' first compress on a fresh cluster
(``first_seconds``: the workers import the task modules, start BLAS, open the archive, and
this process pays its own first compress: imports, the first BLAS calls) is reported on
its own, and the timed run is the second on the same cluster. Without it the comparison
charged this process's one-time costs to whichever runner came first (measured on the
2 GiB archive: a fresh process's first threaded compress 5.9 s, its second 4.2 s).

Beside the wall time each side reports the CPU seconds of the whole process tree during
its timed compress (``cpu_seconds``: user + system of this process, with the scheduler
and nannies of a local cluster, and of every worker process; psutil), and the local side
their ratio (``cpu_ratio``): on a machine shared with other work, wall time moves toward
that ratio, so it tells what the worker processes cost beside the tiles.

The comparison runs in a fresh interpreter (:func:`compare_workers_fresh`, ``python -m
snaplift.workflow.bench.workers``), as a ``snaplift run`` starts: the tile plan is made
around the resident memory of the processes it measures, and the bench's own process,
after its earlier sections, held enough more to halve the tiles (128 tiles of 8 snapshots
where a fresh process plans 38 of 32 on the 8-per-chunk archive, measured), so the
comparison timed another plan than a run would use.

The bytes are the engine's own count (``Compression.info["bytes_between_processes"]``,
one entry per pass: the values sent to workers and received from them, task results and
collected slots, by ``dask.sizeof``, without the framing of the messages), set against
the size of one range accumulator (``info["range_accumulator_bytes"]``).
"""

from __future__ import annotations

import contextlib
import json
import subprocess
import sys
from pathlib import Path
from typing import Any

from snaplift.workflow.bench.floor_cases import BenchSettings, _runner, run_method

__all__ = ["compare_workers", "compare_workers_fresh", "accumulator_bytes"]


def _timed_cpu(run: Any) -> tuple[dict[str, Any], float]:
    """``run()`` and the CPU seconds of the process tree it took. A process that started or
    ended meanwhile is counted for its own part only (none does: the cluster is up before)."""
    import psutil

    def each() -> dict[int, float]:
        me = psutil.Process()
        out = {}
        for process in [me, *me.children(recursive=True)]:
            with contextlib.suppress(psutil.Error):
                times = process.cpu_times()
                out[process.pid] = times.user + times.system
        return out

    before = each()
    figures = run()
    after = each()
    return figures, sum(value - before.get(pid, 0.0) for pid, value in after.items())


def accumulator_bytes(points: int, snapshots: int, range_width: int, corange_width: int) -> int:
    """The sketch's accumulators: the range sketch ``n x k`` and the co-range sketch ``l x m`` (float64)."""
    return 8 * (points * range_width + corange_width * snapshots)


def compare_workers(archive: Path, rank: int, workers: int, memory_bytes: int, *, processes: bool = True,
                    repeats: int = 1) -> dict[str, Any]:
    """Warm page cache: the sketch's compress with a local cluster (``processes``), then with
    threads on the same tile plan (its own plan without ``processes``).

    With ``repeats > 1`` the two runners take turns ``repeats`` times (a worker-process run,
    then a threaded one), and the fastest run of each is compared, as the bench does for
    its other compress cases: the ratio of two single runs moved by more than the gap on
    a shared 2-core machine (0.86x-1.83x for the same code, issue 16). Every run's
    seconds are kept (``runs``) so the spread is on the page.
    """
    settings = BenchSettings(rank=rank, memory_bytes=memory_bytes, workers=workers)
    repeats = max(1, int(repeats))
    out: dict[str, Any] = {}
    with contextlib.ExitStack() as stack:
        local = stack.enter_context(_runner("local", workers)) if processes else None
        plan = None
        first = None
        if local is not None:
            first = run_method(archive, "sketch", settings, local)  # a fresh cluster, a fresh driver
            plan = first.pop("plan")
        threads = stack.enter_context(_runner("threads", workers))
        if plan is None:  # no worker processes ran before: this process's first compress, untimed
            run_method(archive, "sketch", settings, threads)
        local_runs: list[tuple[dict[str, Any], float]] = []
        thread_runs: list[tuple[dict[str, Any], float]] = []
        for _ in range(repeats):
            if local is not None:
                local_runs.append(_timed_cpu(lambda: run_method(archive, "sketch", settings, local, plan=plan)))
            thread_runs.append(_timed_cpu(lambda: run_method(archive, "sketch", settings, threads, plan=plan)))
    if local_runs:
        assert first is not None
        figures, cpu = min(local_runs, key=lambda run: run[0]["seconds"])
        passes = figures["bytes_between_processes"]
        accumulator = figures["range_accumulator_bytes"]
        out["local"] = {"seconds": figures["seconds"], "runs": [run[0]["seconds"] for run in local_runs],
                        "peak_rss": max(max(run[0]["peak_rss"] for run in local_runs), first["peak_rss"]),
                        "passes": figures["passes"],
                        "bytes_per_pass": passes, "range_accumulator_bytes": accumulator,
                        "accumulators_per_pass": [sent / accumulator for sent in passes] if accumulator else [],
                        "tiles": figures["tiles"], "snapshots_per_tile": figures["snapshots_per_tile"],
                        "first_seconds": first["seconds"], "cpu_seconds": cpu}
    figures, cpu = min(thread_runs, key=lambda run: run[0]["seconds"])
    out["threads"] = {"seconds": figures["seconds"], "runs": [run[0]["seconds"] for run in thread_runs],
                      "cpu_seconds": cpu, "widths": tuple(figures["widths"]), "peak_rss": figures["peak_rss"],
                      "tiles": figures["tiles"], "snapshots_per_tile": figures["snapshots_per_tile"],
                      "same_plan": plan is not None}
    if local_runs:
        out["local"]["ratio"] = out["local"]["seconds"] / out["threads"]["seconds"]
        out["local"]["cpu_ratio"] = out["local"]["cpu_seconds"] / max(out["threads"]["cpu_seconds"], 1e-9)
    return out


def compare_workers_fresh(archive: Path, rank: int, workers: int, memory_bytes: int, *, processes: bool = True,
                          repeats: int = 1) -> dict[str, Any]:
    """:func:`compare_workers` in a fresh interpreter (module docstring); its figures as a dict.
    A failure is a one-line error with the child's last line."""
    argv = [sys.executable, "-m", "snaplift.workflow.bench.workers", str(archive), str(rank), str(workers),
            str(memory_bytes), "1" if processes else "0", str(repeats)]
    done = subprocess.run(argv, capture_output=True, text=True, check=False)
    lines = [line for line in done.stdout.splitlines() if line.startswith("{")]
    if done.returncode != 0 or not lines:
        output = (done.stdout + done.stderr).strip().splitlines()
        last = next((line for line in reversed(output) if line.strip()), "no output")
        raise RuntimeError(f"bench: worker comparison on {archive} failed (exit {done.returncode}): {last.strip()}")
    out: dict[str, Any] = json.loads(lines[-1])
    return out


def main(argv: list[str]) -> None:
    """``python -m snaplift.workflow.bench.workers ARCHIVE RANK WORKERS MEMORY_BYTES PROCESSES REPEATS``:
    :func:`compare_workers`, its figures printed as one JSON line."""
    archive, rank, workers, memory, processes, repeats = argv
    out = compare_workers(Path(archive), int(rank), int(workers), int(memory), processes=processes == "1",
                          repeats=int(repeats))
    print(json.dumps(out, default=lambda value: value.item() if hasattr(value, "item") else str(value)))


if __name__ == "__main__":
    main(sys.argv[1:])
