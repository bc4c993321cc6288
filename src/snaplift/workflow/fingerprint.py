"""Fingerprints of the archive and of the stages, and how an archive changed since last time.

Archive fingerprint (cheap, taken on every run): the archive's files with their sizes
and modification times, and a SHA-256 of a sample of their bytes (64 KiB at the start,
middle and end of up to 16 files spread over the file list, always the first and the
last). Equal fingerprints mean *unchanged* with no data read.

When the fingerprint differs, the files decide first (:func:`file_changes`), then content
hashes (:func:`classify_archive`). Every run records each file's size and modification
time (up to :data:`FILE_RECORD_LIMIT` files by name; beyond that a set of digests of
name, size and time):

- a file that is gone, shrank, or kept its size while its modification time changed
  (a rewrite in place, e.g. ``f['u'][7] = ...``) makes the archive *changed*: everything
  is recomputed. Sampling cannot prove that a rewritten file is unchanged, so no sample
  is consulted. (zarr metadata files, ``zarr.json``/``.zarray``/``.zattrs``, are
  rewritten when an array grows and are exempt; what they describe is checked through
  the shape and the sampled values.)
- files that only grew, or new files, with more snapshots than before: the *append
  path*. The run records SHA-256 hashes of the decoded values of a sample of *snapshot
  blocks* (stored chunks along the snapshot axis, all points of every requested field;
  a chunk larger than :data:`SAMPLE_BLOCK_BYTES` over as many of its first snapshots as
  fit in that, the last chunk over its last ones): up to :data:`SAMPLE_BLOCKS` blocks
  spread evenly over the archive, always with the first and the last snapshot, fewer if
  their whole chunks would exceed :data:`SAMPLE_FRACTION` of the archive's bytes or
  :data:`SAMPLE_FLOOR_BYTES`, whichever is larger (never fewer than two). An
  uncompressed HDF5 chunk of whole snapshots is read over the sampled snapshots only; a
  compressed one, or one split in space, is read whole. The next run hashes the same
  blocks again: all equal means *grown* (the sketch is extended, or compress
  recomputed), any difference *changed*. The run's output and the store (scan record
  ``verified_blocks``, a warning) say which old blocks were verified and that
  ``--overwrite`` recomputes from every snapshot.
- files that grew without new snapshots (HDF5 grows when attributes are added): *changed*.

Cost, explicitly: at most ``SAMPLE_BLOCKS`` snapshot blocks per run (a time-major archive
with one snapshot per chunk: 8 snapshots), in chunks bounded by 1 % of the archive or 64 MiB
(with 32 snapshots of 2 MiB per chunk: 2 chunks, of which 2 snapshots each, 8 MiB, are read
from uncompressed HDF5, where whole chunks were 128 MiB); they
are read only when the archive grew (and on a first run, to record them). The price of
not reading every old chunk on the append path is that an edit of an old snapshot
*outside* the sample, in a file that also grew, goes unnoticed; the warning says so.
``snaplift run --overwrite`` always recomputes every stage from the archive. Blocks a run
reads again are verified by checksum against the previous result's (the checksums of
every block compress read, kept with its result: :mod:`snaplift.workflow.checksums`), so
a compress that reads the archive again names any old block that differs.

Stage fingerprints chain: ``scan`` hashes the archive section and the archive's content
identity; ``compress`` hashes scan's fingerprint with ``prepare``, ``lift`` and the
``compress`` settings that change results (not ``memory`` or ``checkpoint_every``: the
tiling does not change results, README.md, "compress"); ``fit`` hashes compress's with
``fit``; ``modes`` and ``report`` hash their input's. ``cluster`` and ``output`` never
enter: where a result is computed does not change it. The store layout the archive needs
(:func:`snaplift.results.store.needed_layout`: the current
:data:`~snaplift.results.store.STORE_VERSION`, or an older one when the newer layouts
only add arrays this archive has none of) enters ``scan`` and the compress settings, so a
store written in an older layout that lacks something (units, coordinates, peak
amplitudes; point positions of an archive that has them) is recomputed, not reused.
"""

from __future__ import annotations

import hashlib
import json
import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from snaplift.archive._base import Reader
from snaplift.results import store as result_store
from snaplift.workflow.lift_section import RAW_KINDS
from snaplift.workflow.schema import Workflow, section_fingerprint

__all__ = [
    "NOT_RESULT_KEYS",
    "SAMPLE_BLOCKS",
    "SAMPLE_BLOCK_BYTES",
    "SAMPLE_FRACTION",
    "Classification",
    "archive_fingerprint",
    "block_hashes",
    "classify_archive",
    "file_changes",
    "sample_blocks",
    "stage_fingerprints",
    "verification_note",
    "workflow_identity",
]

SAMPLE_BLOCKS = 8
SAMPLE_FRACTION = 0.01
#: ... but up to this many bytes may always be sampled (small archives get all 8 blocks)
SAMPLE_FLOOR_BYTES = 64 * 2**20
#: a stored chunk larger than this is sampled over its first snapshots only (at least one)
SAMPLE_BLOCK_BYTES = 4 * 2**20
#: archives of up to this many files record each file by name; larger ones a set of digests
FILE_RECORD_LIMIT = 1000
#: zarr metadata files, rewritten in place when an array grows (module docstring)
METADATA_NAMES = frozenset({"zarr.json", ".zarray", ".zattrs", ".zgroup", ".zmetadata"})
_BYTE_SAMPLE = 64 * 1024
_BYTE_SAMPLE_FILES = 16
#: compress settings that do not change the result (tiling and checkpointing only)
NOT_RESULT_KEYS = frozenset({"memory", "checkpoint_every"})


def _archive_files(reader: Reader) -> list[Path]:
    info = reader.describe()
    if info.files:
        # a zarr store (or a run of one) is listed as its folder: fingerprint the files in it
        out: list[Path] = []
        for entry in map(Path, info.files):
            out.extend(sorted(p for p in entry.rglob("*") if p.is_file()) if entry.is_dir() else [entry])
        return out
    root = Path(reader.path)
    if root.is_file():
        return [root]
    if root.is_dir():
        return sorted(p for p in root.rglob("*") if p.is_file())
    return []


def _sample_bytes(path: Path, size: int) -> bytes:
    offsets = sorted({0, max(0, size // 2 - _BYTE_SAMPLE // 2), max(0, size - _BYTE_SAMPLE)})
    out = b""
    with open(path, "rb") as handle:
        for offset in offsets:
            handle.seek(offset)
            out += handle.read(_BYTE_SAMPLE)
    return out


def archive_fingerprint(reader: Reader) -> dict[str, Any]:
    """Files, sizes, mtimes and a hash of a byte sample; ``fingerprint`` summarises them.

    Example
    -------
    >>> archive_fingerprint(reader)["fingerprint"]  # doctest: +SKIP
    '3f9a0c1d2e4b5a67'
    """
    files = _archive_files(reader)
    root = Path(reader.path)
    listing = hashlib.sha256()
    sample = hashlib.sha256()
    total = 0
    sampled = 0
    stats = []
    for path in files:
        stat = path.stat()
        name = str(path.relative_to(root)) if root.is_dir() and path.is_relative_to(root) else str(path)
        stats.append((name, stat.st_size, stat.st_mtime_ns))
        total += stat.st_size
    listing.update(json.dumps(stats).encode())
    if files:
        step = max(1, len(files) // _BYTE_SAMPLE_FILES)
        chosen = sorted({0, len(files) - 1, *range(0, len(files), step)})[: _BYTE_SAMPLE_FILES + 2]
        for index in chosen:
            data = _sample_bytes(files[index], stats[index][1])
            sample.update(data)
            sampled += len(data)
    info = reader.describe()
    counts = {name: f.n_snapshots for name, f in info.fields.items()}
    summary = section_fingerprint(listing.hexdigest(), sample.hexdigest())
    if len(stats) <= FILE_RECORD_LIMIT:
        record: dict[str, Any] = {"names": [s[0] for s in stats], "sizes": [int(s[1]) for s in stats],
                                  "mtimes": [int(s[2]) for s in stats]}
    else:
        record = {"digests": sorted(_stat_digest(*s) for s in stats)}
    return {"path": str(reader.path), "files": len(files), "bytes": int(total), "listing": listing.hexdigest()[:16],
            "byte_sample": sample.hexdigest()[:16], "bytes_sampled": int(sampled), "n_snapshots": counts,
            "fingerprint": summary, "file_record": record}


def _stat_digest(name: str, size: int, mtime: int) -> str:
    return hashlib.sha256(json.dumps([name, int(size), int(mtime)]).encode()).hexdigest()[:16]


def file_changes(old: dict[str, Any], now: dict[str, Any]) -> str | None:
    """Why the archive's files were changed (not only grown) since ``old``; None if they only grew.

    ``old`` and ``now`` are :func:`archive_fingerprint` results. A file gone, shrunk, or of
    the same size with another modification time is a change (module docstring).

    Example
    -------
    >>> file_changes({"file_record": {"names": ["a.h5"], "sizes": [10], "mtimes": [1]}},
    ...              {"file_record": {"names": ["a.h5"], "sizes": [10], "mtimes": [2]}})
    'a.h5 was rewritten in place (same size, modification time changed)'
    """
    before, after = old.get("file_record"), now.get("file_record") or {}
    if not before:
        return "the previous result recorded no file sizes and times"
    if "digests" in before:
        present = set(after["digests"]) if "digests" in after else {
            _stat_digest(*entry) for entry in zip(after["names"], after["sizes"], after["mtimes"])}
        lost = len(set(before["digests"]) - present)
        if lost:
            return f"{lost} of the archive's {len(before['digests'])} files were changed, removed or grew"
        return None
    current = {name: (size, mtime) for name, size, mtime in zip(after.get("names", []), after.get("sizes", []),
                                                              after.get("mtimes", []))}
    for name, size, mtime in zip(before["names"], before["sizes"], before["mtimes"]):
        if name not in current:
            return f"{name} was removed"
        new_size, new_mtime = current[name]
        if new_size < size:
            return f"{name} shrank from {size} to {new_size} bytes"
        if new_size == size and new_mtime != mtime and Path(name).name not in METADATA_NAMES:
            return f"{name} was rewritten in place (same size, modification time changed)"
    return None


def sample_blocks(n_snapshots: int, chunk: int, block_bytes: int, archive_bytes: int) -> list[tuple[int, int]]:
    """The snapshot blocks whose content is hashed (module docstring).

    ``block_bytes`` are the bytes of one stored chunk along the snapshot axis (``chunk``
    snapshots of every sampled field). How many chunks are sampled is counted in whole
    chunks, since a compressed chunk, or one read through HDF5's chunk cache, is read whole
    for any part of it; a chunk of more than :data:`SAMPLE_BLOCK_BYTES` is sampled over its
    first snapshots only (the last over its last), as many as fit in
    :data:`SAMPLE_BLOCK_BYTES`, at least one, so that where a part can be read alone
    (uncompressed HDF5 or zarr, whatever the chunk shape: positioned reads of the part's
    runs) only that part is.

    Example
    -------
    >>> sample_blocks(1024, 32, 32 * 2**21, 1024 * 2**21)  # 32 snapshots of 2 MiB per chunk
    [(0, 2), (1022, 1024)]
    >>> sample_blocks(1024, 1, 2**21, 1024 * 2**21)  # one snapshot of 2 MiB per chunk
    [(0, 1), (146, 147), (292, 293), (438, 439), (585, 586), (731, 732), (877, 878), (1023, 1024)]
    """
    chunk = max(1, int(chunk))
    n_snapshots = int(n_snapshots)
    n_blocks = max(1, -(-n_snapshots // chunk))
    snapshot_bytes = max(1, int(block_bytes) // chunk)
    width = chunk if snapshot_bytes * chunk <= SAMPLE_BLOCK_BYTES else max(1, SAMPLE_BLOCK_BYTES // snapshot_bytes)
    budget = max(2, int(max(SAMPLE_FRACTION * archive_bytes, SAMPLE_FLOOR_BYTES) // max(1, int(block_bytes))))
    count = min(SAMPLE_BLOCKS, n_blocks, budget)
    picks = sorted({int(round(i)) for i in np.linspace(0, n_blocks - 1, max(count, 1))})
    blocks = [(p * chunk, min(p * chunk + width, n_snapshots)) for p in picks]
    # the last block ends at the last snapshot (a partial chunk is hashed over the snapshots present)
    last = (max(picks[-1] * chunk, n_snapshots - width), n_snapshots)
    if len(blocks) == 1:
        # one chunk: its first and its last snapshots, one block where they meet
        return [blocks[0], last] if last[0] >= blocks[0][1] else [(blocks[0][0], n_snapshots)]
    blocks[-1] = last
    return blocks


def block_hashes(reader: Reader, fields: list[str], blocks: list[tuple[int, int]]) -> tuple[list[str], int]:
    """SHA-256 of the decoded values of every field in each block; and the bytes read."""
    info = reader.describe()
    hashes = []
    read = 0
    for start, stop in blocks:
        digest = hashlib.sha256()
        for name in fields:
            f = info.fields[name]
            values = np.ascontiguousarray(reader.read_tile(name, slice(0, f.n_points), slice(start, stop)))
            digest.update(name.encode())
            digest.update(values.tobytes())
            read += f.n_points * (stop - start) * np.dtype(f.stored_dtype).itemsize
        hashes.append(digest.hexdigest()[:32])
    return hashes, read


@dataclass(frozen=True)
class Classification:
    """How the archive relates to the one the previous result was computed from."""

    state: str  # "new", "unchanged", "grown", "changed"
    reason: str
    identity: str  # content identity that enters the scan fingerprint
    samples: dict[str, Any] = field(default_factory=dict)  # block sample to record for next time
    bytes_read: int = 0
    old_snapshots: int | None = None
    #: old snapshot blocks ``(start, stop)`` whose content was verified (grown archives)
    verified: tuple[tuple[int, int], ...] = ()


def _sample_for(reader: Reader, fields: list[str], chunk: int) -> tuple[dict[str, Any], int]:
    info = reader.describe()
    n = info.fields[fields[0]].n_snapshots
    block_bytes = sum(info.fields[f].n_points * chunk * np.dtype(info.fields[f].stored_dtype).itemsize for f in fields)
    archive_bytes = sum(info.fields[f].n_points * n * np.dtype(info.fields[f].stored_dtype).itemsize for f in fields)
    blocks = sample_blocks(n, chunk, block_bytes, archive_bytes)
    hashes, read = block_hashes(reader, fields, blocks)
    return {"chunk": chunk, "n_snapshots": n, "blocks": [[a, b, h] for (a, b), h in zip(blocks, hashes)]}, read


def classify_archive(reader: Reader, fields: list[str], chunk: int, current: dict[str, Any],
                     previous: dict[str, Any] | None) -> Classification:
    """Compare the archive now (``current`` fingerprint) with the previous run's record.

    ``previous`` is the previous scan record: ``{"archive": fingerprint, "samples": ...,
    "identity": ...}`` or None for a first run.
    """
    if not previous or "archive" not in previous:
        samples, read = _sample_for(reader, fields, chunk)
        return Classification("new", "no previous result", current["fingerprint"], samples, read)
    old = previous["archive"]
    old_samples = previous.get("samples") or {}
    if old.get("fingerprint") == current["fingerprint"] and old.get("n_snapshots") == current["n_snapshots"]:
        return Classification("unchanged", "same files, sizes, times and byte sample", previous["identity"],
                              old_samples, 0)
    n_old = int(old_samples.get("n_snapshots", -1))
    n_now = reader.describe().fields[fields[0]].n_snapshots
    blocks = [(int(a), int(b)) for a, b, _ in old_samples.get("blocks", [])]
    changed = file_changes(old, current)
    if changed is None and n_now == n_old:
        changed = "the files changed but hold no new snapshots"
    elif changed is None and n_now < n_old:
        changed = "fewer snapshots than before"
    elif changed is None and not blocks:
        changed = "no content sample from the previous run"
    if changed is not None:
        samples, read = _sample_for(reader, fields, chunk)
        return Classification("changed", f"{changed}; every stage is recomputed", current["fingerprint"],
                              samples, read, n_old)
    hashes, read = block_hashes(reader, fields, blocks)
    differing = [blocks[i] for i, (h, (_, _, old_h)) in enumerate(zip(hashes, old_samples["blocks"])) if h != old_h]
    if differing:
        samples, more = _sample_for(reader, fields, chunk)
        a, b = differing[0]
        return Classification("changed", f"snapshots {a}..{b - 1} differ from the previous run's "
                              f"({len(differing)} of {len(blocks)} sampled blocks)", current["fingerprint"],
                              samples, read + more, n_old)
    samples, more = _sample_for(reader, fields, chunk)
    return Classification("grown", f"{n_now - n_old} snapshot(s) added after {n_old}; all {len(blocks)} "
                          "sampled old blocks identical", current["fingerprint"], samples, read + more, n_old,
                          verified=tuple(blocks))


def verification_note(classification: Classification) -> str:
    """What a grown archive's run verified of the old snapshots, and how to force a full recompute."""
    spans = ", ".join(f"{a}..{b - 1}" for a, b in classification.verified)
    return (f"archive grew: of the {classification.old_snapshots} old snapshots only the sampled blocks "
            f"{spans} were verified unchanged; a rewrite of other old snapshots is not detected; "
            "run with --overwrite to recompute everything from the archive")


def workflow_identity(workflow: Workflow, archive_path: str) -> str:
    """What makes a store 'of this workflow': the archive it reduces and the fields."""
    paths = ([os.path.abspath(p) for p in archive_path] if isinstance(archive_path, list)
             else os.path.abspath(archive_path))
    return section_fingerprint("identity", paths, list(workflow.archive.fields))


def stage_fingerprints(workflow: Workflow, archive_identity: str,
                       layout_version: int = result_store.STORE_VERSION) -> dict[str, str]:
    """Fingerprint of every stage (module docstring); ``layout_version``: the store layout the
    archive needs (:func:`snaplift.results.store.needed_layout`)."""
    compress = {k: v for k, v in workflow.compress.model_dump(mode="json").items() if k not in NOT_RESULT_KEYS}
    # raw-field lifting changes the matrix compress reads; a state dictionary only the fit
    raw = [e.model_dump(mode="json") for e in workflow.lift if e.kind in RAW_KINDS]
    states = [e.model_dump(mode="json") for e in workflow.lift if e.kind not in RAW_KINDS]
    # the store's layout: a store written in another layout is recomputed, not reused
    layout = {"store_version": int(layout_version)}
    scan = section_fingerprint("scan", workflow.archive, archive_identity, layout)
    compressed = section_fingerprint("compress", scan, workflow.prepare, raw, compress)
    fit = section_fingerprint("fit", compressed, workflow.fit, states)
    modes = section_fingerprint("modes", fit)
    report = section_fingerprint("report", modes)
    # the compress settings without the archive's content: equal for a grown archive whose
    # stored sketch may be extended (snaplift.workflow.append)
    settings = section_fingerprint("compress-settings", workflow.archive, workflow.prepare, raw, compress, layout)
    return {"scan": scan, "compress": compressed, "fit": fit, "modes": modes, "report": report,
            "compress_settings": settings}
