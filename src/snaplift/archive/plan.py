"""A first tile planner: whole fields by blocks of snapshots aligned to stored chunks.

A tile is *(all points of one field) x (one block of snapshots)*. Blocks are shared by
all requested fields (the snapshot matrix stacks the fields' points) and are a whole
multiple of every field's stored snapshot chunk, so each stored chunk is read whole
and exactly once. The block is as long as the memory budget allows.

Memory model (estimates, in bytes; ``s`` = 8 for real, 16 for complex fields, ``n`` =
points of the field, ``b`` = snapshots per block, ``k`` = ``sketch_width``):

- tile: ``n * b * s`` (the decoded double-precision tile);
- accumulators: ``s * k * (2 * n + 2 * b)`` -- the field's rows of the range sketch
  ``X Omega`` (``n x k``), its rows of the co-range test matrix (``k x n``), the block
  of ``Omega`` (``b x k``) and the block's share of the co-range sketch (``k x b``);
- each worker must fit ``tile + accumulators`` in ``memory_bytes / (2 * workers)``; the
  factor 2 leaves room for the raw read buffer and the copy the decoding makes.

``peak_bytes_estimate = 2 * workers * (tile + accumulators)`` of the largest field.

Seam for row (point) blocking: ``point_blocks`` holds, per field, the point ranges of
its tiles; this planner always gives one range covering the whole field. A later
planner that splits rows (for fields too tall for one tile) fills it with several
ranges aligned to the grid chunks and keeps the same ``tiles()`` iteration.
"""

from __future__ import annotations

import math
from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from snaplift.archive._base import ArchiveInfo
from snaplift.archive._common import missing_field_error
from snaplift.errors import ArchiveError

__all__ = ["TilePlan", "Tile", "plan_tiles"]

_MIB = 2.0**20


def _mib(nbytes: float) -> str:
    return f"{nbytes / _MIB:.1f} MiB"


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
        ``2 * workers * (tile_bytes + accumulator_bytes)``; at most ``memory_bytes``.
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

    @property
    def n_points(self) -> int:
        """Rows of the stacked snapshot matrix."""
        return int(sum(self.field_points))

    @property
    def n_tiles(self) -> int:
        return len(self.snapshot_blocks) * sum(len(blocks) for blocks in self.point_blocks)

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
            "memory_per_tile_bytes": int(2 * (self.tile_bytes + self.accumulator_bytes)),
            "peak_bytes_estimate": int(self.peak_bytes_estimate),
            "memory_bytes": int(self.memory_bytes),
            "workers": int(self.workers),
            "sketch_width": int(self.sketch_width),
            "row_blocking": "none (one point block per field)",
        }


def _accumulator_bytes(points: int, block: int, width: int, itemsize: int) -> int:
    return itemsize * width * (2 * points + 2 * block)


def plan_tiles(
    info: ArchiveInfo,
    fields: Sequence[str],
    *,
    memory_bytes: int,
    sketch_width: int = 50,
    workers: int = 1,
) -> TilePlan:
    """Plan tiles of whole fields by snapshot blocks that fit a memory budget.

    Parameters
    ----------
    info
        ``reader.describe()``.
    fields
        Fields to read, in stacking order; their snapshot counts must agree.
    memory_bytes
        Budget for all workers together (``compress.memory`` of the workflow).
    sketch_width
        Columns of the sketches accumulated next to each tile.
    workers
        Tiles processed at the same time.

    Returns
    -------
    TilePlan

    Raises
    ------
    ArchiveError
        If one stored snapshot chunk of the largest field does not fit, with the numbers
        and the budget that would.

    Examples
    --------
    >>> plan = plan_tiles(reader.describe(), ["u", "p"], memory_bytes=2**30)  # doctest: +SKIP
    >>> plan.snapshot_blocks[:2]                                               # doctest: +SKIP
    ((0, 64), (64, 128))
    """
    names = tuple(str(f) for f in fields)
    if not names:
        raise ArchiveError(f"tile plan for {info.path}: no fields requested")
    if memory_bytes <= 0 or workers < 1 or sketch_width < 0:
        raise ArchiveError(
            f"tile plan for {info.path}: memory_bytes must be > 0, workers >= 1 and "
            f"sketch_width >= 0; got {memory_bytes}, {workers}, {sketch_width}"
        )
    for name in names:
        if name not in info.fields:
            raise missing_field_error(name, info.path, list(info.fields))
    chosen = [info.fields[n] for n in names]
    counts = {f.name: f.n_snapshots for f in chosen}
    if len(set(counts.values())) != 1:
        listing = ", ".join(f"{n}: {c}" for n, c in counts.items())
        raise ArchiveError(
            f"fields of {info.path} to stack must have the same number of snapshots; "
            f"got {listing}"
        )
    n_snapshots = chosen[0].n_snapshots
    chunks = [max(1, min(f.snapshot_chunk, n_snapshots)) for f in chosen]
    unit = math.lcm(*chunks) if chunks else 1
    budget = memory_bytes // (2 * workers)
    itemsizes = [np.dtype(f.dtype).itemsize for f in chosen]

    def need(block: int) -> tuple[int, int, str]:
        """Largest (tile, accumulators) over fields for a block, and that field."""
        worst = (0, 0, names[0])
        for f, s in zip(chosen, itemsizes, strict=True):
            tile = f.n_points * block * s
            acc = _accumulator_bytes(f.n_points, block, sketch_width, s)
            if tile + acc > worst[0] + worst[1]:
                worst = (tile, acc, f.name)
        return worst

    first = min(unit, n_snapshots) if n_snapshots else 0
    tile, acc, worst_field = need(max(first, 1))
    if tile + acc > budget:
        f = info.fields[worst_field]
        chunk_note = (
            f"{unit} snapshots (the least common multiple of the stored snapshot chunks "
            f"{', '.join(f'{n}: {c}' for n, c in zip(names, chunks, strict=True))})"
            if len(set(chunks)) > 1
            else f"{unit} snapshots"
        )
        required = 2 * workers * (tile + acc)
        raise ArchiveError(
            f"tile plan for {info.path}: one stored snapshot chunk of field '{worst_field}' "
            f"({chunk_note} x {f.n_points} points) needs {_mib(tile)} for the tile plus "
            f"{_mib(acc)} of sketch accumulators (width {sketch_width}), but the budget "
            f"per worker is memory / (2 x workers) = {_mib(budget)} (memory "
            f"{_mib(memory_bytes)}, {workers} workers); raise compress.memory to at least "
            f"{required} bytes ({_mib(required)}) or use fewer workers"
        )
    # the largest multiple of the unit that fits; need() is increasing in the block
    if n_snapshots == 0:
        block = 0
    else:
        multiples = max(1, math.ceil(n_snapshots / unit))
        low, high = 1, multiples
        while low < high:
            mid = (low + high + 1) // 2
            t, a, _ = need(min(mid * unit, n_snapshots))
            if t + a <= budget:
                low = mid
            else:
                high = mid - 1
        block = min(low * unit, n_snapshots)
    blocks = tuple(
        (start, min(start + block, n_snapshots)) for start in range(0, n_snapshots, block or 1)
    ) if block else ()
    tile, acc, _ = need(block)
    point_blocks = tuple(((0, f.n_points),) for f in chosen)
    bytes_to_read = sum(
        f.n_points * f.n_snapshots * np.dtype(f.stored_dtype).itemsize for f in chosen
    )
    return TilePlan(
        fields=names,
        n_snapshots=n_snapshots,
        field_points=tuple(f.n_points for f in chosen),
        chunk=unit,
        block=block,
        snapshot_blocks=blocks,
        point_blocks=point_blocks,
        bytes_to_read=int(bytes_to_read),
        tile_bytes=int(tile),
        accumulator_bytes=int(acc),
        peak_bytes_estimate=int(2 * workers * (tile + acc)),
        memory_bytes=int(memory_bytes),
        workers=int(workers),
        sketch_width=int(sketch_width),
    )
