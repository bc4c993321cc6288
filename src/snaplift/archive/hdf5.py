"""HDF5 files, including netCDF-4 files (which are HDF5 files with CF attributes).

Fields are datasets stored snapshot axis first; nested groups give ``"group/name"``.
Which datasets are fields follows :func:`snaplift.archive._common.split_fields_and_variables`: the
snapshot count comes from a time variable (CF ``axis="T"``, ``standard_name="time"``,
``units="... since ..."``, or a dataset named ``t``/``time``), else from the most
common leading length of the datasets with 2 or more dimensions. netCDF dimension
scales (coordinate variables) are variables; netCDF's data-less dimension helpers
(``NAME = "This is a netCDF dimension but not a netCDF variable ..."``) hold no values
and are left out.

CF decoding (scale_factor/add_offset, _FillValue/missing_value -> NaN, time units) is
described in :mod:`snaplift.archive._cf`. Complex data stored as an HDF5 compound of
``r``/``i`` members (h5py's and netCDF's convention) is read as complex128.
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from typing import Any

import numpy as np

from snaplift.archive import _handles
from snaplift.archive._cf import plain_attrs
from snaplift.archive._common import Candidate
from snaplift.archive._grouped import GroupedReader
from snaplift.archive._registry import register_reader, sniff_format

__all__ = ["HDF5Reader", "hdf5_candidates"]

_NETCDF_HELPER = b"This is a netCDF dimension but not a netCDF variable"


def _raw_attr(obj: Any, key: str) -> Any:
    try:
        return obj.attrs.get(key)
    except Exception:  # an attribute of a type h5py cannot read is simply absent here
        return None


def _as_bytes(value: Any) -> bytes:
    if isinstance(value, bytes | np.bytes_):
        return bytes(value)
    if isinstance(value, str):
        return value.encode()
    return b""


def _dimension_names(dataset: Any) -> tuple[str | None, ...] | None:
    """Names of the dimension scales attached to each axis (netCDF-4 dimensions), else None."""
    if _raw_attr(dataset, "DIMENSION_LIST") is None:
        return None
    names: list[str | None] = []
    try:
        for axis in dataset.dims:
            scales = list(axis.values())
            names.append(scales[0].name.lstrip("/") if scales else None)
    except Exception:  # unreadable references: no dimension names, nothing else depends on them
        return None
    return tuple(names)


def hdf5_candidates(root: Any) -> list[Candidate]:
    """Every dataset under ``root`` as a :class:`Candidate` (netCDF helpers left out)."""
    import h5py

    found: list[Candidate] = []

    def visit(name: str, obj: Any) -> None:
        if not isinstance(obj, h5py.Dataset) or obj.shape is None:
            return
        is_scale = _as_bytes(_raw_attr(obj, "CLASS")) == b"DIMENSION_SCALE"
        if is_scale and _as_bytes(_raw_attr(obj, "NAME")).startswith(_NETCDF_HELPER):
            return
        storage: dict[str, Any] = {"storage": "chunked" if obj.chunks else "contiguous"}
        if obj.compression:
            storage["compression"] = str(obj.compression)
        found.append(
            Candidate(
                name=name,
                shape=tuple(int(s) for s in obj.shape),
                dtype=np.dtype(obj.dtype),
                attrs=plain_attrs(obj.attrs),
                is_dimension_scale=is_scale,
                chunks=None if obj.chunks is None else tuple(int(c) for c in obj.chunks),
                storage=storage,
                dims=((name,) if is_scale and len(obj.shape) == 1
                      else _dimension_names(obj)),
            )
        )

    root.visititems(visit)
    return found


def _basic_shape(selection: Any, shape: tuple[int, ...]) -> tuple[int, ...] | None:
    """Result shape of a tuple of step-1 in-range slices (one per axis), else None."""
    if not isinstance(selection, tuple) or len(selection) != len(shape):
        return None
    out = []
    for item, size in zip(selection, shape):
        if not isinstance(item, slice) or item.step not in (None, 1):
            return None
        start = 0 if item.start is None else item.start
        stop = size if item.stop is None else item.stop
        if not 0 <= start < stop <= size:
            return None
        out.append(stop - start)
    return tuple(out)


@dataclass(frozen=True)
class _Storage:
    """Where whole snapshots of an unfiltered dataset lie in the file, for positioned reads.

    ``starts[i]`` is the byte address of snapshot ``i * per_chunk`` (one entry per
    chunk; a contiguous dataset is one chunk of all snapshots); ``snapshot_bytes`` the
    bytes of one snapshot.
    """

    per_chunk: int
    starts: tuple[int, ...]
    snapshot_bytes: int


def _storage(dataset: Any) -> _Storage | None:
    """The byte layout of ``dataset`` when its snapshots can be read as plain bytes, else None.

    That needs a native numeric type, no filters (compression, shuffle, checksums), no
    user block, the default file driver, every chunk written (unwritten chunks are the
    fill value) and chunks that hold whole snapshots (chunk shape ``(c, *grid)``).
    """
    file = dataset.file
    if (len(dataset.shape) < 1 or dataset.dtype.kind not in "fiu" or not dataset.dtype.isnative
            or file.driver != "sec2" or file.userblock_size != 0
            or dataset.id.get_create_plist().get_nfilters() != 0):
        return None
    snapshot_bytes = int(np.prod(dataset.shape[1:], dtype=np.int64)) * dataset.dtype.itemsize
    m = int(dataset.shape[0])
    if dataset.chunks is None:
        offset = dataset.id.get_offset()
        return None if offset is None else _Storage(max(m, 1), (int(offset),), snapshot_bytes)
    chunks = tuple(int(c) for c in dataset.chunks)
    if chunks[1:] != tuple(int(n) for n in dataset.shape[1:]):
        return None
    per_chunk = chunks[0]
    expected = -(-m // per_chunk)
    found: dict[int, int] = {}

    def note(info: Any) -> None:
        found[int(info.chunk_offset[0]) // per_chunk] = int(info.byte_offset)

    if hasattr(dataset.id, "chunk_iter"):
        dataset.id.chunk_iter(note)
    else:  # pragma: no cover - older HDF5 libraries
        for index in range(dataset.id.get_num_chunks()):
            note(dataset.id.get_chunk_info(index))
    if len(found) != expected or any(i not in found for i in range(expected)):
        return None
    return _Storage(per_chunk, tuple(found[i] for i in range(expected)), snapshot_bytes)


def _whole_snapshots(selection: tuple[slice, ...], shape: tuple[int, ...]) -> tuple[int, int] | None:
    """``(s0, s1)`` when ``selection`` takes every point of snapshots ``s0 .. s1``, else None."""
    for item, size in zip(selection[1:], shape[1:]):
        if (item.start or 0) != 0 or (size if item.stop is None else item.stop) != size:
            return None
    first = selection[0]
    return int(first.start or 0), int(shape[0] if first.stop is None else first.stop)


class _Dataset:
    """An h5py dataset whose box reads go straight into a reused tile buffer.

    ``dataset[box]`` for a box of step-1 slices of a plain numeric dataset is read into
    :func:`snaplift.archive._handles.tile_buffer` (no page faults on fresh memory for
    every tile): whole snapshots of an unfiltered dataset as plain bytes with positioned
    reads (:func:`snaplift.archive._handles.read_pieces`: chunks adjacent in the file read
    as one run in 8 MiB requests with the next ones hinted to the kernel, so several are
    in flight; they run in parallel, while h5py serialises every call behind one lock),
    other boxes with ``read_direct``; everything else is the dataset's own.
    """

    __slots__ = ("dataset", "path")

    def __init__(self, dataset: Any, path: str) -> None:
        self.dataset = dataset
        self.path = path

    def _layout(self) -> _Storage | None:
        dataset = self.dataset
        key = ("hdf5-storage", self.path, dataset.name, _handles.signature(self.path))
        return _handles.memo(key, lambda: _storage(dataset))

    def __getitem__(self, selection: Any) -> Any:
        dataset = self.dataset
        shape = _basic_shape(selection, tuple(dataset.shape)) if dataset.dtype.kind in "fiu" else None
        if shape is None:
            return dataset[selection]
        out = _handles.tile_buffer(shape, dataset.dtype)
        snapshots = _whole_snapshots(selection, tuple(dataset.shape))
        layout = self._layout() if snapshots is not None else None
        if layout is None or snapshots is None:
            dataset.read_direct(out, source_sel=selection)
            return out
        handle = _handles.raw_file(self.path)
        s0, s1 = snapshots
        # chunks stored one after another are read as one run, several requests in flight
        runs = _handles.snapshot_runs(s0, s1, layout.per_chunk,
                                      lambda chunk, first: layout.starts[chunk] + first * layout.snapshot_bytes,
                                      layout.snapshot_bytes)
        flat = out.reshape(s1 - s0, -1)
        _handles.read_pieces([(handle, offset, flat[j0 - s0:j1 - s0]) for j0, j1, offset in runs])
        return out

    def __getattr__(self, name: str) -> Any:
        return getattr(self.dataset, name)


class HDF5Reader(GroupedReader):
    """Read snapshot fields from an HDF5 or netCDF-4 file, read-only.

    Parameters
    ----------
    path
        The file.
    fields
        Dataset paths to treat as fields (default: the classification rule above).
    time
        Dataset path of the snapshot times (default: detected).

    Examples
    --------
    >>> reader = HDF5Reader("wake.h5")                          # doctest: +SKIP
    >>> reader.read_tile("u", slice(0, 100), slice(0, 8)).shape  # doctest: +SKIP
    (100, 8)
    """

    format_name = "hdf5"
    suffixes = (".h5", ".hdf5", ".hdf", ".he5", ".nc", ".nc4", ".netcdf")

    @classmethod
    def guess_can_open(cls, path: str) -> bool:
        found = sniff_format(path)
        if found is not None:
            return found == "hdf5"
        return os.path.isfile(path) and str(path).lower().endswith(cls.suffixes)

    def _root(self) -> Any:
        return _handles.hdf5_file(self.path)

    def _array(self, root: Any, key: str) -> Any:
        return _Dataset(root[key], self.path)

    def _candidates(self, root: Any) -> list[Candidate]:
        return hdf5_candidates(root)

    def _format(self, root: Any) -> str:
        return "netcdf4" if "_NCProperties" in root.attrs else self.format_name

    def _root_attrs(self, root: Any) -> dict[str, Any]:
        return plain_attrs(root.attrs)

    def _size_bytes(self) -> int:
        return int(os.path.getsize(self.path))


register_reader(HDF5Reader)
