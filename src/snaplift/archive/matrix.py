"""The snapshot matrix ``X`` (points x snapshots): its rows, columns and tile reads.

Rows are the requested fields stacked, masked points dropped, each point multiplied by
``sqrt(w)`` so that the Euclidean inner product is the physical one. Columns are the
selected snapshots. A tile is one block of one field's kept rows x one block of
snapshots; a task carries only the picklable reader descriptor and small index arrays.

:func:`read_snapshot_block` returns a tile *snapshot-major* (``(snapshots, rows)``, the
layout time-major archives store, with no transpose copy); the streaming compress folds
these tiles into its accumulators.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np

from snaplift.archive._base import Reader
from snaplift.archive._shared_reads import shared_block
from snaplift.errors import ArchiveError, FieldNotFoundError, NonFiniteError
from snaplift.lifting.fields import POINTWISE, FieldLift, LiftedField

__all__ = ["FieldRows", "SnapshotMatrix", "build_snapshot_matrix",
           "read_snapshot_block", "read_fields_block", "check_finite", "column_blocks"]


@dataclass(frozen=True)
class FieldRows:
    """Where one field sits in ``X`` and how its raw values become rows."""

    name: str
    grid: tuple[int, ...]
    keep: np.ndarray | None  # flat grid indices of kept points; None keeps all
    sqrt_weight: np.ndarray | None  # one per kept point
    offset: int
    n_rows: int
    #: lifted fields (``lift:`` pointwise / delays): the archive field read, the pointwise
    #: function applied to its raw values, and the snapshot shift of the delay block
    source: str | None = None
    term: str = "x"
    snapshot_shift: int = 0
    #: lifted fields reading the same archive field, and the largest shift among them:
    #: their tiles share one raw read (:mod:`snaplift.archive._shared_reads`)
    siblings: int = 1
    window: int = 0

    @property
    def archive_field(self) -> str:
        return self.source or self.name

    @property
    def lifted(self) -> bool:
        return self.source not in (None, self.name) or self.term != "x" or self.snapshot_shift != 0

    @property
    def stop(self) -> int:
        return self.offset + self.n_rows

    def expand(self, rows: np.ndarray, fill: complex | float = np.nan) -> np.ndarray:
        """Put row values (..., n_rows) back on the grid, ``fill`` at masked points."""
        rows = np.asarray(rows)
        out = np.full(rows.shape[:-1] + (int(np.prod(self.grid)),), fill, dtype=np.result_type(rows, float))
        if self.keep is None:
            out[...] = rows
        else:
            out[..., self.keep] = rows
        return out.reshape(rows.shape[:-1] + self.grid)


@dataclass(frozen=True)
class SnapshotMatrix:
    reader: Reader
    fields: tuple[FieldRows, ...]
    snapshot_index: np.ndarray  # archive snapshot number of each column
    blocks: tuple[tuple[int, int], ...]  # column ranges of the tiles
    dtype: np.dtype

    @property
    def shape(self) -> tuple[int, int]:
        return (self.fields[-1].stop, int(self.snapshot_index.size))


def _raw_points(reader: Reader, name: str, p0: int, p1: int, s0: int, s1: int) -> np.ndarray:
    """``(snapshots, points)`` of one field as float64/complex128, preferably without a copy.

    HDF5 and zarr readers (:class:`~snaplift.archive._grouped.GroupedReader`) store
    fields snapshot axis first, so the block comes straight from the file; the generic
    path transposes what ``read_tile`` returns (a view, never a copy).
    """
    from snaplift.archive._cf import decode
    from snaplift.archive._common import read_block
    from snaplift.archive._grouped import GroupedReader
    from snaplift.archive.runs import RunsReader

    if isinstance(reader, RunsReader):  # each member's own (fast) path, joined along time
        parts = [_raw_points(reader.members[run], name, p0, p1, a, b) for run, a, b in reader.run_slices(s0, s1)]
        return parts[0] if len(parts) == 1 else np.concatenate(parts, axis=0)
    if isinstance(reader, GroupedReader):
        # same reads as GroupedReader.read_tile, minus its (points, snapshots) copy
        _, entry = reader._field_entry(name)
        array = reader._array(reader._root(), entry.key)
        block = read_block(lambda sel: array[sel], entry.grid, (p0, p1), slice(s0, s1))
        if entry.decoding.is_identity and block.dtype in (np.float64, np.complex128) and block.flags.writeable:
            return block
        return decode(block, entry.decoding)
    tile = reader.read_tile(name, slice(p0, p1), slice(s0, s1))
    return tile.T if tile.flags.writeable else np.array(tile.T)


def read_snapshot_block(
    reader: Reader, field: FieldRows, snapshots: np.ndarray, rows: tuple[int, int] | None = None
) -> np.ndarray:
    """``X[rows, snapshots]^T`` of one field: ``(len(snapshots), r1 - r0)``, masked and weighted.

    ``rows`` are kept-row positions within the field (default all). A lifted field
    (:class:`~snaplift.lifting.FieldLift`) reads its archive field at the snapshots shifted
    by its delay and applies its pointwise function to the raw values, before the
    weights: the lifted rows exist only inside the tile. Stored values are
    decoded to float64/complex128; the result is a fresh, writeable array. Finiteness is
    not checked here (:func:`check_finite`), so that a tile kernel can fold the check
    into a reduction it makes anyway.
    """
    snapshots = np.asarray(snapshots, dtype=np.int64)
    r0, r1 = (0, field.n_rows) if rows is None else (int(rows[0]), int(rows[1]))
    if field.keep is None:
        p0, p1 = r0, r1
    else:
        p0, p1 = int(field.keep[r0]), int(field.keep[r1 - 1]) + 1
    if field.siblings > 1:
        # one read of the column block plus the delay window serves every lifted sibling
        base, end = int(snapshots[0]), int(snapshots[-1]) + int(field.window) + 1
        key = (type(reader).__name__, reader.path, field.archive_field, p0, p1, base, end, snapshots.size)
        block, _ = shared_block(key, field.siblings,
                                lambda: _raw_points(reader, field.archive_field, p0, p1, base, end))
        raw = block[snapshots - base + int(field.snapshot_shift)]  # a copy: the block stays shared
    else:
        snapshots = snapshots + int(field.snapshot_shift)
        first, last = int(snapshots[0]), int(snapshots[-1])
        raw = _raw_points(reader, field.archive_field, p0, p1, first, last + 1)
        if snapshots.size != last - first + 1:
            raw = raw[snapshots - first]
    if field.keep is not None:
        local = field.keep[r0:r1] - p0
        if local.size != p1 - p0:
            raw = raw[:, local]
    if field.term != "x":
        raw = POINTWISE[field.term](raw)  # a new array: never writes through to a file
    if not raw.flags.writeable:  # e.g. a memory map: never write through to a file
        raw = np.array(raw)
    if field.sqrt_weight is not None:
        raw *= field.sqrt_weight[r0:r1][np.newaxis, :]
    return raw


def read_fields_block(reader: Reader, fields: tuple[FieldRows, ...] | list[FieldRows],
                      snapshots: np.ndarray) -> np.ndarray:
    """``X[rows, snapshots]^T`` of consecutive whole fields as one ``(len(snapshots), rows)`` buffer.

    The fields must be adjacent in ``X`` (``fields[i + 1].offset == fields[i].stop``). Each
    archive field is read once for all its lifted fields (delay copies and pointwise
    terms): the raw block spans the snapshots plus the delay window, and each lifted
    field's rows are taken from it (shifted, its function applied, weighted) straight
    into its columns of the buffer. This is the lifted tile as one matrix: one read, one
    buffer, one set of products. Finiteness is not checked here (:func:`check_finite`).
    """
    snapshots = np.asarray(snapshots, dtype=np.int64)
    first = fields[0].offset
    groups: list[list[FieldRows]] = []
    for field in fields:
        if groups and field.archive_field == groups[-1][0].archive_field:
            groups[-1].append(field)
        else:
            groups.append([field])
    reads = []
    for members in groups:
        shifts = [int(f.snapshot_shift) for f in members]
        base, end = int(snapshots[0]) + min(shifts), int(snapshots[-1]) + max(shifts) + 1
        lead = members[0]
        p0, p1 = (0, lead.n_rows) if lead.keep is None else (int(lead.keep[0]), int(lead.keep[-1]) + 1)
        reads.append((members, _raw_points(reader, lead.archive_field, p0, p1, base, end), base, p0))
    complex_valued = any(np.iscomplexobj(raw) for _, raw, _, _ in reads)
    out = np.empty((snapshots.size, fields[-1].stop - first), dtype=np.complex128 if complex_valued else np.float64)
    for members, raw, base, p0 in reads:
        for field in members:
            values = raw[snapshots - base + int(field.snapshot_shift)]  # a copy: raw serves the siblings
            if field.keep is not None and field.keep.size != raw.shape[1]:
                values = values[:, field.keep - p0]
            if field.term != "x":
                values = POINTWISE[field.term](values)
            target = out[:, field.offset - first:field.stop - first]
            target[...] = values
            if field.sqrt_weight is not None:
                target *= field.sqrt_weight[np.newaxis, :]
    return out


def check_finite(values: np.ndarray, reader: Reader, field: FieldRows, snapshots: np.ndarray,
                 rows: tuple[int, int], squares: np.ndarray | None = None) -> None:
    """Raise :class:`NonFiniteError` naming the snapshot and grid index of the first NaN/Inf.

    ``values`` is snapshot-major (``(snapshots, rows)``). When ``squares`` (the per-snapshot
    sums of squares of the same tile) is given and finite, the tile is finite and no
    further scan is made.
    """
    if squares is not None and np.all(np.isfinite(squares)):
        return
    finite = np.isfinite(values)
    if finite.all():
        return
    column, row = np.argwhere(~finite)[0]
    kept = int(rows[0]) + int(row)
    point = int(field.keep[kept]) if field.keep is not None else kept
    index = np.unravel_index(point, field.grid)
    count = int((~finite).sum())
    snapshots = np.asarray(snapshots, dtype=np.int64) + int(field.snapshot_shift)
    first, last = int(snapshots[0]), int(snapshots[-1])
    lifted = f" (lifted as '{field.name}')" if field.lifted else ""
    raise NonFiniteError(
        f"{reader.path}: field '{field.archive_field}'{lifted} has {count} non-finite value(s) in snapshots "
        f"{first}..{last}; first at snapshot {int(snapshots[column])}, grid index {tuple(int(i) for i in index)} "
        f"(value {values[column, row]}); "
        "mask these points (archive.mask) or repair the archive"
    )


def column_blocks(snapshot_index: np.ndarray,
                  snapshot_blocks: tuple[tuple[int, int], ...]) -> tuple[tuple[int, int], ...]:
    """Column ranges of the selected snapshots that fall in each planned archive block.

    The planner cuts the archive's snapshot axis at stored-chunk boundaries; a selection
    (``start``/``stop``/``every``) keeps the columns inside each block together, so each
    tile still reads whole chunks. Empty blocks are dropped.
    """
    index = np.asarray(snapshot_index, dtype=np.int64)
    out = []
    for s0, s1 in snapshot_blocks:
        c0, c1 = int(np.searchsorted(index, s0, "left")), int(np.searchsorted(index, s1, "left"))
        if c1 > c0:
            out.append((c0, c1))
    return tuple(out)


def _grid_dataset(reader: Reader, name: str, grid: tuple[int, ...], field: str, role: str) -> np.ndarray:
    info = reader.describe()
    if name not in info.variables and name not in info.fields:
        present = ", ".join(sorted(info.variables)) or "(none)"
        raise FieldNotFoundError(
            f"archive {role} dataset '{name}' not found in {reader.path}; datasets present: {present}"
        )
    values = reader.read_variable(name)
    if tuple(values.shape) != grid:
        raise ArchiveError(
            f"{reader.path}: {role} dataset '{name}' has shape {tuple(values.shape)} but field "
            f"'{field}' has grid {grid}; give one {role} dataset per grid as a mapping "
            f"{{field: dataset}}"
        )
    return values


def build_snapshot_matrix(
    reader: Reader,
    fields: list[str],
    *,
    snapshots: np.ndarray,
    snapshot_block: int,
    weights: str | dict[str, str] | None = None,
    mask: str | dict[str, str] | None = None,
    snapshot_blocks: tuple[tuple[int, int], ...] | None = None,
    lift: FieldLift | None = None,
    run_lengths: np.ndarray | None = None,
) -> SnapshotMatrix:
    """Describe ``X`` for the given fields and snapshots; reads only weights and mask.

    ``snapshot_block`` is the number of selected snapshots per tile; ``snapshot_blocks``
    (the planner's archive snapshot ranges, :attr:`TilePlan.snapshot_blocks`) takes
    precedence and keeps every tile on whole stored chunks (:func:`column_blocks`).

    ``lift`` (pointwise terms and delays of the raw fields) makes every lifted field a row
    block of its own (:meth:`FieldLift.lifted`); with delays the columns are the windows
    that fit inside a run (``run_lengths`` of the selected snapshots, default one run),
    and column j carries the archive snapshot of the window's first copy.
    """
    info = reader.describe()
    missing = [name for name in fields if name not in info.fields]
    if missing:
        raise FieldNotFoundError(
            f"archive field '{missing[0]}' not found in {reader.path}; fields present: "
            f"{', '.join(sorted(info.fields)) or '(none)'}"
        )
    n_snapshots = {info.fields[name].n_snapshots for name in fields}
    if len(n_snapshots) != 1:
        counts = ", ".join(f"{name}: {info.fields[name].n_snapshots}" for name in fields)
        raise ArchiveError(f"{reader.path}: fields must have the same number of snapshots; found {counts}")
    snapshots = np.asarray(snapshots, dtype=np.int64)
    total = next(iter(n_snapshots))
    if snapshots.size == 0 or snapshots.min() < 0 or snapshots.max() >= total:
        raise ArchiveError(f"{reader.path}: snapshot selection is empty or outside 0..{total - 1}")
    entries = [LiftedField(name, name) for name in fields] if lift is None else lift.lifted(fields)
    shifts = {0: 0}
    if lift is not None and lift.delays > 1:
        lengths = np.array([snapshots.size]) if run_lengths is None else np.asarray(run_lengths, dtype=np.int64)
        plan = lift.columns(lengths)
        for block in range(1, lift.delays):
            shift = np.unique(snapshots[plan[block]] - snapshots[plan[0]])
            if shift.size != 1:  # selections are arange(start, stop, every): never happens
                raise ArchiveError(f"{reader.path}: delays need evenly spaced selected snapshots")
            shifts[block] = int(shift[0])
        snapshots = snapshots[plan[0]]
    rows: list[FieldRows] = []
    offset = 0
    complex_valued = False
    grids: dict[str, tuple[np.ndarray | None, np.ndarray | None]] = {}
    for entry in entries:
        name = entry.source
        field_info = info.fields[name]
        grid = field_info.grid
        if name in grids:
            keep, sqrt_weight = grids[name]
            n_rows = int(keep.size if keep is not None else field_info.n_points)
            rows.append(FieldRows(entry.name, grid, keep, sqrt_weight, offset, n_rows, source=name,
                                  term=entry.term, snapshot_shift=shifts[entry.block]))
            offset += n_rows
            continue
        keep = None
        mask_name = mask.get(name) if isinstance(mask, dict) else mask
        if mask_name is not None:
            excluded = _grid_dataset(reader, mask_name, grid, name, "mask").astype(bool).ravel()
            keep = np.flatnonzero(~excluded)
            if keep.size == 0:
                raise ArchiveError(f"{reader.path}: mask '{mask_name}' excludes every point of field '{name}'")
        sqrt_weight = None
        weight_name = weights.get(name) if isinstance(weights, dict) else weights
        if weight_name is not None:
            w = _grid_dataset(reader, weight_name, grid, name, "weights").astype(np.float64).ravel()
            w = w if keep is None else w[keep]
            if not np.all(np.isfinite(w)) or np.any(w < 0):
                bad = int(np.flatnonzero(~np.isfinite(w) | (w < 0))[0])
                raise ArchiveError(
                    f"{reader.path}: weights '{weight_name}' must be finite and >= 0 at kept points; "
                    f"found {w[bad]} at kept point {bad}"
                )
            sqrt_weight = np.sqrt(w)
        grids[name] = (keep, sqrt_weight)
        n_rows = int(keep.size if keep is not None else field_info.n_points)
        source = None if entry.name == name else name
        rows.append(FieldRows(entry.name, grid, keep, sqrt_weight, offset, n_rows, source=source,
                              term=entry.term, snapshot_shift=shifts[entry.block]))
        offset += n_rows
        complex_valued |= np.issubdtype(field_info.dtype, np.complexfloating)
    if lift is not None:
        siblings: dict[str, int] = {}
        windows: dict[str, int] = {}
        for row in rows:
            siblings[row.archive_field] = siblings.get(row.archive_field, 0) + 1
            windows[row.archive_field] = max(windows.get(row.archive_field, 0), row.snapshot_shift)
        rows = [replace(row, siblings=siblings[row.archive_field], window=windows[row.archive_field])
                for row in rows]
    if snapshot_blocks is not None:
        blocks = column_blocks(snapshots, tuple(snapshot_blocks))
    else:
        block = max(1, int(snapshot_block))
        blocks = tuple((c0, min(c0 + block, snapshots.size)) for c0 in range(0, snapshots.size, block))
    dtype = np.dtype(np.complex128 if complex_valued else np.float64)
    return SnapshotMatrix(reader, tuple(rows), snapshots, blocks, dtype)
