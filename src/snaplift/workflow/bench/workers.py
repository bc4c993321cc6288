"""The sketch's compress with threads and with worker processes, and the bytes sent between them.

The bytes are counted where distributed sends them: every message a process writes to a
TCP comm (``distributed.comm.tcp.TCP.write`` returns the bytes it wrote) is added to a
counter installed in each worker process (``client.run``) and in this process (the client
and the scheduler of a local cluster) for the duration of the pass. Until the engine
counts its own bytes over the wire, this is the measurement; it includes distributed's
heartbeats and task messages, so it is an upper bound on what the accumulators cost.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

from snaplift.workflow.bench.floor_cases import BenchSettings, _runner, run_method

__all__ = ["compare_workers", "accumulator_bytes"]

_COUNTER = {"bytes": 0, "installed": False}


def _install_counter(dask_worker: Any = None) -> bool:
    """Wrap ``TCP.write`` once in this process so that it counts the bytes it writes."""
    from distributed.comm import tcp

    if not _COUNTER["installed"]:
        original = tcp.TCP.write

        async def counted(self: Any, *args: Any, **kwargs: Any) -> Any:
            written = await original(self, *args, **kwargs)
            _COUNTER["bytes"] += int(written or 0)
            return written

        tcp.TCP.write = counted  # type: ignore[method-assign]
        _COUNTER["installed"] = True
    return True


def _read_counter(dask_worker: Any = None) -> int:
    return int(_COUNTER["bytes"])


def accumulator_bytes(points: int, snapshots: int, range_width: int, corange_width: int) -> int:
    """The sketch's accumulators: the range sketch ``n x k`` and the co-range sketch ``l x m`` (float64)."""
    return 8 * (points * range_width + corange_width * snapshots)


def compare_workers(archive: Path, rank: int, workers: int, memory_bytes: int, *, processes: bool = True
                    ) -> dict[str, Any]:
    """Warm page cache: the sketch's compress with threads, then (``processes``) with a local cluster."""
    settings = BenchSettings(rank=rank, memory_bytes=memory_bytes, workers=workers)
    out: dict[str, Any] = {}
    with _runner("threads", workers) as runner:
        figures = run_method(archive, "sketch", settings, runner)
    out["threads"] = {"seconds": figures["seconds"], "widths": tuple(figures["widths"]), "peak_rss": figures["peak_rss"]}
    if not processes:
        return out
    with _runner("local", workers) as runner:
        client = runner.client
        client.run(_install_counter)
        _install_counter()
        before_workers = sum(client.run(_read_counter).values())
        before_here = _read_counter()
        figures = run_method(archive, "sketch", settings, runner)
        sent_workers = sum(client.run(_read_counter).values()) - before_workers
        sent_here = _read_counter() - before_here
    out["local"] = {"seconds": figures["seconds"], "peak_rss": figures["peak_rss"], "passes": figures["passes"],
                    "workers_sent": sent_workers, "client_sent": sent_here}
    return out
