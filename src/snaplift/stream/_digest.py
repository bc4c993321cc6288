"""Checksums of the tiles as they are read, so a block read again is verified against its first read.

Every tile task of a pass runs inside :func:`digested`: the tile read (``_tasks._read``)
calls :func:`note_read` with the values as read (decoded, masked, weighted; before any
centring or scaling), which takes a CRC-32C of the bytes of each snapshot (Castagnoli, Braeutigam &
Herrmann 1993, "Optimization of cyclic redundancy-check codes with 24 and 32 parity
bits", IEEE Trans. Commun. 41(6); hardware-accelerated through ``google_crc32c``, which
zarr already installs; ``zlib.crc32`` otherwise). No byte is read for it: the tile is
in memory for the arithmetic anyway. The task returns the digests beside its products, one per snapshot of the tile.

On the driver, :func:`verify` keeps the digests of every tile in the loop state
(``StreamState.arrays['block_digest']``, checkpointed with the accumulators): the first
read of a tile records it, every later read (the next pass of ``randomized`` or
``tsqr``, a tile read again after a resume) must give the same digest, or the pass
stops with :class:`~snaplift.errors.ArchiveChangedError` naming the file, field, rows
and the first snapshot that differs, before the changed values are folded into anything.

:func:`digest_table` turns the state's digests into a table keyed by what each tile
holds (field, rows, archive snapshot), so that a later run with the same row blocks
(any snapshot blocks: a grown archive has other ones) can verify the blocks it reads again against the stored result
(:mod:`snaplift.workflow.checksums`).
"""

from __future__ import annotations

import threading
from typing import Any

import numpy as np

from snaplift.errors import ArchiveChangedError

try:  # hardware CRC-32C (SSE 4.2 / ARMv8): about 4x faster than zlib's CRC-32 here
    import google_crc32c as _crc32c

    def _extend(value: int, data: Any) -> int:
        return int(_crc32c.extend(value, data))

    ALGORITHM = "crc32c"
except ImportError:  # pragma: no cover - zarr depends on google-crc32c
    import zlib

    def _extend(value: int, data: Any) -> int:
        return int(zlib.crc32(data, value))

    ALGORITHM = "crc32"

__all__ = ["ALGORITHM", "block_digest", "note_read", "digested", "verify", "digest_table"]

#: the name of the per-tile digests in ``StreamState.arrays`` (-1: not read yet)
DIGESTS = "block_digest"

_notes = threading.local()


def block_digest(values: np.ndarray) -> np.ndarray:
    """CRC of the bytes of each snapshot (row) of a snapshot-major tile: ``(snapshots,)`` int64.

    Example
    -------
    >>> tile = np.arange(6.0).reshape(2, 3)
    >>> bool(np.all(block_digest(tile) == block_digest(tile.copy())))
    True
    >>> tile[1, 2] = 7.0
    >>> bool(block_digest(tile)[0] == block_digest(np.arange(6.0).reshape(2, 3))[0])
    True
    """
    view = values.view()
    view.flags.writeable = False  # the checksum reads a read-only buffer; the tile stays writeable
    rows = view.reshape(view.shape[0], -1) if view.ndim > 1 else view.reshape(1, -1)
    out = np.empty(rows.shape[0], dtype=np.int64)
    for index, row in enumerate(rows):
        if not row.flags.c_contiguous:
            row = np.ascontiguousarray(row)
            row.flags.writeable = False
        out[index] = _extend(0, row)
    return out


def note_read(values: np.ndarray) -> None:
    """Called by the tile read with the values just read; records their digest inside :func:`digested`."""
    if getattr(_notes, "active", False):
        _notes.digest = block_digest(values)


def digested(task: Any, *args: Any) -> Any:
    """Run ``task(*args)`` and add the digest of the tile it read to its result (``'digest'``;
    None when it read nothing, e.g. a tile kept in memory)."""
    _notes.active, _notes.digest = True, None
    try:
        out = task(*args)
    finally:
        _notes.active = False
    if isinstance(out, dict):
        out["digest"] = _notes.digest
    return out


def _tile_of(tile: Any) -> Any:
    return tile[0] if isinstance(tile, tuple) else tile


def verify(state: Any, source: Any, tile: Any, result: Any, checkpoint: Any = None) -> None:
    """Record the first digests of a tile, or check a later read against them (module docstring).

    ``state.arrays['block_digest']`` is ``(tiles, widest tile)``, -1 where nothing was
    read yet. On a difference the checkpoint (if any) is removed, so that the next run
    starts afresh from the archive as it is then, and :class:`ArchiveChangedError` is raised.
    """
    digest = result.pop("digest", None) if isinstance(result, dict) else None
    if digest is None:
        return
    ref = _tile_of(tile)
    width = int(ref.columns[1] - ref.columns[0])
    table = state.arrays.get(DIGESTS)
    if table is None or table.shape[0] <= ref.id or table.shape[1] < width:
        rows = max(ref.id + 1, 0 if table is None else table.shape[0])
        if table is not None and ref.id >= table.shape[0]:
            rows = max(rows, 2 * table.shape[0])  # grown by doubling: tile ids arrive in order
        grown = np.full((rows, max(width, 0 if table is None else table.shape[1])), -1, dtype=np.int64)
        if table is not None:
            grown[:table.shape[0], :table.shape[1]] = table
        table = state.arrays[DIGESTS] = grown
    first = table[ref.id, :width]
    if np.all(first < 0):
        first[:] = digest
        return
    differing = np.flatnonzero(first != digest)
    if differing.size:
        if checkpoint is not None:
            checkpoint.remove()
        snapshot = int(source.snapshot_index[ref.columns[0] + int(differing[0])])
        raise ArchiveChangedError(
            f"{source.reader.path}: {describe(source, ref)} (snapshot {snapshot} first) read in compress pass "
            f"{int(state.pass_number) + 1} differs from its first read (checksum; a resumed run compares with "
            "the interrupted one): the archive was rewritten during the run; nothing was written and the "
            "checkpoint is dropped, so running again computes from the archive as it is then")
    state.info["blocks_verified"] = int(state.info.get("blocks_verified", 0)) + width


def describe(source: Any, ref: Any) -> str:
    """``field 'u' rows 0..99, snapshots 8..15`` of a tile (archive snapshot numbers)."""
    fields = source.fields[ref.field:ref.field + max(1, int(ref.span))]
    names = "+".join(f"'{f.name}'" for f in fields)
    snapshots = source.snapshot_index[ref.columns[0]:ref.columns[1]]
    r0, r1 = ref.rows if ref.span <= 1 else (0, fields[0].n_rows)
    where = f"field {names} rows {r0}..{r1 - 1}" if ref.span <= 1 else f"fields {names}"
    if snapshots.size:
        where += f", snapshots {int(snapshots[0])}..{int(snapshots[-1])}"
    return where


def digest_table(state: Any, source: Any, jobs: Any) -> dict[str, np.ndarray]:
    """The digests read, one per snapshot of each field's row block, keyed by content:
    field name and ``extent`` = (row start, row stop, archive snapshot, fields in the tile)."""
    table = state.arrays.get(DIGESTS)
    fields: list[np.ndarray] = []
    extents: list[np.ndarray] = []
    digests: list[np.ndarray] = []
    for job in jobs:
        ref = _tile_of(job.tile)
        if table is None or ref.id >= table.shape[0]:
            continue
        snapshots = source.snapshot_index[ref.columns[0]:ref.columns[1]]
        values = table[ref.id, :snapshots.size]
        kept = values >= 0
        count = int(kept.sum())
        if not count:
            continue
        r0, r1 = (int(ref.rows[0]), int(ref.rows[1])) if ref.span <= 1 else (0, int(source.fields[ref.field].n_rows))
        fields.append(np.full(count, ref.field, dtype=np.int64))
        extent = np.empty((count, 4), dtype=np.int64)
        extent[:, 0], extent[:, 1], extent[:, 2], extent[:, 3] = r0, r1, snapshots[kept], int(ref.span)
        extents.append(extent)
        digests.append(values[kept])
    names = np.array([f.name for f in source.fields], dtype=str)
    return {"field": names[np.concatenate(fields)] if fields else np.array([], dtype=str),
            "extent": np.concatenate(extents) if extents else np.zeros((0, 4), dtype=np.int64),
            "digest": np.concatenate(digests) if digests else np.zeros(0, dtype=np.int64)}
