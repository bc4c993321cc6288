"""Describe and validate an archive before any heavy work: shapes, times, values, plan.

Quick mode reads metadata and a few sample snapshots; ``full=True`` reads every value,
tile by tile (bounded memory), to count NaN and Inf. Rendering is the command line's
business; this module only gathers plain data (``ScanReport.to_dict()`` is JSON). The
snapshot times and their spacing rule are in :mod:`snaplift.archive.times`.
"""


from __future__ import annotations

import dataclasses
from dataclasses import dataclass
from typing import Any

import numpy as np

from snaplift.archive._base import FieldInfo, Reader
from snaplift.archive._common import missing_field_error
from snaplift.archive.plan import IN_MEMORY_LIMIT, TilePlan, plan_tiles
from snaplift.archive.probes import probe_report
from snaplift.archive.times import TimeSpacing, _within_run_steps, check_times, snapshot_times
from snaplift.errors import ArchiveError

__all__ = [
    "TimeSpacing",
    "FieldSummary",
    "FieldValues",
    "ScanReport",
    "check_times",
    "snapshot_times",
    "scan_archive",
]


@dataclass(frozen=True)
class FieldSummary:
    name: str
    shape: tuple[int, ...]
    stored_dtype: str
    dtype: str
    chunks: tuple[int, ...] | None
    nbytes: int
    units: str | None


@dataclass(frozen=True)
class FieldValues:
    """Value statistics of one field over the snapshots read (sample or all)."""

    name: str
    snapshots_read: tuple[int, ...] | None  # None: every snapshot (full mode)
    values_read: int
    nan_count: int
    inf_count: int
    minimum: float | None  # of finite values; real part for complex fields
    maximum: float | None
    max_abs: float | None


@dataclass(frozen=True)
class ScanReport:
    """What ``scan_archive`` found; ``to_dict()`` gives plain JSON types."""

    path: str
    format: str
    files: int
    size_bytes: int
    n_snapshots: int
    fields: tuple[FieldSummary, ...]
    variables: tuple[str, ...]
    time_source: str | None  # variable name, "step", or None
    time_unit: str | None
    time_first: float | None
    time_last: float | None
    time_span: float | None
    spacing: TimeSpacing | None
    values: tuple[FieldValues, ...]
    full: bool
    plan: dict[str, Any] | None
    plan_error: str | None
    warnings: tuple[str, ...]
    #: snapshots per run for an archive of several runs (None: one run)
    run_lengths: tuple[int, ...] | None = None
    #: an archive of probes (one value per snapshot per field): the suggested delay window
    #: and its memory (:func:`snaplift.archive.probes.probe_report`); None otherwise
    probes: dict[str, Any] | None = None

    def to_dict(self) -> dict[str, Any]:
        return _plain(dataclasses.asdict(self))  # type: ignore[no-any-return]


def _time_span(times: np.ndarray, run_lengths: tuple[int, ...] | None) -> float:
    """Last minus first time, summed over the runs (times may restart in each run)."""
    if run_lengths is None:
        return float(times[-1] - times[0])
    ends = np.cumsum(run_lengths)
    return float(sum(times[end - 1] - times[end - length] for end, length in zip(ends, run_lengths)))


def _plain(value: Any) -> Any:
    if isinstance(value, dict):
        return {str(k): _plain(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_plain(v) for v in value]
    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, float) and not np.isfinite(value):
        return None if np.isnan(value) else ("inf" if value > 0 else "-inf")
    return value


class _Tally:
    def __init__(self) -> None:
        self.count = self.nan = self.inf = 0
        self.low = np.inf
        self.high = -np.inf
        self.max_abs = 0.0

    def add(self, block: np.ndarray) -> None:
        self.count += block.size
        if block.size == 0:
            return
        nan = np.isnan(block)
        inf = np.isinf(block)  # complex: either part infinite
        self.nan += int(np.count_nonzero(nan))
        self.inf += int(np.count_nonzero(inf & ~nan))
        finite = block[~(nan | inf)]
        if finite.size:
            real = finite.real
            self.low = min(self.low, float(real.min()))
            self.high = max(self.high, float(real.max()))
            self.max_abs = max(self.max_abs, float(np.abs(finite).max()))

    def result(self, name: str, snapshots: tuple[int, ...] | None) -> FieldValues:
        seen = np.isfinite(self.low)
        return FieldValues(
            name=name,
            snapshots_read=snapshots,
            values_read=self.count,
            nan_count=self.nan,
            inf_count=self.inf,
            minimum=float(self.low) if seen else None,
            maximum=float(self.high) if seen else None,
            max_abs=float(self.max_abs) if seen else None,
        )


def _point_step(f: FieldInfo, snapshots: int, memory_bytes: int) -> int:
    """Points per read so that a (points x snapshots) block stays within a quarter of
    the budget (decoded copy, transpose and masks are made from it)."""
    per_point = max(1, snapshots) * np.dtype(f.dtype).itemsize * 4
    return max(1, min(f.n_points, memory_bytes // per_point))


def _sample_values(reader: Reader, f: FieldInfo, picks: list[int], memory: int) -> FieldValues:
    tally = _Tally()
    step = _point_step(f, 1, memory)
    for j in picks:
        for p0 in range(0, f.n_points, step):
            tally.add(reader.read_tile(f.name, slice(p0, p0 + step), slice(j, j + 1)))
    return tally.result(f.name, tuple(picks))


def _full_values(reader: Reader, f: FieldInfo, plan: TilePlan | None, memory: int) -> FieldValues:
    tally = _Tally()
    if plan is not None:
        for tile in plan.tiles():
            if tile.field == f.name:
                tally.add(reader.read_tile(f.name, tile.points, tile.snapshots))
    else:  # no plan fits: fall back to stored chunks read in point slices
        block = f.snapshot_chunk
        step = _point_step(f, block, memory)
        for s0 in range(0, f.n_snapshots, block):
            for p0 in range(0, f.n_points, step):
                tally.add(reader.read_tile(f.name, slice(p0, p0 + step), slice(s0, s0 + block)))
    return tally.result(f.name, None)


def scan_archive(
    reader: Reader,
    *,
    fields: list[str] | None = None,
    time: str | None = None,
    step: float | None = None,
    full: bool = False,
    sample_snapshots: int = 3,
    memory_bytes: int = 2**30,
    method: str | None = "randomized",
    rank: int = 40,
    power_iterations: int = 1,
    sketch_widths: tuple[int, int] | None = None,
    workers: int = 1,
    shared_memory: bool = True,
    baseline_bytes: int = 0,
) -> ScanReport:
    """Describe an archive, check its times and values, and plan its tiles.

    Parameters
    ----------
    reader
        From :func:`snaplift.archive.open_archive`.
    fields
        Fields to check (default: all).
    time, step
        Where snapshot times come from (see :func:`snapshot_times`).
    full
        Read every value to count NaN/Inf (tile by tile); otherwise a sample.
    sample_snapshots
        Snapshots read per field in quick mode, spread evenly from first to last.
    memory_bytes
        Budget for the tile plan and for the reads of the scan itself.
    method, rank, power_iterations, sketch_widths, workers, shared_memory
        The compress settings the plan is made for: the plan shown is the one compress
        would use (:func:`~snaplift.archive.plan.plan_tiles` with ``method``; the
        defaults are those of the ``compress`` section and one worker thread).
        ``method=None`` gives the planner's legacy model (no compress method).
    baseline_bytes
        What the run's processes hold before the pass, planned around as compress does
        (``compress.memory`` bounds the whole process tree; see
        :func:`~snaplift.archive.plan.plan_tiles`); 0 plans the model alone.

    Returns
    -------
    ScanReport

    Examples
    --------
    >>> report = scan_archive(open_archive("wake.h5"), full=True)  # doctest: +SKIP
    >>> report.values[0].nan_count                                 # doctest: +SKIP
    0
    """
    info = reader.describe()
    names = list(fields) if fields is not None else list(info.fields)
    for name in names:
        if name not in info.fields:
            raise missing_field_error(name, reader.path, list(info.fields))
    chosen = [info.fields[n] for n in names]
    counts = {f.n_snapshots for f in chosen}
    if len(counts) > 1:
        listing = ", ".join(f"{f.name}: {f.n_snapshots}" for f in chosen)
        raise ArchiveError(
            f"fields of {reader.path} have different snapshot counts ({listing}); "
            "choose fields that share one"
        )
    n_snapshots = counts.pop() if counts else int(info.attrs.get("n_snapshots") or 0)
    warnings: list[str] = []
    if not chosen:
        warnings.append(f"no snapshot fields found in {reader.path}")

    runs = info.attrs.get("run_lengths")
    run_lengths = tuple(int(n) for n in runs) if runs and len(runs) > 1 else None
    if run_lengths is not None and sum(run_lengths) != n_snapshots:
        run_lengths = None  # fields chosen with another count: not this archive's runs
    if run_lengths is not None and min(run_lengths) < 2:
        short = [k for k, n in enumerate(run_lengths) if n < 2]
        warnings.append(f"run(s) {', '.join(map(str, short))} have fewer than 2 snapshots "
                        "and give no snapshot pairs")

    source = "step" if step is not None else (time or info.attrs.get("time_variable"))
    times: np.ndarray | None = None
    if step is not None or source is not None:
        times = snapshot_times(reader, time=time, step=step, info=info,
                               n_snapshots=n_snapshots if chosen else None)
    unit = None
    spacing = None
    if times is not None:
        variable = info.variables.get(source) if source not in (None, "step") else None
        if variable is not None:
            unit = variable.attrs.get("time_unit") or variable.attrs.get("units")
            stored = np.dtype(variable.attrs.get("stored_dtype", variable.dtype))
        else:
            stored = np.dtype(np.float64)
        within = _within_run_steps(times.size, run_lengths) if times.size >= 2 else None
        if within is not None and within.size:
            # the tolerance follows the precision the times were stored in; each run's
            # times may restart, so steps across run boundaries are not checked
            precision = stored if stored.kind == "f" else np.dtype(np.float64)
            spacing = check_times(times.astype(precision), rtol=1e-6, run_lengths=run_lengths)
            if not spacing.increasing:
                bad = int(within[np.diff(times)[within] <= 0][0])
                warnings.append(
                    f"snapshot times are not increasing: time[{bad + 1}] = {times[bad + 1]:g} "
                    f"follows time[{bad}] = {times[bad]:g}"
                )
            elif not spacing.uniform:
                warnings.append(
                    f"snapshot times are not uniform: median step {spacing.dt:g}, worst "
                    f"step {spacing.worst_gap_value:g} between snapshots "
                    f"{spacing.worst_gap_index} and {spacing.worst_gap_index + 1}"
                )
    else:
        source = None
        warnings.append("no snapshot times found; give a time variable or a fixed step")

    plan: TilePlan | None = None
    plan_error = None
    if chosen:
        try:
            if method is None:
                plan = plan_tiles(info, names, memory_bytes=memory_bytes)
            else:
                plan = plan_tiles(info, names, memory_bytes=memory_bytes, method=method, rank=rank,
                                  power_iterations=power_iterations, sketch_widths=sketch_widths,
                                  workers=workers, shared_memory=shared_memory, baseline_bytes=baseline_bytes,
                                  baseline_label="this process" if baseline_bytes else "")
        except ArchiveError as error:
            plan_error = str(error)

    values = []
    for f in chosen:
        if full:
            values.append(_full_values(reader, f, plan, memory_bytes))
        else:
            k = max(1, min(sample_snapshots, f.n_snapshots))
            picks = sorted({int(round(x)) for x in np.linspace(0, f.n_snapshots - 1, k)})
            values.append(_sample_values(reader, f, picks if f.n_snapshots else [], memory_bytes))
        if values[-1].nan_count or values[-1].inf_count:
            scope = "all values" if full else "the sample"
            warnings.append(
                f"field '{f.name}' has {values[-1].nan_count} NaN and "
                f"{values[-1].inf_count} Inf values in {scope}"
            )

    probes = None
    if chosen and n_snapshots >= 8 and all(f.n_points == 1 for f in chosen):
        # without snapshot times the window is counted in snapshots (a step of 1)
        probe_times = times if times is not None and times.size == n_snapshots else np.arange(float(n_snapshots))
        probes = probe_report(reader, names, probe_times, memory_bytes=memory_bytes, method=method or "randomized",
                              rank=rank, workers=workers, shared_memory=shared_memory,
                              baseline_bytes=baseline_bytes, in_memory_limit=IN_MEMORY_LIMIT)
        probes["window_unit"] = "snapshots" if probe_times is not times else (unit or "")

    return ScanReport(
        path=info.path,
        format=info.format,
        files=len(info.files),
        size_bytes=int(info.size_bytes),
        n_snapshots=int(n_snapshots),
        fields=tuple(
            FieldSummary(
                name=f.name,
                shape=tuple(int(s) for s in f.shape),
                stored_dtype=str(f.stored_dtype),
                dtype=str(f.dtype),
                chunks=None if f.chunks is None else tuple(int(c) for c in f.chunks),
                nbytes=int(f.nbytes),
                units=None if f.attrs.get("units") is None else str(f.attrs["units"]),
            )
            for f in chosen
        ),
        variables=tuple(info.variables),
        time_source=source,
        time_unit=None if unit is None else str(unit),
        time_first=None if times is None or not times.size else float(times[0]),
        time_last=None if times is None or not times.size else float(times[-1]),
        time_span=None if times is None or not times.size else _time_span(times, run_lengths),
        spacing=spacing,
        values=tuple(values),
        full=bool(full),
        plan=None if plan is None else plan.describe(),
        plan_error=plan_error,
        warnings=tuple(warnings),
        run_lengths=run_lengths,
        probes=probes,
    )
