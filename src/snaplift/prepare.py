"""Weighting, centring and scaling of the snapshot matrix, with statistics from the same pass.

The prepared matrix is ``A = S (X_w - mu 1^T)``: ``X_w`` the masked snapshot matrix with
points weighted by ``sqrt(w)``, ``mu`` its temporal mean (only when centring), ``S`` one
factor per field. The default scale divides each field by its (weighted, and centred if
centring is on) RMS over space and time, so fields of different units are comparable.

The statistics (row sums, per-field sums of squares) are gathered in the same read as the
first sketch ``X_w Omega``; because ``A`` is an affine, row-scaled image of ``X_w`` the
sketch is corrected afterwards: ``A Omega = S (X_w Omega - mu (1^T Omega))``.
"""

from __future__ import annotations

from dataclasses import dataclass

import dask.array as da
import numpy as np

from snaplift.archive.matrix import SnapshotMatrix
from snaplift.errors import ArchiveError

__all__ = ["Preparation", "first_pass", "finish_preparation", "prepared_matrix", "corrected_sketch"]


@dataclass(frozen=True)
class Preparation:
    """What was done to the data, so that modes, forecasts and exports can undo it.

    ``field_scale[f]`` is the number field ``f`` was divided by (in its own units);
    ``mean`` the temporal mean of ``X_w`` (weighted units) or None.
    """

    fields: tuple[str, ...]
    field_scale: dict[str, float]
    row_scale: np.ndarray
    mean: np.ndarray | None
    snapshot_norm: np.ndarray  # weighted norm of each raw (unscaled, uncentred) snapshot

    @property
    def centered(self) -> bool:
        return self.mean is not None


def first_pass(matrix: SnapshotMatrix, x: da.Array, omega: np.ndarray) -> tuple[da.Array, ...]:
    """Lazy outputs of the first read: sketch ``X_w Omega``, row sums, per-field column sums of squares."""
    omega_d = da.from_array(omega, chunks=(x.chunks[1], (omega.shape[1],)))
    sketch = x @ omega_d
    row_sum = x.sum(axis=1)
    squares = abs(x) ** 2
    per_field = [squares[f.offset:f.stop].sum(axis=0) for f in matrix.fields]
    return (sketch, row_sum, *per_field)


def finish_preparation(
    matrix: SnapshotMatrix,
    row_sum: np.ndarray,
    column_squares: list[np.ndarray],
    *,
    center: bool,
    scale: str | dict[str, float],
) -> Preparation:
    """Turn the first-pass statistics into centring and scaling (no further read)."""
    n, m = matrix.shape
    mean = np.asarray(row_sum) / m if center else None
    row_scale = np.ones(n)
    field_scale: dict[str, float] = {}
    for field, squares in zip(matrix.fields, column_squares):
        if isinstance(scale, dict):
            value = float(scale[field.name])
        elif scale == "none":
            value = 1.0
        else:
            total = float(np.sum(squares))
            if mean is not None:
                total -= m * float(np.sum(np.abs(mean[field.offset:field.stop]) ** 2))
            weight = float(np.sum(field.sqrt_weight**2)) if field.sqrt_weight is not None else field.n_rows
            value = float(np.sqrt(max(total, 0.0) / (m * weight))) if weight > 0 else 0.0
            if not np.isfinite(value) or value <= 0.0:
                raise ArchiveError(
                    f"{matrix.reader.path}: field '{field.name}' has zero RMS"
                    f"{' after centring' if center else ''}, so it cannot be scaled by it; "
                    "set prepare.scale to a number per field or drop the field"
                )
        field_scale[field.name] = value
        row_scale[field.offset:field.stop] = 1.0 / value
    snapshot_norm = np.sqrt(np.sum(np.asarray(column_squares), axis=0))
    return Preparation(tuple(f.name for f in matrix.fields), field_scale, row_scale, mean, snapshot_norm)


def prepared_matrix(x: da.Array, preparation: Preparation) -> da.Array:
    """Lazy ``A = S (X_w - mu 1^T)``; elementwise, so it fuses into the tile tasks."""
    chunks = x.chunks[0]
    scale = da.from_array(preparation.row_scale[:, np.newaxis], chunks=(chunks, (1,)))
    if preparation.mean is None:
        return x * scale
    mean = da.from_array(preparation.mean[:, np.newaxis], chunks=(chunks, (1,)))
    return (x - mean) * scale


def corrected_sketch(sketch: np.ndarray, preparation: Preparation, omega: np.ndarray) -> np.ndarray:
    """``A Omega`` from ``X_w Omega`` without touching the data again."""
    y = np.asarray(sketch)
    if preparation.mean is not None:
        y = y - np.outer(preparation.mean, omega.sum(axis=0))
    return y * preparation.row_scale[:, np.newaxis]


def to_physical(values: np.ndarray, field_rows, preparation: Preparation, *, add_mean: bool) -> np.ndarray:
    """Rows of ``A`` (..., n_rows of one field) back to the field's own units."""
    values = np.asarray(values) * preparation.field_scale[field_rows.name]
    if add_mean and preparation.mean is not None:
        values = values + preparation.mean[field_rows.offset:field_rows.stop]
    if field_rows.sqrt_weight is not None:
        w = field_rows.sqrt_weight
        values = np.divide(values, w, out=np.full(np.broadcast_shapes(values.shape, w.shape), np.nan,
                                                  dtype=np.result_type(values, float)), where=w > 0)
    return values
