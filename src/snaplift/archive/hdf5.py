"""HDF5 files, including netCDF-4 files (which are HDF5 files with CF attributes).

Fields are datasets stored snapshot axis first; nested groups give ``"group/name"``.
Which datasets are fields follows :func:`snaplift.archive._common.classify`: the
snapshot count comes from a time variable (CF ``axis="T"``, ``standard_name="time"``,
``units="... since ..."``, or a dataset named ``t``/``time``), else from the most
common leading length of the datasets with 2 or more dimensions. netCDF dimension
scales (coordinate variables) are variables; netCDF's data-less dimension helpers
(``NAME = "This is a netCDF dimension but not a netCDF variable ..."``) hold no values
and are left out.

CF decoding (scale_factor/add_offset, _FillValue/missing_value -> NaN, time units) is
described in :mod:`snaplift.archive._cf`. Complex data stored as an HDF5 compound of
``r``/``i`` members (h5py's and netCDF's convention) is read as complex128.
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

__all__ = ["HDF5Reader", "hdf5_candidates"]

_NETCDF_HELPER = b"This is a netCDF dimension but not a netCDF variable"


def _raw_attr(obj: Any, key: str) -> Any:
    try:
        return obj.attrs.get(key)
    except Exception:  # an attribute of a type h5py cannot read is simply absent here
        return None


def _as_bytes(value: Any) -> bytes:
    if isinstance(value, bytes | np.bytes_):
        return bytes(value)
    if isinstance(value, str):
        return value.encode()
    return b""


def hdf5_candidates(root: Any) -> list[Candidate]:
    """Every dataset under ``root`` as a :class:`Candidate` (netCDF helpers left out)."""
    import h5py

    found: list[Candidate] = []

    def visit(name: str, obj: Any) -> None:
        if not isinstance(obj, h5py.Dataset) or obj.shape is None:
            return
        is_scale = _as_bytes(_raw_attr(obj, "CLASS")) == b"DIMENSION_SCALE"
        if is_scale and _as_bytes(_raw_attr(obj, "NAME")).startswith(_NETCDF_HELPER):
            return
        storage: dict[str, Any] = {"storage": "chunked" if obj.chunks else "contiguous"}
        if obj.compression:
            storage["compression"] = str(obj.compression)
        found.append(
            Candidate(
                name=name,
                shape=tuple(int(s) for s in obj.shape),
                dtype=np.dtype(obj.dtype),
                attrs=plain_attrs(obj.attrs),
                is_dimension_scale=is_scale,
                chunks=None if obj.chunks is None else tuple(int(c) for c in obj.chunks),
                storage=storage,
            )
        )

    root.visititems(visit)
    return found


class HDF5Reader(GroupedReader):
    """Read snapshot fields from an HDF5 or netCDF-4 file, read-only.

    Parameters
    ----------
    path
        The file.
    fields
        Dataset paths to treat as fields (default: the classification rule above).
    time
        Dataset path of the snapshot times (default: detected).

    Examples
    --------
    >>> reader = HDF5Reader("wake.h5")                          # doctest: +SKIP
    >>> reader.read_tile("u", slice(0, 100), slice(0, 8)).shape  # doctest: +SKIP
    (100, 8)
    """

    format_name = "hdf5"
    suffixes = (".h5", ".hdf5", ".hdf", ".he5", ".nc", ".nc4", ".netcdf")

    @classmethod
    def guess_can_open(cls, path: str) -> bool:
        found = sniff_format(path)
        if found is not None:
            return found == "hdf5"
        return os.path.isfile(path) and str(path).lower().endswith(cls.suffixes)

    def _root(self) -> Any:
        return _handles.hdf5_file(self.path)

    def _array(self, root: Any, key: str) -> Any:
        return root[key]

    def _candidates(self, root: Any) -> list[Candidate]:
        return hdf5_candidates(root)

    def _format(self, root: Any) -> str:
        return "netcdf4" if "_NCProperties" in root.attrs else self.format_name

    def _root_attrs(self, root: Any) -> dict[str, Any]:
        return plain_attrs(root.attrs)

    def _size_bytes(self) -> int:
        return int(os.path.getsize(self.path))


register_reader(HDF5Reader)
