"""Registry of readers and the one entry point that picks a reader for a path.

Choice order: a glob pattern (``*``, ``?`` or ``[``) goes to the series reader; else the
file's magic bytes (HDF5 signature, numpy magic, a zarr metadata document in a
directory) decide; only when they say nothing does the suffix decide. Every reader's
``guess_can_open`` follows the same rule through :func:`sniff_format`, so a file named
``.npy`` that starts with the HDF5 signature opens as HDF5. A list of two or more paths
is an archive of several runs (:mod:`snaplift.archive.runs`), each entry opened by the
same rule.
"""

from __future__ import annotations

import inspect
import os
from collections.abc import Sequence

from snaplift.archive._base import Reader
from snaplift.errors import ArchiveError, ArchiveFormatError

__all__ = [
    "register_reader",
    "available_readers",
    "open_archive",
    "sniff_format",
    "is_glob",
    "HDF5_SIGNATURE",
    "NUMPY_MAGIC",
]

#: the 8-byte HDF5 superblock signature (HDF5 file format specification, section II.A)
HDF5_SIGNATURE = b"\x89HDF\r\n\x1a\n"
#: the first 6 bytes of a .npy file (numpy NEP 1, "A simple file format for NumPy arrays")
NUMPY_MAGIC = b"\x93NUMPY"
#: netCDF classic / 64-bit offset files: recognised only to say they are not supported
NETCDF3_MAGIC = b"CDF"

_READERS: dict[str, type[Reader]] = {}
_ALIASES = {"netcdf": "hdf5", "netcdf4": "hdf5", "nc": "hdf5", "h5": "hdf5", "zarr2": "zarr",
            "zarr3": "zarr", "glob": "series"}


def is_glob(path: str) -> bool:
    """True if ``path`` is a glob pattern rather than one file name."""
    return any(ch in str(path) for ch in "*?[")


def sniff_format(path: str) -> str | None:
    """``"hdf5"``, ``"npy"``, ``"zarr"``, ``"netcdf3"`` from content, or None.

    HDF5 allows the superblock at byte 0, 512, 1024, ... (a user block before it); the
    first few candidate offsets are checked.
    """
    path = str(path)
    if os.path.isdir(path):
        for name in ("zarr.json", ".zgroup", ".zarray"):
            if os.path.isfile(os.path.join(path, name)):
                return "zarr"
        return None
    try:
        with open(path, "rb") as handle:
            head = handle.read(8)
            if head.startswith(NUMPY_MAGIC):
                return "npy"
            if head == HDF5_SIGNATURE:
                return "hdf5"
            if head.startswith(NETCDF3_MAGIC) and len(head) > 3 and head[3] in (1, 2, 5):
                return "netcdf3"
            for offset in (512, 1024, 2048, 4096):
                handle.seek(offset)
                if handle.read(8) == HDF5_SIGNATURE:
                    return "hdf5"
    except OSError:
        return None
    return None


def register_reader(cls: type[Reader]) -> type[Reader]:
    """Add a reader class to the registry (usable as a class decorator).

    Registering the same class again is a no-op; another class under a name already
    taken is an error.
    """
    if not (isinstance(cls, type) and issubclass(cls, Reader)) or not cls.format_name:
        raise ArchiveError(
            f"register_reader needs a Reader subclass with a format_name, got {cls!r}"
        )
    present = _READERS.get(cls.format_name)
    if present is not None and present is not cls:
        if (present.__module__, present.__qualname__) != (cls.__module__, cls.__qualname__):
            raise ArchiveError(
                f"archive format '{cls.format_name}' is already registered by "
                f"{present.__module__}.{present.__qualname__}"
            )
    _READERS[cls.format_name] = cls
    return cls


def available_readers() -> dict[str, type[Reader]]:
    """Registered readers by format name, in the order they are tried."""
    return dict(_READERS)


def _guess(path: str) -> type[Reader] | None:
    if is_glob(path):
        series = _READERS.get("series")
        return series if series is not None and series.guess_can_open(path) else None
    for cls in _READERS.values():
        if cls.format_name != "series" and cls.guess_can_open(path):
            return cls
    return None


def _paths_of_runs(paths: list[object] | tuple[object, ...]) -> list[str]:
    """The members of a several-run archive as strings, checked: no empties, no repeats."""
    if not paths:
        raise ArchiveError("an archive given as a list needs at least one path; got an empty list")
    seen: dict[str, int] = {}
    out = []
    for position, item in enumerate(paths):
        if not isinstance(item, str | os.PathLike):
            raise ArchiveError(
                f"archive path {position} of the list must be a file name, got "
                f"{type(item).__name__} {item!r}"
            )
        member = os.fspath(item)
        key = os.path.normpath(os.path.abspath(member))
        if key in seen:
            raise ArchiveError(
                f"archive file {member} is listed twice (positions {seen[key]} and {position}); "
                "each file of the list is one run"
            )
        seen[key] = position
        out.append(member)
    return out


def open_archive(
    path: str | os.PathLike[str] | Sequence[str | os.PathLike[str]],
    *,
    format: str | None = None,
    fields: Sequence[str] | None = None,
    time: str | None = None,
    missing_chunks: str | None = None,
) -> Reader:
    """Return a reader for ``path`` (a file, a zarr directory, a glob pattern or a list).

    Parameters
    ----------
    path
        HDF5/netCDF-4 file, zarr v2/v3 store, ``.npy`` file, or a glob pattern of
        per-snapshot files (``"run/frame_*.h5"``). A list (or tuple) of two or more of
        them is an archive of several runs, one per entry, read as one archive by
        :class:`snaplift.archive.runs.RunsReader`; a list of one opens that entry.
    format
        Skip guessing and use this reader (see :func:`available_readers`; ``netcdf4``
        is an alias of ``hdf5``). For a list: the reader of every entry.
    fields
        Datasets to treat as snapshot fields instead of the reader's own rule (for a
        single ``.npy`` or a ``.npy`` series: the one field's name).
    time
        The variable holding snapshot times, where the reader cannot tell.
    missing_chunks
        zarr only: ``"fill"`` reads chunks absent from the store as the array's fill
        value (default: an error naming the chunk).

    Returns
    -------
    Reader
        A picklable descriptor; nothing is opened until it is used.

    Examples
    --------
    >>> reader = open_archive("wake.h5")                      # doctest: +SKIP
    >>> reader.describe().fields["u"].shape                   # doctest: +SKIP
    (400, 96, 64)
    >>> open_archive(["case_a.h5", "case_b.h5"]).run_lengths()  # doctest: +SKIP
    array([400, 350])
    """
    if isinstance(path, list | tuple):
        members = _paths_of_runs(path)
        if len(members) > 1:
            from snaplift.archive.runs import RunsReader  # runs.py opens its members here

            if missing_chunks is not None:
                raise ArchiveError("archive.missing_chunks applies to a single zarr store, not to a list of runs")
            return RunsReader(members, format=format, fields=fields, time=time)
        path = members[0]
    if not isinstance(path, str | os.PathLike):
        raise ArchiveError(
            "archive path must be a file name or a list of them, got "
            f"{type(path).__name__} {path!r}"
        )
    path = os.fspath(path)
    if format is not None:
        name = _ALIASES.get(format.lower(), format.lower())
        cls = _READERS.get(name)
        if cls is None:
            raise ArchiveFormatError(
                f"unknown archive format '{format}' for {path}; "
                f"formats available: {', '.join(_READERS)}"
            )
    else:
        if not is_glob(path) and not os.path.exists(path):
            raise ArchiveError(f"archive not found: {path} (no such file or directory)")
        cls = _guess(path)
        if cls is None:
            found = sniff_format(path) if not is_glob(path) else None
            hint = ""
            if found == "netcdf3":
                hint = " (netCDF-3 classic files are not supported: convert with nccopy -k nc4)"
            elif os.path.isdir(path):
                hint = (
                    " (a directory is read only as a zarr store; for per-snapshot files "
                    "pass a glob such as DIR/*.h5)"
                )
            raise ArchiveFormatError(
                f"cannot open {path}: no reader recognises it{hint}; "
                f"formats tried: {', '.join(_READERS)}"
            )
    options: dict[str, object] = {}
    if fields is not None:
        options["fields"] = tuple(fields)
    if time is not None:
        options["time"] = time
    if missing_chunks is not None:
        options["missing_chunks"] = missing_chunks
    accepted = inspect.signature(cls).parameters
    for key in options:
        if key not in accepted:
            raise ArchiveError(
                f"option '{key}' does not apply to {cls.format_name} archives ({path})"
            )
    return cls(path, **options)  # type: ignore[arg-type]
