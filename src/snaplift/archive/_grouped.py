"""What the HDF5 and zarr readers share: one store of named arrays, snapshot axis first.

Both formats index arrays by ``"group/name"``, slice them with numpy semantics and
carry attrs, so classification (which arrays are fields), CF decoding and tile reads
are written once here; the format modules only list the arrays and open the store.
"""

from __future__ import annotations

import abc
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from snaplift.archive import _handles
from snaplift.archive._base import ArchiveInfo, FieldInfo, Reader, VariableInfo
from snaplift.archive._cf import (
    Decoding,
    decode,
    decoded_dtype,
    decoding_from_attrs,
    parse_time_units,
)
from snaplift.archive._common import (
    Candidate,
    grid_coordinate_names,
    missing_field_error,
    normalise_slice,
    read_block,
    split_fields_and_variables,
    to_tile,
)
from snaplift.errors import ArchiveError

__all__ = ["GroupedReader", "Entry", "Layout", "effective_chunks", "variable_values"]


@dataclass(frozen=True)
class Entry:
    """Where an array lives in the store and how to decode it."""

    key: str
    grid: tuple[int, ...]
    decoding: Decoding
    is_time: bool = False


@dataclass(frozen=True)
class Layout:
    """A parsed archive: the public description plus what reads need."""

    info: ArchiveInfo
    fields: dict[str, Entry]
    variables: dict[str, Entry]


def effective_chunks(shape: tuple[int, ...], chunks: tuple[int, ...] | None) -> tuple[int, ...]:
    """Chunks to plan with: contiguous C-order storage reads any snapshot block at the
    cost of its bytes, so it behaves like chunks of one whole snapshot."""
    if chunks is None:
        return (1, *shape[1:]) if shape else ()
    return tuple(int(c) for c in chunks)


#: numpy datetime64 / timedelta64 units -> canonical time unit names (snaplift.archive._cf)
_NUMPY_TIME_UNITS = {"D": "days", "h": "hours", "m": "minutes", "s": "seconds", "ms": "milliseconds",
                     "us": "microseconds", "ns": "nanoseconds"}


def numpy_time_unit(dtype: np.dtype) -> str | None:
    """The unit of a datetime64 / timedelta64 dtype as a canonical name, else None."""
    if np.dtype(dtype).kind not in "Mm":
        return None
    return _NUMPY_TIME_UNITS.get(np.datetime_data(dtype)[0])


def variable_values(raw: np.ndarray, entry: Entry) -> np.ndarray:
    """Decode a whole variable; floats come back as float64, complex as complex128.

    Integer, boolean and string variables keep their stored type unless CF packing or a
    fill value applies (then float64, NaN at fills) or they are times (float64 counts of
    the unit before ``since``).
    """
    if raw.dtype.kind in "Mm":
        # native datetimes: counts of their unit since the epoch (NaT is missing)
        counts = raw.view(np.int64).astype(np.float64)
        counts[np.isnat(raw)] = np.nan
        return counts
    if not entry.decoding.is_identity or entry.is_time:
        if raw.dtype.kind not in "biufc":
            return raw
        return decode(raw, entry.decoding)
    if raw.dtype.kind == "f":
        return raw.astype(np.float64)
    if raw.dtype.kind == "c":
        return raw.astype(np.complex128)
    return raw


class GroupedReader(Reader):
    """Base of readers over one store of named arrays (HDF5 file, zarr group)."""

    def __init__(
        self, path: str, *, fields: Sequence[str] | None = None, time: str | None = None
    ) -> None:
        super().__init__(path)
        self.fields = None if fields is None else tuple(str(f) for f in fields)
        self.time = None if time is None else str(time)

    # -- format specific ------------------------------------------------------------
    @abc.abstractmethod
    def _root(self) -> Any:
        """The open store (from the per-process handle cache)."""

    @abc.abstractmethod
    def _candidates(self, root: Any) -> list[Candidate]:
        """Every array in the store, with attrs already made plain."""

    @abc.abstractmethod
    def _array(self, root: Any, key: str) -> Any:
        """The array stored under ``key``."""

    @abc.abstractmethod
    def _format(self, root: Any) -> str:
        """Format name reported by describe (may refine ``format_name``)."""

    @abc.abstractmethod
    def _size_bytes(self) -> int:
        """Bytes on disk."""

    def _root_attrs(self, root: Any) -> dict[str, Any]:
        return {}

    # -- shared ---------------------------------------------------------------------
    def _memo_key(self) -> tuple[Any, ...]:
        # the file signature makes a grown or rewritten archive parse afresh
        signature = _handles.signature(self.path)
        return (type(self).__name__, self.path, self.fields, self.time, signature)

    def _layout(self, *, refresh: bool = False) -> Layout:
        return _handles.memo(self._memo_key(), self._build_layout, refresh=refresh)

    def _build_layout(self) -> Layout:
        root = self._root()
        candidates = self._candidates(root)
        chosen, others, time_name = split_fields_and_variables(
            candidates, path=self.path, fields=self.fields, time=self.time
        )
        fields: dict[str, Entry] = {}
        field_infos: dict[str, FieldInfo] = {}
        by_name = {c.name: c for c in others}
        for c in chosen:
            attrs = dict(c.attrs)
            attrs.update(c.storage)
            field_infos[c.name] = FieldInfo(
                name=c.name,
                shape=c.shape,
                stored_dtype=c.dtype,
                dtype=decoded_dtype(c.dtype),
                chunks=effective_chunks(c.shape, c.chunks),
                attrs=attrs,
                nbytes=int(np.prod(c.shape, dtype=np.int64)) * c.dtype.itemsize,
                coordinates=grid_coordinate_names(c, by_name),
            )
            fields[c.name] = Entry(c.name, c.shape[1:], decoding_from_attrs(c.attrs, c.dtype))
        variables: dict[str, Entry] = {}
        variable_infos: dict[str, VariableInfo] = {}
        for c in others:
            attrs = dict(c.attrs)
            units = parse_time_units(attrs.get("units"))
            is_time = c.name == time_name or units is not None
            if units is not None:
                attrs["time_unit"], attrs["time_origin"] = units
            decoding = decoding_from_attrs(c.attrs, c.dtype)
            out_dtype = c.dtype
            native = numpy_time_unit(c.dtype)
            if native is not None:
                attrs.setdefault("time_unit", native)
                attrs.setdefault("time_origin", "1970-01-01" if c.dtype.kind == "M" else "0")
                out_dtype = np.dtype(np.float64)
            elif c.dtype.kind in "biufc" and (is_time or not decoding.is_identity):
                out_dtype = decoded_dtype(c.dtype)
            elif c.dtype.kind in "fc":
                out_dtype = decoded_dtype(c.dtype)
            attrs["stored_dtype"] = str(c.dtype)
            variable_infos[c.name] = VariableInfo(c.name, c.shape, np.dtype(out_dtype), attrs)
            variables[c.name] = Entry(c.name, c.shape, decoding, is_time=is_time)
        counts = {f.n_snapshots for f in field_infos.values()}
        info = ArchiveInfo(
            path=self.path,
            format=self._format(root),
            fields=field_infos,
            variables=variable_infos,
            size_bytes=self._size_bytes(),
            files=(self.path,),
            attrs={
                "time_variable": time_name,
                "n_snapshots": counts.pop() if len(counts) == 1 else None,
                "file_attrs": self._root_attrs(root),
            },
        )
        return Layout(info=info, fields=fields, variables=variables)

    def describe(self) -> ArchiveInfo:
        # memoised per process under the file's (size, mtime): cheap to call often, and
        # a rewritten or grown file is parsed again
        return self._layout().info

    def _field_entry(self, field: str) -> tuple[Layout, Entry]:
        layout = self._layout()
        entry = layout.fields.get(field)
        if entry is None:
            raise missing_field_error(field, self.path, list(layout.fields))
        return layout, entry

    def read_tile(self, field: str, points: slice, snapshots: slice) -> np.ndarray:
        layout, entry = self._field_entry(field)
        info = layout.info.fields[field]
        p0, p1 = normalise_slice(points, info.n_points, "points", field)
        s0, s1 = normalise_slice(snapshots, info.n_snapshots, "snapshots", field)
        if p1 == p0 or s1 == s0:
            return np.zeros((p1 - p0, s1 - s0), dtype=info.dtype)
        array = self._array(self._root(), entry.key)
        block = read_block(lambda sel: array[sel], entry.grid, (p0, p1), slice(s0, s1))
        return to_tile(decode(block, entry.decoding))

    def read_variable(self, name: str) -> np.ndarray:
        layout = self._layout()
        entry = layout.variables.get(name)
        if entry is None:
            if name in layout.fields:
                raise ArchiveError(
                    f"'{name}' in {self.path} is a snapshot field, not a variable; "
                    "read it in tiles with read_tile"
                )
            raise missing_field_error(name, self.path, list(layout.variables), kind="variable")
        raw = np.asarray(self._array(self._root(), entry.key)[...])
        return variable_values(raw, entry)
