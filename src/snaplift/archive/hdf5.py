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

import contextlib
import os
from dataclasses import dataclass
from typing import Any

import numpy as np

from snaplift.archive import _handles
from snaplift.archive._cf import plain_attrs
from snaplift.archive._chunk_reads import ChunkLayout, box_of, chunk_rows, read_box
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


@dataclass(frozen=True)
class _Storage:
    """Where the chunks of an unfiltered dataset lie in the file, for positioned reads.

    ``offsets[index]`` is the byte address of chunk ``index`` (an array of the chunk
    grid's shape); a contiguous dataset is stored as chunks of one snapshot each.
    """

    layout: ChunkLayout
    offsets: np.ndarray

    def locate(self, index: tuple[int, ...]) -> tuple[str, int]:
        return "", int(self.offsets[index])


def _storage(dataset: Any) -> _Storage | None:
    """The byte layout of ``dataset`` when its chunks can be read as plain bytes, else None.

    That needs a native numeric type, no filters (compression, shuffle, checksums), no
    user block, the default file driver and every chunk written (unwritten chunks are
    the fill value).
    """
    file = dataset.file
    if (len(dataset.shape) < 1 or dataset.dtype.kind not in "fiu" or not dataset.dtype.isnative
            or file.driver != "sec2" or file.userblock_size != 0
            or dataset.id.get_create_plist().get_nfilters() != 0):
        return None
    shape = tuple(int(n) for n in dataset.shape)
    itemsize = int(dataset.dtype.itemsize)
    if dataset.chunks is None:
        offset = dataset.id.get_offset()
        if offset is None or shape[0] == 0:
            return None
        snapshot_bytes = int(np.prod(shape[1:], dtype=np.int64)) * itemsize
        starts = int(offset) + snapshot_bytes * np.arange(max(shape[0], 1), dtype=np.int64)
        layout = ChunkLayout(shape, (1, *shape[1:]), itemsize)
        return _Storage(layout, starts.reshape(layout.grid))
    layout = ChunkLayout(shape, tuple(int(c) for c in dataset.chunks), itemsize)
    offsets = np.full(layout.grid, -1, dtype=np.int64)

    def note(info: Any) -> None:
        offsets[tuple(int(o) // c for o, c in zip(info.chunk_offset, layout.chunks))] = int(info.byte_offset)

    if hasattr(dataset.id, "chunk_iter"):
        dataset.id.chunk_iter(note)
    else:  # pragma: no cover - older HDF5 libraries
        for index in range(dataset.id.get_num_chunks()):
            note(dataset.id.get_chunk_info(index))
    if offsets.size == 0 or int(offsets.min()) < 0:
        return None
    return _Storage(layout, offsets)


class _Dataset:
    """An h5py dataset whose box reads go straight into a reused tile buffer.

    ``dataset[box]`` for a box of step-1 slices of a plain numeric dataset is read into
    :func:`snaplift.archive._handles.tile_buffer` (no page faults on fresh memory for
    every tile): from an unfiltered dataset as plain bytes with positioned reads
    (:func:`snaplift.archive._chunk_reads.read_box`: chunk runs adjacent in the file read
    as one run in 8 MiB requests with the next ones hinted to the kernel, so several are
    in flight; they run in parallel, while h5py serialises every call behind one lock),
    whatever the chunks' shape; other boxes with ``read_direct``; everything else is the
    dataset's own.
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
        box = box_of(selection, tuple(dataset.shape)) if dataset.dtype.kind in "fiu" else None
        if box is None:
            return dataset[selection]
        out = _handles.tile_buffer(tuple(b - a for a, b in box), dataset.dtype)
        if not read_stored_box(out, self._layout(), box, self.path, dataset):
            dataset.read_direct(out, source_sel=selection)
        return out

    def __getattr__(self, name: str) -> Any:
        return getattr(self.dataset, name)


def read_stored_box(out: np.ndarray, storage: _Storage | None, box: tuple[tuple[int, int], ...], path: str,
                    dataset: Any) -> bool:
    """Fill ``out`` with ``box`` of the h5py ``dataset`` of ``storage`` in the file ``path`` by
    positioned reads; False when it has no plain layout (nothing read).

    A box whose chunks have short runs (chunks cut finely across the grid, as h5py's and
    netCDF's default chunks are) is read by HDF5 itself, which scatters them in one copy,
    one row of chunks at a time, with the chunks of the next rows hinted to the kernel so
    that the device reads them meanwhile.
    """
    if storage is None:
        return False
    handle = _handles.raw_file(path)
    if read_box(out, storage.layout, box, storage.locate, lambda _key: contextlib.nullcontext(handle), stage=False):
        return True
    fd = handle.fileno()
    rows = chunk_rows(storage.layout, box, storage.locate)
    s0 = box[0][0]
    hinted = ahead = 0
    for row, (t0, t1, ranges) in enumerate(rows):
        while hinted < len(rows) and (hinted <= row or ahead < _handles.READ_AHEAD_BYTES):
            for _key, offset, nbytes in rows[hinted][2]:
                _handles.advise(fd, offset, nbytes)
                ahead += nbytes
            hinted += 1
        ahead -= sum(nbytes for _key, _offset, nbytes in ranges)
        selection = (slice(t0, t1), *(slice(a, b) for a, b in box[1:]))
        dataset.read_direct(out, source_sel=selection, dest_sel=np.s_[t0 - s0:t1 - s0])
    return True


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
