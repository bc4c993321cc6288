"""A stored compress basis read back lazily, a few basis vectors at a time, without dask.

The store keeps each field's basis in physical units, one basis vector per chunk
(``basis/<field>``, shape ``(rank, *grid)``). The modes stage needs the *prepared* rows
(masked points dropped, times ``sqrt(w) / scale``, non-finite values as zero) of one field
at a time. Reading them through a dask graph cost more than the reading itself (importing
dask.array ~0.5 s, ~10 ms of scheduling per graph: 0.6-1.7 s for rank 40 on 262144 points
against 0.3 s to read and decode the vectors); here each group of vectors is one zarr read
and three numpy operations, with temporaries of about three groups.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

__all__ = ["StoredBasis", "StoredFieldBasis"]

#: bytes of prepared basis vectors read at once (one zarr read of whole chunks)
GROUP_BYTES = 32 * 2**20


@dataclass(frozen=True)
class StoredFieldBasis:
    """One field's prepared basis rows (``n_rows x rank``), read on demand."""

    array: Any  # zarr array (rank, *grid), physical units
    keep: np.ndarray | None  # flat indices of the points kept (mask), None: all
    factor: Any  # sqrt(w) / scale per kept point, or a scalar
    n_rows: int

    @property
    def rank(self) -> int:
        return int(self.array.shape[0])

    @property
    def shape(self) -> tuple[int, int]:
        return (self.n_rows, self.rank)

    @property
    def dtype(self) -> np.dtype:
        return np.dtype(self.array.dtype)

    @property
    def nbytes(self) -> int:
        return self.n_rows * self.rank * self.dtype.itemsize

    def columns(self, c0: int, c1: int) -> np.ndarray:
        """Basis vectors ``c0:c1`` as prepared rows, shape ``(n_rows, c1 - c0)``."""
        physical = np.asarray(self.array[c0:c1]).reshape(c1 - c0, -1)
        kept = physical if self.keep is None else physical[:, self.keep]
        prepared = kept * self.factor
        prepared[~np.isfinite(kept)] = 0.0
        return prepared.T

    def __array__(self, dtype: Any = None, copy: Any = None) -> np.ndarray:
        out = np.empty(self.shape, dtype=self.dtype, order="F")
        group = max(1, GROUP_BYTES // max(1, self.n_rows * self.dtype.itemsize))
        for c0 in range(0, self.rank, group):
            c1 = min(c0 + group, self.rank)
            out[:, c0:c1] = self.columns(c0, c1)
        return out if dtype is None else out.astype(dtype, copy=False)


class StoredBasis:
    """The fields' prepared bases stacked in row order (the ``basis`` of a loaded result).

    Slicing the rows of exactly one field gives its :class:`StoredFieldBasis`; any other
    slice (or ``np.asarray``) reads the rows it covers.
    """

    def __init__(self, fields: list[StoredFieldBasis]) -> None:
        self.fields = fields
        self.offsets = np.concatenate(([0], np.cumsum([f.n_rows for f in fields]))).astype(int)
        self.dtype = np.result_type(*[f.dtype for f in fields]) if fields else np.dtype(np.float64)
        self.shape = (int(self.offsets[-1]), fields[0].rank if fields else 0)
        self.nbytes = self.shape[0] * self.shape[1] * self.dtype.itemsize

    def __getitem__(self, key: Any) -> Any:
        if isinstance(key, slice) and key.step in (None, 1):
            start, stop, _ = key.indices(self.shape[0])
            for index, field in enumerate(self.fields):
                if start == self.offsets[index] and stop == self.offsets[index + 1]:
                    return field
        return np.asarray(self)[key]

    def __array__(self, dtype: Any = None, copy: Any = None) -> np.ndarray:
        out = np.concatenate([np.asarray(f) for f in self.fields], axis=0) if self.fields else np.empty(self.shape)
        return out if dtype is None else out.astype(dtype, copy=False)
