"""A series of per-snapshot files matched by a glob pattern (HDF5 or ``.npy``).

Each HDF5 file holds the fields *without* a snapshot axis (a dataset's shape is the
grid); each ``.npy`` file holds one field's grid. Files are ordered by their time value
when every file has one (a scalar dataset, or a root attribute, named ``t``/``time``,
or named by ``time=``; a root attribute's unit is the root attribute ``time_units`` /
``time_unit`` or ``<name>_units``), otherwise by natural number order (``frame_2`` before
``frame_10``), never by plain string order; ties in time keep natural order.

Which HDF5 datasets are fields: the numeric, non-scalar datasets of the first file that
every other file inspected also holds with the same shape. When the files carry times
every file is opened (to read them) and inspected; otherwise the second and the last
file are. Datasets of the first file that fail this test are variables (weights,
coordinates, masks stored once). Decoding attrs are taken from the first file.

A pickled reader stays small: it carries its options plus an *order hint* (format,
file count, and the permutation from natural to time order when they differ), not the
file list. A worker matches the pattern again, checks the count, and applies the hint,
so it neither reopens every file to learn the order nor receives thousands of paths
with every task. Times are read again in a worker only if it asks for them.
"""

from __future__ import annotations

import glob
import os
import re
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from snaplift.archive import _handles
from snaplift.archive._base import ArchiveInfo, FieldInfo, Reader, VariableInfo
from snaplift.archive._cf import (
    TIME_NAMES,
    Decoding,
    decode,
    decoded_dtype,
    decoding_from_attrs,
    parse_time_units,
    plain_attrs,
)
from snaplift.archive._common import (
    missing_field_error,
    natural_key,
    normalise_slice,
    read_block,
    to_tile,
)
from snaplift.archive._grouped import Entry, variable_values
from snaplift.archive._registry import is_glob, register_reader, sniff_format
from snaplift.archive.hdf5 import hdf5_candidates
from snaplift.errors import ArchiveError, ArchiveFormatError

__all__ = ["SeriesReader", "common_stem"]

_TRAILING = re.compile(r"[\s_.\-]*\d+$")


def common_stem(files: Sequence[str]) -> str:
    """``frame_1.npy, frame_2.npy`` -> ``"frame"``; ``"x"`` when the stems differ."""
    stems = set()
    for path in files:
        base = os.path.splitext(os.path.basename(path))[0]
        stems.add(_TRAILING.sub("", base))
    stem = stems.pop() if len(stems) == 1 else ""
    return stem if stem.isidentifier() else "x"


@dataclass(frozen=True)
class _OrderHint:
    """What a worker needs to reproduce the parent's file order without reading times."""

    kind: str
    count: int
    permutation: tuple[int, ...] | None  # natural-order positions in time order
    time_name: str | None


@dataclass(frozen=True)
class _SeriesLayout:
    info: ArchiveInfo
    kind: str
    files: tuple[str, ...]
    fields: dict[str, Entry]
    variables: dict[str, Entry]
    time_name: str | None
    times: np.ndarray | None
    #: the file (first in natural order) that variables are read from
    first_file: str
    #: natural-order positions in file order; None when the two agree
    permutation: tuple[int, ...] | None = None

    def hint(self) -> _OrderHint:
        return _OrderHint(self.kind, len(self.files), self.permutation, self.time_name)


def _file_time(root: Any, name: str, decoding: Decoding | None = None) -> float | None:
    """A file's time value: a scalar dataset ``name``, else a root attribute ``name``."""
    if name in root:
        node = root[name]
        if getattr(node, "shape", None) not in ((), (1,)):
            return None
        raw = np.asarray(node[()]).reshape(())
        if raw.dtype.kind not in "iuf":
            return None
        if decoding is not None and not decoding.is_identity:
            return float(decode(raw.reshape(1), decoding)[0])
        return float(raw)
    if name in root.attrs:
        value = np.asarray(root.attrs[name])
        if value.size == 1 and value.dtype.kind in "iuf":
            return float(value.reshape(()))
    return None


def _root_time_unit(root: Any, name: str) -> dict[str, Any]:
    """``{"units": ...}`` of a time held in a root attribute ``name``: the unit is a root
    attribute ``<name>_units`` / ``<name>_unit`` / ``time_units`` / ``time_unit`` (an
    attribute cannot carry attributes of its own); empty when there is none."""
    for key in dict.fromkeys((f"{name}_units", f"{name}_unit", "time_units", "time_unit")):
        if key in root.attrs:
            value = plain_attrs({key: root.attrs[key]}).get(key)
            if isinstance(value, str) and value.strip():
                return {"units": value.strip(), "units_attribute": key}
    return {}


class SeriesReader(Reader):
    """Snapshot fields spread over one file per snapshot, matched by a glob pattern.

    Parameters
    ----------
    path
        The glob pattern (``"run/frame_*.h5"``; ``**`` recurses).
    fields
        HDF5 series: the datasets that are per-snapshot fields. ``.npy`` series: at most
        one name, the field's name (default: the files' common stem, else ``"x"``).
    time
        HDF5 series: the per-file scalar dataset or root attribute holding the time.

    Examples
    --------
    >>> reader = SeriesReader("run/frame_*.npy")             # doctest: +SKIP
    >>> reader.describe().fields["frame"].shape              # doctest: +SKIP
    (12, 96, 64)
    """

    format_name = "series"
    suffixes = ()

    def __init__(
        self, path: str, *, fields: Sequence[str] | None = None, time: str | None = None
    ) -> None:
        super().__init__(path)
        self.fields = None if fields is None else tuple(str(f) for f in fields)
        self.time = None if time is None else str(time)

    @classmethod
    def guess_can_open(cls, path: str) -> bool:
        return is_glob(str(path))

    # -- pickling: carry a small order hint, not the file list --------------------------
    def _memo_key(self) -> tuple[Any, ...]:
        return (type(self).__name__, self.path, self.fields, self.time)

    def __getstate__(self) -> dict[str, Any]:
        state = dict(vars(self))
        layout = _handles.peek(self._memo_key())
        state["_order_hint"] = None if layout is None else layout.hint()
        return state

    def __setstate__(self, state: dict[str, Any]) -> None:
        state = dict(state)
        hint = state.pop("_order_hint", None)
        self.__dict__.update(state)
        if hint is None:
            return
        layout = _handles.peek(self._memo_key())
        if layout is not None and layout.hint() == hint:
            return
        # the parent saw another state of the series (it grew, or this worker has an
        # older layout): follow the parent
        _handles.forget(self._memo_key())
        _handles.memo((*self._memo_key(), "hint"), lambda: hint, refresh=True)

    # -- layout ---------------------------------------------------------------------
    def _layout(self, *, refresh: bool = False) -> _SeriesLayout:
        return _handles.memo(self._memo_key(), self._build_layout, refresh=refresh)

    def _build_layout(self) -> _SeriesLayout:
        files = self._match()
        if not files:
            raise ArchiveError(f"no files match the pattern {self.path}")
        hint: _OrderHint | None = _handles.peek((*self._memo_key(), "hint"))
        if hint is not None:
            if len(files) != hint.count:
                raise ArchiveFormatError(
                    f"series {self.path} changed since it was described: {len(files)} "
                    f"files match now, {hint.count} did then; describe it again"
                )
            if hint.kind == "npy":
                return self._npy_layout(files)
            return self._hdf5_layout(files, hint)
        kinds: dict[str, str] = {}
        for path in files:
            kind = sniff_format(path)
            if kind not in ("hdf5", "npy"):
                raise ArchiveFormatError(
                    f"series file {path} (pattern {self.path}) is neither HDF5 nor .npy"
                )
            kinds.setdefault(kind, path)
        if len(kinds) > 1:
            raise ArchiveFormatError(
                f"pattern {self.path} matches both HDF5 ({kinds['hdf5']}) and .npy "
                f"({kinds['npy']}) files; use one format per series"
            )
        if "npy" in kinds:
            return self._npy_layout(files)
        return self._hdf5_layout(files)

    def _info(
        self,
        files: Sequence[str],
        fields: dict[str, FieldInfo],
        variables: dict[str, VariableInfo],
        time_name: str | None,
        kind: str,
    ) -> ArchiveInfo:
        return ArchiveInfo(
            path=self.path,
            format=self.format_name,
            fields=fields,
            variables=variables,
            size_bytes=sum(int(os.path.getsize(f)) for f in files),
            files=tuple(files),
            attrs={
                "time_variable": time_name,
                "n_snapshots": len(files),
                "file_format": kind,
                "order": "time" if time_name else "natural",
            },
        )

    def _field_info(self, name: str, grid: tuple[int, ...], dtype: np.dtype, n: int,
                    attrs: dict[str, Any]) -> FieldInfo:
        attrs = dict(attrs)
        attrs["storage"] = "one file per snapshot"
        shape = (n, *grid)
        return FieldInfo(
            name=name,
            shape=shape,
            stored_dtype=np.dtype(dtype),
            dtype=decoded_dtype(dtype),
            chunks=(1, *grid),
            attrs=attrs,
            nbytes=int(np.prod(shape, dtype=np.int64)) * np.dtype(dtype).itemsize,
        )

    def _npy_layout(self, files: list[str]) -> _SeriesLayout:
        if self.time is not None:
            raise ArchiveError(
                f".npy series {self.path} carries no times; option time='{self.time}' "
                "cannot apply (give a fixed step instead)"
            )
        if self.fields is not None and len(self.fields) != 1:
            raise ArchiveError(
                f".npy series {self.path} holds exactly one field; got {list(self.fields)}"
            )
        name = self.fields[0] if self.fields else common_stem(files)
        first = _handles.npy_array(files[0])
        for other in {files[-1]}:
            array = _handles.npy_array(other)
            if array.shape != first.shape or array.dtype != first.dtype:
                raise ArchiveFormatError(
                    f"series file {other} holds {array.dtype} {array.shape}; expected "
                    f"{first.dtype} {first.shape} like {files[0]}"
                )
        grid = tuple(int(s) for s in first.shape)
        info = self._field_info(name, grid, first.dtype, len(files), {})
        entry = Entry(key="", grid=grid, decoding=Decoding())
        return _SeriesLayout(
            info=self._info(files, {name: info}, {}, None, "npy"),
            kind="npy",
            files=tuple(files),
            fields={name: entry},
            variables={},
            time_name=None,
            times=None,
            first_file=files[0],
        )

    def _hdf5_layout(self, files: list[str], hint: _OrderHint | None = None) -> _SeriesLayout:
        first_root = _handles.hdf5_file(files[0])
        candidates = {c.name: c for c in hdf5_candidates(first_root)}
        # the time: explicit, else a scalar dataset or root attribute named t/time
        time_name = self.time if hint is None else hint.time_name
        if hint is not None:
            pass  # the parent found the time; reading it again is what the hint avoids
        elif time_name is None:
            for name in TIME_NAMES:
                if _file_time(first_root, name) is not None:
                    time_name = name
                    break
        elif _file_time(first_root, time_name) is None:
            raise ArchiveFormatError(
                f"series file {files[0]} has no scalar dataset or attribute '{time_name}' "
                "to order the snapshots by"
            )
        time_candidate = candidates.get(time_name) if time_name else None
        time_decoding = (
            decoding_from_attrs(time_candidate.attrs, time_candidate.dtype)
            if time_candidate
            else None
        )
        if self.fields is not None:
            for name in self.fields:
                if name not in candidates:
                    raise missing_field_error(name, files[0], sorted(candidates), kind="dataset")
            field_names = list(self.fields)
        else:
            field_names = [
                c.name
                for c in candidates.values()
                if c.name != time_name
                and len(c.shape) >= 1
                and c.dtype.kind in "biufc"
                and not c.is_dimension_scale
            ]
        times: list[float] | None = [] if time_name and hint is None else None
        # with times every file is opened anyway; without, the second and last suffice
        indices = range(len(files)) if times is not None else sorted({0, 1, len(files) - 1})
        static: set[str] = set()
        for index in indices:
            if index >= len(files):
                continue
            root = first_root if index == 0 else _handles.hdf5_file(files[index])
            if times is not None:
                value = _file_time(root, time_name, time_decoding)  # type: ignore[arg-type]
                if value is None:
                    raise ArchiveFormatError(
                        f"series file {files[index]} has no time '{time_name}' although "
                        f"{files[0]} has one; every file needs it to order the series"
                    )
                times.append(value)
            if index == 0:
                continue
            for name in field_names:
                node = root.get(name)
                if node is None or not hasattr(node, "shape"):
                    if self.fields is not None:
                        raise ArchiveFormatError(
                            f"series file {files[index]} has no dataset '{name}' "
                            f"(pattern {self.path})"
                        )
                    static.add(name)
                elif tuple(node.shape) != candidates[name].shape:
                    raise ArchiveFormatError(
                        f"dataset '{name}' in series file {files[index]} has shape "
                        f"{tuple(node.shape)}; expected {candidates[name].shape} "
                        f"as in {files[0]}"
                    )
        if len(files) == 1 and self.fields is None:
            static = set()
        field_names = [n for n in field_names if n not in static]
        ordered = list(files)
        time_array = None
        permutation: tuple[int, ...] | None = None
        if times is not None:
            order = sorted(range(len(files)), key=lambda i: times[i])  # stable: natural ties
            ordered = [files[i] for i in order]
            time_array = np.asarray([times[i] for i in order], dtype=np.float64)
            permutation = None if order == list(range(len(files))) else tuple(order)
        elif hint is not None and hint.permutation is not None:
            permutation = hint.permutation
            ordered = [files[i] for i in permutation]
        fields: dict[str, Entry] = {}
        field_infos: dict[str, FieldInfo] = {}
        for name in field_names:
            c = candidates[name]
            field_infos[name] = self._field_info(name, c.shape, c.dtype, len(files),
                                                 {**c.attrs, **c.storage})
            fields[name] = Entry(name, c.shape, decoding_from_attrs(c.attrs, c.dtype))
        variables: dict[str, Entry] = {}
        variable_infos: dict[str, VariableInfo] = {}
        for c in candidates.values():
            if c.name in fields or c.name == time_name:
                continue
            attrs = {**c.attrs, "source": f"first file {files[0]}"}
            decoding = decoding_from_attrs(c.attrs, c.dtype)
            numeric = c.dtype.kind in "biufc"
            out = decoded_dtype(c.dtype) if numeric and (
                c.dtype.kind in "fc" or not decoding.is_identity) else c.dtype
            variable_infos[c.name] = VariableInfo(c.name, c.shape, np.dtype(out), attrs)
            variables[c.name] = Entry(c.name, c.shape, decoding)
        if time_name is not None:
            attrs = {"source": "one value per file"}
            if time_candidate is not None:
                attrs.update(time_candidate.attrs)
            else:
                attrs.update(_root_time_unit(first_root, time_name))
            units = parse_time_units(attrs.get("units"))
            if units is not None:
                attrs["time_unit"], attrs["time_origin"] = units
            variable_infos[time_name] = VariableInfo(
                time_name, (len(files),), np.dtype(np.float64), attrs
            )
        return _SeriesLayout(
            info=self._info(ordered, field_infos, variable_infos, time_name, "hdf5"),
            kind="hdf5",
            files=tuple(ordered),
            fields=fields,
            variables=variables,
            time_name=time_name,
            times=time_array,
            first_file=files[0],
            permutation=permutation,
        )

    # -- reading --------------------------------------------------------------------
    def describe(self) -> ArchiveInfo:
        # the pattern is matched again on every call (a directory listing); the parsed
        # layout is reused while the same files match, so describe() stays cheap. A file
        # rewritten in place under the same name is not noticed until a new process or
        # snaplift.archive._handles.clear().
        layout = _handles.peek(self._memo_key())
        if layout is not None and set(self._match()) == set(layout.files):
            return layout.info
        return self._layout(refresh=True).info

    def _match(self) -> list[str]:
        return sorted(
            (f for f in glob.glob(self.path, recursive=True) if os.path.isfile(f)),
            key=natural_key,
        )

    def _read_one(self, layout: _SeriesLayout, path: str, field: str, entry: Entry,
                  points: tuple[int, int]) -> np.ndarray:
        if layout.kind == "npy":
            array: Any = _handles.npy_array(path)
        else:
            root = _handles.hdf5_file(path)
            array = root.get(entry.key)
            if array is None:
                raise ArchiveFormatError(
                    f"series file {path} has no dataset '{entry.key}' (field '{field}' "
                    f"of pattern {self.path})"
                )
        if tuple(array.shape) != entry.grid:
            raise ArchiveFormatError(
                f"field '{field}' in series file {path} has shape {tuple(array.shape)}; "
                f"expected {entry.grid}"
            )
        return read_block(lambda sel: array[sel], entry.grid, points, None)

    def read_tile(self, field: str, points: slice, snapshots: slice) -> np.ndarray:
        layout = self._layout()
        entry = layout.fields.get(field)
        if entry is None:
            raise missing_field_error(field, self.path, list(layout.fields))
        info = layout.info.fields[field]
        p0, p1 = normalise_slice(points, info.n_points, "points", field)
        s0, s1 = normalise_slice(snapshots, info.n_snapshots, "snapshots", field)
        if p1 == p0 or s1 == s0:
            return np.zeros((p1 - p0, s1 - s0), dtype=info.dtype)
        rows = [
            self._read_one(layout, layout.files[j], field, entry, (p0, p1))
            for j in range(s0, s1)
        ]
        return to_tile(decode(np.concatenate(rows, axis=0), entry.decoding))

    def read_variable(self, name: str) -> np.ndarray:
        layout = self._layout()
        if name == layout.time_name:
            if layout.times is not None:
                return layout.times.copy()
            # a worker built from an order hint: read the times now, in file order
            attrs = layout.info.variables[name].attrs
            decoding = decoding_from_attrs(attrs, np.dtype(np.float64))
            values = [_file_time(_handles.hdf5_file(f), name, decoding) for f in layout.files]
            return np.asarray(values, dtype=np.float64)
        entry = layout.variables.get(name)
        if entry is None:
            if name in layout.fields:
                raise ArchiveError(
                    f"'{name}' in {self.path} is a snapshot field, not a variable; "
                    "read it in tiles with read_tile"
                )
            raise missing_field_error(
                name, self.path, list(layout.info.variables), kind="variable"
            )
        root = _handles.hdf5_file(layout.first_file)
        return variable_values(np.asarray(root[entry.key][...]), entry)


register_reader(SeriesReader)
