"""Small pieces shared by the readers: slice checks, grid boxes, field classification."""

from __future__ import annotations

import re
from collections import Counter
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from dataclasses import field as dataclass_field
from typing import Any

import numpy as np

from snaplift.archive._cf import is_time_like
from snaplift.errors import ArchiveError, ArchiveFormatError, FieldNotFoundError

__all__ = [
    "normalise_slice",
    "grid_box",
    "read_block",
    "to_tile",
    "Candidate",
    "split_fields_and_variables",
    "natural_key",
    "missing_field_error",
]


def normalise_slice(value: slice, length: int, what: str, field: str) -> tuple[int, int]:
    """``(start, stop)`` of a step-1 slice clipped to ``length`` (numpy semantics)."""
    if not isinstance(value, slice):
        raise ArchiveError(
            f"{what} of field '{field}' must be a slice, got {type(value).__name__} {value!r}"
        )
    start, stop, step = value.indices(length)
    if step != 1:
        raise ArchiveError(
            f"{what} of field '{field}' must have step 1, got step {value.step}"
        )
    return start, max(start, stop)


def grid_box(grid: Sequence[int], start: int, stop: int) -> tuple[tuple[slice, ...], int]:
    """The smallest row box of ``grid`` holding the C-order flat range ``[start, stop)``.

    Returns per-axis slices and the offset of ``start`` inside the box flattened in C
    order. Leading axes on which the range stays within one index are fixed to that
    index, the next axis is cut to the rows that the range touches, and the remaining
    (faster) axes are taken whole: whole grid rows, which for a C-ordered chunk layout
    are whole contiguous runs.
    """
    grid = [int(g) for g in grid]
    if not grid:
        return (), 0
    slices: list[slice] = []
    base = 0
    for axis in range(len(grid)):
        stride = int(np.prod(grid[axis + 1 :], dtype=np.int64))
        low = (start - base) // stride
        high = (stop - 1 - base) // stride + 1
        if high - low == 1 and axis < len(grid) - 1:
            slices.append(slice(low, low + 1))
            base += low * stride
            continue
        slices.append(slice(low, high))
        slices.extend(slice(0, g) for g in grid[axis + 1 :])
        return tuple(slices), start - base - low * stride
    return tuple(slices), start - base  # pragma: no cover - loop always returns


def read_block(
    read: Callable[[tuple[slice, ...]], np.ndarray],
    grid: Sequence[int],
    points: tuple[int, int],
    snapshots: slice | None,
) -> np.ndarray:
    """Read ``(snapshot, point)`` values through ``read(selection)`` touching only rows.

    ``snapshots`` is the selection on a leading snapshot axis, or None when the stored
    array has no snapshot axis (one file per snapshot); the result is 2-D
    ``(snapshots, points)`` (one row when ``snapshots`` is None).
    """
    start, stop = points
    box, offset = grid_box(grid, start, stop)
    selection = box if snapshots is None else (snapshots, *box)
    raw = np.asarray(read(selection))
    rows = 1 if snapshots is None else raw.shape[0]
    return raw.reshape(rows, -1)[:, offset : offset + (stop - start)]


def to_tile(block: np.ndarray) -> np.ndarray:
    """(snapshots, points) decoded block -> C-contiguous (points, snapshots)."""
    return np.ascontiguousarray(block.T)


@dataclass(frozen=True)
class Candidate:
    """A stored array as the classifier sees it."""

    name: str
    shape: tuple[int, ...]
    dtype: np.dtype
    attrs: dict[str, Any]
    is_dimension_scale: bool = False
    #: stored chunk shape, None for contiguous storage
    chunks: tuple[int, ...] | None = None
    #: storage facts for FieldInfo.attrs (compression, shards, layout)
    storage: dict[str, Any] = dataclass_field(default_factory=dict)
    #: dimension name of each axis where the format records one (netCDF dimension scales,
    #: zarr dimension_names / _ARRAY_DIMENSIONS), else None
    dims: tuple[str | None, ...] | None = None


def grid_coordinate_names(field: Candidate, by_name: dict[str, Candidate]) -> tuple[str | None, ...]:
    """The 1-D array holding the coordinate of each grid axis of ``field`` (None: none).

    A grid axis (every axis after the snapshot axis) takes, in order: the dimension
    coordinate (a 1-D numeric array named like the axis's dimension, of the axis's
    length: netCDF / xarray dimension coordinates), else a CF auxiliary coordinate named
    in the field's ``coordinates`` attribute (CF 1.x section 5) that is 1-D, numeric and
    either on that dimension or the only axis of its length.
    """
    grid = field.shape[1:]
    dims: tuple[str | None, ...] = (None,) * len(grid)
    if field.dims is not None and len(field.dims) == len(field.shape):
        dims = tuple(field.dims[1:])

    def usable(name: str | None, length: int) -> bool:
        c = by_name.get(name) if name else None
        return c is not None and c.shape == (length,) and _numeric(c.dtype) and c.name != field.name

    names: list[str | None] = [d if usable(d, n) else None for d, n in zip(dims, grid)]
    listed = field.attrs.get("coordinates")
    for name in str(listed).split() if isinstance(listed, str) else []:
        c = by_name.get(name)
        if c is None or len(c.shape) != 1 or name in names:
            continue
        own = c.dims[0] if c.dims else None
        axes = [i for i, d in enumerate(dims) if own is not None and d == own and grid[i] == c.shape[0]]
        if not axes:
            axes = [i for i, n in enumerate(grid) if n == c.shape[0]]
            axes = axes if len(axes) == 1 else []
        for i in axes:
            if names[i] is None and usable(name, grid[i]):
                names[i] = name
    return tuple(names)


def _numeric(dtype: np.dtype) -> bool:
    return np.dtype(dtype).kind in "biufc"


def _field_candidates(candidates: Sequence[Candidate], fields: Sequence[str] | None, time: str | None) -> list[str]:
    """Names that could be fields, for the message of a field not found: numeric arrays of
    2 or more dimensions whose leading length is the snapshot count (that of the named
    fields that exist, else of the time, else the most common), not weights or masks."""
    by_name = {c.name: c for c in candidates}
    multi = [c for c in candidates if len(c.shape) >= 2 and _numeric(c.dtype) and c.dtype.kind != "b"
             and not c.is_dimension_scale]
    found = [by_name[n] for n in fields or () if n in by_name and by_name[n].shape]
    if found:
        count: int | None = found[0].shape[0]
    elif time in by_name and len(by_name[time].shape) == 1:
        count = by_name[time].shape[0]
    else:
        lengths = Counter(c.shape[0] for c in multi)
        count = max(lengths, key=lambda n: (lengths[n], n)) if lengths else None
    shown = sorted(c.name for c in multi if c.shape[0] == count)
    return shown or sorted(c.name for c in candidates if len(c.shape) >= 2 and _numeric(c.dtype)) or sorted(by_name)


def split_fields_and_variables(
    candidates: Sequence[Candidate],
    *,
    path: str,
    fields: Sequence[str] | None,
    time: str | None,
) -> tuple[list[Candidate], list[Candidate], str | None]:
    """Split stored arrays into snapshot fields and variables; find the time variable.

    Rules, in order:

    1. the time variable is ``time`` if given, else the 1-D numeric array that looks
       most like a time (:func:`snaplift.archive._cf.is_time_like`);
    2. the snapshot count is the length of an explicit ``time``, else the common
       leading length of explicit ``fields``, else the time variable's length if some
       array of 2 or more dimensions starts with it, else the most common leading
       length among numeric arrays with 2 or more dimensions (ties: the larger);
    3. fields are the explicit ``fields``, else the numeric arrays with 2 or more
       dimensions whose leading length is the snapshot count, except netCDF
       dimension scales; everything else is a variable.
    """
    by_name = {c.name: c for c in candidates}
    for name in list(fields or []):
        if name not in by_name:
            raise missing_field_error(name, path, _field_candidates(candidates, fields, time))
    if time and time not in by_name:
        raise missing_field_error(time, path, sorted(by_name), kind="dataset")
    time_name: str | None = time
    if time is not None and len(by_name[time].shape) != 1:
        raise ArchiveFormatError(
            f"time variable '{time}' in {path} must be 1-D, has shape {by_name[time].shape}"
        )
    if time_name is None:
        # native datetime64 values are times whatever their name
        scored = [
            (3 if c.dtype.kind == "M" else is_time_like(c.name, c.attrs), c.name)
            for c in candidates
            if len(c.shape) == 1 and (_numeric(c.dtype) or c.dtype.kind in "Mm") and c.dtype.kind != "b"
        ]
        scored = [s for s in scored if s[0] > 0]
        if scored:
            best = max(s[0] for s in scored)
            time_name = sorted(n for s, n in scored if s == best)[0]
    multi = [
        c
        for c in candidates
        if len(c.shape) >= 2 and _numeric(c.dtype) and not c.is_dimension_scale
    ]
    if fields:
        chosen = [by_name[n] for n in fields]
        lengths = {c.name: (c.shape[0] if c.shape else None) for c in chosen}
        if len(set(lengths.values())) != 1 or None in lengths.values():
            listing = ", ".join(f"{n} {by_name[n].shape}" for n in fields)
            raise ArchiveFormatError(
                f"fields of {path} must share one leading snapshot length; got {listing}"
            )
        count = next(iter(lengths.values()))
        for c in chosen:
            if not _numeric(c.dtype):
                raise ArchiveFormatError(
                    f"field '{c.name}' in {path} has non-numeric dtype {c.dtype}"
                )
        if time is not None and by_name[time].shape[0] != count:
            raise ArchiveFormatError(
                f"time variable '{time}' in {path} has {by_name[time].shape[0]} values "
                f"but the fields have {count} snapshots"
            )
    else:
        count = None
        if time_name is not None:
            length = by_name[time_name].shape[0]
            if time is not None or any(c.shape[0] == length for c in multi):
                count = length
        if count is None and multi:
            tally = Counter(c.shape[0] for c in multi)
            count = max(tally, key=lambda n: (tally[n], n))
        chosen = [c for c in multi if count is not None and c.shape[0] == count]
    if time_name is not None and count is not None and by_name[time_name].shape[0] != count:
        time_name = None  # a detected time of another length does not time the snapshots
    chosen_names = {c.name for c in chosen}
    variables = [c for c in candidates if c.name not in chosen_names]
    return chosen, variables, time_name


_DIGITS = re.compile(r"(\d+)")


def natural_key(text: str) -> tuple[Any, ...]:
    """Sort key that orders ``frame_2`` before ``frame_10`` (digit runs as integers)."""
    parts = _DIGITS.split(text)
    # re.split alternates text (even positions) and digit runs (odd positions), so the
    # comparison never pits an int against a str
    return tuple(int(p) if i % 2 else p.lower() for i, p in enumerate(parts))


def missing_field_error(
    name: str, path: str, present: Sequence[str], *, kind: str = "field"
) -> FieldNotFoundError:
    """``archive field 'p' not found in wake.h5; fields present: u, v, w``."""
    listing = ", ".join(present) if present else "(none)"
    return FieldNotFoundError(
        f"archive {kind} '{name}' not found in {path}; {kind}s present: {listing}"
    )
