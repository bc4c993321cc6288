"""zarr v2 and v3 stores (a group of arrays, or a single array), opened read-only.

Fields and variables follow the same rule as HDF5 (:func:`snaplift.archive._common.split_fields_and_variables`)
and the same CF decoding when the attrs carry it (xarray writes ``scale_factor``,
``add_offset`` and ``_FillValue`` as attrs). The array's own zarr ``fill_value`` only
names the value of unwritten chunks and is not treated as missing data.

A chunk that is not in a local store is an error naming the array and the chunk index
(zarr would silently return the fill value: a snapshot of zeros), unless the reader is
opened with ``missing_chunks="fill"`` (``archive.missing_chunks: fill``) *and* the
array declares a fill value. A chunk file shorter than the array says, or one zarr
cannot decode, is an error naming the file.

Chunks are the array's (inner) chunk shape; for a sharded v3 array the shard shape is
reported in ``FieldInfo.attrs["shards"]``.
"""

from __future__ import annotations

import contextlib
import os
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from typing import Any

import numpy as np

from snaplift.archive import _handles
from snaplift.archive._cf import plain_attrs
from snaplift.archive._chunk_reads import ChunkLayout, box_of, read_box
from snaplift.archive._common import Candidate
from snaplift.archive._grouped import GroupedReader
from snaplift.archive._registry import register_reader, sniff_format
from snaplift.errors import ArchiveError, SnapliftError

__all__ = ["ZarrReader"]


def _dimension_names(array: Any) -> list[str] | None:
    names = getattr(getattr(array, "metadata", None), "dimension_names", None)
    if names is None:
        names = array.attrs.get("_ARRAY_DIMENSIONS")
    return None if names is None else [str(n) for n in names]


def _candidate(name: str, array: Any) -> Candidate:
    storage: dict[str, Any] = {
        "storage": "chunked",
        "zarr_format": int(array.metadata.zarr_format),
    }
    shards = getattr(array, "shards", None)
    if shards is not None:
        storage["shards"] = [int(s) for s in shards]
    dims = _dimension_names(array)
    if dims is not None:
        storage["dimension_names"] = dims
    return Candidate(
        name=name,
        shape=tuple(int(s) for s in array.shape),
        dtype=np.dtype(array.dtype),
        attrs=plain_attrs(array.attrs),
        chunks=tuple(int(c) for c in array.chunks),
        storage=storage,
        dims=None if dims is None else tuple(dims),
    )


def _stem(path: str) -> str:
    base = os.path.basename(os.path.normpath(path))
    for suffix in (".zarr", ".zr"):
        if base.lower().endswith(suffix):
            return base[: -len(suffix)] or "x"
    return base or "x"


@dataclass(frozen=True)
class _ChunkFiles:
    """An array whose chunk files hold plain C-order bytes of the full chunk shape."""

    layout: ChunkLayout
    base: str
    encode: Callable[[tuple[int, ...]], str]
    name: str

    def locate(self, index: tuple[int, ...]) -> tuple[tuple[int, ...], int]:
        return index, 0

    def path(self, index: tuple[int, ...]) -> str:
        return os.path.join(self.base, *self.encode(index).split("/"))

    @contextlib.contextmanager
    def open(self, index: tuple[int, ...]) -> Iterator[Any]:
        """The chunk file, checked to hold the whole chunk (raises :class:`_NotPlain` if it
        holds something else, ``FileNotFoundError`` if it is gone)."""
        path = self.path(index)
        expected = int(np.prod(self.layout.chunks, dtype=np.int64)) * self.layout.itemsize
        with open(path, "rb", buffering=0) as handle:
            size = os.fstat(handle.fileno()).st_size
            if size < expected:
                raise ArchiveError(f"zarr chunk file {path} is truncated: {size} of {expected} bytes (chunk "
                                   f"{list(index)} of array {self.name}); restore it from a copy of the archive")
            if size != expected:
                raise _NotPlain(path)
            yield handle


class _NotPlain(Exception):
    """A chunk file that is not the plain bytes of its chunk: zarr itself reads the box."""


def _chunk_files(array: Any, missing: frozenset[tuple[int, ...]] | None = None) -> _ChunkFiles | None:
    """The chunk files of ``array`` when its chunks can be read as plain bytes, else None.

    That needs a local store, a native numeric type, no compressor, filter, transpose or
    sharding (zarr v3: the ``bytes`` codec alone, in this machine's byte order; v2: no
    compressor and no filters, C order) and every chunk written (unwritten chunks are
    the array's fill value; ``missing``: the chunks found missing, if known already). Each
    file's size is checked when it is opened for a read.
    """
    import sys

    from zarr.storage import LocalStore

    store_path = getattr(array, "store_path", None)
    dtype = np.dtype(array.dtype)
    shape = tuple(int(n) for n in array.shape)
    chunks = tuple(int(c) for c in array.chunks)
    metadata = array.metadata
    if (store_path is None or not isinstance(store_path.store, LocalStore) or len(shape) < 1
            or dtype.kind not in "fiu" or not dtype.isnative
            or getattr(array, "shards", None) is not None):
        return None
    if metadata.zarr_format == 3:
        codecs = tuple(metadata.codecs)
        if len(codecs) != 1 or type(codecs[0]).__name__ != "BytesCodec":
            return None
        endian = getattr(codecs[0], "endian", None)
        if dtype.itemsize > 1 and getattr(endian, "value", endian) != sys.byteorder:
            return None
    elif metadata.compressor is not None or metadata.filters or metadata.order != "C":
        return None
    if _missing_chunks(array) if missing is None else missing:
        return None
    base = os.path.join(str(store_path.store.root), store_path.path)
    return _ChunkFiles(ChunkLayout(shape, chunks, dtype.itemsize), base,
                       lambda index: str(metadata.encode_chunk_key(tuple(int(i) for i in index))),
                       str(store_path.path or "/"))


#: files of a zarr array folder that are not chunks
_METADATA_FILES = frozenset({"zarr.json", ".zarray", ".zattrs", ".zgroup", ".zmetadata"})


def _missing_chunks(array: Any) -> frozenset[tuple[int, ...]]:
    """Grid indices of the chunks (shards) of ``array`` that are not in its local store.

    The folder is listed once; keys are only generated when fewer files than chunks exist.
    Other stores (remote, in memory) are not checked: an empty set.
    """
    from zarr.storage import LocalStore

    store_path = getattr(array, "store_path", None)
    if store_path is None or not isinstance(store_path.store, LocalStore):
        return frozenset()
    shape = tuple(int(n) for n in array.shape)
    if not shape:
        return frozenset()
    blocks = tuple(int(c) for c in (getattr(array, "shards", None) or array.chunks))
    grid = [-(-n // c) for n, c in zip(shape, blocks)]
    expected = int(np.prod(grid, dtype=np.int64))
    base = os.path.join(str(store_path.store.root), store_path.path)
    found: set[str] = set()
    for folder, _, names in os.walk(base):
        for name in names:
            if name not in _METADATA_FILES:
                found.add(os.path.relpath(os.path.join(folder, name), base).replace(os.sep, "/"))
    if len(found) >= expected:
        return frozenset()
    metadata = array.metadata
    missing = set()
    for index in np.ndindex(*grid):
        if metadata.encode_chunk_key(tuple(int(i) for i in index)) not in found:
            missing.add(tuple(int(i) for i in index))
    return frozenset(missing)


class _Array:
    """A zarr array whose box reads go straight into a reused tile buffer.

    Same idea as the HDF5 reader's: ``array[box]`` for a box of step-1 slices of a plain
    numeric array is read into :func:`snaplift.archive._handles.tile_buffer`: whole
    snapshots of an uncompressed array straight from its chunk files (positioned reads,
    no decoding step, no event loop), other boxes chunk by chunk by zarr (``out=``);
    everything else is the array's own.
    """

    __slots__ = ("array", "path", "missing")

    def __init__(self, array: Any, path: str, missing: str = "error") -> None:
        self.array = array
        self.path = path
        self.missing = missing

    def _missing(self) -> frozenset[tuple[int, ...]]:
        key = ("zarr-missing-chunks", self.path, str(getattr(self.array, "path", "")), _handles.signature(self.path))
        return _handles.memo(key, lambda: _missing_chunks(self.array))

    def _check_missing(self, selection: Any) -> None:
        missing = self._missing()
        if not missing:
            return
        shape = tuple(int(n) for n in self.array.shape)
        blocks = tuple(int(c) for c in (getattr(self.array, "shards", None) or self.array.chunks))
        selection = selection if isinstance(selection, tuple) else (selection,)
        ranges = []
        for axis, n in enumerate(shape):
            item = selection[axis] if axis < len(selection) else slice(None)
            if isinstance(item, slice):
                start, stop, _ = item.indices(n)
            elif isinstance(item, int | np.integer):
                start, stop = int(item) % max(n, 1), int(item) % max(n, 1) + 1
            else:
                start, stop = 0, n
            ranges.append((start // blocks[axis], max(start, stop - 1) // blocks[axis]))
        hit = sorted(index for index in missing
                     if all(lo <= i <= hi for i, (lo, hi) in zip(index, ranges)))
        if not hit:
            return
        fill = getattr(self.array.metadata, "fill_value", None)
        if self.missing == "fill" and fill is not None:
            return
        name = str(getattr(self.array, "path", "")) or os.path.basename(self.path)
        first = hit[0]
        snapshots = f"snapshots {first[0] * blocks[0]}..{min(shape[0], (first[0] + 1) * blocks[0]) - 1}"
        shown = fill.item() if isinstance(fill, np.generic) else fill
        remedy = ("set archive.missing_chunks: fill to read them as the array's fill value "
                  f"({shown!r})" if fill is not None else "the array declares no fill value")
        raise ArchiveError(
            f"{self.path}: array '{name}' chunk {list(first)} ({snapshots}) is missing"
            f"{f' (and {len(hit) - 1} more chunks of this read)' if len(hit) > 1 else ''}; "
            f"restore it, or {remedy}")

    def _files(self) -> _ChunkFiles | None:
        key = ("zarr-chunk-files", self.path, str(getattr(self.array, "path", "")), _handles.signature(self.path))
        return _handles.memo(key, lambda: _chunk_files(self.array, self._missing()))

    def __getitem__(self, selection: Any) -> Any:
        array = self.array
        dtype = np.dtype(array.dtype)
        box = box_of(selection, tuple(array.shape)) if dtype.kind in "fiu" else None
        if box is None:
            return array[selection]
        self._check_missing(selection)
        out = _handles.tile_buffer(tuple(b - a for a, b in box), dtype)
        files = self._files()
        if files is not None:
            try:
                if read_box(out, files.layout, box, files.locate, files.open):
                    return out
            except _NotPlain:
                pass
            except FileNotFoundError as error:  # a chunk removed since the layout was read
                if self.missing != "fill":
                    raise ArchiveError(f"{self.path}: zarr chunk file {error.filename} is missing; restore it, or "
                                       "set archive.missing_chunks: fill to read it as the array's fill value") \
                        from None
        from zarr.core.buffer.cpu import NDBuffer

        try:
            array.get_basic_selection(selection, out=NDBuffer.from_numpy_array(out))
        except SnapliftError:
            raise
        except Exception as error:  # a damaged chunk: zarr's codecs fail in many ways
            name = str(getattr(array, "path", "")) or os.path.basename(self.path)
            raise ArchiveError(
                f"{self.path}: array '{name}' cannot be read at {_describe(selection)}: a chunk file is damaged or "
                f"truncated ({type(error).__name__}: {' '.join(str(error).split())[:200]}); restore it from a copy "
                "of the archive") from None
        return out

    def __getattr__(self, name: str) -> Any:
        return getattr(self.array, name)


def _describe(selection: Any) -> str:
    items = selection if isinstance(selection, tuple) else (selection,)
    parts = [f"{i.start}:{i.stop}" if isinstance(i, slice) else str(i) for i in items]
    return "[" + ", ".join(parts) + "]"


class ZarrReader(GroupedReader):
    """Read snapshot fields from a zarr v2/v3 group (or single array), read-only.

    Parameters
    ----------
    path
        The store directory.
    fields
        Array paths to treat as fields (default: the classification rule).
    time
        Array path of the snapshot times (default: detected).
    missing_chunks
        ``"error"`` (default): a chunk not in the store is an error naming it;
        ``"fill"``: read it as the array's declared fill value.

    Examples
    --------
    >>> ZarrReader("wake.zarr").describe().fields["u"].chunks   # doctest: +SKIP
    (8, 96, 64)
    """

    format_name = "zarr"
    suffixes = (".zarr",)

    @classmethod
    def guess_can_open(cls, path: str) -> bool:
        found = sniff_format(path)
        if found is not None:
            return found == "zarr"
        return os.path.isdir(path) and str(path).rstrip("/").lower().endswith(cls.suffixes)

    def __init__(self, path: str, *, fields: Any = None, time: str | None = None,
                 missing_chunks: str = "error") -> None:
        super().__init__(path, fields=fields, time=time)
        if missing_chunks not in ("error", "fill"):
            raise ArchiveError(f"missing_chunks = {missing_chunks!r}: expected 'error' or 'fill'")
        self.missing_chunks = missing_chunks

    def _root(self) -> Any:
        return _handles.zarr_node(self.path)

    def _is_array(self, root: Any) -> bool:
        import zarr

        return isinstance(root, zarr.Array)

    def _array(self, root: Any, key: str) -> Any:
        return _Array(root if self._is_array(root) else root[key], self.path, self.missing_chunks)

    def _candidates(self, root: Any) -> list[Candidate]:
        import zarr

        if self._is_array(root):
            return [_candidate(_stem(self.path), root)]
        return [
            _candidate(name, node)
            for name, node in sorted(root.members(max_depth=None))
            if isinstance(node, zarr.Array)
        ]

    def _format(self, root: Any) -> str:
        return f"zarr v{int(root.metadata.zarr_format)}"

    def _root_attrs(self, root: Any) -> dict[str, Any]:
        return {} if self._is_array(root) else plain_attrs(root.attrs)

    def _size_bytes(self) -> int:
        total = 0
        for folder, _, names in os.walk(self.path):
            for name in names:
                try:
                    total += os.path.getsize(os.path.join(folder, name))
                except OSError:  # a file removed while walking does not count
                    pass
        return total


register_reader(ZarrReader)
