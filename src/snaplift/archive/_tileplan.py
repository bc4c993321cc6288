"""The tile plan's types: a :class:`TilePlan` and its :class:`Tile` s, and the planner's constants.

See :mod:`snaplift.archive.plan` for the memory models that make a plan.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass
from typing import Any

from snaplift.units import format_bytes

__all__ = [
    "IN_MEMORY_FACTOR",
    "IN_MEMORY_LIMIT",
    "TILES_PER_WORKER",
    "TSQR_MERGE_COPIES",
    "Baseline",
    "Tile",
    "TilePlan",
]

_MIB = 2.0**20
#: the compress model keeps at least this many snapshot blocks per worker when it can,
#: so that all workers have work and checkpoints come at a useful granularity
TILES_PER_WORKER = 4
#: the in-memory path holds the whole matrix this many times (the read buffer, the kept
#: copy, a pass's working copy) besides the method's accumulators
IN_MEMORY_FACTOR = 3
#: arrays of the size of the TSQR tree's last merge held at once (see ``driver_of``)
TSQR_MERGE_COPIES = 3
#: the largest decoded snapshot matrix the workflow plans in memory (bytes): chosen by
#: ``tests/benchmarks/test_small_problems.py`` (README "Small problems")
IN_MEMORY_LIMIT = 16 * 2**20


def _mib(nbytes: float) -> str:
    return format_bytes(nbytes, "MiB")


@dataclass(frozen=True)
class Tile:
    """One unit of work: ``reader.read_tile(field, points, snapshots)``."""

    field: str
    points: slice
    snapshots: slice


@dataclass(frozen=True)
class TilePlan:
    """How an archive is read: snapshot blocks shared by all fields, one point block each.

    Attributes
    ----------
    fields
        Field names in stacking order.
    n_snapshots
        Snapshots of every field.
    field_points
        Points per field (grid size).
    chunk
        The alignment unit: least common multiple of the fields' stored snapshot chunks.
    block
        Snapshots per block (a whole multiple of ``chunk``; the last block may be short).
    snapshot_blocks
        ``(start, stop)`` of every block; together they cover each snapshot once.
    point_blocks
        Per field, the ``(start, stop)`` point ranges (one whole range for now).
    bytes_to_read
        Stored bytes read from the archive by one pass over all tiles.
    tile_bytes
        Bytes of the largest decoded tile.
    accumulator_bytes
        Bytes of the largest field's sketch accumulators.
    peak_bytes_estimate
        ``baseline_bytes`` plus the model's peak (module docstring); at most ``memory_bytes``.
    memory_bytes
        The budget of the whole process tree (``compress.memory``).
    baseline_bytes
        What the run's processes held before the pass (measured by the caller; 0 when
        the plan is for the model alone); the tiles were planned in ``memory_bytes - baseline_bytes``.
    """

    fields: tuple[str, ...]
    n_snapshots: int
    field_points: tuple[int, ...]
    chunk: int
    block: int
    snapshot_blocks: tuple[tuple[int, int], ...]
    point_blocks: tuple[tuple[tuple[int, int], ...], ...]
    bytes_to_read: int
    tile_bytes: int
    accumulator_bytes: int
    peak_bytes_estimate: int
    memory_bytes: int
    workers: int
    sketch_width: int
    method: str | None = None
    passes: int = 1
    range_width: int = 0
    corange_width: int = 0
    in_flight: int = 1
    driver_bytes: int = 0
    cache_bytes: int = 0
    result_bytes: int = 0
    partial_chunk_reads: bool = False
    baseline_bytes: int = 0
    #: the in-memory path: the whole (lifted) matrix is read once, kept, and every pass of
    #: the method works on it in this process (one tile; :data:`IN_MEMORY_FACTOR`)
    in_memory: bool = False
    #: fields (indices into ``fields``) whose rows one tile stacks (lifted fields of one
    #: archive field) when they fit at full height
    row_groups: tuple[tuple[int, ...], ...] = ()
    #: bytes of the whole (lifted) snapshot matrix, decoded (compress model)
    matrix_bytes: int = 0

    @property
    def n_points(self) -> int:
        """Rows of the stacked snapshot matrix."""
        return int(sum(self.field_points))

    @property
    def n_tiles(self) -> int:
        """Tile tasks of one pass: a group of lifted fields read whole is one tile; the
        in-memory path is one tile."""
        if self.in_memory:
            return 1
        groups = self.row_groups or tuple((i,) for i in range(len(self.point_blocks)))
        per_block = 0
        for group in groups:
            whole = len(group) > 1 and all(len(self.point_blocks[i]) == 1 for i in group)
            per_block += 1 if whole else sum(len(self.point_blocks[i]) for i in group)
        return len(self.snapshot_blocks) * per_block

    @property
    def tile_shape(self) -> tuple[int, int]:
        """(points, snapshots) of the largest tile."""
        rows = max((stop - start for blocks in self.point_blocks for start, stop in blocks),
                   default=0)
        return (int(rows), int(self.block))

    def tiles(self) -> Iterator[Tile]:
        """Tiles block by block, fields in order within a block (read order)."""
        for s0, s1 in self.snapshot_blocks:
            for name, blocks in zip(self.fields, self.point_blocks, strict=True):
                for p0, p1 in blocks:
                    yield Tile(name, slice(p0, p1), slice(s0, s1))

    def describe(self) -> dict[str, Any]:
        """A JSON-serialisable summary for scan and logs."""
        return {
            "fields": list(self.fields),
            "field_points": [int(n) for n in self.field_points],
            "n_points": self.n_points,
            "n_snapshots": int(self.n_snapshots),
            "chunk": int(self.chunk),
            "block": int(self.block),
            "n_snapshot_blocks": len(self.snapshot_blocks),
            "n_tiles": self.n_tiles,
            "tile_shape": list(self.tile_shape),
            "bytes_to_read": int(self.bytes_to_read),
            "tile_bytes": int(self.tile_bytes),
            "accumulator_bytes": int(self.accumulator_bytes),
            "memory_per_tile_bytes": int(2 * (self.tile_bytes + self.accumulator_bytes)) if self.method is None
            else int(2 * self.tile_bytes + self.result_bytes),
            "peak_bytes_estimate": int(self.peak_bytes_estimate),
            "memory_bytes": int(self.memory_bytes),
            "baseline_bytes": int(self.baseline_bytes),
            "workers": int(self.workers),
            "sketch_width": int(self.sketch_width),
            "row_blocking": (f"{max(len(b) for b in self.point_blocks)} point blocks per field"
                             + (" (partial-chunk reads)" if self.partial_chunk_reads else ""))
            if any(len(b) > 1 for b in self.point_blocks) else "none (one point block per field)",
            "method": self.method,
            "passes": int(self.passes),
            "bytes_all_passes": int(self.passes * self.bytes_to_read),
            "range_width": int(self.range_width),
            "corange_width": int(self.corange_width),
            "in_flight": int(self.in_flight),
            "driver_bytes": int(self.driver_bytes),
            "cache_bytes_per_worker": int(self.cache_bytes),
            "peak_bytes_per_worker": int(2 * (self.tile_bytes + self.accumulator_bytes)) if self.method is None
            else int(2 * self.tile_bytes + self.cache_bytes + self.result_bytes),
            "partial_chunk_reads": bool(self.partial_chunk_reads),
            "in_memory": bool(self.in_memory),
            "matrix_bytes": int(self.matrix_bytes),
        }


@dataclass(frozen=True)
class Baseline:
    """The part of ``memory_bytes`` the run's processes hold before the pass (module docstring)."""

    bytes: int
    label: str
    memory: int

    @property
    def available(self) -> int:
        return self.memory - self.bytes

    def phrase(self, *, budget: bool = True) -> str:
        who = self.label or "the processes of the run"
        verb = "uses" if who == "this process" else "use"
        return (f"{who} already {verb} {_mib(self.bytes)}"
                + (f" of compress.memory {_mib(self.memory)}" if budget else ""))

    def threads_hint(self, shared_memory: bool) -> str:
        """What else helps when worker processes' own interpreters are part of the baseline."""
        return "" if shared_memory or not self.bytes else " or use cluster kind 'threads' (one process for all workers)"
