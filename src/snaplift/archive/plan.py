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

- per tile being read: ``2 n_t b s`` (the decoded tile and the read/decoding buffer, or for a
  plain tile the next one read ahead while it is multiplied: ``stream/_prefetch.py``);
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
from collections.abc import Sequence

import numpy as np

from snaplift.archive._base import ArchiveInfo
from snaplift.archive._common import missing_field_error
from snaplift.archive._plan_compress import plan_compress_tiles
from snaplift.archive._tileplan import (
    IN_MEMORY_FACTOR,
    IN_MEMORY_LIMIT,
    TILES_PER_WORKER,
    TSQR_MERGE_COPIES,
    Baseline,
    Tile,
    TilePlan,
    _mib,
)
from snaplift.compress_methods import get_method, row_map_bytes
from snaplift.errors import ArchiveError

__all__ = ["IN_MEMORY_FACTOR", "IN_MEMORY_LIMIT", "TILES_PER_WORKER", "TSQR_MERGE_COPIES", "Tile", "TilePlan",
           "method_passes", "method_widths", "plan_tiles", "row_map_bytes"]


def _accumulator_bytes(points: int, block: int, width: int, itemsize: int) -> int:
    return itemsize * width * (2 * points + 2 * block)


def method_widths(method: str, rank: int, *, oversample: int = 10,
                  sketch_widths: tuple[int, int] | None = None) -> tuple[int, int]:
    """Range and co-range widths ``(k, l)`` a compress method accumulates next to each tile
    (:data:`snaplift.compress_methods.METHODS`): ``sketch`` ``(2r + 1, 2k + 1)`` (Tropp et al.
    2017) unless given, ``randomized`` ``(r + oversample, 0)`` (Halko et al. 2011), ``tsqr`` ``(0, 0)``."""
    return get_method(method).widths(rank, oversample=oversample, sketch_widths=sketch_widths)


def method_passes(method: str, *, power_iterations: int = 1, check_pass: bool = False) -> int:
    """Reads of the archive: sketch 1 (+1 check pass), randomized 2 + 2q, tsqr 2."""
    return get_method(method).passes(power_iterations=power_iterations, check_pass=check_pass)


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
    baseline = Baseline(int(baseline_bytes), baseline_label, int(memory_bytes))
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
        return plan_compress_tiles(info, names, chosen, memory_bytes=int(memory_bytes), workers=int(workers),
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
