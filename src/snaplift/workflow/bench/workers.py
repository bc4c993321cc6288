"""The sketch's compress with threads and with worker processes on one tile plan, and the bytes between them.

Both runs use the same tiles: the plan is made once for the worker processes (whose
memory plan counts each process's baseline, so its tiles are the smaller ones) and
given as it is to the threaded run, so the ratio compares the runners, not two plans.
The bytes are the engine's own count (``Compression.info["bytes_between_processes"]``,
one entry per pass: the values sent to workers and received from them, task results and
collected slots, by ``dask.sizeof``, without the framing of the messages), set against
the size of one range accumulator (``info["range_accumulator_bytes"]``).
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

from snaplift.workflow.bench.floor_cases import BenchSettings, _runner, run_method

__all__ = ["compare_workers", "accumulator_bytes"]


def accumulator_bytes(points: int, snapshots: int, range_width: int, corange_width: int) -> int:
    """The sketch's accumulators: the range sketch ``n x k`` and the co-range sketch ``l x m`` (float64)."""
    return 8 * (points * range_width + corange_width * snapshots)


def compare_workers(archive: Path, rank: int, workers: int, memory_bytes: int, *, processes: bool = True
                    ) -> dict[str, Any]:
    """Warm page cache: the sketch's compress with a local cluster (``processes``), then with
    threads on the same tile plan (its own plan without ``processes``)."""
    settings = BenchSettings(rank=rank, memory_bytes=memory_bytes, workers=workers)
    out: dict[str, Any] = {}
    plan = None
    if processes:
        with _runner("local", workers) as runner:
            figures = run_method(archive, "sketch", settings, runner)
        plan = figures.pop("plan")
        passes = figures["bytes_between_processes"]
        accumulator = figures["range_accumulator_bytes"]
        out["local"] = {"seconds": figures["seconds"], "peak_rss": figures["peak_rss"], "passes": figures["passes"],
                        "bytes_per_pass": passes, "range_accumulator_bytes": accumulator,
                        "accumulators_per_pass": [sent / accumulator for sent in passes] if accumulator else [],
                        "tiles": figures["tiles"], "snapshots_per_tile": figures["snapshots_per_tile"]}
    with _runner("threads", workers) as runner:
        figures = run_method(archive, "sketch", settings, runner, plan=plan)
    figures.pop("plan")
    out["threads"] = {"seconds": figures["seconds"], "widths": tuple(figures["widths"]),
                      "peak_rss": figures["peak_rss"],
                      "tiles": figures["tiles"], "snapshots_per_tile": figures["snapshots_per_tile"],
                      "same_plan": plan is not None}
    if processes:
        out["local"]["ratio"] = out["local"]["seconds"] / out["threads"]["seconds"]
    return out
