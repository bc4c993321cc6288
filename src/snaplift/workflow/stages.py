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
from snaplift.archive.plan import TilePlan
from snaplift.cluster import Scheduler
from snaplift.errors import ArchiveError, FieldNotFoundError, FitError, TimeSpacingError
from snaplift.fitting import DMDFit, ResidualReport, fit_dmd_with_residuals
from snaplift.linalg.randomized import LowRank
from snaplift.prepare import Preparation
from snaplift.workflow.schema import Workflow, parse_bytes, resolve_path

__all__ = ["Scanned", "Compressed", "scan_stage", "compress_stage", "fit_stage", "plan_compress",
           "compress_memory", "TIME_RTOL"]

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
    plan: TilePlan | None = None


@dataclass(frozen=True)
class Compressed:
    """What compress hands on: the matrix description, preparation, factors and their record.

    ``projection_kind`` is ``"exact"`` or ``"estimate"`` (single-pass sketch without a
    check pass); ``sketch_state`` the arrays a later append needs (``sketch`` only; the
    store's ``sketch/`` group); ``info`` widths, tiles, runner, resume facts.
    """

    matrix: SnapshotMatrix
    preparation: Preparation
    lowrank: LowRank
    passes: int
    bytes_read: int
    projection_kind: str = "exact"
    method: str = "randomized"
    sketch_state: dict[str, np.ndarray] = field(default_factory=dict)
    info: dict[str, object] = field(default_factory=dict)


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
    plan = plan_compress(workflow, info, scheduler)
    block = plan.snapshot_blocks[0][1] - plan.snapshot_blocks[0][0]
    # tiles are planned over archive snapshots; with 'every' a tile holds block/every selected ones
    snapshot_block = max(1, block // section.snapshots.every)
    return Scanned(reader, index, times, dt, snapshot_block, plan.memory_bytes, plan=plan)


def compress_memory(workflow: Workflow, scheduler: Scheduler) -> int:
    """``compress.memory``, else what the cluster gives: the process's memory under threads,
    memory per worker times workers for worker processes."""
    if workflow.compress.memory:
        return parse_bytes(workflow.compress.memory)
    if scheduler.kind == "threads":
        return int(scheduler.memory_per_worker)
    return int(scheduler.memory_per_worker) * max(1, int(scheduler.workers))


def plan_compress(workflow: Workflow, info, scheduler: Scheduler) -> TilePlan:
    """The tile plan of the compress stage for this workflow and scheduler (metadata only)."""
    settings = workflow.compress
    return plan_tiles(
        info, list(workflow.archive.fields), memory_bytes=compress_memory(workflow, scheduler),
        workers=scheduler.workers, method=settings.method, rank=settings.rank, oversample=settings.oversample,
        power_iterations=settings.power_iterations, check_pass=settings.check_pass,
        sketch_widths=settings.sketch_widths, shared_memory=scheduler.kind == "threads",
    )


def compress_stage(workflow: Workflow, scanned: Scanned, scheduler: Scheduler, *,
                   checkpoint: str | Path | None = None, checkpoint_dir: str | Path | None = None) -> Compressed:
    """Compress the prepared snapshot matrix with ``compress.method`` in bounded streaming passes.

    Statistics for centring and scaling come from the first read. With ``checkpoint``
    (a folder; ``checkpoint_dir`` is the same) the loop state is saved there every
    ``compress.checkpoint_every`` (default 60 s) and at each pass end, and a repeated call
    with the same settings resumes from it.
    """
    checkpoint_dir = checkpoint if checkpoint is not None else checkpoint_dir
    from snaplift.linalg.compress import CompressOptions, compress
    from snaplift.linalg.streaming import runner_for

    section = workflow.archive
    plan = scanned.plan
    matrix = build_snapshot_matrix(
        scanned.reader, list(section.fields), snapshots=scanned.snapshot_index,
        snapshot_block=scanned.snapshot_block, weights=section.weights, mask=section.mask,
        snapshot_blocks=None if plan is None else plan.snapshot_blocks,
    )
    n, m = matrix.shape
    settings = workflow.compress
    if settings.rank > min(n, m):
        raise ArchiveError(
            f"compress.rank = {settings.rank} exceeds what the data allow (min of {n} points and {m} snapshots)"
        )
    options = CompressOptions(
        method=settings.method, rank=settings.rank, oversample=settings.oversample,
        power_iterations=settings.power_iterations, seed=settings.seed,
        sketch_widths=None if settings.sketch_widths is None else tuple(settings.sketch_widths),
        check_pass=settings.check_pass, center=workflow.prepare.center, scale=workflow.prepare.scale,
    )
    with runner_for(scheduler) as runner:
        result = compress(matrix, plan, options, runner=runner,
                          in_flight=None if plan is None else plan.in_flight,
                          checkpoint_dir=checkpoint_dir, checkpoint_every=settings.checkpoint_every,
                          progress=getattr(scheduler, "progress", None))
    return Compressed(matrix, result.preparation, result.lowrank, result.passes, result.bytes_read,
                      projection_kind=result.projection_kind, method=result.method,
                      sketch_state=result.sketch_state, info=result.info)


def fit_stage(workflow: Workflow, compressed: Compressed, scanned: Scanned) -> tuple[DMDFit, ResidualReport]:
    """DMD of the coefficients (affine term when the data were centred), with residuals.

    Returns the fit and its :class:`~snaplift.fitting.ResidualReport` (residual and trust
    of every eigenvalue on the held-out pairs, Colbrook & Townsend 2024).
    """
    coefficients = compressed.lowrank.coefficient
    settings = workflow.fit
    try:
        return fit_dmd_with_residuals(
            coefficients, scanned.dt, holdout=settings.holdout, seed=settings.seed,
            trust_threshold=settings.trust_threshold, rank=settings.rank_argument(),
            affine=workflow.prepare.center, debias=settings.debias,
        )
    except FitError:
        raise
    except np.linalg.LinAlgError as error:
        raise FitError(f"DMD fit failed on the {coefficients.shape} coefficients: {error}") from None
