"""Weighting, centring and scaling of the snapshot matrix, with statistics from the same pass.

The prepared matrix is ``A = S (X_w - mu 1^T)``: ``X_w`` the masked snapshot matrix with
points weighted by ``sqrt(w)``, ``mu`` its temporal mean (only when centring), ``S`` one
factor per field. The default scale divides each field by its (weighted, and centred if
centring is on) RMS over space and time, so fields of different units are comparable.

The statistics (row sums, per-field sums of squares per snapshot) are gathered in the same
read as the first sketches; because ``A`` is an affine, row-scaled image of ``X_w`` the
sketches are corrected afterwards without touching the data again:
``A Omega = S (X_w Omega - mu (1^T Omega))`` and, for the co-range sketch of field ``f``
with scale ``s_f``, ``Psi A = sum_f s_f (Psi_f X_f - (Psi_f mu_f) 1^T)``.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any, Protocol

import numpy as np

from snaplift.errors import ArchiveError

__all__ = ["Preparation", "finish_preparation", "corrected_sketch", "corrected_corange",
           "prepared_column_squares", "field_sums", "to_physical"]


class PreparedMatrix(Protocol):
    """What the preparation needs of a snapshot matrix (``archive.matrix.SnapshotMatrix``
    has it): its shape, its fields (``name``, ``offset``, ``stop``, ``n_rows``,
    ``sqrt_weight``) and its reader's ``path`` for messages."""

    @property
    def shape(self) -> tuple[int, int]: ...

    @property
    def fields(self) -> Sequence[Any]: ...

    @property
    def reader(self) -> Any: ...


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


def finish_preparation(
    matrix: PreparedMatrix,
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


def corrected_sketch(sketch: np.ndarray, preparation: Preparation, omega: np.ndarray) -> np.ndarray:
    """``A Omega`` from ``X_w Omega`` without touching the data again."""
    y = np.asarray(sketch)
    if preparation.mean is not None:
        y = y - np.outer(preparation.mean, omega.sum(axis=0))
    return y * preparation.row_scale[:, np.newaxis]


def corrected_corange(corange: Mapping[int, np.ndarray], preparation: Preparation,
                      psi_mean: Mapping[int, np.ndarray] | None) -> np.ndarray | None:
    """``sum_f s_f (Psi_f X_f - (Psi_f mu_f) 1^T)^T`` (m x l) over the fields ``f`` of
    ``corange`` (field index -> ``(Psi_f X_f)^T``), with ``Psi_f mu_f`` when centred; None if empty."""
    total = None
    for index, values in corange.items():
        part = np.asarray(values)
        if preparation.mean is not None and psi_mean is not None:
            part = part - psi_mean[index][np.newaxis, :]
        part = part / preparation.field_scale[preparation.fields[index]]
        total = part if total is None else total + part
    return total


def prepared_column_squares(preparation: Preparation, squares: np.ndarray, fields,
                            mean_cross: np.ndarray | None = None) -> np.ndarray:
    """``||a_j||^2`` of the prepared snapshots from the raw per-field ``||x_fj||^2``.

    Uncentred this is exact. Centred, ``||a_j||^2 = sum_f s_f^2 (||x_fj||^2 - ||mu_f||^2)
    - 2 sum_f s_f Re(mu_f^H a_fj)``; ``mean_cross[f, j]`` must hold ``Re(mu_f^H a_fj)``
    (exact from another pass, or estimated from a low-rank reconstruction).
    """
    squares = np.asarray(squares, dtype=np.float64)
    total = np.zeros(squares.shape[1])
    for index, field in enumerate(fields):
        s = 1.0 / preparation.field_scale[field.name]
        part = squares[index]
        if preparation.mean is not None:
            mu = preparation.mean[field.offset:field.stop]
            part = part - float(np.vdot(mu, mu).real)
            if mean_cross is not None:
                part = part - 2.0 * mean_cross[index] / s
        total += s * s * part
    return np.clip(total, 0.0, None)


def field_sums(row_sum: np.ndarray, squares: np.ndarray, fields) -> dict[str, dict[str, float | complex]]:
    """Per-field sum and sum of squares of the weighted values (same pass as the sketches)."""
    out: dict[str, dict[str, float | complex]] = {}
    for index, field in enumerate(fields):
        total = complex(np.sum(row_sum[field.offset:field.stop]))
        out[field.name] = {"sum": total.real if total.imag == 0 else total,
                           "sum_of_squares": float(np.sum(squares[index]))}
    return out


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
