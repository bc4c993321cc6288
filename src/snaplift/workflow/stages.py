"""The stages of a workflow as functions of plain values.

``scan`` -> ``compress`` -> ``fit`` -> ``modes``; each takes the validated settings and
the previous stage's result and returns a frozen record. None of them writes: the runner
(:mod:`snaplift.workflow.runner`) owns the scheduler and the result store.
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

import numpy as np

from snaplift.archive import (
    Reader,
    check_times,
    open_archive,
    plan_tiles,
    run_lengths_from_labels,
    selected_run_lengths,
    snapshot_times,
)
from snaplift.archive._base import ArchiveInfo
from snaplift.archive.matrix import SnapshotMatrix, build_snapshot_matrix
from snaplift.archive.plan import IN_MEMORY_LIMIT, TilePlan
from snaplift.cluster import Scheduler, resident_memory
from snaplift.errors import ArchiveError, ConfigError, FieldNotFoundError, TimeSpacingError
from snaplift.lifting import delayed_run_lengths
from snaplift.linalg.randomized import LowRank
from snaplift.prepare import Preparation
from snaplift.workflow.fit_methods import FitOutcome, fit_outcome
from snaplift.workflow.schema import Workflow, parse_bytes, resolve_path, scale_of

__all__ = ["Scanned", "Compressed", "scan_stage", "compress_stage", "fit_stage", "plan_compress",
           "compress_memory", "TIME_RTOL"]

#: relative tolerance on the spread of time steps before spacing counts as non-uniform
#: (common practice: a 0.1 % jitter in dt shifts frequencies by about as much)
TIME_RTOL = 1e-3


@dataclass(frozen=True)
class Scanned:
    """What scan hands on. ``snapshot_index``, ``time`` and ``run_lengths`` describe the
    columns of the snapshot matrix (with delays: the windows, each carrying its first
    snapshot); ``selected_index`` / ``selected_run_lengths`` the snapshots selected
    before the delay windows are formed; ``uniform`` whether the time step is fixed."""

    reader: Reader
    snapshot_index: np.ndarray
    time: np.ndarray
    dt: float
    snapshot_block: int
    memory_bytes: int
    warnings: tuple[str, ...] = ()
    plan: TilePlan | None = None
    run_lengths: np.ndarray | None = None
    selected_index: np.ndarray | None = None
    selected_run_lengths: np.ndarray | None = None
    uniform: bool = True
    lifted_rows: int = 0

    @property
    def columns_run_lengths(self) -> np.ndarray:
        return np.array([self.snapshot_index.size]) if self.run_lengths is None else self.run_lengths


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


def scan_stage(workflow: Workflow, folder: Path, scheduler: Scheduler, *,
               recorded_baseline: int | None = None) -> Scanned:
    """Open the archive, select snapshots, check times, plan tiles. Reads metadata only.

    ``recorded_baseline``: the baseline a killed run of this job planned with (its scan
    record's ``memory_baseline``); see :func:`plan_compress`.
    """
    section = workflow.archive
    # the workflow names its fields: a one-value-per-snapshot (1-D) dataset is then a field too
    reader = open_archive(resolve_path(folder, section.path), format=section.format, fields=list(section.fields),
                          time=section.time)
    info = reader.describe()
    _check_state_size(workflow, info)
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
    selected_runs = selected_run_lengths(archive_run_lengths(reader, section.runs, total), index)
    dt, uniform = _run_time_step(reader.path, times, index, selected_runs,
                                 allow_uneven=workflow.fit.method == "optimized")
    columns, column_runs = np.arange(index.size), selected_runs
    lift = workflow.field_lift
    if lift is not None and lift.delays > 1:
        try:
            columns = lift.columns(selected_runs)[0]
            column_runs = delayed_run_lengths(selected_runs, lift.delays, lift.spacing)
        except ConfigError as error:
            raise ConfigError(f"lift delays on {reader.path}: {error}") from None
    plan = plan_compress(workflow, info, scheduler, recorded_baseline=recorded_baseline)
    block = plan.snapshot_blocks[0][1] - plan.snapshot_blocks[0][0]
    # tiles are planned over archive snapshots; with 'every' a tile holds block/every selected ones
    snapshot_block = max(1, block // section.snapshots.every)
    lifted = lifted_info(info, workflow)
    lifted_rows = sum(f.n_points for f in lifted.fields.values()) if lifted is not info else 0
    return Scanned(reader, index[columns], times[columns], dt, snapshot_block, plan.memory_bytes, plan=plan,
                   run_lengths=np.asarray(column_runs, dtype=np.int64), selected_index=index,
                   selected_run_lengths=np.asarray(selected_runs, dtype=np.int64), uniform=uniform,
                   lifted_rows=int(lifted_rows))


def archive_run_lengths(reader: Reader, runs: str | None, total: int) -> np.ndarray:
    """Snapshots per run of the whole archive: from a run-label dataset, the files of a
    several-file archive, or one run."""
    if runs is not None:
        info = reader.describe()
        if runs not in info.variables and runs not in info.fields:
            raise FieldNotFoundError(
                f"archive.runs dataset '{runs}' not found in {reader.path}; datasets present: "
                f"{', '.join(sorted(info.variables)) or '(none)'}"
            )
        labels = np.asarray(reader.read_variable(runs))
        if labels.shape != (total,):
            raise ArchiveError(f"{reader.path}: run dataset '{runs}' has shape {labels.shape}; expected "
                               f"({total},), one run label per snapshot")
        return run_lengths_from_labels(labels, name=runs, path=str(reader.path))
    lengths = getattr(reader, "run_lengths", None)
    return np.asarray(lengths(), dtype=np.int64) if callable(lengths) else np.array([total], dtype=np.int64)


def _run_time_step(path: str, times: np.ndarray, index: np.ndarray, run_lengths: np.ndarray, *,
                   allow_uneven: bool) -> tuple[float, bool]:
    """Time step shared by every run (times may restart in each run); (dt, uniform)."""
    steps: list[np.ndarray] = []
    start = 0
    for length in np.asarray(run_lengths, dtype=np.int64):
        segment, where = times[start:start + length], index[start:start + length]
        start += int(length)
        if segment.size < 2:
            continue
        spacing = check_times(segment, rtol=TIME_RTOL)
        if not spacing.increasing:
            bad = int(np.flatnonzero(np.diff(segment) <= 0)[0])
            raise TimeSpacingError(
                f"{path}: snapshot times must increase within a run; time[{where[bad + 1]}] = {segment[bad + 1]} "
                f"follows time[{where[bad]}] = {segment[bad]}"
            )
        steps.append(np.column_stack([np.diff(segment), where[:-1], where[1:]]))
    if not steps:
        raise ArchiveError(f"{path}: no run has two selected snapshots; DMD needs snapshot pairs")
    table = np.concatenate(steps)
    dt = float(np.median(table[:, 0]))
    deviation = np.abs(table[:, 0] - dt)
    worst = int(np.argmax(deviation))
    uniform = bool(deviation[worst] <= TIME_RTOL * abs(dt) + 4 * np.finfo(np.float64).eps * np.max(np.abs(times)))
    if not uniform and not allow_uneven:
        raise TimeSpacingError(
            f"{path}: snapshot times are not uniformly spaced (median step {dt:.6g}, tolerance {TIME_RTOL:g} "
            f"relative); worst gap {table[worst, 0]:.6g} between snapshots {int(table[worst, 1])} and "
            f"{int(table[worst, 2])}; DMD needs a fixed step: select a uniform range with archive.snapshots, "
            "or use fit.method: optimized (any spacing)"
        )
    return dt, uniform


def lifted_info(info: ArchiveInfo, workflow: Workflow) -> ArchiveInfo:
    """The archive as the planner sees it after raw-field lifting: one field per lifted field."""
    lift = workflow.field_lift
    if lift is None:
        return info
    fields = {f.name: replace(info.fields[f.source], name=f.name)
              for f in lift.lifted(list(workflow.archive.fields))}
    return replace(info, fields=fields)


def _check_state_size(workflow: Workflow, info: ArchiveInfo) -> None:
    if workflow.state_source != "state":
        return
    from snaplift.workflow.lift_section import STATE_LIMIT

    values = sum(info.fields[f].n_points for f in workflow.archive.fields if f in info.fields)
    if values > STATE_LIMIT:
        raise ConfigError(
            f"lift on: state needs a small state; the fields {workflow.archive.fields} have {values} values per "
            f"snapshot (at most {STATE_LIMIT}); use on: coefficients (the dictionary lifts the reduced "
            "coefficients) or mask points out (archive.mask)"
        )


def compress_memory(workflow: Workflow, scheduler: Scheduler) -> int:
    """``compress.memory``, else what the cluster gives: the process's memory under threads,
    memory per worker times workers for worker processes.

    The budget of the whole process tree of the run (driver, workers, nannies): the
    compress plan subtracts what those processes already hold (:func:`plan_compress`).
    """
    if workflow.compress.memory:
        return parse_bytes(workflow.compress.memory)
    if scheduler.kind == "threads":
        return int(scheduler.memory_per_worker)
    return int(scheduler.memory_per_worker) * max(1, int(scheduler.workers))


def plan_compress(workflow: Workflow, info, scheduler: Scheduler, *, recorded_baseline: int | None = None) -> TilePlan:
    """The tile plan of the compress stage for this workflow and scheduler (metadata only).

    ``compress.memory`` is the budget of the whole process tree: the resident memory the
    scheduler's processes hold now (:func:`snaplift.cluster.resident_memory`: this process,
    and the worker processes and nannies of a distributed cluster), plus a small margin, is
    the plan's ``baseline_bytes``, and the tiles are planned in what remains. With
    ``recorded_baseline`` (a resumed run) that value is kept when the processes measure no
    more, so the resumed run plans the tiles its checkpoint was made with
    (:meth:`snaplift.cluster.ResidentMemory.reserve`).
    """
    lifted = lifted_info(info, workflow)
    try:
        return _plan(workflow, lifted, scheduler, recorded_baseline)
    except ArchiveError as error:
        if lifted is info:
            raise
        count = len(lifted.fields)
        raise type(error)(f"{error}; lift: makes {count} lifted fields of the {len(workflow.archive.fields)} "
                          "archive fields: fewer delays or pointwise terms also shrink the tiles") from None


def _row_groups(workflow: Workflow) -> list[list[int]] | None:
    """The lifted fields of each archive field (adjacent, in row order): one tile's rows."""
    lift = workflow.field_lift
    if lift is None:
        return None
    groups: list[list[int]] = []
    sources: list[str] = []
    for index, lifted in enumerate(lift.lifted(list(workflow.archive.fields))):
        if sources and sources[-1] == lifted.source:
            groups[-1].append(index)
        else:
            groups.append([index])
            sources.append(lifted.source)
    return groups


def _plan(workflow: Workflow, info: ArchiveInfo, scheduler: Scheduler, recorded_baseline: int | None) -> TilePlan:
    settings = workflow.compress
    resident = resident_memory(scheduler.client, workers=scheduler.workers)
    return plan_tiles(
        info, list(info.fields) if workflow.field_lift is not None else list(workflow.archive.fields),
        memory_bytes=compress_memory(workflow, scheduler),
        workers=scheduler.workers, method=settings.method, rank=settings.rank, oversample=settings.oversample,
        power_iterations=settings.power_iterations, check_pass=settings.check_pass,
        sketch_widths=settings.sketch_widths, shared_memory=scheduler.kind == "threads",
        corange_map=settings.corange_map or "sparse",
        baseline_bytes=resident.reserve(recorded_baseline), baseline_label=resident.label,
        row_groups=_row_groups(workflow),
        in_memory_limit=0 if settings.in_memory == "never" else IN_MEMORY_LIMIT,
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

    plan = scanned.plan
    matrix = snapshot_matrix_of(workflow, scanned)
    n, m = matrix.shape
    settings = workflow.compress
    rank = settings.rank
    if rank > min(n, m):
        if workflow.state_source != "state":
            raise ArchiveError(
                f"compress.rank = {settings.rank} exceeds what the data allow (min of {n} points and {m} snapshots)"
            )
        rank = min(n, m)  # a small raw state: its basis is only kept for the diagnostics
    options = CompressOptions(
        method=settings.method, rank=rank, oversample=settings.oversample,
        power_iterations=settings.power_iterations, seed=settings.seed,
        sketch_widths=None if settings.sketch_widths is None else tuple(settings.sketch_widths),
        check_pass=settings.check_pass, center=workflow.prepare.center,
        scale=lifted_scale(workflow.prepare.scale, matrix), corange_map=settings.corange_map or "sparse",
    )
    with runner_for(scheduler) as runner:
        result = compress(matrix, plan, options, runner=runner,
                          in_flight=None if plan is None else plan.in_flight,
                          checkpoint_dir=checkpoint_dir, checkpoint_every=settings.checkpoint_every,
                          progress=getattr(scheduler, "progress", None))
    return Compressed(matrix, result.preparation, result.lowrank, result.passes, result.bytes_read,
                      projection_kind=result.projection_kind, method=result.method,
                      sketch_state=result.sketch_state, info=result.info)


def snapshot_matrix_of(workflow: Workflow, scanned: Scanned, snapshots: np.ndarray | None = None) -> SnapshotMatrix:
    """The (lifted) snapshot matrix of the workflow over the scanned selection."""
    section = workflow.archive
    plan = scanned.plan
    selected = scanned.selected_index if scanned.selected_index is not None else scanned.snapshot_index
    return build_snapshot_matrix(
        scanned.reader, list(section.fields), snapshots=selected if snapshots is None else snapshots,
        snapshot_block=scanned.snapshot_block, weights=section.weights, mask=section.mask,
        snapshot_blocks=None if plan is None else plan.snapshot_blocks,
        lift=workflow.field_lift, run_lengths=scanned.selected_run_lengths if snapshots is None else None,
    )


def lifted_scale(scale: str | dict[str, float], matrix: SnapshotMatrix) -> str | dict[str, float]:
    """``prepare.scale`` for every (lifted) field of ``matrix`` (delay copies share their field's)."""
    if not isinstance(scale, dict):
        return scale
    return {f.name: scale_of(scale, f.name) for f in matrix.fields}


def fit_stage(workflow: Workflow, compressed: Compressed, scanned: Scanned, *, memory_budget: int | None = None,
              say: Any = None) -> FitOutcome:
    """``fit.method`` on the compress result (:mod:`snaplift.workflow.fit_methods`).

    DMD of the coefficients (affine term when the data were centred), EDMD of a
    dictionary of the coefficients or of the raw state, or optimized DMD; each with
    residuals (Colbrook & Townsend 2024) and amplitudes per run. ``memory_budget`` bounds
    the lifted matrix of EDMD; ``say`` receives the lifted size before fitting.
    """
    return fit_outcome(workflow, compressed, scanned, memory_budget=memory_budget, say=say)
