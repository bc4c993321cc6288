"""zarr v2 and v3 stores (a group of arrays, or a single array), opened read-only.

Fields and variables follow the same rule as HDF5 (:func:`snaplift.archive._common.classify`)
and the same CF decoding when the attrs carry it (xarray writes ``scale_factor``,
``add_offset`` and ``_FillValue`` as attrs). The array's own zarr ``fill_value`` only
names the value of unwritten chunks and is not treated as missing data.

Chunks are the array's (inner) chunk shape; for a sharded v3 array the shard shape is
reported in ``FieldInfo.attrs["shards"]``.
"""

from __future__ import annotations

import os
from typing import Any

import numpy as np

from snaplift.archive import _handles
from snaplift.archive._cf import plain_attrs
from snaplift.archive._common import Candidate
from snaplift.archive._grouped import GroupedReader
from snaplift.archive._registry import register_reader, sniff_format

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
    )


def _stem(path: str) -> str:
    base = os.path.basename(os.path.normpath(path))
    for suffix in (".zarr", ".zr"):
        if base.lower().endswith(suffix):
            return base[: -len(suffix)] or "x"
    return base or "x"


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

    def _root(self) -> Any:
        return _handles.zarr_node(self.path)

    def _is_array(self, root: Any) -> bool:
        import zarr

        return isinstance(root, zarr.Array)

    def _array(self, root: Any, key: str) -> Any:
        return root if self._is_array(root) else root[key]

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
