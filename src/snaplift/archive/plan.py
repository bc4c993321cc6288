"""The tile planner: stored chunks read whole and once, memory planned, not hoped for.

A tile is *(a block of one field's points) x (a block of snapshots)*. Snapshot blocks are
shared by all requested fields (the snapshot matrix stacks the fields' points) and are a
whole multiple of every field's stored snapshot chunk, so each stored chunk is read whole
and exactly once per pass; the block is as long as the memory budget allows. Time-major
archives (one chunk per snapshot or per few snapshots) are the common case: their tiles
are full-height, nothing is rechunked.

Two memory models, in bytes (``s`` = 8 for real, 16 for complex fields; ``n_t`` points of
the tile, ``b`` snapshots per block):

*Compress model* (``method`` given: ``sketch``, ``randomized`` or ``tsqr``), matching the
streaming loop of :mod:`snaplift.stream.loop` with ``k`` range and ``l`` co-range
widths (:func:`method_widths`):

- per tile being read: ``2 n_t b s`` (the decoded tile and the read/decoding buffer);
- per tile result waiting to be folded: ``s (n_t k + b (k + l))``;
- per worker: the cached row test matrix ``c`` (``sketch`` only; all rows, since a worker
  sees every row of a time-major archive): ``(12 zeta + 4) n`` bytes for the sparse sign map
  (``zeta = min(l, 8)`` int32 columns and float64 signs per row), ``s n l`` for a Gaussian one;
- driver accumulators: ``sketch`` ``s (2 n k + n r + F m l + n) + c`` (with its own copy of
  the row test matrix for finishing); ``randomized``
  ``s (3 n k + m k + n)``; ``tsqr`` ``s (n r + L m^2 + n)`` (``F`` fields, ``L`` leaves);
- ``peak = workers x (2 tile + cache) + in_flight x result + driver``, and for worker
  processes (not ``tsqr``) ``workers s n k`` more (each worker's slot of range products or
  copy of the operand ``Q``) with the driver at least ``s ((workers + 1) n k + m k + n)``
  (the slots collected beside its own accumulator); this
  must fit ``memory_bytes - baseline_bytes`` (below). When the workers are threads of one process
  (``shared_memory``) the cache is held once and range products are summed in place
  in one ``s n k`` slot per worker, so a result in flight is only ``s (n_t + b (k + l))``
  and the driver holds ``s (2 n k + 2 m k + F m l + 2 n)`` while tiles are read; its
  finishing arrays come after the pass: ``peak = max(workers x 2 tile + cache +
  workers s n k + in_flight x result + that, cache + driver)``. The snapshot block is the longest that fits, but
  short enough to give each worker :data:`TILES_PER_WORKER` blocks when the archive has
  enough stored chunks.

When not even one stored snapshot chunk at full height fits, rows are split into
blocks aligned to the grid's chunk rows (partial-chunk reads; for compressed chunks the
bytes decompressed are counted per row block). ``tsqr`` needs every snapshot of a row
block in one tile, so its tiles are row blocks x all snapshots.

*Legacy model* (``method=None``, the first planner's, kept for callers that plan
without a method): per worker ``tile + s k (2 n + 2 b)`` with ``k = sketch_width`` must fit
``(memory_bytes - baseline_bytes) / (2 workers)``; ``peak = 2 workers (tile + accumulators)``.

*The budget is for the whole process tree.* ``memory_bytes`` (``compress.memory``) bounds
the resident memory of every process of the run: this process (the driver, and under
dask's threaded scheduler also every worker), the worker processes of a distributed
cluster and their nannies. What those processes already hold before the pass, the
*baseline* (``baseline_bytes``: interpreters, imported numpy/dask/h5py, the scheduler, a
worker's own bookkeeping), is measured by the caller
(:func:`snaplift.cluster.resident_memory`, psutil RSS) and the tiles are planned in what
remains; none of the model's terms above is part of it (they are allocated by the pass,
and a finished compress releases its caches). So ``peak_bytes_estimate = baseline_bytes +
peak <= memory_bytes``, and the plan with baseline ``b`` under ``B`` is the plan with
baseline 0 under ``B - b``. Library callers that pass no baseline get the model alone
(``baseline_bytes = 0``): the tiles then fit ``memory_bytes`` but the processes come on top.

``point_blocks`` holds, per field, the point ranges of its tiles; ``tiles()`` iterates
block by block, fields in order.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from snaplift.archive._base import ArchiveInfo
from snaplift.archive._common import missing_field_error
from snaplift.errors import ArchiveError
from snaplift.units import format_bytes

__all__ = ["TilePlan", "Tile", "plan_tiles", "method_widths", "method_passes", "row_map_bytes"]

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
#: nonzeros per row of the sparse sign co-range map (``linalg._testmatrix.SPARSE_NONZEROS``;
#: tests/linalg/test_sketch_maps.py holds the model to the map's own ``nbytes``)
SPARSE_MAP_NONZEROS = 8


def row_map_bytes(kind: str, rows: int, width: int, itemsize: int = 8) -> int:
    """Bytes a process keeps for ``rows`` rows of a co-range row map of this kind."""
    if kind == "sparse":  # int32 column + float64 sign per nonzero, an int32 column pointer per row
        return int(rows) * (max(1, min(int(width), SPARSE_MAP_NONZEROS)) * (4 + 8) + 4)
    return int(rows) * int(width) * int(itemsize)


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
class _Baseline:
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


def _accumulator_bytes(points: int, block: int, width: int, itemsize: int) -> int:
    return itemsize * width * (2 * points + 2 * block)


def method_widths(method: str, rank: int, *, oversample: int = 10,
                  sketch_widths: tuple[int, int] | None = None) -> tuple[int, int]:
    """Range and co-range widths ``(k, l)`` a compress method accumulates next to each tile.

    ``sketch``: ``(2r + 1, 2k + 1)`` (Tropp et al. 2017) unless given; ``randomized``:
    ``(r + oversample, 0)`` (Halko et al. 2011); ``tsqr``: ``(0, 0)``.
    """
    if method == "sketch":
        if sketch_widths is not None:
            return int(sketch_widths[0]), int(sketch_widths[1])
        k = 2 * int(rank) + 1
        return k, 2 * k + 1
    if method == "randomized":
        return int(rank) + int(oversample), 0
    if method == "tsqr":
        return 0, 0
    raise ArchiveError(f"compress.method {method!r} is not one of sketch, randomized, tsqr")


def method_passes(method: str, *, power_iterations: int = 1, check_pass: bool = False) -> int:
    """Reads of the archive: sketch 1 (+1 check pass), randomized 2 + 2q, tsqr 2."""
    if method == "sketch":
        return 2 if check_pass else 1
    if method == "randomized":
        return 2 + 2 * int(power_iterations)
    return 2


def plan_tiles(
    info: ArchiveInfo,
    fields: Sequence[str],
    *,
    memory_bytes: int,
    sketch_width: int = 50,
    workers: int = 1,
    method: str | None = None,
    rank: int = 40,
    oversample: int = 10,
    power_iterations: int = 1,
    check_pass: bool = False,
    sketch_widths: tuple[int, int] | None = None,
    in_flight: int | None = None,
    shared_memory: bool = False,
    corange_map: str = "sparse",
    baseline_bytes: int = 0,
    baseline_label: str = "",
    row_groups: Sequence[Sequence[int]] | None = None,
    in_memory_limit: int = 0,
) -> TilePlan:
    """Plan tiles aligned to stored chunks that fit a memory budget.

    Without ``method`` this is the first planner's legacy model (whole fields by
    snapshot blocks, see the module docstring); with ``method`` the compress model of
    the streaming loop, with row blocks when a full-height chunk does not fit and
    row-block x all-snapshot tiles for ``tsqr``.

    Parameters
    ----------
    info
        ``reader.describe()``.
    fields
        Fields to read, in stacking order; their snapshot counts must agree.
    memory_bytes
        Budget for the whole process tree of the run (``compress.memory`` of the
        workflow): driver, workers and nannies together, ``baseline_bytes`` included.
    sketch_width
        Columns of the sketches accumulated next to each tile.
    workers
        Tiles processed at the same time.
    method, rank, oversample, power_iterations, check_pass, sketch_widths
        The compress settings (``compress`` section of the workflow).
    in_flight
        Tile tasks outstanding (default ``workers + 1``).
    shared_memory
        Workers are threads of one process (dask's threaded scheduler): the cached row
        test matrix is held once, not once per worker.
    corange_map
        ``sketch``'s co-range test matrix, "sparse" (``12 zeta + 4`` bytes per row kept) or
        "gaussian" (``s l`` bytes per row).
    baseline_bytes
        Resident memory the run's processes hold before the pass (measured, e.g.
        :func:`snaplift.cluster.resident_memory`); tiles are planned in ``memory_bytes -
        baseline_bytes``. 0 (the default) plans the model alone.
    baseline_label
        Which processes the baseline is, for the error message (e.g. "2 worker processes,
        2 nannies and this process").
    row_groups
        Fields (indices into ``fields``) whose rows one tile stacks when each fits at full
        height: the lifted fields of one archive field (delay copies, pointwise terms),
        read once into one buffer. Their tile is counted by its actual size (the sum of
        their rows); default: each field alone.
    in_memory_limit
        The in-memory path (compress model only): when the whole decoded snapshot matrix
        is at most this many bytes and :data:`IN_MEMORY_FACTOR` times it plus the method's
        accumulators fits the budget, the plan is one tile of everything, read once and
        kept for every pass. 0 (the default) never plans it.

    Returns
    -------
    TilePlan

    Raises
    ------
    ArchiveError
        If one stored snapshot chunk of the largest field does not fit, with the numbers
        and the budget that would; if the baseline leaves no room, with the baseline.

    Examples
    --------
    >>> plan = plan_tiles(reader.describe(), ["u", "p"], memory_bytes=2**30)  # doctest: +SKIP
    >>> plan.snapshot_blocks[:2]                                               # doctest: +SKIP
    ((0, 64), (64, 128))
    """
    names = tuple(str(f) for f in fields)
    if not names:
        raise ArchiveError(f"tile plan for {info.path}: no fields requested")
    if memory_bytes <= 0 or workers < 1 or sketch_width < 0 or baseline_bytes < 0:
        raise ArchiveError(
            f"tile plan for {info.path}: memory_bytes must be > 0, workers >= 1, "
            f"sketch_width >= 0 and baseline_bytes >= 0; got {memory_bytes}, {workers}, {sketch_width}, "
            f"{baseline_bytes}"
        )
    baseline = _Baseline(int(baseline_bytes), baseline_label, int(memory_bytes))
    if baseline.bytes and baseline.available <= 0:
        raise ArchiveError(f"tile plan for {info.path}: {baseline.phrase()}; raise compress.memory"
                           + baseline.threads_hint(shared_memory))
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
    if method is not None:
        return _plan_compress(info, names, chosen, memory_bytes=int(memory_bytes), workers=int(workers),
                              in_flight=int(in_flight or workers + 1), method=method, rank=int(rank),
                              widths=method_widths(method, rank, oversample=oversample, sketch_widths=sketch_widths),
                              passes=method_passes(method, power_iterations=power_iterations,
                                                   check_pass=check_pass), shared_memory=shared_memory,
                              corange_map=corange_map, baseline=baseline, row_groups=row_groups,
                              in_memory_limit=int(in_memory_limit))
    chunks = [max(1, min(f.snapshot_chunk, n_snapshots)) for f in chosen]
    unit = math.lcm(*chunks) if chunks else 1
    budget = baseline.available // (2 * workers)
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
        required = 2 * workers * (tile + acc) + baseline.bytes
        memory_note = (f"memory {_mib(memory_bytes)}" if not baseline.bytes
                       else f"of compress.memory {_mib(memory_bytes)}, {baseline.phrase(budget=False)}")
        raise ArchiveError(
            f"tile plan for {info.path}: one stored snapshot chunk of field '{worst_field}' "
            f"({chunk_note} x {f.n_points} points) needs {_mib(tile)} for the tile plus "
            f"{_mib(acc)} of sketch accumulators (width {sketch_width}), but the budget "
            f"per worker is {'memory' if not baseline.bytes else 'what remains'} / (2 x workers) = {_mib(budget)} "
            f"({memory_note}, {workers} workers); raise compress.memory to at least "
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
        peak_bytes_estimate=int(2 * workers * (tile + acc) + baseline.bytes),
        memory_bytes=int(memory_bytes),
        workers=int(workers),
        sketch_width=int(sketch_width),
        baseline_bytes=baseline.bytes,
    )


def _row_unit(f: Any) -> tuple[int, int]:
    """(points per whole chunk row block, points per grid row) of a field, flattened in C order."""
    grid = f.grid
    if not grid:
        return 1, 1
    trailing = int(np.prod(grid[1:], dtype=np.int64)) if len(grid) > 1 else 1
    first = int(f.chunks[1]) if f.chunks and len(f.chunks) > 1 else int(grid[0])
    return max(1, min(first, grid[0]) * trailing), max(1, trailing)


def _compressed(info: ArchiveInfo, f: Any) -> bool:
    return bool(f.attrs.get("compression")) or info.format.startswith("zarr")


def _plan_compress(info: ArchiveInfo, names: tuple[str, ...], chosen: list[Any], *, memory_bytes: int,
                   workers: int, in_flight: int, method: str, rank: int, widths: tuple[int, int],
                   passes: int, shared_memory: bool = False, corange_map: str = "sparse",
                   baseline: _Baseline | None = None, row_groups: Sequence[Sequence[int]] | None = None,
                   in_memory_limit: int = 0) -> TilePlan:
    """The compress memory model of the module docstring; see :func:`plan_tiles`."""
    if workers < 1 or in_flight < 1 or memory_bytes <= 0:
        raise ArchiveError(f"tile plan for {info.path}: memory, workers and in_flight must be positive")
    baseline = baseline or _Baseline(0, "", memory_bytes)
    # the tiles, caches and accumulators fit in what the processes do not already hold
    available = baseline.available
    m = chosen[0].n_snapshots
    k, l = widths
    itemsizes = [np.dtype(f.dtype).itemsize for f in chosen]
    s = max(itemsizes)
    points = [f.n_points for f in chosen]
    n = int(sum(points))
    chunks = [max(1, min(f.snapshot_chunk, max(m, 1))) for f in chosen]
    unit = math.lcm(*chunks) if chunks else 1
    groups = _groups(row_groups, len(chosen))
    if method == "sketch":
        # the driver regenerates the row test matrix to form Psi Q when the sketch is finished
        cache = row_map_bytes(corange_map, n, l, s)
        fixed = s * (2 * n * k + n * rank + len(chosen) * m * l + n) + cache
    elif method == "randomized":
        fixed = s * (3 * n * k + m * k + n)
        cache = 0
    else:
        fixed = s * (n * rank + n)
        cache = 0

    def driver_of(rows: list[int]) -> int:
        """The driver's accumulators. tsqr's R factors by their actual size (a leaf of ``r``
        rows keeps ``min(r, m) x m``, together ``L``): kept as read and scaled by the field
        scales (``2 L``), and while the tree is reduced its last merge, whose stacked input,
        LAPACK copy and result are ``min(n, m) x m`` each (at most ``L``): measured,
        ``tests/archive/test_plan_lifted.py``."""
        if method != "tsqr":
            return fixed
        leaves = sum(math.ceil(p / r) * min(r, m) * m for p, r in zip(points, rows))
        return fixed + s * (2 * leaves + TSQR_MERGE_COPIES * min(leaves, min(n, m) * m))

    def rows_of(cap: int) -> list[int]:
        out = []
        for f in chosen:
            whole, grid_row = _row_unit(f)
            if cap >= f.n_points:
                out.append(f.n_points)
                continue
            step = whole if whole <= cap else grid_row
            out.append(max(step, (cap // step) * step) if cap >= step else grid_row)
        return out

    def units_of(rows: list[int]) -> list[tuple[int, int, list[int]]]:
        """Tiles as (rows, itemsize, rows of each field in it): a group of lifted fields at
        full height is one tile of all their rows."""
        out = []
        for group in groups:
            if len(group) > 1 and all(rows[i] >= points[i] for i in group):
                out.append((sum(points[i] for i in group), max(itemsizes[i] for i in group),
                            [points[i] for i in group]))
            else:
                out.extend((rows[i], itemsizes[i], [rows[i]]) for i in group)
        return out

    def result_of(units: list[tuple[int, int, list[int]]], block: int, *, slots: bool) -> int:
        if method == "tsqr":
            return max(sz * (sum(min(x, m) * m for x in leaves) + r * rank) for r, sz, leaves in units)
        if slots:  # one co-range sketch per field of the tile
            return max(sz * (r + block * (k + l * len(leaves))) for r, sz, leaves in units)
        return max(sz * (r * k + block * (k + l * len(leaves))) for r, sz, leaves in units)

    # threads of one process sum range products in place in one slot per worker
    # (snaplift.stream._slots): results in flight are small, and the driver's finishing
    # arrays exist only after the pass, when no tile is held
    slotted = shared_memory and method != "tsqr"
    driver_pass = s * (2 * n * k + 2 * m * k + len(chosen) * m * l + 2 * n)

    def cost(cap: int, block: int) -> tuple[int, int, int]:
        rows = rows_of(cap)
        units = units_of(rows)
        tile = max(r * block * sz for r, sz, _ in units)
        result = result_of(units, block, slots=slotted)
        driver = driver_of(rows)
        caches = cache if shared_memory else workers * cache
        if slotted:
            during = workers * 2 * tile + caches + workers * s * n * k + in_flight * result + driver_pass
            return max(during, cache + driver), tile, result
        if method != "tsqr":
            # worker processes: each holds an n x k array through a pass (its slot of range
            # products, or the scattered operand Q of an adjoint pass), and collecting the
            # slots brings one per worker to the driver beside its own (issue 11: measured
            # 611 MiB for a 531 MiB budget with cluster: local before these were counted)
            held = workers * s * n * k
            collect = s * ((workers + 1) * n * k + m * k + n)
            return workers * 2 * tile + caches + in_flight * result + held + max(driver, collect), tile, result
        return workers * 2 * tile + caches + in_flight * result + driver, tile, result

    matrix_bytes = s * n * m
    # sketch keeps one co-range sketch per field (F m l): with many small (lifted) fields they
    # outweigh the matrix, and holding the tile's copy of them beside the accumulators
    # (in memory) costs more than it saves (measured: 1.9 GB against 1.1 GB streamed for 120
    # lifted probe rows)
    corange_heavy = method == "sketch" and len(chosen) * m * l > 4 * n * m
    if in_memory_limit and matrix_bytes <= in_memory_limit and not corange_heavy:
        # one tile of everything, kept: the read buffer, the kept copy and a working copy,
        # the method's accumulators and the tile's result
        whole = [int(p) for p in points]
        result = result_of([(n, s, whole)], m, slots=False)
        peak = IN_MEMORY_FACTOR * matrix_bytes + driver_of(whole) + result + cache
        if peak <= available:
            return TilePlan(
                fields=names, n_snapshots=m, field_points=tuple(points), chunk=m, block=m,
                snapshot_blocks=((0, m),) if m else (), point_blocks=tuple(((0, p),) for p in points),
                bytes_to_read=int(sum(f.n_points * f.n_snapshots * np.dtype(f.stored_dtype).itemsize
                                      for f in chosen)),
                tile_bytes=int(matrix_bytes), accumulator_bytes=int(driver_of(whole)),
                peak_bytes_estimate=int(peak + baseline.bytes), memory_bytes=int(memory_bytes), workers=1,
                sketch_width=int(k + l), method=method, passes=int(passes), range_width=int(k),
                corange_width=int(l), in_flight=1, driver_bytes=int(driver_of(whole)), cache_bytes=int(cache),
                result_bytes=int(result), baseline_bytes=int(baseline.bytes), in_memory=True,
                row_groups=groups, matrix_bytes=int(matrix_bytes))

    full = max(points)
    if method == "tsqr":
        block = m
        cap = full
        if cost(cap, block)[0] > available:
            # taller leaves mean larger tiles but fewer R factors: the memory is not monotone
            # in the height, so try heights on a geometric grid and keep the tallest that fits
            heights = sorted({max(1, int(full / 1.25**i)) for i in range(200)} | {1})
            fitting = [h for h in heights if cost(h, block)[0] <= available]
            cap = fitting[-1] if fitting else min(heights, key=lambda h: cost(h, block)[0])
    else:
        cap = full
        first = min(unit, m) if m else 1
        if cost(cap, max(first, 1))[0] <= available:
            multiples = max(1, math.ceil(m / unit))
            low = _largest(lambda n: cost(cap, min(n * unit, m))[0] <= available, multiples)
            # keep every worker busy: at least TILES_PER_WORKER tiles each when the archive allows
            target = math.ceil(max(m, 1) / (TILES_PER_WORKER * workers))
            block = min(low * unit, max(unit, math.ceil(target / unit) * unit), m)
        else:
            block = max(first, 1)
            cap = _largest(lambda rows: cost(rows, block)[0] <= available, full)
    peak, tile, result = cost(cap, block)
    driver = driver_of(rows_of(cap))
    if peak > available:
        budget_note = (f"compress.memory is {_mib(memory_bytes)}" if not baseline.bytes
                       else f"{baseline.phrase()}, leaving {_mib(available)}")
        raise ArchiveError(
            f"tile plan for {info.path}: compress.method {method!r} needs at least {peak} bytes "
            f"({_mib(peak)}) for its smallest tiles ({block} snapshots x {min(rows_of(cap))} points) with "
            f"{workers} workers, {in_flight} tiles in flight and {_mib(driver)} of accumulators, but "
            f"{budget_note}; raise compress.memory to at least {peak + baseline.bytes} bytes"
            f"{baseline.threads_hint(shared_memory)} or use fewer workers"
        )
    rows = rows_of(cap)
    point_blocks = tuple(tuple((p0, min(p0 + r, f.n_points)) for p0 in range(0, f.n_points, r))
                         for f, r in zip(chosen, rows))
    partial = any(len(b) > 1 and (r % _row_unit(f)[0] != 0 or _row_unit(f)[0] >= f.n_points)
                  for b, r, f in zip(point_blocks, rows, chosen))
    blocks = tuple((s0, min(s0 + block, m)) for s0 in range(0, m, block or 1)) if block else ()
    bytes_to_read = 0
    for f, b in zip(chosen, point_blocks):
        stored = f.n_points * f.n_snapshots * np.dtype(f.stored_dtype).itemsize
        # a compressed chunk cut by several row blocks is decompressed once per row block
        bytes_to_read += stored * (len(b) if len(b) > 1 and partial and _compressed(info, f) else 1)
    return TilePlan(
        fields=names, n_snapshots=m, field_points=tuple(points), chunk=unit if method != "tsqr" else m,
        block=block, snapshot_blocks=blocks, point_blocks=point_blocks, bytes_to_read=int(bytes_to_read),
        tile_bytes=int(tile), accumulator_bytes=int(driver), peak_bytes_estimate=int(peak + baseline.bytes),
        memory_bytes=int(memory_bytes), workers=int(workers), sketch_width=int(k + l), method=method,
        passes=int(passes), range_width=int(k), corange_width=int(l), in_flight=int(in_flight),
        driver_bytes=int(driver), cache_bytes=int(cache), result_bytes=int(result), partial_chunk_reads=partial,
        baseline_bytes=int(baseline.bytes), row_groups=groups, matrix_bytes=int(matrix_bytes),
    )


def _groups(row_groups: Sequence[Sequence[int]] | None, count: int) -> tuple[tuple[int, ...], ...]:
    """``row_groups`` checked (each field in exactly one group), default one group per field."""
    if not row_groups:
        return tuple((i,) for i in range(count))
    groups = tuple(tuple(int(i) for i in group) for group in row_groups)
    if sorted(i for group in groups for i in group) != list(range(count)):
        raise ArchiveError(f"tile plan: row_groups {groups} must hold each of the {count} fields exactly once")
    return groups


def _largest(fits: Callable[[int], bool], high: int) -> int:
    """Largest n in 1..high with ``fits(n)`` (fits is monotone); 1 if none fits."""
    low = 1
    while low < high:
        mid = (low + high + 1) // 2
        if fits(mid):
            low = mid
        else:
            high = mid - 1
    return low
