"""The scan stage as functions of plain values: the archive opened, snapshots selected,
times, time unit, runs, weights, mask and formulas checked, the tiles planned.

Nothing here writes: the scan stage (:mod:`snaplift.workflow.stages`) writes the times and
the runner (:mod:`snaplift.workflow.runner`) owns the scheduler and the result store.
"""

from __future__ import annotations

from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

import numpy as np

from snaplift.archive import (
    Reader,
    check_times,
    open_archive,
    run_lengths_from_labels,
    selected_run_lengths,
    snapshot_times,
)
from snaplift.archive._base import ArchiveInfo
from snaplift.archive._cf import SECONDS_PER_UNIT, TimeUnit, canonical_time_unit, time_unit_of
from snaplift.archive.matrix import SnapshotMatrix, build_snapshot_matrix
from snaplift.archive.plan import TilePlan
from snaplift.cluster import Scheduler
from snaplift.compress_methods import check_rank
from snaplift.errors import ArchiveError, ConfigError, FieldNotFoundError, TimeSpacingError
from snaplift.fit_methods import get_fit_method
from snaplift.lifting import delayed_run_lengths
from snaplift.lifting.expressions import check_variables, parse_formulas
from snaplift.workflow.fit_methods import state_variables
from snaplift.workflow.lift_section import STATE_LIMIT
from snaplift.workflow.planning import lifted_info, plan_compress
from snaplift.workflow.schema import Workflow, resolve_path, scale_of
from snaplift.workflow.store_metadata import store_metadata

__all__ = ["TIME_RTOL", "Scanned", "check_workflow", "lifted_scale", "scan_stage", "snapshot_matrix_of"]

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
    #: the archive's time unit (None: it declares none); frequencies are in Hz when it converts
    time_unit: TimeUnit | None = None

    @property
    def seconds_per_unit(self) -> float | None:
        return None if self.time_unit is None else self.time_unit.seconds

    @property
    def fit_dt(self) -> float:
        """The step the fit uses: in seconds when the time unit converts, else in the archive's unit."""
        return self.dt * (self.seconds_per_unit or 1.0)

    @property
    def fit_time(self) -> np.ndarray:
        """Column times in seconds when the time unit converts, else in the archive's unit."""
        return np.asarray(self.time, dtype=np.float64) * (self.seconds_per_unit or 1.0)

    @property
    def columns_run_lengths(self) -> np.ndarray:
        return np.array([self.snapshot_index.size]) if self.run_lengths is None else self.run_lengths


def input_notes(reader: Reader, info: ArchiveInfo, workflow: Workflow) -> list[str]:
    """What is accepted but changes what the user gets: zero weights, integer or complex fields.

    Weights of zero at every kept point are an error (nothing would count); weights of
    zero at some points are said with their count (those points are excluded).
    """
    section = workflow.archive
    notes: list[str] = []
    for name in section.fields:
        f = info.fields[name]
        kind = np.dtype(f.stored_dtype).kind
        if kind in "iub":
            notes.append(f"field '{name}' holds {np.dtype(f.stored_dtype).name} values; they are converted to "
                         "float64 (accumulation is always in float64)")
        elif kind == "c":
            notes.append(f"field '{name}' is complex ({np.dtype(f.stored_dtype).name}): compress and fit.method "
                         "dmd and optimized handle it (complex128); edmd and lift entries on the state need real "
                         "data")
        weight_name = section.weights.get(name) if isinstance(section.weights, dict) else section.weights
        if weight_name is None:
            continue
        mask_name = section.mask.get(name) if isinstance(section.mask, dict) else section.mask
        try:
            weights = np.asarray(reader.read_variable(weight_name), dtype=np.float64).ravel()
            kept = (np.ones(weights.size, dtype=bool) if mask_name is None
                    else ~np.asarray(reader.read_variable(mask_name)).astype(bool).ravel())
        except (KeyError, ValueError, OSError):
            continue  # a missing or misshapen dataset is reported, with its name, by the matrix
        if kept.size != weights.size:
            continue
        zero = int(np.count_nonzero(weights[kept] == 0))
        if zero and zero == int(np.count_nonzero(kept)):
            raise ArchiveError(
                f"{reader.path}: weights '{weight_name}' are zero at every kept point of field '{name}' "
                f"({zero} points): nothing would count; give positive weights (cell areas or volumes)")
        if zero:
            notes.append(f"weights '{weight_name}' are zero at {zero} of {int(np.count_nonzero(kept))} kept points "
                         f"of field '{name}'; those points are excluded from the fit and the modes")
    return notes


def _check_state_formulas(workflow: Workflow, reader: Reader, index: np.ndarray) -> None:
    """Formulas on the raw state may use only its variables: checked at scan, not after compress."""
    entries = [(i, e) for i, e in enumerate(workflow.lift) if e.kind == "expressions"]
    if not entries:
        return
    section = workflow.archive
    matrix = build_snapshot_matrix(reader, list(section.fields), snapshots=index, snapshot_block=1,
                                   weights=section.weights, mask=section.mask)
    variables = state_variables(matrix)
    for position, entry in entries:
        try:
            check_variables(parse_formulas(entry.formulas), variables)
        except ConfigError as error:
            raise ConfigError(f"lift[{position}]: {error}") from None


def _check_rank_fits(workflow: Workflow, info: Any, m: int) -> None:
    """compress.rank above the matrix size is refused before any plan (whose numbers would mislead)."""
    if workflow.state_source == "state":
        return  # a small raw state: compress keeps min(n, m) for the diagnostics only
    lifted = lifted_info(info, workflow)
    n = sum(f.n_points for name, f in lifted.fields.items()
            if lifted is not info or name in workflow.archive.fields)
    check_rank(workflow.compress.rank, n, m)


def scan_stage(workflow: Workflow, folder: Path, scheduler: Scheduler | None, *,
               recorded_baseline: int | None = None, with_plan: bool = True,
               checked: Scanned | None = None) -> Scanned:
    """Open the archive, select snapshots, check times, plan tiles. Reads metadata only.

    ``recorded_baseline``: the baseline a killed run of this job planned with (its scan
    record's ``memory_baseline``); see :func:`plan_compress`. ``with_plan=False`` (no
    scheduler needed) skips the tile plan: the checks of :func:`check_workflow`.
    ``checked``: the scan those checks returned, so that a run plans on it instead of
    opening and checking the archive a second time.
    """
    if checked is None:
        checked = _checked_scan(workflow, folder)
    if not with_plan or scheduler is None:
        return checked
    info = checked.reader.describe()
    plan = plan_compress(workflow, info, scheduler, recorded_baseline=recorded_baseline)
    block = plan.snapshot_blocks[0][1] - plan.snapshot_blocks[0][0]
    # tiles are planned over archive snapshots; with 'every' a tile holds block/every selected ones
    snapshot_block = max(1, block // workflow.archive.snapshots.every)
    lifted = lifted_info(info, workflow)
    lifted_rows = sum(f.n_points for f in lifted.fields.values()) if lifted is not info else 0
    return replace(checked, snapshot_block=snapshot_block, memory_bytes=plan.memory_bytes, plan=plan,
                   lifted_rows=int(lifted_rows))


def _checked_scan(workflow: Workflow, folder: Path) -> Scanned:
    """The archive opened, its snapshots selected and times, runs, inputs checked; no plan."""
    section = workflow.archive
    # the workflow names its fields: a one-value-per-snapshot (1-D) dataset is then a field too
    reader = open_archive(resolve_path(folder, section.path), format=section.format, fields=list(section.fields),
                          time=section.time,
                          missing_chunks=section.missing_chunks if section.missing_chunks != "error" else None)
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
    if section.time is None and section.step is None and info.attrs.get("time_variable") is None:
        raise ConfigError(
            f"no snapshot times found in {reader.path}; set archive.time (a dataset of times; datasets present: "
            f"{', '.join(sorted(info.variables)) or '(none)'}) or archive.step (a fixed step, with archive.time_unit)"
        )
    all_times = snapshot_times(reader, time=section.time, step=section.step, n_snapshots=total)
    unit, unit_warnings = archive_time_unit(workflow, reader, info)
    unitless = [f for f in section.fields if not str(info.fields[f].attrs.get("units") or "").strip()
                and f not in (section.units or {})]
    if unitless:
        unit_warnings = [*unit_warnings, f"{reader.path} declares no units for {', '.join(unitless)}: their modes and "
                         "peak amplitudes carry none; set archive.units (e.g. {" + f"{unitless[0]}: Pa" + "})"]
    times = np.asarray(all_times, dtype=np.float64)[index]
    selected_runs = selected_run_lengths(archive_run_lengths(reader, section.runs, total), index)
    dt, uniform = _run_time_step(reader.path, times, index, selected_runs,
                                 allow_uneven=not get_fit_method(workflow.fit.method).uniform_steps)
    columns, column_runs = np.arange(index.size), selected_runs
    lift = workflow.field_lift
    if lift is not None and lift.delays > 1:
        try:
            columns = lift.columns(selected_runs)[0]
            column_runs = delayed_run_lengths(selected_runs, lift.delays, lift.spacing)
        except ConfigError as error:
            raise ConfigError(f"lift delays on {reader.path}: {error}") from None
    _check_rank_fits(workflow, info, int(columns.size))
    if workflow.state_source == "state":
        _check_state_formulas(workflow, reader, index)
    notes = input_notes(reader, info, workflow)
    return Scanned(reader, index[columns], times[columns], dt, 1, 0, plan=None,
                   run_lengths=np.asarray(column_runs, dtype=np.int64), selected_index=index,
                   selected_run_lengths=np.asarray(selected_runs, dtype=np.int64), uniform=uniform,
                   time_unit=unit, warnings=(*unit_warnings, *notes))


def archive_time_unit(workflow: Workflow, reader: Reader, info: ArchiveInfo) -> tuple[TimeUnit | None, list[str]]:
    """The time unit of the snapshot times, and the warning to give when there is none.

    From the time dataset's CF ``units`` (``"ms"``, ``"milliseconds since ..."``) or
    ``time_unit`` attribute; ``archive.time_unit`` gives the unit of ``archive.step`` or of
    a time dataset that declares none or one that does not convert to seconds (a dataset
    that declares another convertible unit is an error).
    """
    section = workflow.archive
    given = None
    if section.time_unit is not None:
        canonical = canonical_time_unit(section.time_unit)
        assert canonical is not None  # the schema allows only convertible units
        given = TimeUnit(section.time_unit, canonical, SECONDS_PER_UNIT[canonical])
    found = None
    if section.step is None:
        name = section.time or info.attrs.get("time_variable")
        variable = info.variables.get(name) if name else None
        found = time_unit_of(variable.attrs) if variable is not None else None
        if found is not None and found.seconds is None and given is not None:
            found = None  # a unit that does not convert ("steps"): archive.time_unit says what it is
        if found is not None and given is not None and found.canonical != given.canonical:
            raise ConfigError(
                f"archive.time_unit is {section.time_unit!r} but the time dataset '{name}' in {reader.path} declares "
                f"units {found.name!r}; remove archive.time_unit (the archive's unit is used)"
            )
    unit = found or given
    if unit is None:
        return None, [(f"{reader.path} declares no time unit: frequencies are in 1/(time unit), growth rates in "
                      "1/(time unit); set archive.time_unit (s, ms, us, min, h, day) for Hz and 1/s")]
    if unit.seconds is None:
        return unit, [(f"the time unit {unit.name!r} of {reader.path} does not convert to seconds: frequencies are "
                      f"in 1/{unit.name.split(' since ')[0].strip()}; set archive.time_unit (s, ms, us, min, h, day) "
                      "for Hz and 1/s")]
    return unit, []


def check_workflow(workflow: Workflow, folder: Path) -> tuple[Scanned, list[str]]:
    """Everything a run checks before reading a tile: the archive opens, the fields, time,
    time unit, runs, weights, mask and coordinates exist with the right shapes.

    Reads metadata and the small datasets (times, run labels, weights, mask, coordinates),
    no field values, and needs no scheduler: ``snaplift run --dry-run`` calls it so that a
    batch job learns a wrong name before it waits in the queue; ``run`` calls it before it
    looks at an existing result store. Returns the scan and what a run would print.
    """
    scanned = _checked_scan(workflow, folder)
    matrix = snapshot_matrix_of(workflow, scanned)
    metadata = store_metadata(workflow, scanned.reader, scanned.reader.describe(), scanned.time, scanned.time_unit)
    info = scanned.reader.describe()
    lines = [f"archive {scanned.reader.path} ({info.format}): fields "
             + ", ".join(f"{f} {info.fields[f].shape}" for f in workflow.archive.fields)]
    unit = scanned.time_unit
    selected = scanned.selected_index if scanned.selected_index is not None else scanned.snapshot_index
    lines.append(f"time: {selected.size} snapshots selected, step {scanned.dt:.6g} "
                 f"{unit.name if unit is not None else '(no time unit)'}; frequencies in {metadata.frequency_unit}")
    if scanned.run_lengths is not None and scanned.run_lengths.size > 1:
        lines.append(f"runs: {scanned.run_lengths.size} ({', '.join(map(str, scanned.run_lengths.tolist()))} columns)")
    kept = sum(rows.n_rows for rows in matrix.fields)
    lines.append(f"snapshot matrix: {kept} rows x {matrix.shape[1]} columns"
                 + _named(" (weights {})", workflow.archive.weights) + _named(" (mask {})", workflow.archive.mask))
    if metadata.coordinates:
        lines.append("coordinates: " + ", ".join(
            f"{d} <- {c.attrs.get('archive_variable')} [{c.attrs.get('units', 'unit unknown')}]"
            for d, c in metadata.coordinates.items()))
    else:
        lines.append("coordinates: none in the archive (index positions; archive.coords names them)")
    lines.extend(f"warning: {warning}" for warning in scanned.warnings)
    return scanned, lines


def _named(template: str, datasets: str | dict[str, str] | None) -> str:
    """``" (mask 'solid')"``, ``" (mask T: 'solid', w: 'solid3d')"``; empty when not given."""
    if not datasets:
        return ""
    if isinstance(datasets, str):
        return template.format(repr(datasets))
    return template.format(", ".join(f"{field}: {name!r}" for field, name in datasets.items()))


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
    if uniform:
        # the mean step (the span of each run over its steps) carries less rounding than
        # any one step, which matters for times stored as large counts (days since an epoch)
        dt = float(np.mean(table[:, 0]))
    if not uniform and not allow_uneven:
        raise TimeSpacingError(
            f"{path}: snapshot times are not uniformly spaced (median step {dt:.6g}, tolerance {TIME_RTOL:g} "
            f"relative); worst gap {table[worst, 0]:.6g} between snapshots {int(table[worst, 1])} and "
            f"{int(table[worst, 2])}; DMD needs a fixed step: select a uniform range with archive.snapshots, "
            "or use fit.method: optimized (any spacing)"
        )
    return dt, uniform


def _check_state_size(workflow: Workflow, info: ArchiveInfo) -> None:
    if workflow.state_source != "state":
        return
    values = sum(info.fields[f].n_points for f in workflow.archive.fields if f in info.fields)
    if values > STATE_LIMIT:
        raise ConfigError(
            f"lift on: state needs a small state; the fields {workflow.archive.fields} have {values} values per "
            f"snapshot (at most {STATE_LIMIT}); use on: coefficients (the dictionary lifts the reduced "
            "coefficients) or mask points out (archive.mask)"
        )


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


