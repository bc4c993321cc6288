"""A single ``.npy`` file holding one field ``(snapshot, *grid)``, memory-mapped read-only."""

from __future__ import annotations

import os
from collections.abc import Sequence
from typing import Any

import numpy as np

from snaplift.archive import _handles
from snaplift.archive._base import ArchiveInfo, FieldInfo, Reader
from snaplift.archive._cf import decoded_dtype
from snaplift.archive._common import (
    missing_field_error,
    normalise_slice,
    read_block,
    to_tile,
)
from snaplift.archive._registry import register_reader, sniff_format
from snaplift.errors import ArchiveError, ArchiveFormatError

__all__ = ["NpyReader", "npy_field_info"]


def npy_field_info(name: str, array: np.ndarray, path: str, *, files: int = 1) -> FieldInfo:
    """FieldInfo of a memory-mapped ``.npy`` array whose first axis is the snapshot axis.

    A C-ordered file reads any block of snapshots at the cost of its bytes, so its
    chunks are reported as one whole snapshot; a Fortran-ordered file spreads every
    snapshot over the whole file and reports no chunking (one chunk of all snapshots).
    """
    if array.ndim < 1:
        raise ArchiveFormatError(
            f".npy file {path} holds a scalar; expected an array (snapshot, *grid)"
        )
    if array.dtype.kind not in "biufc":
        raise ArchiveFormatError(
            f".npy file {path} has dtype {array.dtype}; expected a numeric array"
        )
    fortran = bool(array.flags.f_contiguous and not array.flags.c_contiguous)
    chunks = None if fortran else (1, *array.shape[1:])
    return FieldInfo(
        name=name,
        shape=tuple(int(s) for s in array.shape),
        stored_dtype=np.dtype(array.dtype),
        dtype=decoded_dtype(array.dtype),
        chunks=chunks,
        attrs={"storage": "memory-mapped .npy", "order": "F" if fortran else "C"},
        nbytes=int(array.nbytes),
    )


def _stem(path: str) -> str:
    return os.path.splitext(os.path.basename(path))[0] or "x"


class NpyReader(Reader):
    """One field from one ``.npy`` file, memory-mapped (``mmap_mode="r"``).

    Parameters
    ----------
    path
        The file; its array is ``(snapshot, *grid)``.
    fields
        At most one name: the field's name (default: the file stem).

    Examples
    --------
    >>> NpyReader("u.npy").describe().fields["u"].shape        # doctest: +SKIP
    (400, 96, 64)
    """

    format_name = "npy"
    suffixes = (".npy",)

    def __init__(self, path: str, *, fields: Sequence[str] | None = None) -> None:
        super().__init__(path)
        if fields is not None and len(tuple(fields)) != 1:
            raise ArchiveError(
                f".npy file {path} holds exactly one field; got fields {list(fields)}"
            )
        self.fields = None if fields is None else (str(tuple(fields)[0]),)

    @classmethod
    def guess_can_open(cls, path: str) -> bool:
        found = sniff_format(path)
        if found is not None:
            return found == "npy"
        return os.path.isfile(path) and str(path).lower().endswith(cls.suffixes)

    @property
    def field_name(self) -> str:
        return self.fields[0] if self.fields else _stem(self.path)

    def _array(self) -> np.ndarray:
        return _handles.npy_array(self.path)

    def describe(self) -> ArchiveInfo:
        info = npy_field_info(self.field_name, self._array(), self.path)
        return ArchiveInfo(
            path=self.path,
            format=self.format_name,
            fields={info.name: info},
            variables={},
            size_bytes=int(os.path.getsize(self.path)),
            files=(self.path,),
            attrs={"time_variable": None, "n_snapshots": info.n_snapshots},
        )

    def read_tile(self, field: str, points: slice, snapshots: slice) -> np.ndarray:
        if field != self.field_name:
            raise missing_field_error(field, self.path, [self.field_name])
        array = self._array()
        grid = array.shape[1:]
        n_points = int(np.prod(grid, dtype=np.int64))
        p0, p1 = normalise_slice(points, n_points, "points", field)
        s0, s1 = normalise_slice(snapshots, array.shape[0], "snapshots", field)
        out_dtype = decoded_dtype(array.dtype)
        if p1 == p0 or s1 == s0:
            return np.zeros((p1 - p0, s1 - s0), dtype=out_dtype)
        block: Any = read_block(lambda sel: array[sel], grid, (p0, p1), slice(s0, s1))
        # astype copies out of the map, so the tile never aliases the file
        return to_tile(block.astype(out_dtype))

    def read_variable(self, name: str) -> np.ndarray:
        raise missing_field_error(name, self.path, [], kind="variable")


register_reader(NpyReader)
