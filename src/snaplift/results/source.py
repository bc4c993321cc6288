"""The archive a result store was fitted on, opened again from the store's provenance.

Report and ``forecast --compare`` set the model against the archive. The store records the
archive's resolved path (``attrs['archive']``) and the workflow text (format, time
dataset, fields); from those the same reader is opened, read-only as always. An archive
that has moved or is gone is not an error for the report (it says so and compares with
the projection on the basis instead); ``forecast --compare`` names the path it tried.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import yaml

from snaplift.archive import open_archive
from snaplift.archive._base import Reader
from snaplift.errors import ArchiveError, SnapliftError

__all__ = ["SourceArchive", "open_source", "archive_snapshots"]


@dataclass(frozen=True)
class SourceArchive:
    """A reader of the archive behind a store, and which stored fields come from it as they are."""

    reader: Reader
    fields: tuple[str, ...]  # archive fields (not lifted ones) that have modes
    n_snapshots: int


def _workflow_archive(attrs: dict[str, Any]) -> dict[str, Any]:
    try:
        data = yaml.safe_load(str(attrs.get("workflow") or "")) or {}
    except yaml.YAMLError:
        return {}
    section = data.get("archive") if isinstance(data, dict) else None
    return section if isinstance(section, dict) else {}


def open_source(attrs: dict[str, Any], mode_fields: list[str], lifted: dict[str, Any]) -> SourceArchive:
    """Open the archive named in a store's provenance; raise ``ArchiveError`` if it cannot be.

    ``lifted`` is ``prepare.attrs['lifted']``: lifted fields have no archive values of their own.
    """
    section = _workflow_archive(attrs)
    recorded = attrs.get("archive")
    path: Any = recorded
    if isinstance(section.get("path"), list):
        path = _run_files(str(recorded), [str(p) for p in section["path"]])
    if not path or (isinstance(path, str) and not Path(path).exists() and "*" not in path):
        raise ArchiveError(f"the archive of this result store ({recorded}) is not there any more")
    archive_fields = [f for f in section.get("fields") or [] if isinstance(f, str)]
    try:
        reader = open_archive(path, format=section.get("format"), fields=archive_fields or None,
                              time=section.get("time"))
        info = reader.describe()
    except (SnapliftError, OSError) as error:
        raise ArchiveError(f"the archive of this result store ({recorded}) cannot be opened: {error}") from None
    fields = tuple(f for f in mode_fields if f not in lifted and f in info.fields)
    total = info.fields[fields[0]].n_snapshots if fields else 0
    return SourceArchive(reader, fields, int(total))


def _run_files(recorded: str, listed: list[str]) -> list[str]:
    """The files of a several-run archive: the workflow's list, relative entries resolved
    against the folder the run resolved them from (``recorded`` begins with the first file)."""
    first = recorded.split(" + ", 1)[0]
    base = ""
    if not Path(listed[0]).is_absolute() and first.endswith(listed[0]):
        base = first[: len(first) - len(listed[0])]
    return [p if Path(p).is_absolute() else base + p for p in listed]


def archive_snapshots(source: SourceArchive, field: str, snapshots: np.ndarray,
                      points: np.ndarray | None = None, block: int = 32) -> Iterator[tuple[int, np.ndarray]]:
    """``(position, values)`` of ``field`` at archive snapshots ``snapshots`` (sorted),
    all points (flattened grid) or only ``points``; read a run of snapshots at a time."""
    snapshots = np.asarray(snapshots, dtype=np.int64)
    start = 0
    while start < snapshots.size:
        stop = start
        # contiguous stretch, at most `block` snapshots wide
        while stop + 1 < snapshots.size and snapshots[stop + 1] - snapshots[start] < block:
            stop += 1
        first, last = int(snapshots[start]), int(snapshots[stop])
        if points is None:
            values = source.reader.read_tile(field, slice(None), slice(first, last + 1))  # (points, snapshots)
        else:  # only the span of the requested points (a probe reads little more than its chunk)
            low, high = int(np.min(points)), int(np.max(points)) + 1
            values = source.reader.read_tile(field, slice(low, high), slice(first, last + 1))[np.asarray(points) - low]
        for position in range(start, stop + 1):
            yield position, values[:, int(snapshots[position]) - first]
        start = stop + 1
