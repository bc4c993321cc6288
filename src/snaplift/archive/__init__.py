"""Archive readers, scan and tile planner: the first stage of the pipeline.

Importing this package registers the built-in readers (HDF5/netCDF-4, zarr v2/v3,
``.npy`` and series of per-snapshot files); :func:`open_archive` picks one for a path
(and reads a list of paths, one run each, as one archive: :class:`RunsReader`).
"""

from __future__ import annotations

from snaplift.archive._base import ArchiveInfo, FieldInfo, Reader, VariableInfo
from snaplift.archive._registry import available_readers, open_archive, register_reader

# importing a reader module registers it; the order here is the order of guessing
from snaplift.archive import hdf5 as _hdf5  # noqa: E402,F401  isort: skip
from snaplift.archive import zarrstore as _zarrstore  # noqa: E402,F401  isort: skip
from snaplift.archive import npy as _npy  # noqa: E402,F401  isort: skip
from snaplift.archive import series as _series  # noqa: E402,F401  isort: skip
from snaplift.archive.plan import Tile, TilePlan, plan_tiles  # noqa: E402
from snaplift.archive.runs import (  # noqa: E402
    RunsReader,
    run_lengths_from_labels,
    selected_run_lengths,
)
from snaplift.archive.scan import (  # noqa: E402
    ScanReport,
    TimeSpacing,
    check_times,
    scan_archive,
    snapshot_times,
)

__all__ = [
    "open_archive",
    "register_reader",
    "available_readers",
    "Reader",
    "FieldInfo",
    "VariableInfo",
    "ArchiveInfo",
    "scan_archive",
    "ScanReport",
    "plan_tiles",
    "TilePlan",
    "Tile",
    "check_times",
    "TimeSpacing",
    "snapshot_times",
    "RunsReader",
    "run_lengths_from_labels",
    "selected_run_lengths",
]
