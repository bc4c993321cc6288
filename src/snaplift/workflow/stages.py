"""The stages of a workflow as functions of plain values.

``scan`` -> ``compress`` -> ``fit`` -> ``modes``; each takes the validated settings and
the previous stage's result and returns a frozen record. None of them writes: the runner
(:mod:`snaplift.workflow.runner`) owns the scheduler and the result store.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from snaplift.archive import Reader, check_times, open_archive, plan_tiles, snapshot_times
from snaplift.archive.matrix import SnapshotMatrix, build_snapshot_matrix
from snaplift.cluster import Scheduler
from snaplift.errors import ArchiveError, FieldNotFoundError, FitError, TimeSpacingError
from snaplift.fitting import DMDFit, fit_dmd
from snaplift.linalg.randomized import LowRank, randomized_svd, gaussian_map
from snaplift.prepare import Preparation, corrected_sketch, finish_preparation, first_pass, prepared_matrix
from snaplift.workflow.schema import Workflow, parse_bytes, resolve_path

__all__ = ["Scanned", "Compressed", "scan_stage", "compress_stage", "fit_stage", "TIME_RTOL"]

#: relative tolerance on the spread of time steps before spacing counts as non-uniform
#: (common practice: a 0.1 % jitter in dt shifts frequencies by about as much)
TIME_RTOL = 1e-3


@dataclass(frozen=True)
class Scanned:
    reader: Reader
    snapshot_index: np.ndarray
    time: np.ndarray
    dt: float
    snapshot_block: int
    memory_bytes: int
    warnings: tuple[str, ...] = ()


@dataclass(frozen=True)
class Compressed:
    matrix: SnapshotMatrix
    preparation: Preparation
    lowrank: LowRank
    passes: int
    bytes_read: int


def scan_stage(workflow: Workflow, folder: Path, scheduler: Scheduler) -> Scanned:
    """Open the archive, select snapshots, check times, plan tiles. Reads metadata only."""
    section = workflow.archive
    reader = open_archive(resolve_path(folder, section.path), format=section.format)
    info = reader.describe()
    for name in section.fields:
        if name not in info.fields:
            raise FieldNotFoundError(
                f"archive field '{name}' not found in {reader.path}; fields present: "
                f"{', '.join(sorted(info.fields)) or '(none)'}"
            )
    total = info.fields[section.fields[0]].n_snapshots
    stop = min(section.snapshots.stop or total, total)
    index = np.arange(section.snapshots.start, stop, section.snapshots.every, dtype=np.int64)
    if index.size < 3:
        raise ArchiveError(
            f"{reader.path}: archive.snapshots selects {index.size} snapshot(s) of {total}; at least 3 are needed"
        )
    all_times = snapshot_times(reader, time=section.time, step=section.step, n_snapshots=total)
    times = np.asarray(all_times, dtype=np.float64)[index]
    spacing = check_times(times, rtol=TIME_RTOL)
    if not spacing.increasing:
        bad = int(np.flatnonzero(np.diff(times) <= 0)[0])
        raise TimeSpacingError(
            f"{reader.path}: snapshot times must increase; time[{index[bad + 1]}] = {times[bad + 1]} "
            f"follows time[{index[bad]}] = {times[bad]}"
        )
    if not spacing.uniform:
        gap = spacing.worst_gap_index
        raise TimeSpacingError(
            f"{reader.path}: snapshot times are not uniformly spaced (median step {spacing.dt:.6g}, "
            f"tolerance {TIME_RTOL:g} relative); worst gap {spacing.worst_gap_value:.6g} between snapshots "
            f"{index[gap]} and {index[gap + 1]}; DMD needs a fixed step: select a uniform range with "
            "archive.snapshots"
        )
    dt = float(spacing.dt)
    memory = parse_bytes(workflow.compress.memory) if workflow.compress.memory else scheduler.memory_per_worker
    width = workflow.compress.rank + workflow.compress.oversample
    plan = plan_tiles(info, list(section.fields), memory_bytes=memory, sketch_width=width,
                      workers=scheduler.workers)
    block = plan.snapshot_blocks[0][1] - plan.snapshot_blocks[0][0]
    # tiles are planned over archive snapshots; with 'every' a tile holds block/every selected ones
    snapshot_block = max(1, block // section.snapshots.every)
    return Scanned(reader, index, times, dt, snapshot_block, memory)


def _bytes_per_pass(matrix: SnapshotMatrix) -> int:
    info = matrix.reader.describe()
    total = 0
    for c0, c1 in matrix.blocks:
        span = int(matrix.snapshot_index[c1 - 1] - matrix.snapshot_index[c0] + 1)
        for rows in matrix.fields:
            f = info.fields[rows.name]
            total += span * f.n_points * f.stored_dtype.itemsize
    return total


def compress_stage(workflow: Workflow, scanned: Scanned, scheduler: Scheduler) -> Compressed:
    """Randomized SVD of the prepared snapshot matrix; statistics from the first read."""
    section = workflow.archive
    matrix = build_snapshot_matrix(
        scanned.reader, list(section.fields), snapshots=scanned.snapshot_index,
        snapshot_block=scanned.snapshot_block, weights=section.weights, mask=section.mask,
    )
    n, m = matrix.shape
    settings = workflow.compress
    rank = min(settings.rank, n, m)
    if rank < settings.rank:
        raise ArchiveError(
            f"compress.rank = {settings.rank} exceeds what the data allow (min of {n} points and {m} snapshots)"
        )
    x = matrix.to_dask()
    width = min(rank + settings.oversample, n, m)
    complex_valued = np.issubdtype(matrix.dtype, np.complexfloating)
    omega = gaussian_map(matrix.snapshot_index, width, seed=settings.seed, complex_valued=complex_valued)
    sketch, row_sum, *column_squares = scheduler.compute(*first_pass(matrix, x, omega))
    preparation = finish_preparation(matrix, np.asarray(row_sum), [np.asarray(c) for c in column_squares],
                                     center=workflow.prepare.center, scale=workflow.prepare.scale)
    a = prepared_matrix(x, preparation)
    lowrank = randomized_svd(
        a, rank, oversample=settings.oversample, power_iterations=settings.power_iterations,
        seed=settings.seed, snapshot_index=matrix.snapshot_index,
        range_sketch=corrected_sketch(sketch, preparation, omega),
        compute=scheduler.compute, persist=scheduler.persist,
    )
    passes = lowrank.passes + 1
    return Compressed(matrix, preparation, lowrank, passes, passes * _bytes_per_pass(matrix))


def fit_stage(workflow: Workflow, compressed: Compressed, scanned: Scanned) -> DMDFit:
    """DMD of the coefficients; affine term when the data were centred."""
    coefficients = compressed.lowrank.coefficient
    try:
        return fit_dmd(coefficients, scanned.dt, rank=workflow.fit.rank, affine=workflow.prepare.center)
    except FitError:
        raise
    except np.linalg.LinAlgError as error:
        raise FitError(f"DMD fit failed on the {coefficients.shape} coefficients: {error}") from None
