"""Probe archives: 1-D datasets of one value per snapshot (sensor signals), and the delay
window that suits them.

A probe archive has no field with a grid: each probe is a dataset of shape
``(n_snapshots,)`` beside the time. DMD of a few probe values sees at most that many
eigenvalues, so probes are lifted by delays (Hankel stacking; Arbabi & Mezic 2017,
SIAM J. Appl. Dyn. Syst. 16(4)). :func:`suggest_delays` proposes a window that spans the
longest period the periodogram shows (a Hann-windowed FFT of each probe, mean and linear
trend removed; peaks at least :data:`PEAK_FRACTION` of the largest), so that one window
holds a whole cycle of the slowest oscillation: a rule of thumb (common practice), not an
optimum. The memory the lifted matrix costs is counted by the planner as one matrix
(``row_groups`` of :func:`snaplift.archive.plan.plan_tiles`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace
from typing import Any

import numpy as np

from snaplift.archive._base import ArchiveInfo, Reader
from snaplift.archive.plan import plan_tiles
from snaplift.errors import ArchiveError

__all__ = ["probe_names", "DelaySuggestion", "suggest_delays", "probe_report", "PEAK_FRACTION"]

#: a periodogram peak counts when its power is at least this fraction of the largest (common practice)
PEAK_FRACTION = 0.01
#: a suggested window never exceeds this fraction of the snapshots (common practice: keep
#: most columns of the Hankel matrix)
MAX_WINDOW_FRACTION = 0.25


def probe_names(info: ArchiveInfo, time: str | None = None) -> list[str]:
    """1-D numeric datasets with one value per snapshot, the time variable left out.

    The snapshot count is the length of the time variable (``time`` or the one the reader
    identified), else the most common length of the 1-D datasets.
    """
    name = time or info.attrs.get("time_variable")
    candidates = {v.name: v for v in info.variables.values()
                  if len(v.shape) == 1 and np.dtype(v.dtype).kind in "fiuc" and v.name != name}
    if not candidates:
        return []
    if name is not None and name in info.variables:
        length = int(info.variables[name].shape[0])
    else:
        lengths = [int(v.shape[0]) for v in candidates.values()]
        length = max(set(lengths), key=lengths.count)
    return [n for n, v in candidates.items() if int(v.shape[0]) == length and length >= 3]


@dataclass(frozen=True)
class DelaySuggestion:
    """A delay window for probes: ``count`` copies ``spacing`` snapshots apart."""

    count: int
    spacing: int
    longest_period: float  # in time units; nan when no peak was found
    dt: float
    #: probe whose periodogram showed the longest period
    probe: str | None

    @property
    def window(self) -> float:
        """Time spanned by one window, ``(count - 1) spacing dt``."""
        return (self.count - 1) * self.spacing * self.dt


def _peak_periods(values: np.ndarray, dt: float) -> np.ndarray:
    """Periods (time units) of the periodogram's peaks, longest first."""
    values = np.asarray(values, dtype=np.float64)
    n = values.size
    if n < 8 or not np.all(np.isfinite(values)):
        return np.array([])
    t = np.arange(n)
    trend = np.polyval(np.polyfit(t, values, 1), t)
    power = np.abs(np.fft.rfft((values - trend) * np.hanning(n))) ** 2
    frequency = np.fft.rfftfreq(n, d=dt)
    # below 2 cycles over the record a "period" is leakage from the trend, not an oscillation
    usable = np.arange(power.size) >= 2
    if not np.any(usable) or power[usable].max() <= 0:
        return np.array([])
    top = power[usable].max()
    inner = np.arange(1, power.size - 1)
    peaks = inner[(power[inner] >= power[inner - 1]) & (power[inner] >= power[inner + 1])
                  & (power[inner] >= PEAK_FRACTION * top) & usable[inner]]
    return np.sort(1.0 / frequency[peaks])[::-1]


def suggest_delays(probes: dict[str, np.ndarray], dt: float, n_snapshots: int) -> DelaySuggestion:
    """A window spanning the longest period any probe's periodogram shows (see module notes).

    Example
    -------
    >>> t = 0.05 * np.arange(2000)
    >>> s = suggest_delays({"x": np.cos(2 * np.pi * 0.5 * t)}, 0.05, 2000)
    >>> s.count, round(s.longest_period, 2)
    (41, 2.0)
    """
    longest, which = math.nan, None
    for name, values in probes.items():
        periods = _peak_periods(values, dt)
        if periods.size and not (periods[0] <= longest):
            longest, which = float(periods[0]), name
    limit = max(2, int(MAX_WINDOW_FRACTION * n_snapshots))
    if not math.isfinite(longest):
        return DelaySuggestion(min(limit, 2), 1, math.nan, float(dt), None)
    count = int(math.ceil(longest / dt - 1e-9)) + 1
    spacing = 1
    if count > limit:  # keep the span, thin the copies
        spacing = int(math.ceil((count - 1) / (limit - 1)))
        count = int(math.ceil(longest / (dt * spacing) - 1e-9)) + 1
    return DelaySuggestion(int(count), int(spacing), longest, float(dt), which)


def probe_report(reader: Reader, names: list[str], times: np.ndarray, *, memory_bytes: int, method: str,
                 rank: int, workers: int = 1, shared_memory: bool = True, baseline_bytes: int = 0,
                 in_memory_limit: int = 0) -> dict[str, Any]:
    """What ``snaplift scan`` says about probes: the suggested delays and what they cost.

    Returns plain values: the probes, the suggestion (count, spacing, window, longest
    period), the lifted matrix (rows x columns, bytes) and the compress plan of the lifted
    archive (its lifted fields counted as one matrix per probe), or the planner's refusal.
    """
    info = reader.describe()
    m = int(times.size)
    dt = float(np.median(np.diff(times))) if m > 1 else 1.0
    values = {name: np.asarray(reader.read_tile(name, slice(0, 1), slice(0, m)), dtype=np.float64).ravel()
              for name in names}
    suggestion = suggest_delays(values, dt, m)
    count, spacing = suggestion.count, suggestion.spacing
    columns = max(0, m - (count - 1) * spacing)
    points = sum(info.fields[name].n_points for name in names)
    rows = points * count
    lifted: dict[str, Any] = {}
    groups: list[list[int]] = []
    for name in names:
        groups.append(list(range(len(lifted), len(lifted) + count)))
        for block in range(count):
            copy = name if block == 0 else f"{name}_delay{block}"
            lifted[copy] = replace(info.fields[name], name=copy)
    plan: dict[str, Any] | None = None
    plan_error = None
    try:
        plan = plan_tiles(replace(info, fields=lifted), list(lifted), memory_bytes=memory_bytes, method=method,
                          rank=min(rank, rows, max(columns, 1)), workers=workers, shared_memory=shared_memory,
                          baseline_bytes=baseline_bytes, baseline_label="this process" if baseline_bytes else "",
                          row_groups=groups, in_memory_limit=in_memory_limit).describe()
    except ArchiveError as error:
        plan_error = str(error)
    return {
        "probes": list(names),
        "values_per_snapshot": int(points),
        "delays": {"count": int(count), "spacing": int(spacing)},
        "window": None if not math.isfinite(suggestion.longest_period) else float(suggestion.window),
        "longest_period": None if not math.isfinite(suggestion.longest_period) else float(suggestion.longest_period),
        "longest_period_probe": suggestion.probe,
        "lifted_rows": int(rows),
        "lifted_columns": int(columns),
        "lifted_bytes": int(8 * rows * columns),
        "plan": plan,
        "plan_error": plan_error,
    }
