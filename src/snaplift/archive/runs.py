"""Archives made of several independent runs (trajectories).

Two ways to store runs:

- *one file (or store) per run*: :class:`RunsReader` presents ``case_a.h5``,
  ``case_b.h5`` ... as one archive whose snapshot axis is the runs' snapshot axes
  concatenated in the order given. The members must agree on field names, grids and
  dtypes; each keeps its own snapshot count. :func:`snaplift.archive.open_archive`
  returns a RunsReader for a list of two or more paths.
- *a run dataset inside one file*: one run label per snapshot, the snapshots of a run
  contiguous; :func:`run_lengths_from_labels` turns the labels into run lengths.

:func:`selected_run_lengths` gives the run lengths of a selection of snapshots
(``start``/``stop``/``every`` over the archive's snapshot axis). Snapshot pairs and delay
windows never cross a run boundary (README.md, "runs").

Variables of a RunsReader: a variable whose leading length is its member's snapshot
count in *every* member (times, per-snapshot values) is concatenated; any other variable
(weights, mask, coordinates) is read from the first member and must be the same in every
member. Its shape is checked from metadata; its values are compared when it is read,
which reads it once from every member (about one snapshot's worth of bytes per run).
"""

from __future__ import annotations

import os
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from snaplift.archive import _handles
from snaplift.archive._base import ArchiveInfo, FieldInfo, Reader, VariableInfo
from snaplift.archive._common import missing_field_error, normalise_slice
from snaplift.archive._registry import open_archive
from snaplift.errors import ArchiveError, ArchiveFormatError

__all__ = ["RunsReader", "run_lengths_from_labels", "selected_run_lengths"]

#: how a variable of a several-file archive is combined from its members
CONCATENATED = "concatenated"
FIRST = "first file"


def _display_path(paths: Sequence[str]) -> str:
    """The name a several-file archive goes by in messages: its files, shortened."""
    if len(paths) <= 3:
        return " + ".join(paths)
    return f"{paths[0]} + ... + {paths[-1]} ({len(paths)} run files)"


@dataclass(frozen=True)
class _RunsLayout:
    info: ArchiveInfo
    #: snapshot offset of each run in the concatenated axis, and the total at the end
    offsets: np.ndarray
    #: variable name -> CONCATENATED or FIRST
    roles: dict[str, str]
    #: variables that cannot be read as one: name -> the reason (raised by read_variable)
    problems: dict[str, str]


def _member_count(info: ArchiveInfo, path: str) -> int:
    counts = {f.n_snapshots for f in info.fields.values()}
    if not counts:
        raise ArchiveFormatError(f"run file {path} holds no snapshot fields")
    if len(counts) > 1:
        listing = ", ".join(f"{f.name}: {f.n_snapshots}" for f in info.fields.values())
        raise ArchiveFormatError(
            f"fields of run file {path} have different snapshot counts ({listing})"
        )
    return counts.pop()


def _check_fields(first: ArchiveInfo, other: ArchiveInfo, first_path: str, path: str) -> None:
    """One clear error naming the file, the field and what differs."""
    for name in other.fields:
        if name not in first.fields:
            raise ArchiveFormatError(
                f"run file {path} has field '{name}' that {first_path} has not; every run "
                f"needs the same fields (fields of {first_path}: {', '.join(first.fields)}; "
                "if a run's snapshot count equals a grid length, name the fields with fields=)"
            )
    for name, f in first.fields.items():
        g = other.fields.get(name)
        if g is None:
            raise ArchiveFormatError(
                f"run file {path} has no field '{name}' that {first_path} has; fields "
                f"present: {', '.join(other.fields) or '(none)'}"
            )
        if g.grid != f.grid:
            raise ArchiveFormatError(
                f"field '{name}' has grid {g.grid} in run file {path} but {f.grid} in "
                f"{first_path}; every run needs the same grids"
            )
        if g.stored_dtype != f.stored_dtype or g.dtype != f.dtype:
            raise ArchiveFormatError(
                f"field '{name}' is stored as {g.stored_dtype} in run file {path} but as "
                f"{f.stored_dtype} in {first_path}; every run needs the same dtypes"
            )


def _differing(first: VariableInfo) -> VariableInfo:
    return VariableInfo(first.name, first.shape, first.dtype,
                        {**first.attrs, "runs": "differs between run files"})


def _combine_variable(name: str, infos: Sequence[ArchiveInfo], paths: Sequence[str],
                      counts: Sequence[int]) -> tuple[VariableInfo | None, str, str | None]:
    """(description, role, problem) of one variable from its members' descriptions."""
    first = infos[0].variables[name]
    missing = [p for i, p in zip(infos, paths, strict=True) if name not in i.variables]
    if missing:
        return None, FIRST, (f"variable '{name}' is in run file {paths[0]} but not in run "
                             f"file {missing[0]}; every run needs it")
    members = [i.variables[name] for i in infos]
    per_snapshot = all(len(v.shape) >= 1 and v.shape[0] == n
                       for v, n in zip(members, counts, strict=True))
    if per_snapshot:
        for v, path in zip(members[1:], paths[1:], strict=True):
            if v.shape[1:] != first.shape[1:]:
                return _differing(first), CONCATENATED, (
                    f"variable '{name}' has shape {v.shape} in run file {path} but {first.shape} "
                    f"in {paths[0]}; only the snapshot axis may differ")
            if v.attrs.get("time_unit") != first.attrs.get("time_unit"):
                return _differing(first), CONCATENATED, (
                    f"time variable '{name}' is in {v.attrs.get('time_unit') or 'no unit'} in "
                    f"run file {path} but in {first.attrs.get('time_unit') or 'no unit'} in "
                    f"{paths[0]}; every run needs the same time unit")
        dtypes = [np.dtype(v.dtype) for v in members]
        dtype = np.result_type(*dtypes) if all(d.kind in "biufc" for d in dtypes) else dtypes[0]
        shape = (int(sum(counts)), *first.shape[1:])
        attrs = {**first.attrs, "runs": CONCATENATED}
        return VariableInfo(name, shape, np.dtype(dtype), attrs), CONCATENATED, None
    for v, path in zip(members[1:], paths[1:], strict=True):
        if v.shape != first.shape:
            return _differing(first), FIRST, (
                f"variable '{name}' has shape {v.shape} in run file {path} but {first.shape} in "
                f"{paths[0]}; a variable without a snapshot axis must be the same in every run")
    attrs = {**first.attrs, "runs": f"{FIRST} (the same in every run)"}
    return VariableInfo(name, first.shape, first.dtype, attrs), FIRST, None


def _same_values(a: np.ndarray, b: np.ndarray) -> bool:
    if a.shape != b.shape:
        return False
    numeric = a.dtype.kind in "fc" and b.dtype.kind in "fc"
    return bool(np.array_equal(a, b, equal_nan=numeric))


class RunsReader(Reader):
    """Several archives, one run each, read as one archive (snapshot axes concatenated).

    Parameters
    ----------
    paths
        Two or more files, zarr stores or globs of per-snapshot files, one run each,
        in run order. Each is opened through :func:`snaplift.archive.open_archive`.
    format
        Reader for every member (default: guessed per member).
    fields, time
        Passed to every member's reader (see :func:`snaplift.archive.open_archive`).

    Notes
    -----
    The description's fields have the total snapshot count and the first member's
    chunk layout (``FieldInfo.attrs["run_chunks"]`` lists every member's when they
    differ); ``files`` lists every member's files, ``size_bytes`` is their sum and
    ``attrs["run_lengths"]`` the snapshots per run. A tile whose snapshots cross a run
    boundary is read from each member it touches.

    Examples
    --------
    >>> reader = RunsReader(["case_a.h5", "case_b.h5"])          # doctest: +SKIP
    >>> reader.run_lengths()                                     # doctest: +SKIP
    array([400, 350])
    >>> reader.read_tile("u", slice(0, 100), slice(390, 410)).shape  # doctest: +SKIP
    (100, 20)
    """

    format_name = "runs"
    suffixes = ()

    def __init__(
        self,
        paths: Sequence[str | os.PathLike[str]],
        *,
        format: str | None = None,
        fields: Sequence[str] | None = None,
        time: str | None = None,
    ) -> None:
        if isinstance(paths, str | os.PathLike) or len(paths) < 2:
            raise ArchiveError(
                f"an archive of several runs needs a list of 2 or more paths; got {paths!r}"
            )
        members = tuple(os.fspath(p) for p in paths)
        super().__init__(_display_path(members))
        self.paths = members
        self.format = format
        self.fields = None if fields is None else tuple(str(f) for f in fields)
        self.time = None if time is None else str(time)
        self.members: tuple[Reader, ...] = tuple(
            open_archive(p, format=format, fields=fields, time=time) for p in members
        )

    @classmethod
    def guess_can_open(cls, path: Any) -> bool:
        """True for a list or tuple of two or more paths (never for one path)."""
        return isinstance(path, list | tuple) and len(path) >= 2

    # -- layout ---------------------------------------------------------------------
    def _memo_key(self) -> tuple[Any, ...]:
        return (type(self).__name__, self.paths, self.format, self.fields, self.time)

    def _layout(self, *, refresh: bool = False) -> _RunsLayout:
        return _handles.memo(self._memo_key(), self._build_layout, refresh=refresh)

    def _build_layout(self) -> _RunsLayout:
        infos = [m.describe() for m in self.members]
        paths = self.paths
        counts = [_member_count(i, p) for i, p in zip(infos, paths, strict=True)]
        first = infos[0]
        for info, path in zip(infos[1:], paths[1:], strict=True):
            _check_fields(first, info, paths[0], path)
        times = [i.attrs.get("time_variable") for i in infos]
        for path, name in zip(paths[1:], times[1:], strict=True):
            if name != times[0]:
                raise ArchiveFormatError(
                    f"run file {path} has time variable {name!r} but {paths[0]} has "
                    f"{times[0]!r}; every run needs the same one (name it with time=)"
                )
        total = int(sum(counts))
        fields: dict[str, FieldInfo] = {}
        for name, f in first.fields.items():
            attrs = dict(f.attrs)
            chunks = [i.fields[name].chunks for i in infos]
            if any(c != f.chunks for c in chunks):
                attrs["run_chunks"] = [None if c is None else list(c) for c in chunks]
            fields[name] = FieldInfo(
                name=name,
                shape=(total, *f.grid),
                stored_dtype=f.stored_dtype,
                dtype=f.dtype,
                chunks=f.chunks,
                attrs=attrs,
                nbytes=int(sum(i.fields[name].nbytes for i in infos)),
                coordinates=f.coordinates,  # the first run's (the grids are checked to agree)
            )
        variables: dict[str, VariableInfo] = {}
        roles: dict[str, str] = {}
        problems: dict[str, str] = {}
        for name in first.variables:
            described, role, problem = _combine_variable(name, infos, paths, counts)
            roles[name] = role
            if problem is not None:
                problems[name] = problem
            if described is not None:
                variables[name] = described
        for info, path in zip(infos[1:], paths[1:], strict=True):
            for name in info.variables:
                if name not in first.variables and name not in problems:
                    problems[name] = (f"variable '{name}' is in run file {path} but not in run "
                                      f"file {paths[0]}; every run needs it")
        formats = list(dict.fromkeys(i.format for i in infos))
        info = ArchiveInfo(
            path=self.path,
            format=f"runs of {', '.join(formats)}",
            fields=fields,
            variables=variables,
            size_bytes=int(sum(i.size_bytes for i in infos)),
            files=tuple(f for i in infos for f in i.files),
            attrs={
                "time_variable": times[0],
                "n_snapshots": total,
                "run_lengths": [int(n) for n in counts],
                "run_files": list(paths),
                "file_attrs": first.attrs.get("file_attrs", {}),
            },
        )
        offsets = np.concatenate([[0], np.cumsum(counts)]).astype(np.int64)
        return _RunsLayout(info=info, offsets=offsets, roles=roles, problems=problems)

    # -- reading --------------------------------------------------------------------
    def describe(self) -> ArchiveInfo:
        # every call looks at the members again (their own descriptions are memoised
        # per file signature), so a grown member is seen with its new length
        return self._layout(refresh=True).info

    def run_lengths(self) -> np.ndarray:
        """Snapshots per run, in run order (int64)."""
        return np.diff(self._layout().offsets)

    def run_slices(self, start: int, stop: int) -> list[tuple[int, int, int]]:
        """``(run, local_start, local_stop)`` of each run that archive snapshots
        ``[start, stop)`` touch, in order (``member = self.members[run]``)."""
        offsets = self._layout().offsets
        out = []
        run = max(0, int(np.searchsorted(offsets, start, side="right")) - 1)
        while run < len(self.members) and offsets[run] < stop:
            first = int(offsets[run])
            lo, hi = max(start, first) - first, min(stop, int(offsets[run + 1])) - first
            if hi > lo:
                out.append((run, lo, hi))
            run += 1
        return out

    def read_tile(self, field: str, points: slice, snapshots: slice) -> np.ndarray:
        layout = self._layout()
        info = layout.info.fields.get(field)
        if info is None:
            raise missing_field_error(field, self.path, list(layout.info.fields))
        p0, p1 = normalise_slice(points, info.n_points, "points", field)
        s0, s1 = normalise_slice(snapshots, info.n_snapshots, "snapshots", field)
        if p1 == p0 or s1 == s0:
            return np.zeros((p1 - p0, s1 - s0), dtype=info.dtype)
        pieces = []
        for run, lo, hi in self.run_slices(s0, s1):
            tile = self.members[run].read_tile(field, slice(p0, p1), slice(lo, hi))
            if tile.shape != (p1 - p0, hi - lo):
                raise ArchiveError(
                    f"run file {self.paths[run]} changed since it was described: field "
                    f"'{field}' snapshots {lo}..{hi - 1} came back as {tile.shape[1]} "
                    "snapshot(s); describe the archive again"
                )
            pieces.append(tile)
        return pieces[0] if len(pieces) == 1 else np.concatenate(pieces, axis=1)

    def read_variable(self, name: str) -> np.ndarray:
        layout = self._layout()
        problem = layout.problems.get(name)
        if problem is not None:
            raise ArchiveFormatError(problem)
        role = layout.roles.get(name)
        if role is None:
            if name in layout.info.fields:
                raise ArchiveError(
                    f"'{name}' in {self.path} is a snapshot field, not a variable; "
                    "read it in tiles with read_tile"
                )
            raise missing_field_error(name, self.path, list(layout.info.variables),
                                      kind="variable")
        values = [self.members[0].read_variable(name)]
        if role == CONCATENATED:
            values += [m.read_variable(name) for m in self.members[1:]]
            for value, path, n in zip(values, self.paths, np.diff(layout.offsets), strict=True):
                if value.ndim < 1 or value.shape[0] != n:
                    raise ArchiveError(
                        f"variable '{name}' in run file {path} has shape {value.shape}; "
                        f"expected {n} values along the snapshot axis"
                    )
            return np.concatenate(values, axis=0)
        for member, path in zip(self.members[1:], self.paths[1:], strict=True):
            other = member.read_variable(name)
            if not _same_values(values[0], other):
                raise ArchiveFormatError(
                    f"variable '{name}' differs between run files {self.paths[0]} and {path}; "
                    "a variable without a snapshot axis (weights, mask, coordinates) must be "
                    "the same in every run"
                )
        return values[0]


# ------------------------------------------------------------------------ run labels
def run_lengths_from_labels(
    labels: Any, *, name: str, path: str, n_snapshots: int | None = None
) -> np.ndarray:
    """Lengths of the runs given by one run label per snapshot, in order.

    Parameters
    ----------
    labels
        1-D integer labels (boolean or finite float also work; strings do not), one per
        snapshot; the snapshots of one run must be contiguous (``0 0 1 1 2``; labels
        need not be sorted: ``5 5 2 2``).
    name, path
        The dataset and the file it came from, named in errors.
    n_snapshots
        The archive's snapshot count, if the length should be checked.

    Returns
    -------
    numpy.ndarray
        int64 snapshots per run, in the order the runs appear.

    Raises
    ------
    ArchiveError
        Labels not 1-D, empty, of the wrong length, not integers, or a label that comes
        back after another run (``0 0 1 1 0``), naming the first offending snapshot.

    Examples
    --------
    >>> run_lengths_from_labels([7, 7, 7, 3, 3], name="case", path="duct.h5")
    array([3, 2])
    """
    values = np.asarray(labels)
    where = f"run dataset '{name}' in {path}"
    if values.ndim != 1:
        raise ArchiveError(
            f"{where} has shape {values.shape}; expected 1-D, one run label per snapshot"
        )
    if n_snapshots is not None and values.size != int(n_snapshots):
        raise ArchiveError(f"{where} has {values.size} labels; expected {int(n_snapshots)}, "
                           "one run label per snapshot")
    if values.size == 0:
        raise ArchiveError(f"{where} is empty; expected one run label per snapshot")
    if values.dtype.kind not in "biuf":
        raise ArchiveError(f"{where} has dtype {values.dtype}; expected integer run labels")
    if values.dtype.kind == "f" and not np.all(np.isfinite(values)):
        bad = int(np.flatnonzero(~np.isfinite(values))[0])
        raise ArchiveError(
            f"{where} has label {values[bad]} at snapshot {bad}; run labels must be finite"
        )
    starts = np.concatenate([[0], np.flatnonzero(values[1:] != values[:-1]) + 1])
    run_labels = values[starts]
    order = np.argsort(run_labels, kind="stable")
    repeated = order[1:][run_labels[order[1:]] == run_labels[order[:-1]]]
    if repeated.size:
        run = int(repeated.min())
        index = int(starts[run])
        raise ArchiveError(
            f"{where}: label {run_labels[run]} comes back at snapshot {index} after run "
            f"{run_labels[run - 1]} (snapshots {int(starts[run - 1])}..{index - 1}); the "
            "snapshots of one run must be contiguous"
        )
    return np.diff(np.append(starts, values.size)).astype(np.int64)


def selected_run_lengths(run_lengths: Any, snapshot_index: Any) -> np.ndarray:
    """Run lengths of a selection of snapshots; runs with nothing selected are dropped.

    Parameters
    ----------
    run_lengths
        Snapshots per run of the whole archive, in order (their sum is the snapshot count).
    snapshot_index
        Selected archive snapshots, strictly increasing (``arange(start, stop, every)``).

    Returns
    -------
    numpy.ndarray
        int64 selected snapshots per run that keeps at least one.

    Examples
    --------
    >>> selected_run_lengths([5, 4, 3], [1, 3, 5, 7, 9, 11])
    array([2, 2, 2])
    """
    lengths = np.atleast_1d(np.asarray(run_lengths))
    if lengths.ndim != 1 or lengths.size == 0 or lengths.dtype.kind not in "iu":
        raise ArchiveError(
            f"run lengths must be a non-empty 1-D list of integers; got {run_lengths!r}"
        )
    if np.any(lengths < 0):
        bad = int(np.flatnonzero(lengths < 0)[0])
        raise ArchiveError(f"run length {bad} is {lengths[bad]}; run lengths must be >= 0")
    lengths = lengths.astype(np.int64)
    index = np.asarray(snapshot_index)
    if index.ndim != 1 or (index.size and index.dtype.kind not in "iu"):
        raise ArchiveError(
            f"selected snapshots must be a 1-D list of integers; got shape {index.shape}"
        )
    index = index.astype(np.int64)
    total = int(lengths.sum())
    if index.size and (index[0] < 0 or index.max() >= total):
        bad = int(np.flatnonzero((index < 0) | (index >= total))[0])
        raise ArchiveError(f"selected snapshot {index[bad]} (position {bad}) is outside the "
                           f"archive's snapshots 0..{total - 1}")
    if np.any(np.diff(index) <= 0):
        bad = int(np.flatnonzero(np.diff(index) <= 0)[0])
        raise ArchiveError(f"selected snapshots must increase; {index[bad + 1]} follows "
                           f"{index[bad]} at position {bad + 1}")
    runs = np.searchsorted(np.cumsum(lengths), index, side="right")
    counts = np.bincount(runs, minlength=lengths.size)
    return counts[counts > 0].astype(np.int64)
