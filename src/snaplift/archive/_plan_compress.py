"""The compress memory model of the tile planner (:mod:`snaplift.archive.plan`, module docstring).

The method's widths, passes and the driver's and cache's memory terms come from
:data:`snaplift.compress_methods.METHODS`; this module adds the tiles, the results in
flight and, for a method whose tiles hold every snapshot (``tsqr``), the R factors of the
leaves.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from typing import Any

import numpy as np

from snaplift.archive._base import ArchiveInfo
from snaplift.archive._tileplan import (
    IN_MEMORY_FACTOR,
    TILES_PER_WORKER,
    TSQR_MERGE_COPIES,
    Baseline,
    TilePlan,
    _mib,
)
from snaplift.compress_methods import METHODS
from snaplift.errors import ArchiveError

__all__ = ["plan_compress_tiles"]


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


def plan_compress_tiles(info: ArchiveInfo, names: tuple[str, ...], chosen: list[Any], *, memory_bytes: int,
                   workers: int, in_flight: int, method: str, rank: int, widths: tuple[int, int],
                   passes: int, shared_memory: bool = False, corange_map: str = "sparse",
                   baseline: Baseline | None = None, row_groups: Sequence[Sequence[int]] | None = None,
                   in_memory_limit: int = 0) -> TilePlan:
    """The compress memory model of the module docstring; see :func:`plan_tiles`."""
    if workers < 1 or in_flight < 1 or memory_bytes <= 0:
        raise ArchiveError(f"tile plan for {info.path}: memory, workers and in_flight must be positive")
    baseline = baseline or Baseline(0, "", memory_bytes)
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
    terms = METHODS[method]
    # the co-range state: l columns per field, or the field's own rows when it has no more
    # than l (kept whole: linalg.sketch.exact_layout), e.g. each lifted field of a probe
    corange_columns = sum(min(p, l) for p in points)
    cache = terms.cache_bytes(n=n, widths=widths, itemsize=s, corange_map=corange_map)
    fixed = terms.driver_bytes(n=n, m=m, corange_columns=corange_columns, rank=rank, widths=widths, itemsize=s,
                               cache=cache)
    whole_columns = terms.whole_columns

    def driver_of(rows: list[int]) -> int:
        """The driver's accumulators. tsqr's R factors by their actual size (a leaf of ``r``
        rows keeps ``min(r, m) x m``, together ``L``): kept as read and scaled by the field
        scales (``2 L``), and while the tree is reduced its last merge, whose stacked input,
        LAPACK copy and result are ``min(n, m) x m`` each (at most ``L``): measured,
        ``tests/archive/test_plan_lifted.py``."""
        if not whole_columns:
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
        if whole_columns:
            return max(sz * (sum(min(x, m) * m for x in leaves) + r * rank) for r, sz, leaves in units)
        # one co-range sketch per field of the tile, or its rows when it has no more than l
        if slots:
            return max(sz * (r + block * (k + sum(min(x, l) for x in leaves))) for r, sz, leaves in units)
        return max(sz * (r * k + block * (k + sum(min(x, l) for x in leaves))) for r, sz, leaves in units)

    # threads of one process sum range products in place in one slot per worker
    # (snaplift.stream._slots): results in flight are small, and the driver's finishing
    # arrays exist only after the pass, when no tile is held
    slotted = shared_memory and not whole_columns
    driver_pass = s * (2 * n * k + 2 * m * k + corange_columns * m + 2 * n)

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
        if not whole_columns:
            # worker processes: each holds an n x k array through a pass (its slot of range
            # products, or the scattered operand Q of an adjoint pass), and collecting the
            # slots brings one per worker to the driver beside its own (issue 11: measured
            # 611 MiB for a 531 MiB budget with cluster: local before these were counted)
            held = workers * s * n * k
            collect = s * ((workers + 1) * n * k + m * k + n)
            return workers * 2 * tile + caches + in_flight * result + held + max(driver, collect), tile, result
        return workers * 2 * tile + caches + in_flight * result + driver, tile, result

    matrix_bytes = s * n * m
    if in_memory_limit and matrix_bytes <= in_memory_limit:
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
    if whole_columns:
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
    blocks = _tapered_blocks(m, block, unit, workers) if block and not whole_columns else \
        (tuple((s0, min(s0 + block, m)) for s0 in range(0, m, block or 1)) if block else ())
    bytes_to_read = 0
    for f, b in zip(chosen, point_blocks):
        stored = f.n_points * f.n_snapshots * np.dtype(f.stored_dtype).itemsize
        # a compressed chunk cut by several row blocks is decompressed once per row block
        bytes_to_read += stored * (len(b) if len(b) > 1 and partial and _compressed(info, f) else 1)
    return TilePlan(
        fields=names, n_snapshots=m, field_points=tuple(points), chunk=unit if not whole_columns else m,
        block=block, snapshot_blocks=blocks, point_blocks=point_blocks, bytes_to_read=int(bytes_to_read),
        tile_bytes=int(tile), accumulator_bytes=int(driver), peak_bytes_estimate=int(peak + baseline.bytes),
        memory_bytes=int(memory_bytes), workers=int(workers), sketch_width=int(k + l), method=method,
        passes=int(passes), range_width=int(k), corange_width=int(l), in_flight=int(in_flight),
        driver_bytes=int(driver), cache_bytes=int(cache), result_bytes=int(result), partial_chunk_reads=partial,
        baseline_bytes=int(baseline.bytes), row_groups=groups, matrix_bytes=int(matrix_bytes),
    )


#: the last ``workers x block`` snapshots are read in tiles this many times smaller
TAIL_SPLIT = 4


def _tapered_blocks(m: int, block: int, unit: int, workers: int) -> tuple[tuple[int, int], ...]:
    """Snapshot blocks of ``block`` snapshots, the last ``workers x block`` of them split into
    blocks :data:`TAIL_SPLIT` times smaller (whole multiples of the stored chunk ``unit``).

    The arithmetic of the last tiles follows the last read with nothing left to overlap it:
    on the capped bench (8 tiles of 256 MiB, 2 workers) it was 0.58 s of the run, a quarter
    of that with the tail split (issue 16). Smaller tiles hold less memory, so the plan's
    peak still holds.
    """
    small = max(unit, (block // TAIL_SPLIT) // unit * unit)
    tail = workers * block
    if small >= block or m <= tail:
        return tuple((s0, min(s0 + block, m)) for s0 in range(0, m, block))
    # full blocks up to a chunk-aligned start of the tail, small blocks after it
    head = ((m - tail) // block) * block
    edges = list(range(0, head, block)) + list(range(head, m, small))
    return tuple((s0, min(s1, m)) for s0, s1 in zip(edges, edges[1:] + [m]))


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
