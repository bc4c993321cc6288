"""The snapshot matrix ``X`` (points x snapshots) as a lazy dask array of tiles.

Rows are the requested fields stacked, masked points dropped, each point multiplied by
``sqrt(w)`` so that the Euclidean inner product is the physical one. Columns are the
selected snapshots. A tile is one field's kept points x one block of snapshots; its task
carries only the picklable reader descriptor and small index arrays.
"""

from __future__ import annotations

from dataclasses import dataclass

import dask.array as da
import numpy as np
from dask import delayed

from snaplift.archive._base import Reader
from snaplift.errors import ArchiveError, FieldNotFoundError, NonFiniteError

__all__ = ["FieldRows", "SnapshotMatrix", "build_snapshot_matrix", "read_prepared_tile"]


@dataclass(frozen=True)
class FieldRows:
    """Where one field sits in ``X`` and how its raw values become rows."""

    name: str
    grid: tuple[int, ...]
    keep: np.ndarray | None  # flat grid indices of kept points; None keeps all
    sqrt_weight: np.ndarray | None  # one per kept point
    offset: int
    n_rows: int

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

    def to_dask(self) -> da.Array:
        """The weighted, masked snapshot matrix, one task per (field, snapshot block)."""
        rows = []
        for field in self.fields:
            row = []
            for c0, c1 in self.blocks:
                tile = delayed(read_prepared_tile, pure=True)(
                    self.reader, field, self.snapshot_index[c0:c1]
                )
                row.append(da.from_delayed(tile, shape=(field.n_rows, c1 - c0), dtype=self.dtype))
            rows.append(row)
        return da.block(rows)


def read_prepared_tile(reader: Reader, field: FieldRows, snapshots: np.ndarray) -> np.ndarray:
    """Read one tile, drop masked points, apply ``sqrt(w)``; fail on NaN/Inf.

    Snapshots are read as one contiguous range (so stored chunks are read whole) and
    strided in memory when ``every > 1``.
    """
    first, last = int(snapshots[0]), int(snapshots[-1])
    raw = reader.read_tile(field.name, slice(0, int(np.prod(field.grid))), slice(first, last + 1))
    if snapshots.size != last - first + 1:
        raw = raw[:, snapshots - first]
    values = raw if field.keep is None else raw[field.keep]
    if field.sqrt_weight is not None:
        values = values * field.sqrt_weight[:, np.newaxis]
    finite = np.isfinite(values)
    if not finite.all():
        row, column = np.argwhere(~finite)[0]
        point = int(field.keep[row]) if field.keep is not None else int(row)
        index = np.unravel_index(point, field.grid)
        count = int((~finite).sum())
        raise NonFiniteError(
            f"{reader.path}: field '{field.name}' has {count} non-finite value(s) in snapshots "
            f"{first}..{last}; first at snapshot {int(snapshots[column])}, grid index {tuple(int(i) for i in index)} "
            f"(value {values[row, column]}); "
            "mask these points (archive.mask) or repair the archive"
        )
    return np.ascontiguousarray(values)


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
) -> SnapshotMatrix:
    """Describe ``X`` for the given fields and snapshots; reads only weights and mask.

    ``snapshot_block`` is the number of selected snapshots per tile (from the planner).
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
    rows: list[FieldRows] = []
    offset = 0
    complex_valued = False
    for name in fields:
        field_info = info.fields[name]
        grid = field_info.grid
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
        n_rows = int(keep.size if keep is not None else field_info.n_points)
        rows.append(FieldRows(name, grid, keep, sqrt_weight, offset, n_rows))
        offset += n_rows
        complex_valued |= np.issubdtype(field_info.dtype, np.complexfloating)
    snapshots = np.asarray(snapshots, dtype=np.int64)
    total = next(iter(n_snapshots))
    if snapshots.size == 0 or snapshots.min() < 0 or snapshots.max() >= total:
        raise ArchiveError(f"{reader.path}: snapshot selection is empty or outside 0..{total - 1}")
    block = max(1, int(snapshot_block))
    blocks = tuple((c0, min(c0 + block, snapshots.size)) for c0 in range(0, snapshots.size, block))
    dtype = np.dtype(np.complex128 if complex_valued else np.float64)
    return SnapshotMatrix(reader, tuple(rows), snapshots, blocks, dtype)
