"""Snapshot times: reading them from the archive and checking their spacing.

Time spacing rule (:func:`check_times`): with ``dt`` the median step, the times are
uniform when every step satisfies ``|dt_i - dt| <= rtol * |dt| + atol``. ``rtol``
defaults to 1e-6 (common practice: tight enough to catch a dropped or repeated
snapshot, loose enough for times written as decimal text); ``atol`` defaults to
``4 * eps * max|t|`` of the times' own precision, the rounding a stored time value
carries (so float32 times far from zero are not called non-uniform for their rounding).
"""


from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from snaplift.archive._base import ArchiveInfo, Reader
from snaplift.archive._common import missing_field_error
from snaplift.errors import ArchiveError

__all__ = ["TimeSpacing", "check_times", "snapshot_times"]


@dataclass(frozen=True)
class TimeSpacing:
    """Spacing of snapshot times.

    ``worst_gap_index`` is ``i`` of the step ``times[i+1] - times[i]`` farthest from the
    median step ``dt``; ``worst_gap_value`` is that step.
    """

    n_times: int
    dt: float
    uniform: bool
    increasing: bool
    worst_gap_index: int
    worst_gap_value: float
    max_relative_deviation: float
    rtol: float
    atol: float


def check_times(
    times: Sequence[float] | np.ndarray,
    *,
    rtol: float = 1e-6,
    atol: float | None = None,
    run_lengths: Sequence[int] | np.ndarray | None = None,
) -> TimeSpacing:
    """Median step, uniformity and the worst gap of a time axis.

    Parameters
    ----------
    times
        Snapshot times, at least two.
    rtol, atol
        Tolerance ``|dt_i - dt| <= rtol * |dt| + atol`` (see the module notes; the
        default ``atol`` is ``4 * eps * max|t|`` in the precision of ``times``).
    run_lengths
        Snapshots per run when ``times`` holds several runs one after the other: the
        steps across run boundaries are left out (times may restart in each run);
        ``worst_gap_index`` still indexes ``times``.

    Returns
    -------
    TimeSpacing

    Examples
    --------
    >>> check_times([0.0, 0.1, 0.2, 0.4]).worst_gap_index
    2
    """
    values = np.asarray(times)
    if values.ndim != 1 or values.size < 2:
        raise ArchiveError(
            f"time spacing needs a 1-D sequence of at least 2 times; got shape {values.shape}"
        )
    if not np.issubdtype(values.dtype, np.floating):
        values = values.astype(np.float64)
    if not np.all(np.isfinite(values)):
        bad = int(np.flatnonzero(~np.isfinite(values))[0])
        raise ArchiveError(f"time value at index {bad} is {values[bad]}; times must be finite")
    eps = float(np.finfo(values.dtype).eps)
    data = values.astype(np.float64)
    steps = np.diff(data)
    positions = _within_run_steps(values.size, run_lengths)
    if positions.size == 0:
        raise ArchiveError(
            "time spacing needs a run with 2 or more times; run lengths "
            f"{np.asarray(run_lengths).tolist()}"
        )
    steps = steps[positions]
    dt = float(np.median(steps))
    if atol is None:
        atol = 4.0 * eps * float(np.max(np.abs(data)))
    deviation = np.abs(steps - dt)
    worst_step = int(np.argmax(deviation))
    worst = int(positions[worst_step])
    uniform = bool(np.all(deviation <= rtol * abs(dt) + atol)) and dt > 0
    return TimeSpacing(
        n_times=int(values.size),
        dt=dt,
        uniform=uniform,
        increasing=bool(np.all(steps > 0)),
        worst_gap_index=worst,
        worst_gap_value=float(steps[worst_step]),
        max_relative_deviation=float(deviation[worst_step] / abs(dt)) if dt else float("inf"),
        rtol=float(rtol),
        atol=float(atol),
    )


def _within_run_steps(n_times: int, run_lengths: Sequence[int] | np.ndarray | None) -> np.ndarray:
    """Positions ``i`` of the steps ``t[i+1] - t[i]`` that stay inside one run."""
    positions = np.arange(n_times - 1)
    if run_lengths is None:
        return positions
    lengths = np.asarray(run_lengths, dtype=np.int64)
    if lengths.ndim != 1 or int(lengths.sum()) != n_times or np.any(lengths < 0):
        raise ArchiveError(
            f"run lengths {lengths.tolist()} do not add up to the {n_times} times given"
        )
    ends = np.cumsum(lengths)[:-1] - 1  # last snapshot of every run but the last
    return np.setdiff1d(positions, ends)


def snapshot_times(
    reader: Reader,
    *,
    time: str | None = None,
    step: float | None = None,
    n_snapshots: int | None = None,
    info: ArchiveInfo | None = None,
) -> np.ndarray:
    """The snapshot times as float64, one per snapshot.

    Parameters
    ----------
    reader
        The archive.
    time
        A variable holding the times (1-D, one value per snapshot).
    step
        A fixed spacing; times are ``0, step, 2 step, ...``.
    n_snapshots
        Snapshot count to expect (default: the common count of the archive's fields).
    info
        ``reader.describe()`` if the caller has it already.

    With neither ``time`` nor ``step`` the variable the reader identified as the time
    is used. Time variables with CF units come back as counts of their unit.

    Raises
    ------
    ArchiveError
        Both or neither source available, a bad step, or a time variable whose length
        is not the snapshot count.
    """
    if time is not None and step is not None:
        raise ArchiveError(
            f"give either a time variable or a fixed step for {reader.path}, not both "
            f"(time='{time}', step={step})"
        )
    info = info if info is not None else reader.describe()
    count = n_snapshots if n_snapshots is not None else info.attrs.get("n_snapshots")
    if count is None:
        counts = {f.n_snapshots for f in info.fields.values()}
        count = counts.pop() if len(counts) == 1 else None
    if step is not None:
        if not np.isfinite(step) or step <= 0:
            raise ArchiveError(f"time step must be a positive number; got {step}")
        if count is None:
            raise ArchiveError(f"cannot tell the snapshot count of {reader.path}")
        return np.arange(int(count), dtype=np.float64) * float(step)
    name = time if time is not None else info.attrs.get("time_variable")
    if name is None:
        raise ArchiveError(
            f"no snapshot times found in {reader.path}; name the time variable "
            f"(variables present: {', '.join(info.variables) or '(none)'}) or give a fixed step"
        )
    if name not in info.variables:
        raise missing_field_error(name, reader.path, list(info.variables), kind="variable")
    values = np.asarray(reader.read_variable(name), dtype=np.float64)
    if values.ndim != 1 or (count is not None and values.size != count):
        raise ArchiveError(
            f"time variable '{name}' in {reader.path} has shape {values.shape}; expected "
            f"({count},), one value per snapshot"
        )
    return values
