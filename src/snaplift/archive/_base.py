"""The contract every archive reader fulfils.

A reader is a small, picklable *descriptor*: it holds the path and its explicit options
and nothing else. Task graphs carry readers, never open files; each worker process opens
files lazily through :mod:`snaplift.archive._handles`, which keeps a small per-process
cache of read-only handles. Input files are never opened for writing.

Orientation: a *field* is stored with the snapshot axis first, ``(snapshot, *grid)``.
The snapshot matrix ``X`` (points x snapshots) is the transpose of a field flattened in
C order over its grid, so ``read_tile`` returns ``(points, snapshots)`` blocks.
"""

from __future__ import annotations

import abc
from dataclasses import dataclass, field
from typing import Any, ClassVar

import numpy as np

__all__ = ["FieldInfo", "VariableInfo", "ArchiveInfo", "Reader"]


@dataclass(frozen=True)
class FieldInfo:
    """A snapshot field: ``shape == (n_snapshots, *grid)``.

    ``chunks`` is the stored chunk shape in the same axis order (``None`` for contiguous
    storage or one file per snapshot, in which case ``snapshot_chunk`` is 1 or the whole
    length); ``stored_dtype`` is the dtype on disk, ``dtype`` the dtype ``read_tile``
    returns after decoding (float64 or complex128: accumulation is always double).
    """

    name: str
    shape: tuple[int, ...]
    stored_dtype: np.dtype
    dtype: np.dtype
    chunks: tuple[int, ...] | None
    attrs: dict[str, Any] = field(default_factory=dict)
    nbytes: int = 0
    #: per grid axis, the archive variable (1-D) holding its coordinate, or None
    coordinates: tuple[str | None, ...] = ()

    @property
    def n_snapshots(self) -> int:
        return int(self.shape[0])

    @property
    def grid(self) -> tuple[int, ...]:
        return tuple(int(s) for s in self.shape[1:])

    @property
    def n_points(self) -> int:
        return int(np.prod(self.grid, dtype=np.int64))

    @property
    def snapshot_chunk(self) -> int:
        """Snapshots per stored chunk along the snapshot axis."""
        return int(self.chunks[0]) if self.chunks else int(self.shape[0])


@dataclass(frozen=True)
class VariableInfo:
    """A dataset without a snapshot axis role: times, coordinates, weights, masks."""

    name: str
    shape: tuple[int, ...]
    dtype: np.dtype
    attrs: dict[str, Any] = field(default_factory=dict)


@dataclass(frozen=True)
class ArchiveInfo:
    """What ``describe()`` reports: everything scan and the planner need, no data."""

    path: str
    format: str
    fields: dict[str, FieldInfo]
    variables: dict[str, VariableInfo]
    size_bytes: int
    files: tuple[str, ...] = ()
    attrs: dict[str, Any] = field(default_factory=dict)


class Reader(abc.ABC):
    """One archive format. Subclasses are registered in :mod:`snaplift.archive._registry`.

    Constructor arguments are explicit keywords (no ``**kwargs``) and must be picklable.
    Every method reopens through the per-process handle cache, so a reader can be sent
    to any worker.
    """

    #: short format name shown by scan (``"hdf5"``, ``"zarr"`` ...)
    format_name: ClassVar[str] = ""
    #: file suffixes recognised when magic bytes do not decide
    suffixes: ClassVar[tuple[str, ...]] = ()

    def __init__(self, path: str) -> None:
        self.path = str(path)

    def __repr__(self) -> str:
        return f"{type(self).__name__}({self.path!r})"

    def __eq__(self, other: object) -> bool:
        return type(self) is type(other) and vars(self) == vars(other)

    def __hash__(self) -> int:
        return hash((type(self).__name__, self.path))

    @classmethod
    @abc.abstractmethod
    def guess_can_open(cls, path: str) -> bool:
        """True if this reader recognises ``path`` (magic bytes first, then suffix)."""

    @abc.abstractmethod
    def describe(self) -> ArchiveInfo:
        """Fields (snapshot axis first), other variables, chunking, size on disk."""

    @abc.abstractmethod
    def read_tile(self, field: str, points: slice, snapshots: slice) -> np.ndarray:
        """Return ``X[points, snapshots]`` of one field as float64/complex128.

        ``points`` indexes the field's grid flattened in C order, ``snapshots`` the
        snapshot axis; both are slices with step 1 (or None bounds). CF decoding
        (scale_factor/add_offset) is applied and fill values become NaN.
        """

    @abc.abstractmethod
    def read_variable(self, name: str) -> np.ndarray:
        """Read a whole non-snapshot dataset (times, coordinates, weights, mask).

        Time variables with CF ``units`` like ``"seconds since ..."`` are returned in
        the unit named before ``since`` as float64.
        """
