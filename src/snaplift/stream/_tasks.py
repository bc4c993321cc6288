"""Tile tasks: what a worker does with one tile. Plain functions of picklable values.

A task receives the shared :class:`TileSource` (reader descriptor, field rows, selected
snapshots, seed), possibly other shared arrays, and one :class:`TileRef` (which field,
which kept rows, which columns). It opens the archive through the per-process handle
cache, reads the tile snapshot-major, and returns small products for the driver to fold.
No task ever carries an open file.
"""

from __future__ import annotations

import functools
from dataclasses import dataclass
from typing import Any

import numpy as np

from snaplift.archive import _handles
from snaplift.archive._base import Reader
from snaplift.archive.matrix import FieldRows, check_finite, read_fields_block, read_snapshot_block
from snaplift.errors import ArchiveChangedError
from snaplift.linalg._kernels import adjoint_product, column_squares, field_column_squares, qr_factor, range_product
from snaplift.linalg._testmatrix import apply_corange, cached_row_map, gaussian_map, row_map, set_cache_limit
from snaplift.linalg._testmatrix import release as release_test_matrices
from snaplift.stream import _prefetch
from snaplift.stream._digest import note_read
from snaplift.stream._slots import add_range_product

__all__ = ["TileSource", "TileRef", "Preparing", "reads_ahead", "sketch_task", "product_task", "tsqr_task",
           "tsqr_leaf_task",
           "release_caches", "release_resident", "resident_loaded", "warm_process"]


@dataclass(frozen=True)
class TileSource:
    """What every tile task of one compress shares (scattered once to each worker)."""

    reader: Reader
    fields: tuple[FieldRows, ...]
    snapshot_index: np.ndarray
    complex_valued: bool
    seed: int
    cache_bytes: int = 1 << 30
    #: kind of the co-range row map (``compress.corange_map``): "sparse" or "gaussian"
    corange_map: str = "gaussian"
    #: the in-memory path: tiles read once are kept in this process under this key ("" = stream)
    resident: str = ""
    #: reader threads per process for reading tiles ahead (:mod:`snaplift.stream._prefetch`; 0: off)
    read_ahead: int = 0

    @property
    def n_rows(self) -> int:
        return int(self.fields[-1].stop)


@dataclass(frozen=True)
class TileRef:
    """One tile: kept rows ``rows`` of field ``field`` (an index) x selected columns ``columns``.

    With ``span > 1`` the tile is the whole fields ``field .. field + span - 1`` stacked
    (adjacent in ``X``, so its rows are one contiguous range): the lifted fields of one
    archive field (delay copies, pointwise terms) as row blocks of one matrix, read once
    (:func:`~snaplift.archive.matrix.read_fields_block`); ``rows`` is then that of the
    first field, whole.
    """

    field: int
    rows: tuple[int, int]
    columns: tuple[int, int]
    id: int = -1
    span: int = 1
    #: the tile this task's worker takes next, read while this one is multiplied (set by the pass)
    ahead: TileRef | None = None
    #: names the pass's reads ahead ("" = this tile is not read ahead)
    read_key: str = ""

    def members(self, source: TileSource) -> tuple[FieldRows, ...]:
        return tuple(source.fields[self.field:self.field + self.span])

    def global_rows(self, source: TileSource) -> tuple[int, int]:
        offset = source.fields[self.field].offset
        if self.span > 1:
            return offset, source.fields[self.field + self.span - 1].stop
        return offset + self.rows[0], offset + self.rows[1]


@dataclass(frozen=True)
class Preparing:
    """Per-row centring and scaling applied inside the tile: ``a = (x - mean) * row_scale``."""

    row_scale: np.ndarray
    mean: np.ndarray | None


def _read(source: TileSource, tile: TileRef, *, check: bool) -> tuple[np.ndarray, np.ndarray | None]:
    """The tile snapshot-major and, with ``check``, its per-snapshot sums of squares
    (``(snapshots,)``; ``(span, snapshots)``, one row per field, for a tile of several fields)."""
    snapshots = source.snapshot_index[tile.columns[0]:tile.columns[1]]
    if tile.span > 1 or source.resident:
        return _read_fields(source, tile, snapshots, check=check)
    field = source.fields[tile.field]
    raw = _read_plain(source, tile, field, snapshots)
    note_read(raw)  # checksum of the block as read (snaplift.stream._digest)
    if raw.shape[0] == 0 or raw.shape[1] == 0:
        return raw, np.zeros(raw.shape[0])
    squares = column_squares(raw) if check else None
    if check:
        check_finite(raw, source.reader, field, snapshots, tile.rows, squares)
    return raw, squares


def reads_ahead(source: TileSource, tile: TileRef) -> bool:
    """Whether ``tile`` is read in a reader thread, ahead: one plain field (no mask, no lift,
    no read shared with siblings), whose read makes no buffer but the tile."""
    if not source.read_ahead or source.resident or tile.span != 1:
        return False
    field = source.fields[tile.field]
    return field.keep is None and field.term == "x" and field.siblings <= 1


def _block_reader(source: TileSource, ref: TileRef) -> Any:
    """A call that reads ``ref``'s block (handed to a reader thread by :mod:`_prefetch`)."""
    columns = source.snapshot_index[ref.columns[0]:ref.columns[1]]
    return lambda: read_snapshot_block(source.reader, source.fields[ref.field], columns, ref.rows)


def _read_plain(source: TileSource, tile: TileRef, field: FieldRows, snapshots: np.ndarray) -> np.ndarray:
    if not tile.read_key or not reads_ahead(source, tile):
        return read_snapshot_block(source.reader, field, snapshots, tile.rows)
    reader = functools.partial(_block_reader, source)
    own = (tile.read_key, tile.id)
    threads = source.read_ahead
    _prefetch.request(own, reader(tile), threads)  # nothing when it was read ahead already
    raw = _prefetch.take(own, reader(tile), threads)
    # the next tile is asked for once this one is here: at the start of a pass every task
    # asks for its own tile first, so no read ahead takes a reader thread before a tile a
    # task waits for (measured: a worker's first tile waited for another's read ahead,
    # 2.4 s at 200 MB/s); later its own tile was read ahead and is here at once
    if tile.ahead is not None and reads_ahead(source, tile.ahead):
        _prefetch.request((tile.read_key, tile.ahead.id), reader(tile.ahead), threads)
    return raw


def request_own(source: TileSource, tile: TileRef) -> None:
    """Start reading ``tile`` in a reader thread now (when it is read that way), so that a
    task can prepare its test matrices while its first tile is read."""
    if not tile.read_key or not reads_ahead(source, tile):
        return
    _prefetch.request((tile.read_key, tile.id), _block_reader(source, tile), source.read_ahead)


def _read_fields(source: TileSource, tile: TileRef, snapshots: np.ndarray, *, check: bool
                 ) -> tuple[np.ndarray, np.ndarray | None]:
    members = tile.members(source)
    stored = _resident.get((source.resident, tile.id)) if source.resident else None
    if stored is not None:
        raw = stored.copy()  # the kept matrix stays as read: tasks prepare their copy in place
    else:
        raw = read_fields_block(source.reader, members, snapshots)
        note_read(raw)  # checksum of the block as read (snaplift.stream._digest)
        if source.resident:
            _resident[(source.resident, tile.id)] = raw.copy()
    if not check:
        return raw, None
    first = members[0].offset
    starts = np.array([f.offset - first for f in members], dtype=np.int64)
    if raw.shape[0] == 0 or raw.shape[1] == 0:
        return raw, np.zeros((len(members), raw.shape[0]))
    squares = field_column_squares(raw, starts)
    if not np.all(np.isfinite(squares)):
        for field in members:
            part = raw[:, field.offset - first:field.stop - first]
            check_finite(part, source.reader, field, snapshots, (0, field.n_rows))
    return raw, squares


#: matrices kept in memory by the in-memory path (``TileSource.resident``), by (key, tile id)
_resident: dict[tuple[str, int], np.ndarray] = {}


def release_resident(key: str | None = None) -> None:
    """Drop the kept matrices of one compress (``key``) or of all."""
    for name in [k for k in _resident if key is None or k[0] == key]:
        del _resident[name]


def resident_loaded(key: str, tile_id: int) -> bool:
    return (key, tile_id) in _resident


def _prepare(raw: np.ndarray, preparing: Preparing | None, g0: int, g1: int) -> np.ndarray:
    if preparing is None:
        return raw
    if preparing.mean is not None:
        raw -= preparing.mean[g0:g1][np.newaxis, :]
    scale = preparing.row_scale[g0:g1]
    if scale.size and not (scale[0] == 1.0 and np.all(scale == 1.0)):  # skip a sweep for scale 'none'
        raw *= scale[np.newaxis, :]
    return raw


def _range(out: dict[str, Any], slot: Any, source: TileSource, tile: TileRef, a: np.ndarray,
           right: np.ndarray) -> None:
    """``slot`` is None (return the product) or ``(key, slot index, previous tile of the slot,
    the driver's memory file system or None)``."""
    if slot is None:
        out["range"] = range_product(a, right)
    else:  # summed in place, in a fixed order, in a slot (snaplift.stream._slots)
        key, index, after, files = slot
        add_range_product(key, "range", (source.n_rows, right.shape[1]), tile.id, tile.global_rows(source), a,
                          right, index, after, files)
        out["range"] = None


def sketch_task(source: TileSource, widths: tuple[int, ...], slot: Any, tile: TileRef) -> dict[str, Any]:
    """First read of a tile: range sketch ``X Omega``, co-range sketch ``Psi X`` (if any), statistics.

    ``widths = (k, l)`` or ``(k, l, exact_limit)``. Returns ``range`` (rows x k; None when
    summed into the worker's ``slot``), ``corange`` (snapshots x l, this tile's columns of
    ``(Psi X)^T``; for a tile of several fields a list with one per field, None for a field
    kept whole; None when ``l == 0``), ``exact`` (snapshots x rows: the raw rows of the
    fields of at most ``exact_limit`` rows, :func:`snaplift.linalg.sketch.exact_layout`, or
    None), ``row_sum`` (rows; None when summed into the worker's ``slot`` like the range)
    and ``squares`` (snapshots). The test matrices are keyed by global snapshot and row
    index (Tropp et al. 2017).
    """
    set_cache_limit(source.cache_bytes)
    range_width, corange_width = widths[0], widths[1]
    exact_limit = widths[2] if len(widths) > 2 and corange_width else 0
    # the test matrices are made while the tile is read: the first tile of a pass builds
    # the row map of its rows (0.1-0.6 s), which took turns with the read before (issue 16)
    request_own(source, tile)
    c0, c1 = tile.columns
    omega = gaussian_map(source.snapshot_index[c0:c1], range_width, seed=source.seed,
                         complex_valued=source.complex_valued)
    psi_t = None
    if corange_width and tile.span == 1 and source.fields[tile.field].n_rows > exact_limit:
        g0, g1 = tile.global_rows(source)
        psi_t = cached_row_map(g0, g1, corange_width, seed=source.seed, complex_valued=source.complex_valued,
                               kind=source.corange_map)
    raw, squares = _read(source, tile, check=True)
    out: dict[str, Any] = {"corange": None, "exact": None, "row_sum": None, "squares": squares}
    if corange_width and tile.span > 1:  # one co-range sketch per field: its scale comes later
        first = source.fields[tile.field].offset
        parts: list[Any] = []
        kept: list[tuple[int, int]] = []
        for f in tile.members(source):
            if f.n_rows <= exact_limit:  # narrower than the sketch: kept whole
                parts.append(None)
                kept.append((f.offset - first, f.stop - first))
                continue
            parts.append(apply_corange(raw[:, f.offset - first:f.stop - first],
                                       cached_row_map(f.offset, f.stop, corange_width, seed=source.seed,
                                                      complex_valued=source.complex_valued,
                                                      kind=source.corange_map)))
        out["corange"] = parts
        if kept:  # the kept fields of a tile are adjacent in the state: one block of columns
            out["exact"] = np.concatenate([raw[:, a:b] for a, b in kept], axis=1) if len(kept) < len(parts) \
                else raw.copy()
    elif corange_width and source.fields[tile.field].n_rows <= exact_limit:
        out["exact"] = raw.copy()
    elif psi_t is not None:
        # before the range product: that one may wait for this slot's previous tile, and
        # by now it has usually arrived
        out["corange"] = apply_corange(raw, psi_t)
    _range(out, slot, source, tile, raw, omega)
    _row_sum(out, slot, source, tile, raw)
    return out


def _row_sum(out: dict[str, Any], slot: Any, source: TileSource, tile: TileRef, raw: np.ndarray) -> None:
    """The tile's row sums: returned (``slot`` None) or summed in the same slot as its range
    product, under the name ``row_sum`` (an ``(n, 1)`` accumulator, ``raw^T @ 1``), so that
    a worker sends no full-height vector per tile."""
    if slot is None:
        out["row_sum"] = raw.sum(axis=0)
        return
    key, index, after, files = slot
    ones = np.ones((raw.shape[0], 1), dtype=raw.dtype)
    add_range_product(key, "row_sum", (source.n_rows, 1), tile.id, tile.global_rows(source), raw, ones, index, after,
                      files)


def product_task(source: TileSource, preparing: Preparing, operand: np.ndarray, kind: str, slot: Any,
                 tile: TileRef) -> dict[str, Any]:
    """A later pass over a prepared tile ``A_t``.

    ``kind == "range"``: ``A_t @ operand[columns]`` (rows x k), for ``Y = A Z``;
    ``kind == "adjoint"``: ``A_t^H @ operand[rows]`` (snapshots x k), for ``A^H Q``, with
    the exact per-snapshot ``squares`` of ``A_t`` (column norms for projection errors);
    ``kind == "adjoint_only"``: the same product without the squares.
    """
    raw, _ = _read(source, tile, check=False)
    g0, g1 = tile.global_rows(source)
    a = _prepare(raw, preparing, g0, g1)
    if kind == "range":
        c0, c1 = tile.columns
        out: dict[str, Any] = {}
        _range(out, slot, source, tile, a, operand[c0:c1])
        return {"product": out["range"]}
    if kind == "adjoint":
        return {"product": adjoint_product(a, operand[g0:g1]), "squares": column_squares(a)}
    if kind == "adjoint_only":  # a power iteration: the column norms would be thrown away
        return {"product": adjoint_product(a, operand[g0:g1]), "squares": None}
    raise ValueError(f"unknown product kind {kind!r}")


def tsqr_task(source: TileSource, center: bool, slot: None, tile: TileRef,
              leaf: tuple[np.ndarray, np.ndarray] | None = None) -> dict[str, Any]:
    """TSQR leaf: QR of the tile ``X_i`` (all snapshots of a row block), centred on its own rows.

    With every snapshot in the tile, the row means are the global ones, so centring is
    exact here. Without ``leaf`` returns ``r`` (the leaf's R factor) and the statistics;
    with ``leaf = (r_first_pass, factor)`` recomputes the same factorisation and returns
    ``basis = Q_i @ factor`` (Demmel et al. 2012: the implicit Q of the tree, applied to
    the small singular vectors), refusing if ``R`` came out different (archive changed).
    """
    raw, squares = _read(source, tile, check=leaf is None)
    out: dict[str, Any] = {}
    if leaf is None:
        out["row_sum"] = raw.sum(axis=0)
        out["squares"] = squares
    if center:
        raw -= raw.mean(axis=0)[np.newaxis, :]
    if tile.span > 1:
        return _tsqr_fields(source, tile, raw, out, leaf)
    q, r = qr_factor(raw.T)
    if leaf is None:
        out["r"] = r
        return out
    first, factor = leaf
    _same_leaf(source, source.fields[tile.field], tile.rows, r, first)
    out["basis"] = q @ factor
    return out


def _tsqr_fields(source: TileSource, tile: TileRef, raw: np.ndarray, out: dict[str, Any],
                 leaf: tuple[Any, Any] | None) -> dict[str, Any]:
    """TSQR leaves of a tile of several fields: one leaf per field, whose R factors are
    scaled by the field's own scale later (``R(s X) = s R(X)``)."""
    first = source.fields[tile.field].offset
    leaves = []
    for index, field in enumerate(tile.members(source)):
        q, r = qr_factor(raw[:, field.offset - first:field.stop - first].T)
        if leaf is None:
            leaves.append(r)
            continue
        _same_leaf(source, field, (0, field.n_rows), r, leaf[0][index])
        leaves.append(q @ leaf[1][index])
    if leaf is None:
        out["r"] = leaves
    else:
        out["basis"] = np.concatenate(leaves, axis=0)
    return out


def _same_leaf(source: TileSource, field: FieldRows, rows: tuple[int, int], r: np.ndarray, first: np.ndarray) -> None:
    scale = max(float(np.abs(first).max(initial=0.0)), 1e-300)
    if r.shape != first.shape or float(np.abs(r - first).max(initial=0.0)) > 1e-8 * scale:
        raise ArchiveChangedError(
            f"{source.reader.path}: field '{field.name}' rows {rows[0]}..{rows[1] - 1} read "
            "differently in the second TSQR pass than in the first; the archive changed during compress"
        )


def tsqr_leaf_task(source: TileSource, center: bool, slot: None, item: tuple[TileRef, np.ndarray, np.ndarray]
                   ) -> dict[str, Any]:
    """Second TSQR pass for one leaf: ``item = (tile, r_first_pass, factor)``."""
    tile, r, factor = item
    return tsqr_task(source, center, None, tile, (r, factor))


def release_caches(test_matrices: bool = True) -> None:
    """Drop this process's caches of a compress: the row test matrices (unless
    ``test_matrices`` is False), the reads ahead and the kept tile buffers. Run in every
    worker by one ``Client.run``."""
    if test_matrices:
        release_test_matrices()
    _prefetch.clear()
    _handles.release_tile_buffers()


def warm_process() -> None:
    """Pay in a fresh worker process, when its cluster opens, what its first tile would pay:
    the sparse co-range map's library (``scipy.sparse``, imported on first use) and the
    start of BLAS. Measured on a loaded 2-core machine: the first tile of a fresh worker
    took 0.6-2 s against 0.15 s for the next ones. Run without waiting
    (:func:`snaplift.cluster.open_scheduler`), it overlaps the driver's scan."""
    for kind in ("sparse", "gaussian"):
        apply_corange(np.ones((2, 16)), row_map(0, 16, 4, seed=0, complex_valued=False, kind=kind))
    np.matmul(np.ones((8, 8)), np.ones((8, 8)))
