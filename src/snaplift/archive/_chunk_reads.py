"""Positioned reads of a box of an unfiltered chunked array, straight into the tile buffer.

An HDF5 dataset without filters, and a zarr array with the plain ``bytes`` codec alone,
keep every chunk as the C-order bytes of the full chunk shape (edge chunks too, padded).
A box of the array (a tile: snapshots ``s0 .. s1`` and a block of the grid) is then a
list of byte runs of the chunks' files: :func:`read_box` reads them with positioned
reads (:func:`snaplift.archive._handles.read_pieces`: requests of at most 8 MiB, the next
ones hinted to the kernel so that several are in flight, the GIL released), chunk runs
adjacent in the file and in the tile joined into one request.

Before this, only chunks holding whole snapshots (chunk shape ``(c, *grid)``) were read
this way; chunks that split the grid (``(8, 128, 512)`` of a ``512 x 512`` grid, or the
chunks h5py and netCDF choose by default) went through the library, one synchronous
chunk at a time: the device stood idle between requests, and under a 200 MB/s cap the
compress read at 0.76-0.82 of the cap against 0.92 for whole-snapshot chunks (issue 16).

A run of a chunk is where both the chunk's bytes and the tile's are contiguous: the
innermost axes that the box takes whole in the chunk and in the tile, times the extent
on the first axis that is not. Runs of at least :data:`MIN_RUN_BYTES`, and runs of whole
snapshots of a chunk (joined with the next chunk's where the file allows), are read
straight into the tile. Shorter ones (a chunk cut finely across the grid) are, with
``stage``, read in one request per chunk part into a small staging buffer and copied,
provided that the bytes read stay within :data:`MAX_STAGED_EXCESS` of the bytes needed
(else the caller's library read is used, which reads no more than needed); without
``stage`` the caller's library reads them (HDF5 scatters a chunk into the tile in one
copy: measured warm on h5py's default chunks ``(16, 32, 32)``, the staged reads took
0.24 s of CPU per 512 MiB against its 0.11-0.15 s), with the rows of chunks hinted to the
kernel ahead of it (:func:`chunk_rows`).
"""

from __future__ import annotations

import contextlib
import itertools
import math
from collections.abc import Callable, Hashable, Iterator
from dataclasses import dataclass
from typing import Any

import numpy as np

from snaplift.archive import _handles

__all__ = ["ChunkLayout", "read_box", "box_of", "chunk_rows", "MIN_RUN_BYTES", "STAGE_BYTES", "MAX_STAGED_EXCESS",
           "OPEN_FILES"]

#: runs at least this long are read straight into the tile; shorter ones through a staging buffer
MIN_RUN_BYTES = 64 * 2**10
#: bytes of the staging buffer (at least one chunk's part of one snapshot)
STAGE_BYTES = 8 * 2**20
#: staged reads may read at most this fraction more than the box needs
MAX_STAGED_EXCESS = 0.25
#: files open at once while a box is read (zarr keeps each chunk in a file of its own)
OPEN_FILES = 256


@dataclass(frozen=True)
class ChunkLayout:
    """Shape, chunk shape and item size of an array stored as plain C-order chunks."""

    shape: tuple[int, ...]
    chunks: tuple[int, ...]
    itemsize: int

    @property
    def grid(self) -> tuple[int, ...]:
        """Chunks along each axis."""
        return tuple(-(-n // c) for n, c in zip(self.shape, self.chunks))


def box_of(selection: Any, shape: tuple[int, ...]) -> tuple[tuple[int, int], ...] | None:
    """``((start, stop), ...)`` of a tuple of step-1 in-range slices (one per axis), else None."""
    if not isinstance(selection, tuple) or len(selection) != len(shape):
        return None
    box = []
    for item, size in zip(selection, shape):
        if not isinstance(item, slice) or item.step not in (None, 1):
            return None
        start = 0 if item.start is None else int(item.start)
        stop = size if item.stop is None else int(item.stop)
        if not 0 <= start < stop <= size:
            return None
        box.append((start, stop))
    return tuple(box)


@dataclass(frozen=True)
class _Part:
    """Bytes ``offset .. offset + nbytes`` of the file ``key``, for the tile.

    ``target`` is the tile's byte offset when the bytes go straight there; else
    ``copy(staged)`` puts them (read into a staging buffer) in place.
    """

    key: Hashable
    offset: int
    nbytes: int
    target: int | None
    copy: Callable[[np.ndarray], None] | None = None


def _strides(extents: tuple[int, ...]) -> tuple[int, ...]:
    """C-order element strides of an array of ``extents``."""
    out, step = [], 1
    for n in reversed(extents):
        out.append(step)
        step *= n
    return tuple(reversed(out))


def _parts(out: np.ndarray, layout: ChunkLayout, box: tuple[tuple[int, int], ...],
           locate: Callable[[tuple[int, ...]], tuple[Hashable, int]], *, stage: bool = True) -> list[_Part] | None:
    """The reads that fill ``out`` (the box, C-contiguous) chunk by chunk, or None when a
    staged read would read more than :data:`MAX_STAGED_EXCESS` beyond the box, or when
    a short run would need one and ``stage`` is false."""
    itemsize, chunks = layout.itemsize, layout.chunks
    extents = tuple(b - a for a, b in box)
    out_strides = _strides(extents)
    chunk_strides = _strides(chunks)
    flat = out.reshape(-1)
    parts: list[_Part] = []
    needed = staged = 0
    ranges = [range(a // c, -(-b // c)) for (a, b), c in zip(box, chunks)]
    for index in itertools.product(*ranges):
        origin = tuple(i * c for i, c in zip(index, chunks))
        lo = tuple(max(a, o) - o for (a, _), o in zip(box, origin))  # in chunk coordinates
        hi = tuple(min(b, o + c) - o for (_, b), o, c in zip(box, origin, chunks))
        width = tuple(h - low for low, h in zip(lo, hi))
        at = tuple(o + low - a for o, low, (a, _) in zip(origin, lo, box))  # in tile coordinates
        key, base = locate(index)
        # the run: innermost axes whole in chunk and tile, then the first one that is not
        axis = len(chunks) - 1
        run = 1
        while axis >= 0:
            run *= width[axis]
            if not (width[axis] == chunks[axis] == extents[axis]):
                break
            axis -= 1
        if axis < 0:  # the whole chunk part is one run in the file and in the tile
            nbytes = run * itemsize
            parts.append(_Part(key, base + sum(low * s for low, s in zip(lo, chunk_strides)) * itemsize,
                               nbytes, sum(t * s for t, s in zip(at, out_strides)) * itemsize))
            needed += nbytes
            continue
        outer = [range(w) for w in width[:axis]]
        if axis == 0 or run * itemsize >= MIN_RUN_BYTES:  # axis 0: one run per chunk, joined with the next
            for step in itertools.product(*outer):
                source = sum((low + k) * s for low, k, s in zip(lo, step, chunk_strides))
                source += lo[axis] * chunk_strides[axis]
                target = sum((t + k) * s for t, k, s in zip(at, step, out_strides))
                target += at[axis] * out_strides[axis]
                parts.append(_Part(key, base + source * itemsize, run * itemsize, target * itemsize))
            needed += run * itemsize * math.prod(width[:axis])
            continue
        if not stage:
            return None
        # short runs: the chunk's bytes from the box's first to its last, a few snapshots at a time
        part_elems = math.prod(chunks[1:])  # one snapshot of the chunk
        first = sum(low * s for low, s in zip(lo[1:], chunk_strides[1:]))
        last = sum((h - 1) * s for h, s in zip(hi[1:], chunk_strides[1:])) + 1
        span = last - first  # elements read per snapshot of the chunk
        # snapshots of the chunk read together only where their spans follow on in the file
        per_read = max(1, STAGE_BYTES // (part_elems * itemsize)) if span == part_elems else 1
        for t0 in range(lo[0], hi[0], per_read):
            t1 = min(hi[0], t0 + per_read)
            count = (t1 - t0 - 1) * part_elems + span
            parts.append(_Part(key, base + (t0 * chunk_strides[0] + first) * itemsize, count * itemsize, None,
                               _copier(flat, layout, lo, hi, at, extents, t0, t1)))
            staged += count * itemsize
        needed += math.prod(width) * itemsize
    if staged and staged > (1 + MAX_STAGED_EXCESS) * needed:
        return None
    return _join(parts)


def _copier(flat: np.ndarray, layout: ChunkLayout, lo: tuple[int, ...], hi: tuple[int, ...],
            at: tuple[int, ...], extents: tuple[int, ...], t0: int, t1: int) -> Callable[[np.ndarray], None]:
    """Copy snapshots ``t0 .. t1`` of a chunk's box part, read from the part's first element on
    (element ``lo`` of snapshot ``t0``), into the tile."""
    tile = flat.reshape(extents)
    target = tile[(slice(at[0] + t0 - lo[0], at[0] + t1 - lo[0]),)
                  + tuple(slice(t, t + h - low) for t, low, h in zip(at[1:], lo[1:], hi[1:]))]
    itemsize = flat.dtype.itemsize
    strides = tuple(s * itemsize for s in _strides(layout.chunks))

    def copy(staged: np.ndarray) -> None:
        # the box's corner is the first element read, so the box is a strided view of the staged bytes
        source = np.lib.stride_tricks.as_strided(staged.view(flat.dtype), shape=target.shape, strides=strides,
                                                 writeable=False)
        target[...] = source

    return copy


def _join(parts: list[_Part]) -> list[_Part]:
    """Parts read straight into the tile joined where both the file's and the tile's bytes follow on."""
    joined: list[_Part] = []
    for part in parts:
        if joined:
            last = joined[-1]
            if (part.target is not None and last.target is not None and part.key == last.key
                    and part.offset == last.offset + last.nbytes and part.target == last.target + last.nbytes):
                joined[-1] = _Part(last.key, last.offset, last.nbytes + part.nbytes, last.target)
                continue
        joined.append(part)
    return joined


def _groups(parts: list[_Part]) -> Iterator[list[_Part]]:
    """Consecutive parts touching at most :data:`OPEN_FILES` files."""
    group: list[_Part] = []
    keys: set[Hashable] = set()
    for part in parts:
        if part.key not in keys and len(keys) == OPEN_FILES:
            yield group
            group, keys = [], set()
        group.append(part)
        keys.add(part.key)
    if group:
        yield group


def read_box(out: np.ndarray, layout: ChunkLayout, box: tuple[tuple[int, int], ...],
             locate: Callable[[tuple[int, ...]], tuple[Hashable, int]],
             open_file: Callable[[Any], Any], *, stage: bool = True) -> bool:
    """Fill ``out`` (the box, C-contiguous) from the chunks' files; False (nothing read) when
    the box is better read by the array's own library (see :data:`MAX_STAGED_EXCESS`), or,
    without ``stage``, when it has short runs (the library reads them with one copy).

    ``locate(chunk_index)`` gives the chunk's file key and the byte offset of its first
    element; ``open_file(key)`` a context manager yielding a handle with ``fileno()``.
    """
    parts = _parts(out, layout, box, locate, stage=stage)
    if parts is None:
        return False
    tile = out.reshape(-1).view(np.uint8)
    largest = max((p.nbytes for p in parts if p.target is None), default=0)
    staging = np.empty(largest, np.uint8) if largest else None
    for group in _groups(parts):
        with contextlib.ExitStack() as stack:
            handles = {}
            for part in group:
                if part.key not in handles:
                    handles[part.key] = stack.enter_context(open_file(part.key))
            pieces: list[tuple[Any, ...]] = []
            for part in group:
                if part.target is not None:
                    pieces.append((handles[part.key], part.offset, tile[part.target:part.target + part.nbytes]))
                else:
                    assert staging is not None and part.copy is not None
                    view = staging[:part.nbytes]
                    pieces.append((handles[part.key], part.offset, view,
                                   lambda copy=part.copy, view=view: copy(view)))
            _handles.read_pieces(pieces)
    return True


def chunk_rows(layout: ChunkLayout, box: tuple[tuple[int, int], ...],
               locate: Callable[[tuple[int, ...]], tuple[Hashable, int]]
               ) -> list[tuple[int, int, list[tuple[Hashable, int, int]]]]:
    """The box by rows of chunks along the first axis: ``(start, stop, [(key, offset, bytes)])``
    with the byte ranges of the row's chunks that the box touches (whole chunks; ranges
    that follow on in a file joined), for hinting them to the kernel ahead of a library read."""
    chunk_bytes = math.prod(layout.chunks) * layout.itemsize
    (s0, s1), rest = box[0], box[1:]
    c0 = layout.chunks[0]
    spatial = [range(a // c, -(-b // c)) for (a, b), c in zip(rest, layout.chunks[1:])]
    rows = []
    for row in range(s0 // c0, -(-s1 // c0)):
        ranges: list[tuple[Hashable, int, int]] = []
        for index in itertools.product(*spatial):
            key, offset = locate((row, *index))
            if ranges and ranges[-1][0] == key and ranges[-1][1] + ranges[-1][2] == offset:
                ranges[-1] = (key, ranges[-1][1], ranges[-1][2] + chunk_bytes)
            else:
                ranges.append((key, offset, chunk_bytes))
        rows.append((max(s0, row * c0), min(s1, (row + 1) * c0), ranges))
    return rows
